"""The bundled definitions, compiled and run in DuckDB, on values either side of every threshold.

Two kinds of check:

1. For every threshold of every bundled file, a row where that comparison alone decides the
   criterion (its any_of siblings false, its all_of siblings true), with the analyte just inside
   and just outside. Which side qualifies is read from the source tables in
   ``tests/test_definitions_content.py`` (each number cited there), not from the file.
2. Hand-worked presentations per guideline: the expected result follows from the guideline's
   text (cited beside each case), so a wrong ``all_of``/``any_of`` in a file shows up here.

Values are canonical units (mmol/L; pH unitless; urine ketones ordinal 0..4).
"""

from __future__ import annotations

import duckdb
import pytest

from cohort._compile import ANALYTES, FLAGS, AllOf, AnyOf, AtLeast, Compare, Flag, compile_criterion, compile_severity
from cohort._sql import Fragment
from cohort.definitions import load_definition
from tests.test_definitions_content import EXPECTED

COLUMNS = {"column_for": lambda analyte: analyte, "flag_for": lambda flag: flag}
DELTA = {"ph": 0.001}  # "just either side": 0.001 pH units, 0.01 in the units of the other analytes


@pytest.fixture(scope="module")
def con() -> duckdb.DuckDBPyConnection:
    connection = duckdb.connect()
    yield connection
    connection.close()


def _run(con: duckdb.DuckDBPyConnection, fragment: Fragment, rows: list[dict]) -> list[object]:
    columns = [f"{name} double" for name in ANALYTES] + [f"{flag} boolean" for flag in FLAGS]
    con.execute("create or replace temp table bundled_rows (row_id integer, " + ", ".join(columns) + ")")
    names = ["row_id", *ANALYTES, *FLAGS]
    for index, row in enumerate(rows):
        unknown = set(row) - set(names)
        assert not unknown, unknown
        con.execute(
            f"insert into bundled_rows ({', '.join(names)}) values ({', '.join('?' for _ in names)})",
            [index, *[row.get(name) for name in ANALYTES], *[row.get(flag) for flag in FLAGS]],
        )
    return [value for (value,) in con.execute(f"select {fragment.sql} from bundled_rows order by row_id").fetchall()]


# --------------------------------------------------------------------------- 1. every threshold
def _side(analyte: str, op: str, value: float, inside: bool) -> float:
    """A value just inside (meets ``op value``) or just outside the threshold."""
    delta = DELTA.get(analyte, 0.01)
    if op == "<":
        return value - delta if inside else value
    if op == "<=":
        return value if inside else value + delta
    if op == ">":
        return value + delta if inside else value
    return value if inside else value - delta  # ">="


def _force(node: object, truth: bool, row: dict) -> None:
    """Set ``row`` so that the subtree ``node`` is ``truth`` (each analyte appears once per tree)."""
    if isinstance(node, Compare):
        assert node.analyte not in row, f"{node.analyte} twice in one tree"
        row[node.analyte] = _side(node.analyte, node.op, node.value, truth)
    elif isinstance(node, Flag):
        row[node.flag] = truth
    elif isinstance(node, (AllOf, AnyOf, AtLeast)):
        children = node.all_of if isinstance(node, AllOf) else node.any_of if isinstance(node, AnyOf) else node.of
        for child in children:
            _force(child, truth, row)


def _decisive_rows(tree: object, target: Compare) -> tuple[dict, dict]:
    """Rows in which ``target`` alone decides ``tree``: (target inside, target outside)."""

    def path_to(node: object) -> list[object] | None:
        if node is target:
            return [node]
        children = (
            node.all_of if isinstance(node, AllOf) else node.any_of if isinstance(node, AnyOf)
            else node.of if isinstance(node, AtLeast) else []
        )
        for child in children:
            found = path_to(child)
            if found:
                return [node, *found]
        return None

    path = path_to(tree)
    assert path, "target not in tree"
    context: dict = {}
    for parent, child in zip(path, path[1:]):
        if isinstance(parent, AllOf):
            for sibling in parent.all_of:
                if sibling is not child:
                    _force(sibling, True, context)
        elif isinstance(parent, AnyOf):
            for sibling in parent.any_of:
                if sibling is not child:
                    _force(sibling, False, context)
        else:  # at_least N of: exactly N - 1 siblings true
            siblings = [sibling for sibling in parent.of if sibling is not child]
            for index, sibling in enumerate(siblings):
                _force(sibling, index < parent.at_least - 1, context)
    inside, outside = dict(context), dict(context)
    inside[target.analyte] = _side(target.analyte, target.op, target.value, True)
    outside[target.analyte] = _side(target.analyte, target.op, target.value, False)
    return inside, outside


