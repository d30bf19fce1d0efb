"""Property-based fuzzing of definition files and ``--set KEY=VALUE`` overrides (issue 9).

Generated with hypothesis (D. R. MacIver, Z. Hatfield-Dodds et al., "Hypothesis: A new approach
to property-based testing", Journal of Open Source Software 4(43):1891, 2019):

- invalid files and overrides (wrong types, out-of-range numbers, unknown fields, analytes,
  operators, flags, grades and specimens, deep nesting, YAML alias bombs, unicode, injection
  attempts with quotes, semicolons, comments and ``{{ }}``) must raise DefinitionError naming
  the field at fault, never another exception;
- valid files (free text holding the same injection attempts and unicode) must load, compile and
  render recipes whose SQL differs from a reference rendering (same tree shapes, fixed numbers and
  texts) only in literal values: both are split into tokens by sqlglot's DuckDB tokenizer (a
  general SQL library: T. Mao et al., sqlglot, github.com/tobymao/sqlglot) and compared with
  every number and string literal masked, comments included; and no generated free text appears
  in the SQL at all;
- valid definitions run on a tiny MiniCdm extract (tests/cdmkit.py; invented values, not
  reference data) without error.

The number ranges are the documented ones (cohort.definitions.Timing.ranges()); the grammar is
the closed one of cohort._compile.
"""

from __future__ import annotations

import copy
import math
import re
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from sqlglot.dialects.duckdb import DuckDB
from sqlglot.tokens import TokenType

from cohort._compile import ANALYTES, FLAGS, GRADES, OPERATORS
from cohort._errors import DefinitionError
from cohort._sql import render_recipe
from cohort.definitions import (
    BICARBONATE_SPECIMENS,
    PH_SPECIMENS,
    Definition,
    load_definition,
    parse_definition,
    parse_override,
)

FUZZ = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                        HealthCheck.too_slow])
RECIPES = ("31_lab_state.sql", "40_onset_candidates.sql", "41_resolution_candidates.sql", "42_onset_visit.sql",
           "43_onset_censoring.sql", "44_episode_step.sql", "45_episode_rebound.sql", "46_episodes.sql")
BASE = load_definition("consensus-2024").to_dict()

# Text meant to break out of a quoted literal, a comment, a slot or a statement.
INJECTIONS = [
    "'; drop table person; --", '" or 1=1 --', "x' union select * from death --", "/* */ select 1",
    "{{ diagnosis }}", "{{diagnosis}}", "{% raw %}", "${HOME}", "`rm -rf /`", "\\'; --", "a\nb", "\x00",
    "glucose); delete from measurement; --", "ph' or 'a'='a", "venous') or ('1'='1", "../../etc/passwd",
    "Ωmega ketoacidose à pH < 7,3", "名前", "🙂", "\u202e", "",
]
# NEL (U+0085) is a line break to YAML 1.1 (spec 5.4); PyYAML's safe_dump(allow_unicode=True)
# writes it unescaped and reads it back as a space (checked with PyYAML 6), so drawn text leaves
# it out: the round trip, not the loader, would change it.
_DRAWN = st.characters(exclude_categories=("Cs",), exclude_characters="\x85")  # st.text leaves out surrogates too
TEXT = st.one_of(st.sampled_from(INJECTIONS), st.text(_DRAWN, min_size=0, max_size=30))
NAMEISH = st.one_of(st.sampled_from(INJECTIONS), st.text(_DRAWN, min_size=1, max_size=20))


def _marker(draw_index: int) -> str:
    # a free-text marker that cannot occur in the SQL by chance
    return f"zqx{draw_index:04d}qz"


# --------------------------------------------------------------------------- valid definitions
def _in(low: float, high: float, *, low_open: bool) -> st.SearchStrategy[float]:
    return st.floats(min_value=low, max_value=high, allow_nan=False, exclude_min=low_open)


NUMBERS = st.one_of(st.floats(min_value=-1e6, max_value=1e6, allow_nan=False),
                    st.integers(min_value=-10**6, max_value=10**6),
                    st.sampled_from([0, -0.0, 7.3, 11.1, 1e-300, 5e-324, 1e300]))
LEAF = st.one_of(
    st.fixed_dictionaries({"analyte": st.sampled_from(ANALYTES), "op": st.sampled_from(OPERATORS), "value": NUMBERS}),
    st.fixed_dictionaries({"flag": st.sampled_from(FLAGS)}),
)


