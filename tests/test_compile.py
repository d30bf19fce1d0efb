"""The closed grammar compiles criteria to SQL that DuckDB runs, and admits nothing else.

Oracles: exact SQL text for hand-written criteria (golden cases); DuckDB itself running the
compiled SQL against rows on either side of a threshold; and, for random trees, a plain-Python
evaluator of the grammar's meaning ("a missing value never meets a comparison").
"""

from __future__ import annotations

import math

import duckdb
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cohort._compile import (
    ANALYTES,
    FLAGS,
    OPERATORS,
    AllOf,
    Compare,
    analytes_used,
    compile_criterion,
    compile_severity,
    flags_used,
    iter_comparisons,
    parse_criterion,
)
from cohort._errors import DefinitionError
from cohort._sql import Fragment

COLUMNS = {"column_for": lambda analyte: f"dx_{analyte}", "flag_for": lambda flag: f"is_{flag}"}


# --------------------------------------------------------------------------- golden SQL
GOLDEN = [
    (
        {"analyte": "ph", "op": "<", "value": 7.3},
        "coalesce((dx_ph < 7.3), false)",
    ),
    (
        {"flag": "known_diabetes"},
        "coalesce((is_known_diabetes), false)",
    ),
    (
        {"all_of": [{"analyte": "bhb", "op": "<", "value": 0.6}, {"analyte": "ph", "op": ">", "value": 7.3}]},
        "coalesce(((dx_bhb < 0.6) and (dx_ph > 7.3)), false)",
    ),
    (
        {"any_of": [{"analyte": "glucose", "op": ">=", "value": 11.1}, {"flag": "known_diabetes"}]},
        "coalesce(((dx_glucose >= 11.1) or (is_known_diabetes)), false)",
    ),
    (
        # integers are rendered from float: 18 -> 18.0, 2 -> 2.0
        {"any_of": [{"analyte": "bicarbonate", "op": "<", "value": 18}, {"analyte": "urine_ketones", "op": ">=", "value": 2}]},
        "coalesce(((dx_bicarbonate < 18.0) or (dx_urine_ketones >= 2.0)), false)",
    ),
    (
        {
            "at_least": 2,
            "of": [
                {"analyte": "bicarbonate", "op": ">=", "value": 15},
                {"analyte": "ph", "op": ">", "value": 7.3},
                {"analyte": "anion_gap", "op": "<=", "value": 12},
            ],
        },
        "coalesce(((case when (dx_bicarbonate >= 15.0) then 1 else 0 end + "
        "case when (dx_ph > 7.3) then 1 else 0 end + "
        "case when (dx_anion_gap <= 12.0) then 1 else 0 end) >= 2), false)",
    ),
    (
        {"analyte": "creatinine", "op": ">", "value": 1e-05},
        "coalesce((dx_creatinine > 1e-05), false)",
    ),
    (
        {"analyte": "sodium", "op": "<=", "value": -1},
        "coalesce((dx_sodium <= -1.0), false)",
    ),
]


@pytest.mark.parametrize(("criterion", "sql"), GOLDEN)
def test_golden_sql_text(criterion: dict, sql: str) -> None:
    fragment = compile_criterion(criterion, **COLUMNS)
    assert isinstance(fragment, Fragment)
    assert fragment.sql == sql


def test_golden_severity_case() -> None:
    severity = {
        "reading": "worst first",
        "grades": [
            {"grade": "severe", "when": {"analyte": "ph", "op": "<", "value": 7.0}},
            {"grade": "moderate", "when": {"analyte": "ph", "op": "<=", "value": 7.25}},
            {"grade": "mild", "when": {"analyte": "ph", "op": "<", "value": 7.3}},
        ],
    }
    assert compile_severity(severity, **COLUMNS).sql == (
        "case when coalesce((dx_ph < 7.0), false) then 'severe' "
        "when coalesce((dx_ph <= 7.25), false) then 'moderate' "
        "when coalesce((dx_ph < 7.3), false) then 'mild' else null end"
    )
    assert compile_severity(None, **COLUMNS).sql == "cast(null as varchar)"


def test_column_for_is_called_only_with_closed_names() -> None:
    seen: list[str] = []

    def column_for(analyte: str) -> str:
        seen.append(analyte)
        return analyte

    compile_criterion(
        {"all_of": [{"analyte": "bhb", "op": "<", "value": 1}, {"any_of": [{"analyte": "ph", "op": ">", "value": 7}]}]},
        column_for=column_for,
        flag_for=str,
    )
    assert seen == ["bhb", "ph"]
    assert set(seen) <= set(ANALYTES)