def _trees(name: str) -> dict[str, object]:
    definition = load_definition(name)
    trees = {"diagnosis": definition.diagnosis, "resolution": definition.resolution.when}
    for grade in definition.severity.grades if definition.severity else []:
        trees[f"severity.{grade.grade}"] = grade.when
    return trees


THRESHOLDS = [(name, *row) for name, rows in EXPECTED.items() for row in rows]


@pytest.mark.parametrize(("name", "section", "analyte", "op", "value"), THRESHOLDS)
def test_each_threshold_decides_on_its_side(
    con: duckdb.DuckDBPyConnection, name: str, section: str, analyte: str, op: str, value: float
) -> None:
    tree = _trees(name)[section]
    target = next(node for node in _iter(tree) if node.analyte == analyte)
    inside, outside = _decisive_rows(tree, target)
    # The source table's op and value say which side qualifies (tests/test_definitions_content.py).
    inside[analyte] = _side(analyte, op, float(value), True)
    outside[analyte] = _side(analyte, op, float(value), False)
    fragment = compile_criterion(tree, **COLUMNS)
    assert _run(con, fragment, [inside, outside, {**inside, analyte: None}]) == [True, False, False]


def _iter(tree: object):
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, Compare):
            yield node
        elif isinstance(node, AllOf):
            stack.extend(node.all_of)
        elif isinstance(node, AnyOf):
            stack.extend(node.any_of)
        elif isinstance(node, AtLeast):
            stack.extend(node.of)


# --------------------------------------------------------------------------- 2. worked presentations
CLASSIC = {"glucose": 25.0, "bhb": 4.5, "ph": 7.15, "bicarbonate": 11.0, "known_diabetes": True}