def _grow(children: st.SearchStrategy[dict]) -> st.SearchStrategy[dict]:
    items = st.lists(children, min_size=1, max_size=3)
    at_least = st.lists(children, min_size=2, max_size=3).flatmap(
        lambda of: st.integers(1, len(of)).map(lambda n: {"at_least": n, "of": of}))
    return st.one_of(items.map(lambda c: {"all_of": c}), items.map(lambda c: {"any_of": c}), at_least)


TREES = st.recursive(LEAF, _grow, max_leaves=8)


@st.composite
def valid_definitions(draw: st.DrawFn) -> tuple[dict, list[str]]:
    """A valid definition mapping and the free-text strings placed in it (each with a marker)."""
    texts: list[str] = []

    def text() -> str:
        value = draw(TEXT) + _marker(len(texts))
        texts.append(value)
        return value

    data: dict = {
        "name": draw(st.from_regex(r"\A[a-z0-9][a-z0-9.-]{0,20}\Z")),
        "title": text(),
        "citation": {"authors": text(), "title": text(), "year": draw(st.integers(1900, 2100))},
        "diagnosis": draw(TREES),
        "resolution": {"when": draw(TREES)},
    }
    data["citation"]["journal" if draw(st.booleans()) else "publisher"] = text()
    for optional in ("volume", "pages", "doi", "note"):
        if draw(st.booleans()):
            data["citation"][optional] = text()
    if draw(st.booleans()):
        data["resolution"]["reading"] = text()
    if draw(st.booleans()):
        data["notes"] = [text() for _ in range(draw(st.integers(0, 3)))]
    if draw(st.booleans()):
        grades = sorted(draw(st.sets(st.sampled_from(GRADES), min_size=1)), key=GRADES.index)
        data["severity"] = {"reading": text(), "grades": [{"grade": grade, "when": draw(TREES)} for grade in grades]}
    low = draw(st.one_of(st.none(), st.integers(0, 100), _in(0, 100, low_open=False)))
    high = draw(st.one_of(st.none(), _in((low or 0) + 0.5, 130, low_open=False)))
    data["population"] = {"min_age_years": low, "max_age_years": high}
    gap = draw(_in(0, 2160, low_open=True))
    timing = {
        "diagnosis_lookback_hours": draw(_in(0, 72, low_open=True)),
        "resolution_lookback_hours": draw(_in(0, 48, low_open=True)),
        "episode_gap_hours": gap,
        "rebound_hours": draw(_in(0, gap, low_open=True)),
        "anion_gap_pairing_minutes": draw(_in(0, 240, low_open=False)),
        "ph_specimens": draw(st.lists(st.sampled_from(PH_SPECIMENS), min_size=1, unique=True)),
        "bicarbonate_specimens": draw(st.lists(st.sampled_from(BICARBONATE_SPECIMENS), min_size=1, unique=True)),
    }
    kept = {key: value for key, value in timing.items() if draw(st.booleans())}
    if "episode_gap_hours" in kept:  # the default rebound (24 h) may exceed a drawn gap
        kept["rebound_hours"] = timing["rebound_hours"]
    elif "rebound_hours" in kept:
        kept["rebound_hours"] = min(kept["rebound_hours"], 72.0)  # inside the default gap
    data["timing"] = kept
    return data, texts


def _twin(data: dict) -> dict:
    """The same tree shapes and specimens with every number, name and text replaced by fixed ones."""
    twin = copy.deepcopy(data)

    def numbers(node: object) -> object:
        if isinstance(node, dict):
            # same sign, so that a minus sign (a token of its own) lines up
            return {key: (math.copysign(1.0, value) if key == "value" else numbers(value)) for key, value in node.items()}
        if isinstance(node, list):
            return [numbers(item) for item in node]
        return node

    twin["diagnosis"] = numbers(twin["diagnosis"])
    twin["resolution"] = {"when": numbers(twin["resolution"]["when"])}
    if "severity" in twin:
        twin["severity"] = {"reading": "r", "grades": numbers(twin["severity"]["grades"])}
    twin.update(name="reference", title="t", notes=[],
                citation={"authors": "a", "title": "t", "journal": "j", "year": 2000})
    twin["population"] = {"min_age_years": 1, "max_age_years": 2}
    timing = {key: value for key, value in twin.get("timing", {}).items() if key.endswith("specimens")}
    twin["timing"] = timing
    return twin


def _rendered(definition: Definition) -> dict[str, str]:
    from cohort.engines._dialect import recipe_values

    values = recipe_values(definition)
    slots = {**values["state"], **values[definition.name]}
    return {name: render_recipe(name, slots) for name in RECIPES}


_LITERALS = {TokenType.NUMBER, TokenType.STRING}