def test_analytes_and_flags_used() -> None:
    tree = {
        "all_of": [
            {"any_of": [{"analyte": "glucose", "op": ">=", "value": 11.1}, {"flag": "known_diabetes"}]},
            {"at_least": 1, "of": [{"analyte": "ph", "op": "<", "value": 7.3}, {"analyte": "bicarbonate", "op": "<", "value": 18}]},
        ]
    }
    assert analytes_used(tree) == {"glucose", "ph", "bicarbonate"}
    assert flags_used(tree) == {"known_diabetes"}
    assert [node.analyte for node in iter_comparisons(tree)] == ["glucose", "ph", "bicarbonate"]
    assert analytes_used(None) == set()


# --------------------------------------------------------------------------- running in DuckDB
@pytest.fixture(scope="module")
def con() -> duckdb.DuckDBPyConnection:
    connection = duckdb.connect()
    yield connection
    connection.close()


def _evaluate_sql(con: duckdb.DuckDBPyConnection, fragment: Fragment, rows: list[dict]) -> list[object]:
    """Run ``fragment`` over rows of a temporary table with one column per analyte and flag."""
    columns = [f"dx_{name} double" for name in ANALYTES] + [f"is_{flag} boolean" for flag in FLAGS]
    con.execute("create or replace temp table compile_rows (row_id integer, " + ", ".join(columns) + ")")
    names = ["row_id"] + [f"dx_{name}" for name in ANALYTES] + [f"is_{flag}" for flag in FLAGS]
    placeholders = ", ".join("?" for _ in names)
    for index, row in enumerate(rows):
        values = [index] + [row.get(name) for name in ANALYTES] + [row.get(flag) for flag in FLAGS]
        con.execute(f"insert into compile_rows ({', '.join(names)}) values ({placeholders})", values)
    result = con.execute(f"select {fragment.sql} as result from compile_rows order by row_id").fetchall()
    return [value for (value,) in result]


def test_values_either_side_of_each_operator(con: duckdb.DuckDBPyConnection) -> None:
    # The boundary itself decides < vs <= and > vs >= (definition of the operators).
    rows = [{"ph": 7.29999}, {"ph": 7.3}, {"ph": 7.30001}, {}]
    expected = {
        "<": [True, False, False, False],
        "<=": [True, True, False, False],
        ">": [False, False, True, False],
        ">=": [False, True, True, False],
    }
    for op, want in expected.items():
        fragment = compile_criterion({"analyte": "ph", "op": op, "value": 7.3}, **COLUMNS)
        assert _evaluate_sql(con, fragment, rows) == want, op


def test_missing_values_never_qualify(con: duckdb.DuckDBPyConnection) -> None:
    any_of = compile_criterion({"any_of": [{"analyte": "ph", "op": "<", "value": 7.3}, {"flag": "known_diabetes"}]}, **COLUMNS)
    all_of = compile_criterion({"all_of": [{"analyte": "ph", "op": "<", "value": 7.3}, {"flag": "known_diabetes"}]}, **COLUMNS)
    two_of = compile_criterion(
        {"at_least": 2, "of": [{"analyte": "ph", "op": ">", "value": 7.3}, {"analyte": "bicarbonate", "op": ">=", "value": 15},
                               {"analyte": "anion_gap", "op": "<=", "value": 12}]},
        **COLUMNS,
    )
    rows = [
        {},                                                    # everything missing
        {"ph": 7.1},                                           # flag missing, pH qualifies
        {"known_diabetes": True},                              # pH missing, flag true
        {"ph": 7.1, "known_diabetes": False},
        {"ph": 7.35, "bicarbonate": None, "anion_gap": 10},    # two of three with one missing
        {"ph": 7.35, "bicarbonate": None, "anion_gap": None},  # one of three, two missing
    ]
    assert _evaluate_sql(con, any_of, rows) == [False, True, True, True, False, False]
    assert _evaluate_sql(con, all_of, rows) == [False, False, False, False, False, False]
    assert _evaluate_sql(con, two_of, rows) == [False, False, False, False, True, False]


