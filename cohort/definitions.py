"""Definition files: the published criteria of a DKA definition, validated on load.

A definition file (YAML) holds what a guideline fixes (diagnostic criteria, severity grades,
resolution criteria, the population it applies to) and the tool's own timing choices. It is
validated by pydantic models with closed fields (``extra="forbid"``); criteria are trees of the
closed grammar in :mod:`cohort._compile`, so no text of a file reaches SQL.

The bundled files live in ``cohort/definitions/`` and are named ``ada-2009``, ``consensus-2024``,
``jbds-2023`` and ``ispad-2022``. A user's own file is loaded by path.

Timing defaults
---------------
These are the toolkit's choices, not any guideline's; each is a field of :class:`Timing` with its
reason beside it, and each can be overridden (``overrides={"timing.episode_gap_hours": 48}``).
"""

from __future__ import annotations

import copy
import hashlib
import json
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any, ClassVar

import yaml
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, field_validator, model_validator
from pydantic_core import PydanticCustomError

from cohort._compile import (
    _MAX_DEPTH,
    Criterion,
    Severity,
    _check_tree,
    _fail,
    _show,
    analytes_used,
    as_number,
    did_you_mean,
    flags_used,
    format_validation_error,
)
from cohort._errors import DefinitionError
from cohort._paths import definitions_dir

__all__ = [
    "PH_SPECIMENS",
    "BICARBONATE_SPECIMENS",
    "Citation",
    "Population",
    "Resolution",
    "Timing",
    "Definition",
    "list_definitions",
    "load_definition",
    "parse_definition",
    "parse_override",
]

PH_SPECIMENS: tuple[str, ...] = ("arterial", "venous", "capillary", "unspecified")
"""pH specimens a definition may accept (DEVELOPERS.md specimen list)."""

BICARBONATE_SPECIMENS: tuple[str, ...] = ("serum", "blood", "arterial", "venous", "total_co2")
"""Bicarbonate specimens a definition may accept (``total_co2`` = total CO2 reported as bicarbonate)."""

_NAME = re.compile(r"^[a-z0-9][a-z0-9.-]{0,63}$")

# Bounds on the raw content, checked before validation (which recurses): the bundled files hold a
# few hundred values and nest about 15 containers deep; YAML anchors can make a short file expand
# to millions of values, and a deeply nested one would exhaust Python's recursion limit.
_MAX_NESTING = 64
_MAX_VALUES = 20_000