def _masked(sql: str) -> list[tuple[str, str, tuple[str, ...]]]:
    """The SQL's tokens (sqlglot's DuckDB tokenizer) with every number and string literal masked.

    Two renderings with equal masked tokens differ only inside literals: no keyword, name,
    operator, parenthesis or comment was added, removed or changed.
    """
    return [
        (token.token_type.name, "?" if token.token_type in _LITERALS else token.text.lower(), tuple(token.comments))
        for token in DuckDB().tokenize(sql)
    ]


def test_masking_sees_a_change_outside_the_literals():
    # the check has teeth: an operator, a name or a comment changed is seen; a literal is not
    base = _masked("select a from t where b < 7.3 and c in ('venous')")
    assert _masked("select a from t where b < 1.0 and c in ('arterial')") == base
    assert _masked("select a from t where b <= 7.3 and c in ('venous')") != base
    assert _masked("select a from t where b < 7.3 and c in ('venous') -- x") != base
    assert _masked("select a from t where b < 7.3 or 1=1 and c in ('venous')") != base


def _write(tmp_path: Path, data: object, name: str = "fuzz.yaml") -> Path:
    path = tmp_path / name
    path.write_text(yaml.safe_dump(data, allow_unicode=True, sort_keys=False), encoding="utf-8")
    return path


@FUZZ
@given(case=valid_definitions())
def test_valid_files_load_compile_and_change_only_literals(tmp_path_factory, case):
    data, texts = case
    path = _write(tmp_path_factory.mktemp("fuzz"), data)
    definition = load_definition(path)
    assert definition.to_dict()["title"] == data["title"]  # free text kept as written
    rendered = _rendered(definition)
    reference = _rendered(parse_definition(_twin(data)))
    for recipe, sql in rendered.items():
        for text in texts:
            assert _marker(texts.index(text)) not in sql, f"free text reached {recipe}"
        assert _masked(sql) == _masked(reference[recipe]), f"{recipe} differs beyond its literal values"


# --------------------------------------------------------------------------- invalid definitions
def _set(data: dict, path: list, value: object) -> dict:
    changed = copy.deepcopy(data)
    target = changed
    for part in path[:-1]:
        target = target[part]
    target[path[-1]] = value
    return changed


def _dotted(path: list) -> str:
    return "".join(f"[{p}]" if isinstance(p, int) else ("." if i else "") + p for i, p in enumerate(path))


BAD_NUMBER = st.one_of(st.sampled_from(["abc", "7.3; drop table person", "", True, [1], {"x": 1}, None]),
                       st.just(float("nan")), st.just(float("inf")), st.just(10**400), NAMEISH)


