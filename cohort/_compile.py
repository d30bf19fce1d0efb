"""The closed grammar of definition criteria, and its compiler to SQL fragments.

A criterion is a small tree. Its nodes are, in a definition file's YAML:

- ``{all_of: [C, ...]}``: every child holds;
- ``{any_of: [C, ...]}``: at least one child holds;
- ``{at_least: N, of: [C, ...]}``: at least ``N`` of the children hold (ADA 2009's "two of");
- ``{analyte: NAME, op: OP, value: NUMBER}``: the analyte's current value compares true;
- ``{flag: NAME}``: a person-level flag (``known_diabetes``) is true.

Names come only from closed lists (:data:`ANALYTES`, :data:`FLAGS`, :data:`OPERATORS`,
:data:`GRADES`); numbers are parsed as numbers (never booleans, text, NaN or infinity) and
rendered by Python's ``repr`` of a ``float``. The SQL column or expression behind an analyte or a
flag is supplied by the caller (``column_for`` / ``flag_for``), who builds it from the same closed
lists, so no text of a definition file ever reaches SQL.

Missing values never qualify. The grammar has no negation, so every node is monotone in its
children; inside the fragment SQL's three-valued logic applies (a comparison with a null is
null, ``null or true`` is true, ``null and x`` is not true) and the whole criterion is wrapped in
``coalesce(..., false)``. ``at_least`` counts a child only when it is true (``case when child
then 1 else 0 end``). The result is exactly "a criterion holds when it holds with every missing
value treated as not meeting its comparison".
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Iterable, Iterator, Mapping
from typing import Annotated, Any, Union

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    TypeAdapter,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import PydanticCustomError

from cohort._errors import DefinitionError
from cohort._sql import Fragment, Identifier

__all__ = [
    "ANALYTES",
    "FLAGS",
    "OPERATORS",
    "GRADES",
    "AllOf",
    "AnyOf",
    "AtLeast",
    "Compare",
    "Flag",
    "Criterion",
    "Grade",
    "Severity",
    "compile_criterion",
    "compile_severity",
    "compile_relaxed",
    "analytes_used",
    "flags_used",
    "iter_comparisons",
    "parse_criterion",
    "format_validation_error",
]

ANALYTES: tuple[str, ...] = (
    "glucose",
    "ph",
    "bicarbonate",
    "bhb",
    "urine_ketones",
    "sodium",
    "chloride",
    "potassium",
    "anion_gap",
    "anion_gap_with_k",
    "hba1c",
    "creatinine",
)
"""Analytes a criterion may name (canonical units in DEVELOPERS.md; urine ketones ordinal 0..4)."""

FLAGS: tuple[str, ...] = ("known_diabetes",)
"""Person-level flags a criterion may name."""

OPERATORS: tuple[str, ...] = ("<", "<=", ">", ">=")
"""Comparison operators a criterion may use."""

GRADES: tuple[str, ...] = ("severe", "moderate", "mild")
"""Severity grades, worst first (the episodes contract: ``mild|moderate|severe|null``)."""

# Words people write for an analyte, mapped to its name here (for "did you mean" only).
_ANALYTE_ALIASES: dict[str, str] = {
    "beta_hydroxybutyrate": "bhb",
    "betahydroxybutyrate": "bhb",
    "b_ohb": "bhb",
    "bohb": "bhb",
    "ketones": "bhb",
    "blood_ketones": "bhb",
    "serum_ketones": "bhb",
    "ketonuria": "urine_ketones",
    "urine_ketone": "urine_ketones",
    "hco3": "bicarbonate",
    "bicarb": "bicarbonate",
    "co2": "bicarbonate",
    "total_co2": "bicarbonate",
    "na": "sodium",
    "cl": "chloride",
    "k": "potassium",
    "ag": "anion_gap",
    "a1c": "hba1c",
    "blood_glucose": "glucose",
    "plasma_glucose": "glucose",
    "bg": "glucose",
}
_OPERATOR_ALIASES: dict[str, str] = {"≤": "<=", "≥": ">=", "=<": "<=", "=>": ">="}

_NODE_KEYS: tuple[str, ...] = ("all_of", "any_of", "at_least", "of", "analyte", "op", "value", "flag")
_MAX_DEPTH = 12


# --------------------------------------------------------------------------- messages
def did_you_mean(word: object, choices: Iterable[str], aliases: Mapping[str, str] | None = None) -> str:
    """Return ``" did you mean `x`?"`` for the closest choice, or ``""`` when none is close.

    Examples
    --------
    >>> did_you_mean("bhd", ANALYTES)
    '; did you mean `bhb`?'
    """
    if not isinstance(word, str):
        return ""
    choices = list(choices)
    key = word.strip().lower()
    if aliases and key in aliases:
        return f"; did you mean `{aliases[key]}`?"
    close = difflib.get_close_matches(key, choices, n=1, cutoff=0.6)
    return f"; did you mean `{close[0]}`?" if close else ""


def _show(value: object) -> str:
    """Render a found value for a message, shortened."""
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _fail(message: str, **context: object) -> PydanticCustomError:
    return PydanticCustomError("dka", "{message}", {"message": message, **context})


def as_number(value: object) -> float:
    """Return ``value`` as a finite float, refusing booleans, text, NaN and infinity.

    Raises a pydantic custom error (turned into a :class:`DefinitionError` with the field's
    path by :func:`format_validation_error`).
    """
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        hint = ""
        if isinstance(value, str):
            try:
                float(value)
            except ValueError:
                pass
            else:
                hint = (
                    " (it was read as text: YAML needs an exponent written with a dot and a sign, like 1.0e-3)"
                    if "e" in value.lower()
                    else " (it was read as text: remove the quotes)"
                )
        raise _fail(f"must be a number, got {_show(value)}{hint}")
    try:
        number = float(value)
    except OverflowError:  # an integer too large for a float (more than about 309 digits)
        raise _fail(f"must be a finite number, got an integer of {len(str(abs(value)))} digits") from None
    if not math.isfinite(number):
        raise _fail(f"must be a finite number, got {_show(value)}")
    return number


# --------------------------------------------------------------------------- grammar nodes
class _Node(BaseModel):
    """Base of grammar nodes: closed fields, unknown keys refused with a did-you-mean."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    @model_validator(mode="before")
    @classmethod
    def _refuse_unknown_keys(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            allowed = list(cls.model_fields)
            for key in data:
                if key not in allowed:
                    hint = did_you_mean(key, allowed) or did_you_mean(key, _NODE_KEYS)
                    raise _fail(
                        f"is not a known field{hint} (allowed here: {', '.join(f'`{a}`' for a in allowed)})",
                        field=str(key),
                    )
        return data


class Compare(_Node):
    """``{analyte: NAME, op: OP, value: NUMBER}``: the analyte's value compared with a number."""

    analyte: str
    op: str
    value: float

    @field_validator("analyte", mode="before")
    @classmethod
    def _known_analyte(cls, value: Any) -> str:
        if not isinstance(value, str) or value not in ANALYTES:
            hint = did_you_mean(value, ANALYTES, _ANALYTE_ALIASES)
            raise _fail(
                f"must be an analyte from the closed list, got {_show(value)}{hint} "
                f"Analytes are: {', '.join(ANALYTES)}"
            )
        return value

    @field_validator("op", mode="before")
    @classmethod
    def _known_operator(cls, value: Any) -> str:
        if not isinstance(value, str) or value not in OPERATORS:
            hint = ""
            if isinstance(value, str) and value.strip() in _OPERATOR_ALIASES:
                hint = f"; did you mean `{_OPERATOR_ALIASES[value.strip()]}`?"
            raise _fail(
                f"must be one of {', '.join(f'`{op}`' for op in OPERATORS)} (quote it in YAML), "
                f"got {_show(value)}{hint}"
            )
        return value

    @field_validator("value", mode="before")
    @classmethod
    def _number(cls, value: Any) -> float:
        return as_number(value)


class Flag(_Node):
    """``{flag: NAME}``: a person-level flag is true."""

    flag: str

    @field_validator("flag", mode="before")
    @classmethod
    def _known_flag(cls, value: Any) -> str:
        if not isinstance(value, str) or value not in FLAGS:
            hint = did_you_mean(value, FLAGS)
            raise _fail(f"must be a flag from the closed list ({', '.join(FLAGS)}), got {_show(value)}{hint}")
        return value


class AllOf(_Node):
    """``{all_of: [C, ...]}``: every child holds."""

    all_of: list[Criterion] = Field(min_length=1)


class AnyOf(_Node):
    """``{any_of: [C, ...]}``: at least one child holds."""

    any_of: list[Criterion] = Field(min_length=1)


class AtLeast(_Node):
    """``{at_least: N, of: [C, ...]}``: at least ``N`` of the children hold."""

    at_least: int
    of: list[Criterion] = Field(min_length=2)

    @field_validator("at_least", mode="before")
    @classmethod
    def _count(cls, value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise _fail(f"must be a whole number of at least 1, got {_show(value)}")
        return value

    @model_validator(mode="after")
    def _count_fits(self) -> AtLeast:
        if not 1 <= self.at_least <= len(self.of):
            raise _fail(
                f"must be between 1 and the number of items in `of` ({len(self.of)}), "
                f"got {self.at_least}",
                field="at_least",
            )
        return self


class _NotACriterion(BaseModel):
    """Stand-in for a node that matches no shape: always fails with a message that helps."""

    @model_validator(mode="before")
    @classmethod
    def _explain(cls, data: Any) -> Any:
        shapes = "`all_of`, `any_of`, `at_least` with `of`, `analyte` with `op` and `value`, or `flag`"
        if not isinstance(data, Mapping):
            raise _fail(f"must be a criterion (a mapping with {shapes}), got {_show(data)}")
        if not data:
            raise _fail(f"must be a criterion with {shapes}, got an empty mapping")
        keys = [str(key) for key in data]
        hints = "".join(did_you_mean(key, _NODE_KEYS) for key in keys)
        raise _fail(
            f"is not a criterion: unknown key(s) {', '.join(f'`{k}`' for k in keys)}{hints}. "
            f"A criterion has {shapes}"
        )


_KIND_OF_MODEL = {AllOf: "all_of", AnyOf: "any_of", AtLeast: "at_least", Compare: "compare", Flag: "flag"}


def _node_kind(data: Any) -> str:
    if isinstance(data, BaseModel):
        return _TAG + _KIND_OF_MODEL.get(type(data), "invalid")
    if not isinstance(data, Mapping):
        return _TAG + "invalid"
    keys = set(data)
    for key, kind in (("all_of", "all_of"), ("any_of", "any_of"), ("at_least", "at_least"),
                      ("of", "at_least"), ("analyte", "compare"), ("op", "compare"),
                      ("value", "compare"), ("flag", "flag")):
        if key in keys:
            return _TAG + kind
    return _TAG + "invalid"


_TAG = "node:"  # tags appear in pydantic error locations; format_validation_error drops them

Criterion = Annotated[
    Union[
        Annotated[AllOf, Tag("node:all_of")],
        Annotated[AnyOf, Tag("node:any_of")],
        Annotated[AtLeast, Tag("node:at_least")],
        Annotated[Compare, Tag("node:compare")],
        Annotated[Flag, Tag("node:flag")],
        Annotated[_NotACriterion, Tag("node:invalid")],
    ],
    Discriminator(_node_kind),
]
"""A criterion tree node (validated by pydantic; see the module docstring for the grammar)."""

for _model in (AllOf, AnyOf, AtLeast):
    _model.model_rebuild()


class Grade(_Node):
    """One severity grade: ``{grade: severe|moderate|mild, when: C}``."""

    grade: str
    when: Criterion

    @field_validator("grade", mode="before")
    @classmethod
    def _known_grade(cls, value: Any) -> str:
        if not isinstance(value, str) or value not in GRADES:
            hint = did_you_mean(value, GRADES)
            raise _fail(f"must be one of {', '.join(GRADES)}, got {_show(value)}{hint}")
        return value


class Severity(_Node):
    """Severity grades, worst first; the first grade whose criterion holds at onset wins."""

    reading: str = Field(min_length=1)
    grades: list[Grade] = Field(min_length=1)

    @model_validator(mode="after")
    def _worst_first(self) -> Severity:
        names = [grade.grade for grade in self.grades]
        if len(set(names)) != len(names):
            raise _fail(f"may list each grade once, got {', '.join(names)}", field="grades")
        if names != sorted(names, key=GRADES.index):
            expected = ", ".join(sorted(names, key=GRADES.index))
            raise _fail(f"must list the grades worst first ({expected}), got {', '.join(names)}",
                        field="grades")
        return self


_CRITERION_ADAPTER: TypeAdapter[Any] = TypeAdapter(Criterion)
_SEVERITY_ADAPTER: TypeAdapter[Any] = TypeAdapter(Severity)


# --------------------------------------------------------------------------- errors
def format_location(loc: Iterable[object]) -> str:
    """Render a pydantic error location as a dotted path: ``resolution.when.all_of[0].value``."""
    path = ""
    for part in loc:
        if isinstance(part, int):
            path += f"[{part}]"
        elif isinstance(part, str) and part.startswith(_TAG):
            continue
        else:
            path += ("." if path else "") + str(part)
    return path


def format_validation_error(exc: ValidationError, *, origin: str, prefix: str = "") -> list[str]:
    """Turn a pydantic :class:`ValidationError` into messages naming each field.

    Parameters
    ----------
    exc
        The error pydantic raised.
    origin
        What was being validated, for example ``"definition `consensus-2024`"``.
    prefix
        A path prepended to every location (for a criterion validated on its own).

    Returns
    -------
    list of str
        One message per error, like
        ``definition `x`: `resolution.when.all_of[0].value` must be a number, got 'low'``.
    """
    messages: list[str] = []
    for error in exc.errors(include_url=False):
        loc = list(error["loc"])
        context = error.get("ctx") or {}
        if error["type"] == "dka" and "field" in context:
            loc.append(context["field"])
        path = format_location(loc)
        if prefix:
            path = prefix + ("" if not path or path.startswith("[") else ".") + path
        if error["type"] == "dka":
            text = str(context.get("message", error["msg"]))
        elif error["type"] == "missing":
            text = "is required"
        elif error["type"] == "extra_forbidden":
            text = "is not a known field"
        elif error["type"] == "too_short":
            text = f"must hold at least {context.get('min_length', 1)} item(s), got {_show(error.get('input'))}"
        else:
            found = error.get("input")
            text = f"{error['msg'][0].lower()}{error['msg'][1:]}, got {_show(found)}"
        where = f"`{path}` " if path else ""
        messages.append(f"{origin}: {where}{text}")
    return messages


def _raise_definition_error(messages: list[str]) -> None:
    error = DefinitionError("\n".join(messages))
    error.messages = messages  # type: ignore[attr-defined]
    raise error


# --------------------------------------------------------------------------- parsing
def parse_criterion(criterion: object, *, origin: str = "criterion") -> Criterion:
    """Validate a criterion given as a mapping (or an already-built node).

    Parameters
    ----------
    criterion
        A mapping in the YAML shape, or a node (:class:`AllOf`, :class:`Compare`, ...).
    origin
        Names the thing in error messages.

    Returns
    -------
    Criterion
        The validated node tree.

    Raises
    ------
    DefinitionError
        Naming the field at fault, what it must be, and what was found.

    Examples
    --------
    >>> parse_criterion({"analyte": "ph", "op": "<", "value": 7.3})
    Compare(analyte='ph', op='<', value=7.3)
    """
    try:
        node = _CRITERION_ADAPTER.validate_python(criterion)
    except ValidationError as exc:
        _raise_definition_error(format_validation_error(exc, origin=origin))
    _check_tree(node, origin=origin, path="", depth=0)
    return node


def _check_tree(node: object, *, origin: str, path: str, depth: int) -> None:
    """Check a node tree again (nodes may have been built with ``model_construct``)."""
    where = f"`{path}` " if path else ""
    if depth > _MAX_DEPTH:
        _raise_definition_error([f"{origin}: {where}nests deeper than {_MAX_DEPTH} levels"])
    if isinstance(node, Compare):
        if node.analyte not in ANALYTES:
            _raise_definition_error([f"{origin}: {where}names an unknown analyte {_show(node.analyte)}"])
        if node.op not in OPERATORS:
            _raise_definition_error([f"{origin}: {where}has an unknown operator {_show(node.op)}"])
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)) or not math.isfinite(node.value):
            _raise_definition_error([f"{origin}: {where}value must be a finite number, got {_show(node.value)}"])
        return
    if isinstance(node, Flag):
        if node.flag not in FLAGS:
            _raise_definition_error([f"{origin}: {where}names an unknown flag {_show(node.flag)}"])
        return
    children = _children(node)
    if children is None:
        _raise_definition_error([f"{origin}: {where}is not a criterion node, got {type(node).__name__}"])
    key = {AllOf: "all_of", AnyOf: "any_of", AtLeast: "of"}[type(node)]
    if not children:
        _raise_definition_error([f"{origin}: `{path + '.' if path else ''}{key}` needs at least one item"])
    if isinstance(node, AtLeast) and (isinstance(node.at_least, bool) or not 1 <= node.at_least <= len(children)):
        _raise_definition_error([f"{origin}: {where}at_least must be between 1 and {len(children)}"])
    for index, child in enumerate(children):
        _check_tree(child, origin=origin, path=f"{path + '.' if path else ''}{key}[{index}]", depth=depth + 1)