DIAGNOSIS_CASES = [
    # (name, description, row, expected)
    # 2024 consensus (Umpierrez 2024): D and K and A; D = glucose >= 11.1 or prior diabetes.
    ("consensus-2024", "classic DKA", CLASSIC, True),
    ("consensus-2024", "euglycaemic DKA in known diabetes (SGLT2 inhibitor)", {**CLASSIC, "glucose": 8.0}, True),
    ("consensus-2024", "glucose 11.1 without known diabetes", {**CLASSIC, "glucose": 11.1, "known_diabetes": False}, True),
    ("consensus-2024", "glucose 11.0 without known diabetes", {**CLASSIC, "glucose": 11.0, "known_diabetes": False}, False),
    ("consensus-2024", "urine 2+ instead of BHB", {**CLASSIC, "bhb": None, "urine_ketones": 2}, True),
    ("consensus-2024", "urine 1+ only", {**CLASSIC, "bhb": None, "urine_ketones": 1}, False),
    ("consensus-2024", "bicarbonate 17 with pH 7.32 (and/or)", {**CLASSIC, "ph": 7.32, "bicarbonate": 17.0}, True),
    ("consensus-2024", "ketosis without acidosis (starvation-like)", {**CLASSIC, "ph": 7.36, "bicarbonate": 22.0}, False),
    ("consensus-2024", "alcoholic ketoacidosis: no diabetes, normal glucose", {**CLASSIC, "glucose": 5.0, "known_diabetes": False}, False),
    ("consensus-2024", "lactic acidosis: no ketones", {**CLASSIC, "bhb": 0.3}, False),
    ("consensus-2024", "hyperosmolar state: high glucose, little ketosis, no acidosis",
     {"glucose": 45.0, "bhb": 1.0, "ph": 7.35, "bicarbonate": 20.0, "known_diabetes": True}, False),
    # ADA 2009 (Kitabchi 2009, Table 1): glucose > 250 mg/dL, ketones positive, acidosis; no
    # known-diabetes alternative.
    ("ada-2009", "classic DKA", CLASSIC, True),
    ("ada-2009", "euglycaemic DKA is missed (glucose required)", {**CLASSIC, "glucose": 8.0}, False),
    ("ada-2009", "glucose 13.9 is not > 250 mg/dL", {**CLASSIC, "glucose": 13.9}, False),
    ("ada-2009", "pH 7.30 and bicarbonate 18 are mild DKA (inclusive)", {**CLASSIC, "ph": 7.3, "bicarbonate": 18.0}, True),
    ("ada-2009", "pH 7.31 and bicarbonate 18.5 are not DKA", {**CLASSIC, "ph": 7.31, "bicarbonate": 18.5}, False),
    ("ada-2009", "urine ketones trace/1+ count as positive", {**CLASSIC, "bhb": None, "urine_ketones": 1}, True),
    ("ada-2009", "negative urine ketones, no BHB", {**CLASSIC, "bhb": None, "urine_ketones": 0}, False),
    ("ada-2009", "anion gap not required (missing)", {**CLASSIC, "anion_gap": None}, True),
    # JBDS (2021, updated 2023): ketones >= 3.0 or urine >= 2+; glucose > 11 or known diabetes;
    # bicarbonate < 15 and/or venous pH < 7.3.
    ("jbds-2023", "classic DKA", CLASSIC, True),
    ("jbds-2023", "euglycaemic DKA in known diabetes", {**CLASSIC, "glucose": 7.0}, True),
    ("jbds-2023", "bicarbonate 16 and pH 7.31: no acidosis by JBDS", {**CLASSIC, "ph": 7.31, "bicarbonate": 16.0}, False),
    ("jbds-2023", "bicarbonate 14.9 with pH 7.32", {**CLASSIC, "ph": 7.32, "bicarbonate": 14.9}, True),
    ("jbds-2023", "glucose 11.0 without known diabetes", {**CLASSIC, "glucose": 11.0, "known_diabetes": False}, False),
    # ISPAD 2022 (Glaser 2022): glucose > 11; venous pH < 7.3 or bicarbonate < 18; BHB >= 3 or
    # moderate/large ketonuria.
    ("ispad-2022", "classic paediatric DKA", CLASSIC, True),
    ("ispad-2022", "bicarbonate 17 with pH 7.31 (2022 limit 18)", {**CLASSIC, "ph": 7.31, "bicarbonate": 17.0}, True),
    ("ispad-2022", "euglycaemic DKA is missed (glucose required)", {**CLASSIC, "glucose": 9.0}, False),
    ("ispad-2022", "small ketonuria (1+) only", {**CLASSIC, "bhb": None, "urine_ketones": 1}, False),
    ("ispad-2022", "moderate ketonuria (2+)", {**CLASSIC, "bhb": None, "urine_ketones": 2}, True),
]


@pytest.mark.parametrize(("name", "description", "row", "expected"), DIAGNOSIS_CASES, ids=[c[1] for c in DIAGNOSIS_CASES])
def test_worked_diagnosis(con: duckdb.DuckDBPyConnection, name: str, description: str, row: dict, expected: bool) -> None:
    fragment = compile_criterion(load_definition(name).diagnosis, **COLUMNS)
    assert _run(con, fragment, [row]) == [expected], description


SEVERITY_CASES = [
    # 2024 consensus: severe pH < 7.00 / bicarbonate < 10 / BHB > 6; moderate pH 7.00-7.25 /
    # bicarbonate 10 to < 15; mild pH > 7.25 to < 7.30 / bicarbonate 15 to < 18; worst band wins.
    ("consensus-2024", {"ph": 6.95, "bicarbonate": 8.0, "bhb": 7.0}, "severe"),
    ("consensus-2024", {"ph": 7.0, "bicarbonate": 12.0, "bhb": 4.0}, "moderate"),
    ("consensus-2024", {"ph": 7.25, "bicarbonate": 16.0, "bhb": 4.0}, "moderate"),
    ("consensus-2024", {"ph": 7.26, "bicarbonate": 16.0, "bhb": 4.0}, "mild"),
    ("consensus-2024", {"ph": 7.28, "bicarbonate": 9.5, "bhb": 4.0}, "severe"),    # worst of pH and bicarbonate
    ("consensus-2024", {"ph": 7.28, "bicarbonate": 16.0, "bhb": 6.5}, "severe"),   # BHB > 6
    ("consensus-2024", {"ph": None, "bicarbonate": 17.0, "bhb": 3.5}, "mild"),
    # ADA 2009 Table 1, gap 7.24-7.25 closed as moderate (file's reading).
    ("ada-2009", {"ph": 6.99, "bicarbonate": 12.0}, "severe"),
    ("ada-2009", {"ph": 7.245, "bicarbonate": 16.0}, "moderate"),
    ("ada-2009", {"ph": 7.25, "bicarbonate": 16.0}, "mild"),
    ("ada-2009", {"ph": 7.3, "bicarbonate": 18.0}, "mild"),
    ("ada-2009", {"ph": 7.28, "bicarbonate": 14.0}, "moderate"),
    ("ada-2009", {"ph": 7.35, "bicarbonate": 20.0}, None),
    # ISPAD 2022: severe pH < 7.1 or bicarbonate < 5; moderate pH < 7.2 or bicarbonate < 10.
    ("ispad-2022", {"ph": 7.05, "bicarbonate": 8.0}, "severe"),
    ("ispad-2022", {"ph": 7.1, "bicarbonate": 8.0}, "moderate"),
    ("ispad-2022", {"ph": 7.2, "bicarbonate": 10.0}, "mild"),
    ("ispad-2022", {"ph": 7.25, "bicarbonate": 4.0}, "severe"),
    # JBDS grades none.
    ("jbds-2023", {"ph": 6.9, "bicarbonate": 4.0, "bhb": 8.0}, None),
]


