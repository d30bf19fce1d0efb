"""Rendering and running the SQL recipes under ``sql/``.

Recipes are plain SQL files with named slots written ``{{ name }}``. A slot is filled only from a
closed set of value types, so no text from a definition file or a command line reaches SQL
unchecked:

- ``bool``, ``int`` and ``float`` render as SQL literals (finite numbers only);
- a :class:`datetime.datetime` renders as ``timestamp 'YYYY-MM-DD HH:MM:SS'`` (no time zone,
  whole seconds);
- :class:`Fragment` renders as-is; fragments are made only by the definition compiler from its
  fixed grammar (analyte names from a closed list, operators from a closed list, numbers);
- :class:`Identifier` renders a table or column name checked against ``[a-z_][a-z0-9_]*``;
- a ``tuple`` of ``str`` from :data:`SAFE_WORDS`-style closed vocabularies renders as a quoted
  list ``('venous', 'arterial')`` (every item checked against ``[a-z0-9_]+``).

Anything else, or a slot left unfilled, or a value given for a slot the recipe does not have, is
an error.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from cohort._errors import CohortError
from cohort._paths import sql_dir

__all__ = ["Fragment", "Identifier", "recipe_names", "render", "render_recipe", "run_recipe"]

_SLOT = re.compile(r"\{\{\s*([a-z_][a-z0-9_]*)\s*\}\}")
#: A macro call ``{{ name(key=value, ...) }}`` (cohort._macros); may span lines.
_MACRO = re.compile(r"\{\{\s*([a-z_][a-z0-9_]*)\(([^(){}]*)\)\s*\}\}", re.S)
_IDENT = re.compile(r"^[a-z_][a-z0-9_]*$")
_WORD = re.compile(r"^[a-z0-9_]+$")


@dataclass(frozen=True)
class Fragment:
    """A piece of SQL made by the toolkit's own compilers (never from user text)."""

    sql: str


@dataclass(frozen=True)
class Identifier:
    """A table or column name, checked against ``[a-z_][a-z0-9_]*``."""

    name: str

    def __post_init__(self) -> None:
        if not _IDENT.match(self.name):
            msg = f"identifier must match [a-z_][a-z0-9_]*, got {self.name!r}"
            raise CohortError(msg)


SlotValue = bool | int | float | dt.datetime | Fragment | Identifier | tuple[str, ...]


def _literal(name: str, value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            msg = f"SQL slot `{name}` must be a finite number, got {value!r}"
            raise CohortError(msg)
        return repr(value)
    if isinstance(value, dt.datetime):
        if value.tzinfo is not None or value.microsecond:
            msg = f"SQL slot `{name}` takes a naive datetime in whole seconds, got {value!r}"
            raise CohortError(msg)
        return f"timestamp '{value:%Y-%m-%d %H:%M:%S}'"
    if isinstance(value, Fragment):
        return value.sql
    if isinstance(value, Identifier):
        return value.name
    if isinstance(value, tuple):
        if not value:
            msg = f"SQL slot `{name}` needs at least one item, got an empty list"
            raise CohortError(msg)
        for item in value:
            if not isinstance(item, str) or not _WORD.match(item):
                msg = f"SQL slot `{name}` takes words of [a-z0-9_], got {item!r}"
                raise CohortError(msg)
        return "(" + ", ".join(f"'{item}'" for item in value) + ")"
    msg = (
        f"SQL slot `{name}` takes a number, a boolean, a compiled fragment, an identifier or a "
        f"tuple of words; got {type(value).__name__}"
    )
    raise CohortError(msg)


def render(text: str, values: Mapping[str, SlotValue], *, recipe: str = "<text>",
           dialect: str = "duckdb") -> str:
    """Fill the ``{{ slot }}`` markers of a recipe.

    Parameters
    ----------
    text
        The recipe text.
    values
        A value for every slot in the text, and no others.
    recipe
        The recipe's name, for error messages.
    dialect
        The engine the text is written for; macro calls (:mod:`cohort._macros`) expand to that
        engine's form. Slots themselves render the same for every engine.

    Returns
    -------
    str
        The SQL with every slot filled.

    Examples
    --------
    >>> render("select {{ hours }} as h", {"hours": 6})
    'select 6 as h'
    """
    from cohort._macros import expand

    try:
        text = _MACRO.sub(lambda match: expand(match.group(1), match.group(2), values, dialect), text)
    except CohortError as error:
        raise CohortError(f"recipe {recipe}: {error}") from None
    wanted = set(_SLOT.findall(text))
    missing = sorted(wanted - set(values))
    if missing:
        msg = f"recipe {recipe}: no value given for slot(s) {', '.join(missing)}"
        raise CohortError(msg)
    return _SLOT.sub(lambda match: _literal(match.group(1), values[match.group(1)]), text)


def _wanted(text: str) -> set[str]:
    """Slots a recipe reads: its ``{{ slot }}`` markers and the slots its macros name."""
    from cohort._macros import slot_arguments

    wanted = set(_SLOT.findall(text))
    for _, arguments in _MACRO.findall(text):
        wanted |= slot_arguments(arguments)
    return wanted


def recipe_names() -> list[str]:
    """Return the recipe file names under ``sql/`` in run order."""
    return sorted(path.name for path in sql_dir().glob("*.sql"))


def _recipe_path(name: str) -> Path:
    path = sql_dir() / name
    if not path.is_file():
        msg = f"no recipe named {name!r} under {sql_dir()}; recipes are: {', '.join(recipe_names())}"
        raise CohortError(msg)
    return path


def render_recipe(name: str, values: Mapping[str, SlotValue], *, dialect: str = "duckdb") -> str:
    """Read recipe ``name`` (for example ``"10_lab_events.sql"``) and fill its slots.

    Slot values not used by this recipe are ignored, so one parameter mapping can serve every
    recipe of a run; slots the recipe has but the mapping lacks are an error. Macro calls expand
    for ``dialect`` (DuckDB unless an engine's renderer asks otherwise).
    """
    text = _recipe_path(name).read_text(encoding="utf-8")
    wanted = _wanted(text)
    return render(text, {key: values[key] for key in wanted if key in values}, recipe=name,
                  dialect=dialect)


def run_recipe(con: object, name: str, target: str, values: Mapping[str, SlotValue]) -> None:
    """Render recipe ``name`` and materialise its result as table ``target`` on a DuckDB connection.

    The recipe is a single ``with ... select`` statement; the runner wraps it in
    ``create or replace temp table <target> as``.
    """
    Identifier(target)
    sql = render_recipe(name, values)
    con.execute(f"create or replace temp table {target} as\n{sql}")  # type: ignore[attr-defined]