def _children(node: object) -> list[Any] | None:
    if isinstance(node, AllOf):
        return list(node.all_of)
    if isinstance(node, AnyOf):
        return list(node.any_of)
    if isinstance(node, AtLeast):
        return list(node.of)
    return None


def _as_node(criterion: object) -> Any:
    if isinstance(criterion, (AllOf, AnyOf, AtLeast, Compare, Flag)):
        _check_tree(criterion, origin="criterion", path="", depth=0)
        return criterion
    return parse_criterion(criterion)


# --------------------------------------------------------------------------- compiling
def _number_sql(value: float) -> str:
    number = float(value)
    if not math.isfinite(number):  # unreachable after validation; kept as the last guard
        msg = f"criterion value must be a finite number, got {value!r}"
        raise DefinitionError(msg)
    return repr(number)


def _expression(text: object, what: str) -> str:
    if isinstance(text, (Fragment,)):
        text = text.sql
    elif isinstance(text, Identifier):
        text = text.name
    if not isinstance(text, str) or not text.strip():
        msg = f"{what} must return a non-empty SQL expression (str, Fragment or Identifier), got {text!r}"
        raise DefinitionError(msg)
    return text


def _sql(node: Any, column_for: Callable[..., object], flag_for: Callable[[str], object], *, with_op: bool = False) -> str:
    if isinstance(node, Compare):
        raw = column_for(node.analyte, node.op) if with_op else column_for(node.analyte)
        column = _expression(raw, f"column_for({node.analyte!r})")
        return f"({column} {node.op} {_number_sql(node.value)})"
    if isinstance(node, Flag):
        return f"({_expression(flag_for(node.flag), f'flag_for({node.flag!r})')})"
    if isinstance(node, AllOf):
        return "(" + " and ".join(_sql(child, column_for, flag_for, with_op=with_op) for child in node.all_of) + ")"
    if isinstance(node, AnyOf):
        return "(" + " or ".join(_sql(child, column_for, flag_for, with_op=with_op) for child in node.any_of) + ")"
    if isinstance(node, AtLeast):
        counts = " + ".join(
            f"case when {_sql(child, column_for, flag_for, with_op=with_op)} then 1 else 0 end" for child in node.of
        )
        return f"(({counts}) >= {int(node.at_least)})"
    msg = f"not a criterion node: {type(node).__name__}"  # unreachable after _check_tree
    raise DefinitionError(msg)