# --------------------------------------------------------------------------- refused input
INJECTIONS = [
    ({"analyte": "glucose; drop table person", "op": "<", "value": 1}, "analyte"),
    ({"analyte": "glucose", "op": "<; drop table person; --", "value": 1}, "op"),
    ({"analyte": "glucose", "op": "<", "value": "1; drop table person"}, "value"),
    ({"analyte": "glucose", "op": "<", "value": "1) or (1=1"}, "value"),
    ({"analyte": "gluc'ose", "op": "<", "value": 1}, "analyte"),
    ({"analyte": 'glucose"', "op": "<", "value": 1}, "analyte"),
    ({"analyte": "glucose -- comment", "op": "<", "value": 1}, "analyte"),
    ({"analyte": "glucose /* c */", "op": "<", "value": 1}, "analyte"),
    ({"flag": "known_diabetes or 1=1"}, "flag"),
    ({"all_of": ["glucose; drop table person"]}, "all_of[0]"),
    ({"any_of": [{"analyte": "ph", "op": "<", "value": 7.3}], "sql": "drop table person"}, "sql"),
    ({"analyte": "ph", "op": "<", "value": 7.3, "column": "person.person_id"}, "column"),
]


@pytest.mark.parametrize(("criterion", "field"), INJECTIONS)
def test_injection_attempts_are_refused(criterion: dict, field: str) -> None:
    with pytest.raises(DefinitionError) as caught:
        compile_criterion(criterion, **COLUMNS)
    assert f"`{field}`" in str(caught.value)


@pytest.mark.parametrize(
    ("criterion", "message"),
    [
        ({"analyte": "ph", "op": "<", "value": True}, "`value` must be a number, got True"),
        ({"analyte": "ph", "op": "<", "value": False}, "`value` must be a number, got False"),
        ({"analyte": "ph", "op": "<", "value": float("nan")}, "`value` must be a finite number, got nan"),
        ({"analyte": "ph", "op": "<", "value": float("inf")}, "`value` must be a finite number, got inf"),
        ({"analyte": "ph", "op": "<", "value": "7.3"}, "`value` must be a number, got '7.3'"),
        ({"analyte": "ph", "op": "<", "value": None}, "`value` must be a number, got None"),
        ({"analyte": "ph", "op": "<", "value": [7.3]}, "`value` must be a number, got [7.3]"),
        ({"analyte": "ph", "op": "=", "value": 7.3}, "`op` must be one of `<`, `<=`, `>`, `>=`"),
        ({"analyte": "ph", "op": "≥", "value": 7.3}, "did you mean `>=`?"),
        ({"analyte": "bhd", "op": "<", "value": 1}, "did you mean `bhb`?"),
        ({"analyte": "beta_hydroxybutyrate", "op": "<", "value": 1}, "did you mean `bhb`?"),
        ({"analyt": "ph", "op": "<", "value": 1}, "`analyt` is not a known field; did you mean `analyte`?"),
        ({"analyte": "ph", "op": "<"}, "`value` is required"),
        ({"flag": "known_diabetis"}, "did you mean `known_diabetes`?"),
        ({"any_of": []}, "`any_of` must hold at least 1 item"),
        ({"at_least": 3, "of": [{"flag": "known_diabetes"}, {"flag": "known_diabetes"}]},
         "`at_least` must be between 1 and the number of items in `of` (2), got 3"),
        ({"at_least": True, "of": [{"flag": "known_diabetes"}, {"flag": "known_diabetes"}]},
         "`at_least` must be a whole number of at least 1, got True"),
        ({"all_of": [{"any_of": [{"analyte": "ph", "op": "<", "value": "low"}]}]},
         "`all_of[0].any_of[0].value` must be a number, got 'low'"),
        ("glucose < 11", "must be a criterion (a mapping with"),
        ({}, "got an empty mapping"),
        ({"none_of": [{"flag": "known_diabetes"}]}, "is not a criterion: unknown key(s) `none_of`"),
    ],
)
def test_invalid_criteria_name_the_field(criterion: object, message: str) -> None:
    with pytest.raises(DefinitionError) as caught:
        compile_criterion(criterion, **COLUMNS)
    assert message in str(caught.value)