@st.composite
def invalid_cases(draw: st.DrawFn) -> tuple[dict, str]:
    """(definition mapping with one fault, the field path its message must name)."""
    kind = draw(st.sampled_from([
        "timing_type", "timing_range", "age", "year", "name", "unknown_field", "analyte", "operator", "flag",
        "grade", "specimen", "criterion_value", "nesting", "at_least",
    ]))
    data = copy.deepcopy(BASE)
    leaf = ["diagnosis", "all_of", 2, "any_of", 0]  # {analyte: ph, op: "<", value: 7.3}
    if kind == "timing_type":
        field = draw(st.sampled_from(sorted(Definition.model_fields["timing"].annotation.model_fields)))
        value = draw(BAD_NUMBER) if not field.endswith("specimens") else draw(st.one_of(NAMEISH, st.just([]), st.integers()))
        assume(value is not None or field.endswith("specimens"))
        return _set(data, ["timing", field], value), f"timing.{field}"
    if kind == "timing_range":
        field, (low, high) = draw(st.sampled_from([("diagnosis_lookback_hours", (0, 72)), ("resolution_lookback_hours", (0, 48)),
                                                   ("episode_gap_hours", (0, 2160)), ("anion_gap_pairing_minutes", (-1e-9, 240))]))
        value = draw(st.one_of(st.floats(max_value=low, allow_nan=False), st.floats(min_value=high, exclude_min=True, allow_nan=False)))
        return _set(data, ["timing", field], value), f"timing.{field}"
    if kind == "age":
        value = draw(st.one_of(st.floats(max_value=-1e-9, allow_nan=False), st.floats(min_value=130.0001, allow_nan=False), BAD_NUMBER))
        assume(value is not None)
        return _set(data, ["population", "min_age_years"], value), "population.min_age_years"
    if kind == "year":
        value = draw(st.one_of(st.integers(max_value=1899), st.integers(min_value=2101), st.sampled_from(["twenty", None, 3.5])))
        return _set(data, ["citation", "year"], value), "citation.year"
    if kind == "name":
        value = draw(st.one_of(NAMEISH, st.integers(), st.just("a" * 65)))
        assume(not (isinstance(value, str) and re.fullmatch(r"[a-z0-9][a-z0-9.-]{0,63}", value)))
        return _set(data, ["name"], value), "name"
    if kind == "unknown_field":
        where = draw(st.sampled_from([[], ["timing"], ["citation"], ["population"], leaf, ["resolution"]]))
        key = draw(NAMEISH)
        target = data
        for part in where:
            target = target[part]
        assume(key not in target and key not in ("all_of", "any_of", "at_least", "of", "analyte", "op", "value", "flag"))
        target[key] = draw(st.one_of(st.integers(), NAMEISH))
        return data, _dotted([*where, key])
    if kind == "analyte":
        value = draw(st.one_of(NAMEISH, st.integers(), st.sampled_from(["Glucose", "bhb ", "ketones"])))
        assume(value not in ANALYTES)
        return _set(data, [*leaf, "analyte"], value), _dotted([*leaf, "analyte"])
    if kind == "operator":
        value = draw(st.one_of(NAMEISH, st.sampled_from(["=", "==", "<>", "!=", "≤", "=>", "< ", "in"])))
        assume(value not in OPERATORS)
        return _set(data, [*leaf, "op"], value), _dotted([*leaf, "op"])
    if kind == "flag":
        value = draw(NAMEISH)
        assume(value not in FLAGS)
        path = ["diagnosis", "all_of", 0, "any_of", 1, "flag"]
        return _set(data, path, value), _dotted(path)
    if kind == "grade":
        value = draw(NAMEISH)
        assume(value not in GRADES)
        return _set(data, ["severity", "grades", 0, "grade"], value), "severity.grades[0].grade"
    if kind == "specimen":
        field = draw(st.sampled_from(["ph_specimens", "bicarbonate_specimens"]))
        return _set(data, ["timing", field], ["venous", draw(NAMEISH)]), f"timing.{field}"
    if kind == "criterion_value":
        value = draw(BAD_NUMBER)
        return _set(data, [*leaf, "value"], value), _dotted([*leaf, "value"])
    if kind == "nesting":
        depth = draw(st.integers(13, 400))
        tree: dict = {"analyte": "ph", "op": "<", "value": 7.3}
        for _ in range(depth):
            tree = {draw(st.sampled_from(["all_of", "any_of"])): [tree]}
        return _set(data, ["resolution", "when"], tree), "resolution.when"
    # at_least outside 1..len(of)
    count = draw(st.one_of(st.integers(max_value=0), st.integers(min_value=4), st.sampled_from([True, "2", 2.5])))
    node = {"at_least": count, "of": [{"flag": "known_diabetes"}] * 3}
    return _set(data, ["diagnosis"], node), "diagnosis.at_least"


@FUZZ
@given(case=invalid_cases())
def test_invalid_files_are_refused_naming_the_field(tmp_path_factory, case):
    data, field = case
    folder = tmp_path_factory.mktemp("bad")
    try:
        path = _write(folder, data)
    except (yaml.YAMLError, RecursionError):  # not representable as YAML: validate the mapping itself
        path = None
    with pytest.raises(DefinitionError) as caught:
        load_definition(path) if path is not None else parse_definition(data)
    message = str(caught.value)
    assert f"`{field}" in message, message


@pytest.mark.parametrize("text", [
    # an alias bomb: nine levels of ten aliases expand to 10**9 values
    "a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n" + "".join(
        f"a{i}: &a{i} [{', '.join(['*a' + str(i - 1)] * 10)}]\n" for i in range(1, 9)) + "name: bomb\n",
    # nesting beyond what the YAML reader can hold
    "name: deep\ndiagnosis: " + "[" * 5000 + "]" * 5000 + "\n",
    "name: deep\ndiagnosis: " + "{all_of: [" * 3000 + "{flag: known_diabetes}" + "]}" * 3000 + "\n",
])
def test_yaml_bombs_are_refused_quickly(tmp_path, text):
    path = tmp_path / "bomb.yaml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(DefinitionError, match="holds more than|nests"):
        load_definition(path)


# --------------------------------------------------------------------------- overrides
KNOWN_TIMING = ("diagnosis_lookback_hours", "resolution_lookback_hours", "episode_gap_hours", "rebound_hours",
                "anion_gap_pairing_minutes")