def compile_criterion(
    criterion: object,
    *,
    column_for: Callable[[str], object],
    flag_for: Callable[[str], object],
) -> Fragment:
    """Compile a criterion tree to a boolean SQL expression that is never null.

    Parameters
    ----------
    criterion
        A criterion node (from a loaded :class:`cohort.definitions.Definition`) or a mapping in
        the YAML shape (validated first).
    column_for
        Returns the trusted SQL expression holding an analyte's value, for example
        ``lambda analyte: f"dx_{analyte}"``. Called only with names from :data:`ANALYTES`.
    flag_for
        Returns the trusted SQL boolean expression of a flag. Called only with names from
        :data:`FLAGS`.

    Returns
    -------
    Fragment
        ``coalesce((...), false)``: true when the criterion holds, false otherwise (missing
        values never qualify).

    Raises
    ------
    DefinitionError
        When the criterion is not in the grammar.

    Examples
    --------
    >>> compile_criterion(
    ...     {"any_of": [{"analyte": "ph", "op": "<", "value": 7.3}, {"flag": "known_diabetes"}]},
    ...     column_for=lambda analyte: f"dx_{analyte}",
    ...     flag_for=lambda flag: flag,
    ... ).sql
    'coalesce(((dx_ph < 7.3) or (known_diabetes)), false)'
    """
    node = _as_node(criterion)
    return Fragment(f"coalesce({_sql(node, column_for, flag_for)}, false)")