def test_nodes_built_without_validation_are_checked_again() -> None:
    # model_construct skips pydantic validation; the compiler checks every name itself.
    sneaky = Compare.model_construct(analyte="glucose; drop table person", op="<", value=1.0)
    with pytest.raises(DefinitionError, match="unknown analyte"):
        compile_criterion(AllOf.model_construct(all_of=[sneaky]), **COLUMNS)
    with pytest.raises(DefinitionError, match="unknown operator"):
        compile_criterion(Compare.model_construct(analyte="ph", op="<>", value=1.0), **COLUMNS)
    with pytest.raises(DefinitionError, match="finite number"):
        compile_criterion(Compare.model_construct(analyte="ph", op="<", value=float("nan")), **COLUMNS)
    with pytest.raises(DefinitionError, match="finite number"):
        compile_criterion(Compare.model_construct(analyte="ph", op="<", value="7.3"), **COLUMNS)


def test_parse_criterion_round_trips_to_the_same_sql() -> None:
    tree = {"all_of": [{"analyte": "bhb", "op": "<", "value": 0.6}, {"any_of": [{"analyte": "ph", "op": ">=", "value": 7.3}]}]}
    node = parse_criterion(tree)
    assert compile_criterion(node, **COLUMNS) == compile_criterion(node.model_dump(), **COLUMNS)


# --------------------------------------------------------------------------- hypothesis
# Values near the thresholds the guidelines use, so that random rows land on both sides often.
_NUMBERS = st.one_of(
    st.sampled_from([0.6, 1.0, 3.0, 6.0, 7.0, 7.1, 7.2, 7.25, 7.3, 10.0, 11.0, 11.1, 12.0, 13.9, 15.0, 18.0]),
    st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False),
    st.integers(min_value=-1000, max_value=1000),
)


def _leaf() -> st.SearchStrategy[dict]:
    compare = st.fixed_dictionaries(
        {"analyte": st.sampled_from(ANALYTES), "op": st.sampled_from(OPERATORS), "value": _NUMBERS}
    )
    flag = st.fixed_dictionaries({"flag": st.sampled_from(FLAGS)})
    return st.one_of(compare, compare, flag)


def _extend(children: st.SearchStrategy[dict]) -> st.SearchStrategy[dict]:
    items = st.lists(children, min_size=1, max_size=4)
    at_least = st.lists(children, min_size=2, max_size=4).flatmap(
        lambda of: st.integers(min_value=1, max_value=len(of)).map(lambda n: {"at_least": n, "of": of})
    )
    return st.one_of(items.map(lambda c: {"all_of": c}), items.map(lambda c: {"any_of": c}), at_least)


TREES = st.recursive(_leaf(), _extend, max_leaves=10)
ROW_VALUE = st.one_of(st.none(), _NUMBERS.map(float))
ROWS = st.lists(
    st.fixed_dictionaries(
        {**{name: ROW_VALUE for name in ANALYTES}, **{flag: st.one_of(st.none(), st.booleans()) for flag in FLAGS}}
    ),
    min_size=1,
    max_size=6,
)


def _reference(tree: dict, row: dict) -> bool:
    """The grammar's meaning in plain Python: a missing value never meets a comparison."""
    if "analyte" in tree:
        value = row.get(tree["analyte"])
        if value is None:
            return False
        threshold = float(tree["value"])
        return {"<": value < threshold, "<=": value <= threshold, ">": value > threshold, ">=": value >= threshold}[tree["op"]]
    if "flag" in tree:
        return row.get(tree["flag"]) is True
    if "all_of" in tree:
        return all(_reference(child, row) for child in tree["all_of"])
    if "any_of" in tree:
        return any(_reference(child, row) for child in tree["any_of"])
    return sum(_reference(child, row) for child in tree["of"]) >= tree["at_least"]


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(tree=TREES, rows=ROWS)
def test_random_valid_trees_compile_and_agree_with_the_reference(con: duckdb.DuckDBPyConnection, tree: dict, rows: list[dict]) -> None:
    fragment = compile_criterion(tree, **COLUMNS)
    assert fragment.sql.startswith("coalesce(") and fragment.sql.endswith(", false)")
    got = _evaluate_sql(con, fragment, rows)
    assert got == [_reference(tree, row) for row in rows]
    assert all(isinstance(value, bool) for value in got)  # never null