class _Strict(BaseModel):
    """Closed fields; an unknown key is refused with a did-you-mean."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    @model_validator(mode="before")
    @classmethod
    def _refuse_unknown_keys(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            allowed = list(cls.model_fields)
            for key in data:
                if key not in allowed:
                    raise _fail(
                        f"is not a known field{did_you_mean(key, allowed)} "
                        f"(allowed here: {', '.join(f'`{a}`' for a in allowed)})",
                        field=str(key),
                    )
        return data


class Citation(_Strict):
    """The published source of a definition: a journal article, or a guideline document (``publisher``)."""

    model_config = ConfigDict(extra="forbid", frozen=True, coerce_numbers_to_str=True)

    authors: str = Field(min_length=1)
    title: str = Field(min_length=1)
    journal: str | None = None
    publisher: str | None = None
    year: int = Field(ge=1900, le=2100)
    volume: str | None = None
    pages: str | None = None
    doi: str | None = None
    note: str | None = None

    @model_validator(mode="after")
    def _where_published(self) -> Citation:
        if not self.journal and not self.publisher:
            raise _fail("needs a `journal` (articles) or a `publisher` (guideline documents)", field="journal")
        return self


def _range_check(value: object, *, low: float, high: float, low_open: bool, high_open: bool) -> float:
    """Return ``value`` as a float inside the interval, or fail naming the interval."""
    interval = f"{'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"
    try:
        number = as_number(value)
    except PydanticCustomError:
        raise _fail(f"must be a number in {interval}, got {_show(value)}") from None
    below = number <= low if low_open else number < low
    above = number >= high if high_open else number > high
    if below or above:
        raise _fail(f"must be a number in {interval}, got {_show(value)}")
    return number


class Population(_Strict):
    """Who the definition applies to: age at onset, ``min_age_years <= age < max_age_years``."""

    min_age_years: float | None = None
    max_age_years: float | None = None

    @field_validator("min_age_years", "max_age_years", mode="before")
    @classmethod
    def _age(cls, value: Any) -> float | None:
        if value is None:
            return None
        return _range_check(value, low=0, high=130, low_open=False, high_open=False)

    @model_validator(mode="after")
    def _ordered(self) -> Population:
        if (
            self.min_age_years is not None
            and self.max_age_years is not None
            and self.min_age_years >= self.max_age_years
        ):
            raise _fail(
                f"must be greater than `min_age_years` ({self.min_age_years:g}), got {self.max_age_years:g}",
                field="max_age_years",
            )
        return self


class Resolution(_Strict):
    """Resolution criteria: the first time point after onset at which ``when`` holds."""

    when: Criterion
    reading: str | None = None


# Each timing field: (default, low, high, low_open, high_open, reason). The reasons are the
# toolkit's own choices (common practice), not a guideline's; they are written beside each field.
_TIMING_NUMBERS: dict[str, tuple[float, float, float, bool, bool, str]] = {
    "diagnosis_lookback_hours": (
        6.0, 0.0, 72.0, True, False,
        "How long a value may be carried forward to meet the diagnostic criteria. The "
        "components of a diagnosis describe one presentation; at arrival a point-of-care "
        "ketone, a blood gas and a laboratory panel usually fall within a few hours of each "
        "other, while a value older than 6 h may describe a different metabolic state.",
    ),
    "resolution_lookback_hours": (
        4.0, 0.0, 48.0, True, False,
        "How long a value measured after onset may be carried forward to meet the resolution "
        "criteria. During treatment ketones and venous gases are repeated every 1-2 h (JBDS "
        "monitoring schedule), so 4 h allows one missed draw without pairing a fresh ketone "
        "with a stale pH.",
    ),
    "episode_gap_hours": (
        72.0, 0.0, 2160.0, True, False,
        "Minimum time from the end of one episode to the onset of the next. Criteria met again "
        "within 3 days of the end of an episode are read as the same illness (relapse or "
        "incomplete treatment), not a new presentation.",
    ),
    "rebound_hours": (
        24.0, 0.0, 2160.0, True, False,
        "Window after resolution in which meeting the diagnostic criteria again marks the "
        "episode as a rebound (for example after premature closure of the insulin infusion). "
        "Must not exceed episode_gap_hours.",
    ),
    "anion_gap_pairing_minutes": (
        30.0, 0.0, 240.0, False, False,
        "Largest time difference between the sodium, chloride and bicarbonate combined into a "
        "derived anion gap. Results of one blood draw share a time or differ by minutes; 30 "
        "minutes pairs them without mixing draws taken an hour apart during treatment.",
    ),
}
_TIMING_SPECIMENS: dict[str, tuple[tuple[str, ...], tuple[str, ...], str]] = {
    "ph_specimens": (
        PH_SPECIMENS, PH_SPECIMENS,
        "All pH specimens count: venous pH runs only about 0.03 lower than arterial (Kelly "
        "2010 and 2013 meta-analyses), less than the spread of the guideline thresholds, and "
        "many laboratories report blood-gas pH without a specimen.",
    ),
    "bicarbonate_specimens": (
        BICARBONATE_SPECIMENS, BICARBONATE_SPECIMENS,
        "All bicarbonate specimens count, total CO2 included: most chemistry analysers report "
        "total CO2 as 'bicarbonate', about 1 mmol/L higher than calculated bicarbonate "
        "(common practice [from memory]); venous runs about 1-1.4 mmol/L above arterial.",
    ),
}


class Timing(_Strict):
    """The toolkit's timing choices, each with a default and a range.

    Attributes
    ----------
    diagnosis_lookback_hours : float, default 6, in (0, 72]
        How long a value may be carried forward to meet the diagnostic criteria.
    resolution_lookback_hours : float, default 4, in (0, 48]
        How long a value measured after onset may be carried forward to meet resolution.
    episode_gap_hours : float, default 72, in (0, 2160]
        Minimum time from the end of one episode to the onset of the next.
    rebound_hours : float, default 24, in (0, 2160], at most ``episode_gap_hours``
        Window after resolution in which re-meeting the diagnosis marks a rebound.
    anion_gap_pairing_minutes : float, default 30, in [0, 240]
        Largest time difference between Na, Cl and HCO3 combined into a derived anion gap.
    ph_specimens : tuple of str, default all of arterial, venous, capillary, unspecified
    bicarbonate_specimens : tuple of str, default all of serum, blood, arterial, venous, total_co2

    The reason for each default is in ``Timing.reasons()``.
    """

    diagnosis_lookback_hours: float = _TIMING_NUMBERS["diagnosis_lookback_hours"][0]
    resolution_lookback_hours: float = _TIMING_NUMBERS["resolution_lookback_hours"][0]
    episode_gap_hours: float = _TIMING_NUMBERS["episode_gap_hours"][0]
    rebound_hours: float = _TIMING_NUMBERS["rebound_hours"][0]
    anion_gap_pairing_minutes: float = _TIMING_NUMBERS["anion_gap_pairing_minutes"][0]
    ph_specimens: tuple[str, ...] = PH_SPECIMENS
    bicarbonate_specimens: tuple[str, ...] = BICARBONATE_SPECIMENS

    @field_validator(*_TIMING_NUMBERS, mode="before")
    @classmethod
    def _in_range(cls, value: Any, info: Any) -> float:
        _, low, high, low_open, high_open, _ = _TIMING_NUMBERS[info.field_name]
        return _range_check(value, low=low, high=high, low_open=low_open, high_open=high_open)

    @field_validator(*_TIMING_SPECIMENS, mode="before")
    @classmethod
    def _specimens(cls, value: Any, info: Any) -> tuple[str, ...]:
        allowed = _TIMING_SPECIMENS[info.field_name][1]
        if isinstance(value, str) or not isinstance(value, (list, tuple)):
            raise _fail(f"must be a list drawn from {', '.join(allowed)}, got {_show(value)}")
        if not value:
            raise _fail(f"must name at least one of {', '.join(allowed)}, got an empty list")
        for item in value:
            if not isinstance(item, str) or item not in allowed:
                raise _fail(
                    f"may hold only {', '.join(allowed)}, got {_show(item)}{did_you_mean(item, allowed)}"
                )
        if len(set(value)) != len(value):
            raise _fail(f"names a specimen twice: {_show(list(value))}")
        return tuple(item for item in allowed if item in value)  # canonical order

    @model_validator(mode="after")
    def _rebound_inside_gap(self) -> Timing:
        if self.rebound_hours > self.episode_gap_hours:
            raise _fail(
                f"must not exceed `episode_gap_hours` ({self.episode_gap_hours:g}), got "
                f"{self.rebound_hours:g}: a rebound is a re-qualifying time point inside the gap",
                field="rebound_hours",
            )
        return self

    @staticmethod
    def reasons() -> dict[str, str]:
        """Return the reason for each timing default, by field name."""
        out = {name: spec[5] for name, spec in _TIMING_NUMBERS.items()}
        out.update({name: spec[2] for name, spec in _TIMING_SPECIMENS.items()})
        return out

    @staticmethod
    def ranges() -> dict[str, str]:
        """Return the allowed range of each numeric timing field, in interval notation."""
        return {
            name: f"{'(' if lo_open else '['}{lo:g}, {hi:g}{')' if hi_open else ']'}"
            for name, (_, lo, hi, lo_open, hi_open, _) in _TIMING_NUMBERS.items()
        }


class Definition(_Strict):
    """A validated DKA definition.

    Attributes
    ----------
    name : str
        Short name (``consensus-2024``); lower-case letters, digits, ``-`` and ``.``.
    title : str
    citation : Citation
        Authors, title, journal, year, volume, pages of the source.
    population : Population
        Age at onset the definition applies to: ``min_age_years <= age < max_age_years``.
    diagnosis : Criterion
        The diagnostic criteria (a tree of the closed grammar).
    severity : Severity or None
        Grades worst first; ``None`` where the guideline grades none.
    resolution : Resolution
    timing : Timing
        The toolkit's own timing choices.
    notes : list of str
        Readings taken where the source is ambiguous, and anything a user should know.
    """

    name: str
    title: str = Field(min_length=1)
    citation: Citation
    population: Population = Population()
    diagnosis: Criterion
    severity: Severity | None = None
    resolution: Resolution
    timing: Timing = Timing()
    notes: list[str] = Field(default_factory=list)

    _origin: str = PrivateAttr(default="<mapping>")
    _overrides: dict[str, object] = PrivateAttr(default_factory=dict)

    _SECTIONS: ClassVar[tuple[str, ...]] = ("diagnosis", "severity", "resolution")

    @field_validator("name", mode="before")
    @classmethod
    def _name(cls, value: Any) -> str:
        if not isinstance(value, str) or not _NAME.match(value):
            raise _fail(
                "must be 1-64 characters of lower-case letters, digits, '-' and '.', starting "
                f"with a letter or digit, got {_show(value)}"
            )
        return value

    @field_validator("notes", mode="before")
    @classmethod
    def _notes(cls, value: Any) -> list[str]:
        if isinstance(value, str):
            return [value]
        return value

    # ------------------------------------------------------------------ behaviour
    def __eq__(self, other: object) -> bool:
        """Definitions are equal when their content is (origin and overrides aside)."""
        if not isinstance(other, Definition):
            return NotImplemented
        return self.to_dict() == other.to_dict()

    def __hash__(self) -> int:
        return hash(self.sha256())

    @property
    def origin(self) -> str:
        """Where the definition was loaded from (a bundled name, a path, or ``<mapping>``)."""
        return self._origin

    @property
    def overrides(self) -> dict[str, object]:
        """The overrides applied on load (dotted keys), empty if none."""
        return dict(self._overrides)

    def to_dict(self) -> dict[str, Any]:
        """Return the definition as plain JSON-ready data (the YAML shape, after overrides).

        ``parse_definition(d.to_dict())`` gives back an equal definition.
        """
        return self.model_dump(mode="json")

    def sha256(self) -> str:
        """Return the SHA-256 of the canonical content (sorted-key JSON, after overrides).

        Two definitions with the same content hash alike whatever their file's layout,
        comments, key order or number spelling (``18`` and ``18.0``).

        Examples
        --------
        >>> d = load_definition("consensus-2024")
        >>> d.sha256() == load_definition("consensus-2024").sha256()
        True
        >>> d.sha256() != load_definition("consensus-2024", overrides={"timing.episode_gap_hours": 48}).sha256()
        True
        """
        text = json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def analytes(self) -> set[str]:
        """Return every analyte named by the diagnosis, severity and resolution criteria."""
        return analytes_used(self.diagnosis) | analytes_used(self.severity) | analytes_used(self.resolution.when)

    def flags(self) -> set[str]:
        """Return every flag named by the criteria."""
        return flags_used(self.diagnosis) | flags_used(self.severity) | flags_used(self.resolution.when)

    def timing_slots(self) -> dict[str, float | tuple[str, ...]]:
        """Return the timing values as recipe slot values (:mod:`cohort._sql` types).

        Keys are the :class:`Timing` field names; numbers are floats, specimen lists tuples of
        words (rendered by the recipe runner as ``('arterial', 'venous')``).
        """
        return dict(self.timing.model_dump())


# --------------------------------------------------------------------------- YAML
class _UniqueKeyLoader(yaml.SafeLoader):
    """A safe YAML loader that refuses a key written twice in one mapping."""


def _construct_mapping(loader: _UniqueKeyLoader, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
    loader.flatten_mapping(node)
    mapping: dict[Any, Any] = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in mapping:
            raise yaml.constructor.ConstructorError(
                "while reading a mapping", node.start_mark, f"found the key {key!r} twice", key_node.start_mark
            )
        mapping[key] = loader.construct_object(value_node, deep=deep)
    return mapping


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _read_yaml(path: Path) -> Any:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        msg = f"definition file {path}: cannot be read ({exc.strerror or exc}); check the path"
        raise DefinitionError(msg) from None
    except UnicodeDecodeError as exc:
        msg = f"definition file {path}: is not UTF-8 text ({exc.reason} at byte {exc.start})"
        raise DefinitionError(msg) from None
    try:
        return yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 - a SafeLoader subclass
    except RecursionError:
        msg = (f"definition file {path}: nests too deeply to read (thousands of levels); criteria may nest "
               f"at most {_MAX_DEPTH} levels")
        raise DefinitionError(msg) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None) or getattr(exc, "context_mark", None)
        where = f"{path}:{mark.line + 1}:{mark.column + 1}" if mark else str(path)
        problem = getattr(exc, "problem", None) or str(exc)
        msg = f"definition file {where}: YAML could not be read: {problem}; fix the file's syntax at that line"
        raise DefinitionError(msg) from None


# --------------------------------------------------------------------------- overrides
_SEGMENT = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)((?:\[\d+\])*)")


def _split_key(key: str) -> list[str | int]:
    parts: list[str | int] = []
    for piece in key.split("."):
        match = _SEGMENT.fullmatch(piece)
        if not match:
            msg = f"override key {key!r}: each part must be a field name, optionally with [index], got {piece!r}"
            raise DefinitionError(msg)
        parts.append(match.group(1))
        parts.extend(int(index) for index in re.findall(r"\[(\d+)\]", match.group(2)))
    return parts


def _apply_overrides(raw: dict[str, Any], overrides: Mapping[str, object], origin: str) -> dict[str, Any]:
    data = copy.deepcopy(raw)
    for key, value in overrides.items():
        if not isinstance(key, str):
            msg = f"{origin}: override keys must be dotted field names like `timing.episode_gap_hours`, got {key!r}"
            raise DefinitionError(msg)
        parts = _split_key(key)
        target: Any = data
        for depth, part in enumerate(parts[:-1]):
            walked = _join_key(parts[: depth + 1])
            if isinstance(part, int):
                if not isinstance(target, list) or part >= len(target):
                    msg = f"{origin}: override `{key}`: `{walked}` is not an item of a list in this definition"
                    raise DefinitionError(msg)
                target = target[part]
                continue
            if not isinstance(target, dict):
                msg = f"{origin}: override `{key}`: `{walked}` is not inside a mapping"
                raise DefinitionError(msg)
            if target.get(part) is None:
                target[part] = {}  # a section the file leaves to its defaults (e.g. timing)
            target = target[part]
        last = parts[-1]
        if isinstance(last, int):
            if not isinstance(target, list) or last >= len(target):
                msg = f"{origin}: override `{key}` names a list item that does not exist"
                raise DefinitionError(msg)
        elif not isinstance(target, dict):
            msg = f"{origin}: override `{key}` does not lead to a field of a mapping"
            raise DefinitionError(msg)
        target[last] = copy.deepcopy(value)
    return data


def _join_key(parts: list[str | int]) -> str:
    return "".join(f"[{p}]" if isinstance(p, int) else ("." if i else "") + p for i, p in enumerate(parts))


def parse_override(text: str) -> tuple[str, object]:
    """Split a command-line override ``KEY=VALUE``, reading VALUE as a YAML scalar or list.

    Examples
    --------
    >>> parse_override("timing.episode_gap_hours=48")
    ('timing.episode_gap_hours', 48)
    >>> parse_override("timing.ph_specimens=[venous, arterial]")
    ('timing.ph_specimens', ['venous', 'arterial'])
    """
    key, sep, value = text.partition("=")
    if not sep or not key.strip():
        msg = f"an override must look like KEY=VALUE (for example timing.episode_gap_hours=48), got {text!r}"
        raise DefinitionError(msg)
    try:
        parsed = yaml.safe_load(value) if value.strip() else None
    except (yaml.YAMLError, RecursionError):
        msg = f"override {key.strip()!r}: the value {_show(value)} could not be read as a number, word or [list]"
        raise DefinitionError(msg) from None
    return key.strip(), parsed


# --------------------------------------------------------------------------- loading
def list_definitions() -> list[str]:
    """Return the names of the bundled definitions, sorted.

    Examples
    --------
    >>> list_definitions()
    ['ada-2009', 'consensus-2024', 'ispad-2022', 'jbds-2023']
    """
    return sorted(path.stem for path in definitions_dir().glob("*.yaml"))


def _resolve(name_or_path: str | Path) -> tuple[Path, str]:
    if isinstance(name_or_path, Path):
        return name_or_path, str(name_or_path)
    if not isinstance(name_or_path, str) or not name_or_path.strip():
        msg = f"a definition is a bundled name or a file path, got {name_or_path!r}; bundled: {', '.join(list_definitions())}"
        raise DefinitionError(msg)
    text = name_or_path.strip()
    if text in list_definitions():
        return definitions_dir() / f"{text}.yaml", text
    looks_like_path = any(sep in text for sep in ("/", "\\")) or text.endswith((".yaml", ".yml"))
    if looks_like_path or Path(text).is_file():
        return Path(text), text
    msg = (
        f"no bundled definition named {text!r}{did_you_mean(text, list_definitions())} "
        f"Bundled definitions are: {', '.join(list_definitions())} (or give the path of a YAML file)"
    )
    raise DefinitionError(msg)


def parse_definition(
    data: Mapping[str, Any], *, overrides: Mapping[str, object] | None = None, origin: str = "<mapping>"
) -> Definition:
    """Validate a definition given as a mapping (the YAML shape).

    Parameters
    ----------
    data
        The definition content.
    overrides
        Dotted keys and values applied before validation.
    origin
        Where the content came from, kept on the result.

    Returns
    -------
    Definition

    Raises
    ------
    DefinitionError
        Naming each field at fault, what it must be and what was found.
    """
    label_name = data.get("name") if isinstance(data, Mapping) else None
    label = f"definition `{label_name}`" if isinstance(label_name, str) and _NAME.match(label_name) else f"definition {origin}"
    if not isinstance(data, Mapping):
        msg = f"{label}: must be a mapping of fields (name, title, citation, ...), got {_show(data)}"
        raise DefinitionError(msg)
    _check_size(data, label)
    content = _apply_overrides(dict(data), overrides or {}, label)
    _check_size(content, label)
    try:
        definition = Definition.model_validate(content)
    except ValidationError as exc:
        messages = format_validation_error(exc, origin=label)
        for key in overrides or {}:
            path = _join_key(_split_key(key))
            messages = [m + f" (set by override `{key}`)" if f"`{path}`" in m else m for m in messages]
        error = DefinitionError("\n".join(messages))
        error.messages = messages  # type: ignore[attr-defined]
        raise error from None
    # the criteria again as the compiler sees them (nesting depth, counts), so that every loaded
    # definition compiles
    trees = [("diagnosis", definition.diagnosis), ("resolution.when", definition.resolution.when)]
    if definition.severity is not None:
        trees += [(f"severity.grades[{i}].when", grade.when) for i, grade in enumerate(definition.severity.grades)]
    for path, tree in trees:
        _check_tree(tree, origin=label, path=path, depth=0)
    definition._origin = origin
    definition._overrides = dict(overrides or {})
    return definition


def _check_size(data: object, label: str) -> None:
    """Refuse content nesting deeper than ``_MAX_NESTING`` or holding more than ``_MAX_VALUES`` values."""
    stack: list[tuple[object, str, int]] = [(data, "", 0)]
    seen = 0
    while stack:
        value, path, depth = stack.pop()
        seen += 1
        if seen > _MAX_VALUES:
            msg = (
                f"{label}: holds more than {_MAX_VALUES:,} values (YAML anchors and aliases repeated "
                "many times?); a definition needs a few hundred; write the criteria out plainly"
            )
            raise DefinitionError(msg)
        if depth > _MAX_NESTING:
            msg = (
                f"{label}: `{path}` nests deeper than {_MAX_NESTING} levels; criteria may nest at most "
                f"{_MAX_DEPTH} levels (all_of / any_of / at_least inside one another)"
            )
            raise DefinitionError(msg)
        if isinstance(value, Mapping):
            for key, item in value.items():
                stack.append((item, f"{path}.{key}" if path else str(key), depth + 1))
        elif isinstance(value, (list, tuple)):
            for index, item in enumerate(value):
                stack.append((item, f"{path}[{index}]", depth + 1))


def load_definition(name_or_path: str | Path, *, overrides: Mapping[str, object] | None = None) -> Definition:
    """Load and validate a bundled definition (by name) or a user's file (by path).

    Parameters
    ----------
    name_or_path
        A bundled name (see :func:`list_definitions`) or the path of a YAML file.
    overrides
        Dotted keys and values applied before validation, for example
        ``{"timing.episode_gap_hours": 48, "timing.ph_specimens": ["venous"]}``. An override
        changes :meth:`Definition.sha256`.

    Returns
    -------
    Definition

    Raises
    ------
    DefinitionError
        For an unknown name (with the bundled names and a did-you-mean), an unreadable file, a
        YAML syntax error (with the file and line), or content that does not validate (naming
        each field, its value and what is allowed).

    Examples
    --------
    >>> d = load_definition("consensus-2024", overrides={"timing.episode_gap_hours": 48})
    >>> d.timing.episode_gap_hours
    48.0
    >>> sorted(d.analytes())
    ['bhb', 'bicarbonate', 'glucose', 'ph', 'urine_ketones']
    """
    path, origin = _resolve(name_or_path)
    if not path.is_file():
        msg = f"definition file {path}: not found; give an existing YAML file or a bundled name ({', '.join(list_definitions())})"
        raise DefinitionError(msg)
    raw = _read_yaml(path)
    if not isinstance(raw, dict):
        msg = f"definition file {path}: must hold a mapping of fields (name, title, citation, ...), got {_show(raw)}"
        raise DefinitionError(msg)
    return parse_definition(raw, overrides=overrides, origin=origin)