def compile_relaxed(
    criterion: object,
    *,
    low_for: Callable[[str], object],
    high_for: Callable[[str], object],
    flag_for: Callable[[str], object],
) -> Fragment:
    """Compile a criterion over per-group extremes: a screen that never drops a group that can qualify.

    Each ``<`` / ``<=`` comparison is made against the group's lowest value of the analyte
    (``low_for``) and each ``>`` / ``>=`` against its highest (``high_for``). Because the grammar
    has no negation, a group (for example a person) with any single row meeting the criterion
    also meets the relaxed one; a group failing the relaxed criterion can be left out before the
    heavy work without changing any result.

    Parameters
    ----------
    criterion
        A criterion node or mapping, as for :func:`compile_criterion`.
    low_for, high_for
        Return the trusted SQL expressions of an analyte's minimum and maximum over the group.
    flag_for
        Returns the trusted SQL expression of a flag over the group (for example "ever true").

    Returns
    -------
    Fragment
        ``coalesce((...), false)``.

    Examples
    --------
    >>> compile_relaxed(
    ...     {"all_of": [{"analyte": "ph", "op": "<", "value": 7.3}, {"analyte": "bhb", "op": ">=", "value": 3}]},
    ...     low_for=lambda analyte: f"min_{analyte}", high_for=lambda analyte: f"max_{analyte}", flag_for=str,
    ... ).sql
    'coalesce(((min_ph < 7.3) and (max_bhb >= 3.0)), false)'
    """
    node = _as_node(criterion)

    def column_for(analyte: str, op: str) -> object:
        return low_for(analyte) if op in ("<", "<=") else high_for(analyte)

    return Fragment(f"coalesce({_sql(node, column_for, flag_for, with_op=True)}, false)")