# Invalid trees: a valid tree with one field replaced by a bad value; the message must name
# the path of that field.
_BAD_LEAF_FIELDS = st.sampled_from(
    [
        ("analyte", "glucose; drop table person"),
        ("analyte", "Glucose"),
        ("analyte", 7),
        ("op", "=="),
        ("op", "<>"),
        ("value", "low"),
        ("value", True),
        ("value", float("nan")),
        ("value", float("-inf")),
        ("value", None),
        ("flag", "diabetes' or '1'='1"),
        ("extra", "x"),
    ]
)


def _paths(tree: dict, prefix: str = "") -> list[tuple[str, dict]]:
    """Every leaf node with its dotted path."""
    out: list[tuple[str, dict]] = []
    if "analyte" in tree or "flag" in tree:
        return [(prefix, tree)]
    key = "all_of" if "all_of" in tree else "any_of" if "any_of" in tree else "of"
    for index, child in enumerate(tree[key]):
        out.extend(_paths(child, f"{prefix + '.' if prefix else ''}{key}[{index}]"))
    return out


@settings(max_examples=120, deadline=None)
@given(tree=TREES, choice=st.data(), bad=_BAD_LEAF_FIELDS)
def test_random_invalid_trees_are_refused_naming_the_field(tree: dict, choice: st.DataObject, bad: tuple[str, object]) -> None:
    leaves = _paths(tree)
    path, leaf = choice.draw(st.sampled_from(leaves))
    field, value = bad
    if field in ("analyte", "op", "value") and "flag" in leaf:
        field, value = "flag", "diabetes' or '1'='1"
    if field == "flag" and "analyte" in leaf:
        field, value = "analyte", "glucose; drop table person"
    leaf[field] = value
    with pytest.raises(DefinitionError) as caught:
        compile_criterion(tree, **COLUMNS)
    expected = f"`{path + '.' if path else ''}{field}`"
    assert expected in str(caught.value)


def test_numbers_are_rendered_from_float_not_from_text() -> None:
    # 7.30 written in a file and 7.3 render the same; 1.0e-3 renders as Python's repr.
    for written, rendered in [(7.30, "7.3"), (7, "7.0"), (1.0e-3, "0.001"), (2.5e16, "2.5e+16")]:
        sql = compile_criterion({"analyte": "ph", "op": "<", "value": written}, **COLUMNS).sql
        assert sql == f"coalesce((dx_ph < {rendered}), false)"
        assert math.isclose(float(rendered), float(written))


# --------------------------------------------------------------------------- relaxed screen
def _reference_relaxed(tree: dict, rows: list[dict]) -> bool:
    """The relaxed criterion in plain Python: comparisons against each analyte's min or max."""
    def extreme(analyte: str, op: str) -> float | None:
        values = [row[analyte] for row in rows if row.get(analyte) is not None]
        if not values:
            return None
        return min(values) if op in ("<", "<=") else max(values)

    if "analyte" in tree:
        return _reference(tree, {tree["analyte"]: extreme(tree["analyte"], tree["op"])})
    if "flag" in tree:
        return any(row.get(tree["flag"]) is True for row in rows)
    key = "all_of" if "all_of" in tree else "any_of" if "any_of" in tree else "of"
    results = [_reference_relaxed(child, rows) for child in tree[key]]
    if key == "all_of":
        return all(results)
    if key == "any_of":
        return any(results)
    return sum(results) >= tree["at_least"]


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(tree=TREES, rows=ROWS)
def test_relaxed_screen_keeps_every_group_with_a_qualifying_row(con: duckdb.DuckDBPyConnection, tree: dict, rows: list[dict]) -> None:
    from cohort._compile import compile_relaxed

    fragment = compile_relaxed(
        tree,
        low_for=lambda analyte: f"min(dx_{analyte})",
        high_for=lambda analyte: f"max(dx_{analyte})",
        flag_for=lambda flag: f"bool_or(is_{flag})",
    )
    _evaluate_sql(con, Fragment("true"), rows)  # loads the rows
    (screened,) = con.execute(f"select {fragment.sql} from compile_rows").fetchone()
    assert screened is _reference_relaxed(tree, rows)
    if any(_reference(tree, row) for row in rows):
        assert screened is True  # the screen never drops a group that has a qualifying row


def test_trees_nested_too_deep_are_refused() -> None:
    tree: dict = {"analyte": "ph", "op": "<", "value": 7.3}
    for _ in range(14):
        tree = {"all_of": [tree]}
    with pytest.raises(DefinitionError, match="nests deeper than 12 levels"):
        compile_criterion(tree, **COLUMNS)
