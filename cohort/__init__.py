"""dka-cohort: diabetic ketoacidosis episodes from OMOP CDM extracts.

The public face of the package. Stages of the data flow live in their own modules
(source -> sql recipes -> features -> stats -> report); this module re-exports what users call.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

from cohort._errors import CohortError, DefinitionError, DisclosureError, InputError, SchemaError

try:
    __version__ = version("dka-cohort")
except PackageNotFoundError:  # pragma: no cover - running from a bare source tree
    __version__ = "0.0.0"

__all__ = [
    "__version__",
    "CohortError",
    "DefinitionError",
    "DisclosureError",
    "InputError",
    "SchemaError",
]