def compile_severity(
    severity: object,
    *,
    column_for: Callable[[str], object],
    flag_for: Callable[[str], object],
) -> Fragment:
    """Compile severity grades to a SQL ``case`` giving ``'severe'``, ``'moderate'``, ``'mild'`` or null.

    Parameters
    ----------
    severity
        A :class:`Severity` (``definition.severity``), a mapping in the YAML shape, or ``None``
        for a definition that grades none (the fragment is then a typed null).
    column_for, flag_for
        As for :func:`compile_criterion`.

    Returns
    -------
    Fragment
        ``case when <worst> then 'severe' when ... else null end``; grades are tried worst
        first and the first that holds wins.

    Examples
    --------
    >>> compile_severity(None, column_for=str, flag_for=str).sql
    'cast(null as varchar)'
    >>> compile_severity(
    ...     {"reading": "r", "grades": [{"grade": "severe", "when": {"analyte": "ph", "op": "<", "value": 7.0}}]},
    ...     column_for=lambda analyte: analyte, flag_for=str,
    ... ).sql
    "case when coalesce((ph < 7.0), false) then 'severe' else null end"
    """
    if severity is None:
        return Fragment("cast(null as varchar)")
    if not isinstance(severity, Severity):
        try:
            severity = _SEVERITY_ADAPTER.validate_python(severity)
        except ValidationError as exc:
            _raise_definition_error(format_validation_error(exc, origin="severity"))
    branches = []
    for grade in severity.grades:
        if grade.grade not in GRADES:
            _raise_definition_error([f"severity: unknown grade {_show(grade.grade)}"])
        condition = compile_criterion(grade.when, column_for=column_for, flag_for=flag_for)
        branches.append(f"when {condition.sql} then '{grade.grade}'")
    return Fragment("case " + " ".join(branches) + " else null end")


