"""Error classes of dka-cohort.

Every error the toolkit raises on purpose derives from :class:`CohortError`; the command line
turns them into a one-line message and exit code 2. Messages say what was expected, what was
found and how to fix it.
"""

from __future__ import annotations

__all__ = ["CohortError", "SchemaError", "DefinitionError", "DisclosureError", "InputError"]


class CohortError(Exception):
    """Base class of every error dka-cohort raises on purpose."""


class SchemaError(CohortError):
    """An extract is missing a table or column, or a column has the wrong type."""


class DefinitionError(CohortError):
    """A definition file or option value is invalid."""


class DisclosureError(CohortError):
    """An output would break the disclosure rule (small counts)."""


class InputError(CohortError):
    """A command-line argument or function argument is invalid (bad number, unwritable folder)."""


class ExtractWarning(UserWarning):
    """The extract can be read but something in it deserves a look (an empty measurement table)."""