@pytest.mark.parametrize(("name", "row", "expected"), SEVERITY_CASES)
def test_worked_severity(con: duckdb.DuckDBPyConnection, name: str, row: dict, expected: str | None) -> None:
    fragment = compile_severity(load_definition(name).severity, **COLUMNS)
    assert _run(con, fragment, [row]) == [expected]


RESOLUTION_CASES = [
    # ADA 2009 [from memory]: glucose < 11.1 and two of bicarbonate >= 15, pH > 7.3, anion gap <= 12.
    ("ada-2009", {"glucose": 10.0, "bicarbonate": 16.0, "ph": 7.32, "anion_gap": 14.0}, True),
    ("ada-2009", {"glucose": 10.0, "bicarbonate": 16.0, "ph": 7.28, "anion_gap": 14.0}, False),  # only one of three
    ("ada-2009", {"glucose": 10.0, "bicarbonate": 13.0, "ph": 7.32, "anion_gap": 11.0}, True),
    ("ada-2009", {"glucose": 12.0, "bicarbonate": 20.0, "ph": 7.4, "anion_gap": 8.0}, False),    # glucose still high
    ("ada-2009", {"glucose": 10.0, "bicarbonate": 16.0, "ph": None, "anion_gap": None}, False),  # one known, two missing
    # 2024 consensus [from memory]: BHB < 0.6 and (pH >= 7.3 or bicarbonate >= 18); glucose not used.
    ("consensus-2024", {"bhb": 0.5, "ph": 7.3, "bicarbonate": 15.0, "glucose": 20.0}, True),
    ("consensus-2024", {"bhb": 0.5, "ph": 7.25, "bicarbonate": 18.0}, True),
    ("consensus-2024", {"bhb": 0.6, "ph": 7.4, "bicarbonate": 22.0}, False),
    ("consensus-2024", {"bhb": None, "ph": 7.4, "bicarbonate": 22.0}, False),
    # JBDS: ketones < 0.6 and venous pH > 7.3; bicarbonate not a criterion.
    ("jbds-2023", {"bhb": 0.4, "ph": 7.31, "bicarbonate": 14.0}, True),
    ("jbds-2023", {"bhb": 0.4, "ph": 7.3, "bicarbonate": 24.0}, False),
    # ISPAD [from memory]: pH > 7.30, bicarbonate > 15, and BHB < 1 or a closed anion gap.
    ("ispad-2022", {"ph": 7.31, "bicarbonate": 16.0, "bhb": 0.9}, True),
    ("ispad-2022", {"ph": 7.31, "bicarbonate": 16.0, "bhb": None, "anion_gap": 11.0}, True),
    ("ispad-2022", {"ph": 7.31, "bicarbonate": 15.0, "bhb": 0.5}, False),
]


@pytest.mark.parametrize(("name", "row", "expected"), RESOLUTION_CASES)
def test_worked_resolution(con: duckdb.DuckDBPyConnection, name: str, row: dict, expected: bool) -> None:
    fragment = compile_criterion(load_definition(name).resolution.when, **COLUMNS)
    assert _run(con, fragment, [row]) == [expected]