def iter_comparisons(criterion: object) -> Iterator[Compare]:
    """Yield every comparison node of a criterion tree, depth first, in file order."""
    node = _as_node(criterion)
    stack = [node]
    while stack:
        current = stack.pop()
        if isinstance(current, Compare):
            yield current
        children = _children(current)
        if children:
            stack.extend(reversed(children))


def _nodes(criterion: object) -> Iterator[Any]:
    if isinstance(criterion, Severity):
        for grade in criterion.grades:
            yield from _nodes(grade.when)
        return
    node = _as_node(criterion)
    stack = [node]
    while stack:
        current = stack.pop()
        yield current
        stack.extend(_children(current) or [])


def analytes_used(criterion: object) -> set[str]:
    """Return the analytes a criterion (or a :class:`Severity`) names.

    Examples
    --------
    >>> sorted(analytes_used({"all_of": [{"analyte": "ph", "op": "<", "value": 7.3},
    ...                                   {"analyte": "bhb", "op": ">=", "value": 3}]}))
    ['bhb', 'ph']
    """
    if criterion is None:
        return set()
    return {node.analyte for node in _nodes(criterion) if isinstance(node, Compare)}


def flags_used(criterion: object) -> set[str]:
    """Return the flags a criterion (or a :class:`Severity`) names."""
    if criterion is None:
        return set()
    return {node.flag for node in _nodes(criterion) if isinstance(node, Flag)}