@FUZZ
@given(key=st.one_of(NAMEISH, st.sampled_from(["timing.", ".timing", "timing..gap", "timing.gap hours",
                                                 "timing[0]", "diagnosis.all_of[x]", "a;b", "timing.{{ x }}"])),
       value=st.one_of(NAMEISH, st.integers()))
def test_override_keys_out_of_the_grammar_are_refused(key, value):
    text = f"{key}={value}"
    try:
        parsed_key, parsed_value = parse_override(text)
    except DefinitionError:
        return  # refused at parsing (no "=", empty key, or a value YAML cannot read)
    with pytest.raises(DefinitionError) as caught:
        load_definition("consensus-2024", overrides={parsed_key: parsed_value})
    message = str(caught.value)
    assert parsed_key in message or repr(parsed_key) in message or "is not a known field" in message, message


@FUZZ
@given(field=st.sampled_from(KNOWN_TIMING), value=st.one_of(
    st.floats(allow_nan=True), st.integers(min_value=-10**5, max_value=10**5), NAMEISH,
    st.sampled_from(["[1, 2]", "{a: 1}", "true", "null", "1e400", "0x10", "7,3", "'48'", "!!python/object:os.system"]),
))
def test_timing_overrides_are_accepted_in_range_or_refused_naming_the_field(field, value):
    try:
        key, parsed = parse_override(f"timing.{field}={value}")
    except DefinitionError as error:
        assert f"timing.{field}" in str(error)
        return
    try:
        definition = load_definition("consensus-2024", overrides={key: parsed})
    except DefinitionError as error:
        assert f"`timing.{field}`" in str(error) or "`timing.rebound_hours`" in str(error), str(error)
        assert f"set by override `timing.{field}`" in str(error) or field == "episode_gap_hours"
        return
    number = getattr(definition.timing, field)
    assert isinstance(parsed, (int, float)) and not isinstance(parsed, bool) and number == float(parsed)
    low, high = Definition.model_fields["timing"].annotation.ranges()[field].strip("([])").split(", ")
    assert float(low) <= number <= float(high)


# --------------------------------------------------------------------------- running them
@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """A tiny extract with lab events prepared once: two persons, one with DKA-like values."""
    from tests.cdmkit import MiniCdm

    from cohort._labs import prepare_lab_events
    from cohort._sql import run_recipe
    from cohort.source import open_extract

    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01", gender="F")
    cdm.person(2, birth="2012-01-01", gender="M")
    cdm.condition(1, "E10.9", at="2019-01-01")
    for person, visit, start in ((1, 10, "2024-03-01 09:00"), (2, 20, "2024-05-01 10:00")):
        cdm.visit(visit, person_id=person, start=start, end="2024-06-04 12:00", kind="ERIP")
    # invented values, hourly: glucose (2345-7), pH (2746-6 venous), bicarbonate (1963-8), BHB (53060-9)
    for person, visit, day in ((1, 10, "2024-03-01"), (2, 20, "2024-05-01")):
        for hour, (glucose, ph, bicarbonate, bhb) in enumerate(
                [(25.0, 7.05, 8.0, 6.5), (20.0, 7.15, 12.0, 4.0), (14.0, 7.28, 16.0, 1.5), (9.0, 7.36, 21.0, 0.4)]):
            at = f"{day} {10 + 2 * hour:02d}:00"
            cdm.lab(person, "2345-7", glucose, unit="mmol/L", at=at, visit=visit)
            cdm.lab(person, "2746-6", ph, unit="[pH]", at=at, visit=visit)
            cdm.lab(person, "1963-8", bicarbonate, unit="mmol/L", at=at, visit=visit)
            cdm.lab(person, "53060-9", bhb, unit="mmol/L", at=at, visit=visit)
    path = cdm.write(tmp_path_factory.mktemp("mini") / "extract", fmt="parquet")
    extract = open_extract(path, threads=1)
    prepare_lab_events(extract)
    run_recipe(extract.con, "30_person_diabetes.sql", "dka_person_diabetes", {})
    yield extract
    extract.close()


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                  HealthCheck.too_slow])
@given(case=valid_definitions())
def test_valid_definitions_run_on_a_tiny_extract(session, case):
    from cohort.episodes import EPISODE_COLUMNS, build_lab_state, episodes_in_session

    data, _texts = case
    definition = parse_definition(data)
    build_lab_state(session.con, [definition])
    episodes, attrition = episodes_in_session(session.con, definition)
    assert tuple(episodes.columns) == EPISODE_COLUMNS
    assert episodes["person_id"].is_in([1, 2]).all()
    assert attrition and all(row["persons"] is None or row["persons"] >= 0 for row in attrition)
