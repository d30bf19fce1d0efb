"""Lab state over time (sql/31_lab_state.sql): worked examples and a plain-Python reference.

The recipe is run on ``dka_lab_events`` / ``dka_person_diabetes`` tables built directly in a DuckDB
session (the intermediate-table contract of DEVELOPERS.md), gathered into time points by
``sql/21_lab_points.sql`` as a run does. Values are invented; the rules checked
are the recipe's own (bounded carry-forward, specimens, the anion gap formula).

Anion gap = Na - (Cl + HCO3), with potassium (Na + K) - (Cl + HCO3), measured sodium (CLINICAL.md
"Formulas and conversions", [S]).
"""

from __future__ import annotations

import datetime as dt
import math
from collections import defaultdict

import duckdb
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cohort._sql import Fragment, render_recipe, run_recipe
from cohort.episodes import STATE_ANALYTES

T0 = dt.datetime(2024, 3, 1, 8, 0)
SLOTS = {
    "diagnosis_lookback_hours": 6.0,
    "resolution_lookback_hours": 4.0,
    "anion_gap_pairing_minutes": 30.0,
    "ph_specimens": ("arterial", "venous", "capillary", "unspecified"),
    "bicarbonate_specimens": ("serum", "blood", "arterial", "venous", "total_co2"),
    "person_screen": Fragment("true"),
    "state_analytes": STATE_ANALYTES,
}
# several results at one time point (sql/21): most acidotic pH and bicarbonate, the midpoint of the
# lowest and highest sodium, chloride and potassium (their mean when there are two), else the highest
SAME_TIME = {"ph": min, "bicarbonate": min, "sodium": "mid", "chloride": "mid", "potassium": "mid"}


def at(minutes: float) -> dt.datetime:
    return T0 + dt.timedelta(minutes=minutes)


def session(events, diabetes=()):
    """A DuckDB session holding dka_lab_events (person, minutes, analyte, specimen, value) rows."""
    con = duckdb.connect()
    con.execute(
        "create temp table dka_lab_events (person_id bigint, measurement_id bigint, visit_occurrence_id bigint, "
        "event_datetime timestamp, analyte varchar, specimen varchar, value double)")
    rows = [(person, index + 1, 100 + person, at(minutes), analyte, specimen, float(value))
            for index, (person, minutes, analyte, specimen, value) in enumerate(events)]
    if rows:
        con.executemany("insert into dka_lab_events values (?, ?, ?, ?, ?, ?, ?)", rows)
    con.execute("create temp table dka_person_diabetes (person_id bigint, first_diabetes_datetime timestamp, "
                "diabetes_type varchar)")
    first: dict[int, float] = {}
    for person, minutes in diabetes:  # the contract: one row per person, the earliest record
        first[person] = min(first.get(person, minutes), minutes)
    for person, minutes in first.items():
        con.execute("insert into dka_person_diabetes values (?, ?, 'type1')", [person, at(minutes)])
    # the checked-rows contract sql/22 reads (sql/20): these rows are all usable
    con.execute("create temp view dka_measurement_checked as select person_id, measurement_id, "
                "cast(1 as bigint) as measurement_concept_id, visit_occurrence_id, event_datetime, "
                "analyte, specimen, value, "
                "cast(null as varchar) as reason, cast(null as varchar) as detail from dka_lab_events")
    run_recipe(con, "21_lab_points.sql", "dka_lab_points", {})
    return con


def state(con, slots=None, *, dialect="duckdb"):
    """Run sql/31; ``dialect`` picks the form of its carry-forward macro (cohort/_macros.py): the
    portable form is DuckDB SQL too, so both forms run here on the same rows."""
    sql = render_recipe("31_lab_state.sql", {**SLOTS, **(slots or {})}, dialect=dialect)
    con.execute(f"create or replace temp table dka_lab_state as\n{sql}")
    rows = con.sql("select * from dka_lab_state order by person_id, state_datetime").fetchall()
    names = [column[0] for column in con.sql("select * from dka_lab_state limit 0").description]
    return [dict(zip(names, row)) for row in rows]


def row_at(rows, person, minutes):
    [row] = [r for r in rows if r["person_id"] == person and r["state_datetime"] == at(minutes)]
    return row


# ----------------------------------------------------------------------------- worked examples
def test_value_carried_within_lookback_and_dropped_after():
    con = session([(1, 0, "bhb", "serum", 5.0), (1, 5 * 60, "glucose", "plasma", 20.0),
                   (1, 7 * 60, "glucose", "plasma", 15.0)])
    rows = state(con)
    assert [r["state_datetime"] for r in rows] == [at(0), at(300), at(420)]
    # 5 h after the ketone: inside the 6 h diagnosis look-back, outside the 4 h resolution one.
    assert row_at(rows, 1, 300)["dx_bhb"] == 5.0
    assert row_at(rows, 1, 300)["rs_bhb"] is None
    # 7 h after: outside both.
    assert row_at(rows, 1, 420)["dx_bhb"] is None
    assert row_at(rows, 1, 420)["dx_glucose"] == 15.0
    assert row_at(rows, 1, 0)["rs_bhb_datetime"] == at(0)


def test_lookback_bound_is_inclusive():
    con = session([(1, 0, "ph", "venous", 7.1), (1, 360, "glucose", "plasma", 20.0),
                   (1, 361, "glucose", "plasma", 21.0)])
    rows = state(con)
    assert row_at(rows, 1, 360)["dx_ph"] == 7.1      # exactly 6 h: still carried
    assert row_at(rows, 1, 361)["dx_ph"] is None     # 6 h 1 min: not


def test_only_accepted_specimens_count():
    con = session([(1, 0, "ph", "arterial", 7.0), (1, 10, "ph", "venous", 7.2),
                   (1, 20, "bicarbonate", "total_co2", 9.0), (1, 30, "glucose", "plasma", 20.0)])
    rows = state(con, {"ph_specimens": ("venous",), "bicarbonate_specimens": ("serum",)})
    assert row_at(rows, 1, 0 + 10)["dx_ph"] == 7.2
    assert row_at(rows, 1, 30)["dx_ph"] == 7.2
    assert row_at(rows, 1, 30)["dx_bicarbonate"] is None
    # the arterial-only and total-CO2-only time points are not time points at all
    assert [r["state_datetime"] for r in rows] == [at(10), at(30)]


def test_same_time_results_take_the_most_acidotic_ph():
    con = session([(1, 0, "ph", "arterial", 7.05), (1, 0, "ph", "venous", 7.02),
                   (1, 0, "glucose", "plasma", 25.0), (1, 0, "glucose", "capillary", 27.0)])
    row = row_at(state(con), 1, 0)
    assert row["dx_ph"] == 7.02
    assert row["dx_glucose"] == 27.0


def test_derived_anion_gap_pairs_within_window():
    # Na 140, Cl 100, HCO3 10 -> 140 - (100 + 10) = 30; with K 5: (140 + 5) - (100 + 10) = 35.
    con = session([(1, 0, "sodium", "serum", 140), (1, 0, "chloride", "serum", 100),
                   (1, 20, "bicarbonate", "serum", 10), (1, 20, "potassium", "serum", 5),
                   (2, 0, "sodium", "serum", 140), (2, 0, "chloride", "serum", 100),
                   (2, 45, "bicarbonate", "serum", 10)])
    rows = state(con)
    assert row_at(rows, 1, 20)["dx_anion_gap"] == pytest.approx(30.0)
    assert row_at(rows, 1, 20)["dx_anion_gap_with_k"] == pytest.approx(35.0)
    assert row_at(rows, 1, 20)["rs_anion_gap_datetime"] == at(20)
    # 45 min apart: more than the 30 min pairing window, no derived gap
    assert row_at(rows, 2, 45)["dx_anion_gap"] is None


def test_derived_anion_gap_is_carried_past_a_lone_new_result():
    # A panel at 0 gives a gap of 24; a blood-gas bicarbonate alone at 90 min cannot pair with
    # the 0-min sodium, so the panel's gap is carried (still inside the look-backs).
    con = session([(1, 0, "sodium", "serum", 136), (1, 0, "chloride", "serum", 100),
                   (1, 0, "bicarbonate", "serum", 12), (1, 90, "bicarbonate", "venous", 14)])
    row = row_at(state(con), 1, 90)
    assert row["dx_anion_gap"] == pytest.approx(24.0)
    assert row["rs_anion_gap_datetime"] == at(0)
    assert row["dx_bicarbonate"] == 14.0


def test_reported_anion_gap_wins_over_derived():
    con = session([(1, 0, "sodium", "serum", 136), (1, 0, "chloride", "serum", 100),
                   (1, 0, "bicarbonate", "serum", 12), (1, 0, "anion_gap", "serum", 22)])
    assert row_at(state(con), 1, 0)["dx_anion_gap"] == 22.0


def test_known_diabetes_from_the_record_time_on():
    con = session([(1, 0, "glucose", "plasma", 20), (1, 120, "glucose", "plasma", 21),
                   (2, 0, "glucose", "plasma", 20)], diabetes=[(1, 60)])
    rows = state(con)
    assert row_at(rows, 1, 0)["known_diabetes"] is False
    assert row_at(rows, 1, 120)["known_diabetes"] is True
    assert row_at(rows, 2, 0)["known_diabetes"] is False


def test_screen_drops_persons_but_changes_no_kept_row():
    events = [(1, 0, "bhb", "serum", 5.0), (1, 30, "ph", "venous", 7.1),
              (2, 0, "bhb", "serum", 0.2), (2, 30, "ph", "venous", 7.4)]
    full = state(session(events))
    screened = state(session(events), {"person_screen": Fragment("(person_extremes.max_bhb >= 3.0)")})
    assert {r["person_id"] for r in screened} == {1}
    assert screened == [r for r in full if r["person_id"] == 1]


def test_uncarried_analytes_keep_their_time_points_and_change_no_carried_value():
    # Toolkit rule (sql/31 header, common practice for a state table): the list of carried
    # analytes changes columns, never rows. An HbA1c-only time point (minute 90) stays a row and
    # still carries the bicarbonate of minute 60; the HbA1c and creatinine columns go null.
    events = [(1, 0, "glucose", "serum", 25.0), (1, 0, "sodium", "serum", 140.0),
              (1, 0, "chloride", "serum", 100.0), (1, 0, "bicarbonate", "serum", 10.0),
              (1, 60, "bicarbonate", "venous", 12.0), (1, 90, "hba1c", "blood", 9.1),
              (1, 120, "creatinine", "serum", 110.0)]
    carried = ("glucose", "ph", "bicarbonate", "bhb", "urine_ketones", "sodium", "chloride",
               "potassium", "anion_gap")
    full = state(session(events))
    pruned = state(session(events), {"state_analytes": carried})
    assert [r["state_datetime"] for r in pruned] == [r["state_datetime"] for r in full] == [
        at(0), at(60), at(90), at(120)]
    assert row_at(pruned, 1, 90)["dx_bicarbonate"] == 12.0
    # derived anion gap at minute 0: 140 - (100 + 10) = 30 (CLINICAL.md, formulas: Na - (Cl + HCO3))
    assert row_at(pruned, 1, 0)["dx_anion_gap"] == 30.0
    for full_row, pruned_row in zip(full, pruned):
        for column, value in pruned_row.items():
            dropped = any(column in (f"dx_{a}", f"rs_{a}", f"rs_{a}_datetime")
                          for a in ("hba1c", "creatinine", "anion_gap_with_k"))
            assert value == (None if dropped else full_row[column]), column
    assert row_at(full, 1, 90)["dx_hba1c"] == 9.1


def test_carried_analytes_of_the_bundled_definitions():
    # Each bundled definition's criteria name only glucose, pH, bicarbonate, BHB, urine ketones
    # and the anion gap (cohort/definitions/*.yaml, checked against CLINICAL.md by
    # tests/test_definitions_content.py); the onset contract adds potassium, the derived gap
    # sodium and chloride. HbA1c, creatinine and the gap with potassium are never carried.
    from cohort.definitions import load_definition
    from cohort.episodes import carried_analytes

    names = ("ada-2009", "consensus-2024", "jbds-2023", "ispad-2022")
    carried = carried_analytes([load_definition(name) for name in names])
    assert carried == ("glucose", "ph", "bicarbonate", "bhb", "urine_ketones", "sodium", "chloride",
                       "potassium", "anion_gap")
    assert set(carried) < set(STATE_ANALYTES)


# ----------------------------------------------------------------------------- reference
def reference_state(events, diabetes, slots):
    """Plain-Python lab state: same rules, written the obvious way (loops, no windows)."""
    dx_lb = dt.timedelta(hours=slots["diagnosis_lookback_hours"])
    rs_lb = dt.timedelta(hours=slots["resolution_lookback_hours"])
    pairing = dt.timedelta(minutes=slots["anion_gap_pairing_minutes"])
    values: dict[tuple[int, dt.datetime, str], list[float]] = defaultdict(list)
    for person, minutes, analyte, specimen, value in events:
        if analyte == "ph" and specimen not in slots["ph_specimens"]:
            continue
        if analyte == "bicarbonate" and specimen not in slots["bicarbonate_specimens"]:
            continue
        values[(person, at(minutes), analyte)].append(float(value))
    point: dict[tuple[int, dt.datetime, str], float] = {}
    for key, found in values.items():
        rule = SAME_TIME.get(key[2], max)
        point[key] = (min(found) + max(found)) / 2 if rule == "mid" else rule(found)
    persons = sorted({key[0] for key in point})
    first_diabetes = {}
    for person, minutes in diabetes:
        first_diabetes[person] = min(first_diabetes.get(person, at(minutes)), at(minutes))
    out = []
    for person in persons:
        times = sorted({key[1] for key in point if key[0] == person})
        series = {a: [(t, point[(person, t, a)]) for t in times if (person, t, a) in point] for a in STATE_ANALYTES}

        def last(analyte, when, series=series):
            before = [(t, v) for t, v in series[analyte] if t <= when]
            return before[-1] if before else None

        derived = {"anion_gap": [], "anion_gap_with_k": []}
        for when in times:
            parts = {a: last(a, when) for a in ("sodium", "chloride", "bicarbonate", "potassium")}
            for name, needed in (("anion_gap", ("sodium", "chloride", "bicarbonate")),
                                 ("anion_gap_with_k", ("sodium", "potassium", "chloride", "bicarbonate"))):
                if all(parts[a] is not None for a in needed):
                    stamps = [parts[a][0] for a in needed]
                    if max(stamps) - min(stamps) <= pairing and max(stamps) == when:
                        gap = parts["sodium"][1] - (parts["chloride"][1] + parts["bicarbonate"][1])
                        if name == "anion_gap_with_k":
                            gap += parts["potassium"][1]
                        derived[name].append((when, gap))
        for when in times:
            row = {"person_id": person, "state_datetime": when,
                   "known_diabetes": person in first_diabetes and first_diabetes[person] <= when}
            for analyte in STATE_ANALYTES:
                got = last(analyte, when)
                options = [got]
                if analyte in derived:
                    earlier = [(t, v) for t, v in derived[analyte] if t <= when]
                    options.append(earlier[-1] if earlier else None)
                for prefix, bound in (("dx", dx_lb), ("rs", rs_lb)):
                    chosen = next((o for o in options if o is not None and o[0] >= when - bound), None)
                    row[f"{prefix}_{analyte}"] = chosen[1] if chosen else None
                    if prefix == "rs":
                        row[f"rs_{analyte}_datetime"] = chosen[0] if chosen else None
            out.append(row)
    return out


_event = st.tuples(
    st.integers(1, 3),
    st.integers(0, 16).map(lambda slot: slot * 25),        # minutes on a 25-min grid: ties happen
    st.sampled_from(STATE_ANALYTES),
    st.sampled_from(["serum", "venous", "arterial", "total_co2", "capillary"]),
    st.integers(0, 200).map(lambda x: x / 4),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(events=st.lists(_event, min_size=1, max_size=40),
       diabetes=st.lists(st.tuples(st.integers(1, 3), st.integers(0, 400)), max_size=3),
       dx_hours=st.sampled_from([1.0, 2.5, 6.0]),
       rs_hours=st.sampled_from([0.5, 1.0, 4.0]),
       pairing=st.sampled_from([0.0, 30.0, 60.0]),
       ph_specimens=st.sampled_from([("venous",), ("arterial", "venous", "capillary", "unspecified")]),
       bicarbonate_specimens=st.sampled_from([("serum",), ("serum", "venous", "total_co2")]))
def test_window_form_equals_plain_python_reference(events, diabetes, dx_hours, rs_hours, pairing,
                                                   ph_specimens, bicarbonate_specimens):
    """Both forms of the carry-forward (DuckDB's and the portable one other engines run) == loops
    (the property test STYLE.md habit 9 asks for)."""
    slots = {**SLOTS, "diagnosis_lookback_hours": dx_hours, "resolution_lookback_hours": rs_hours,
             "anion_gap_pairing_minutes": pairing, "ph_specimens": ph_specimens,
             "bicarbonate_specimens": bicarbonate_specimens}
    con = session(events, diabetes)
    got = state(con, slots)
    assert state(con, slots, dialect="postgres") == got
    want = reference_state(events, diabetes, slots)
    assert [(r["person_id"], r["state_datetime"]) for r in got] == \
        [(r["person_id"], r["state_datetime"]) for r in want]
    for got_row, want_row in zip(got, want):
        for key, expected in want_row.items():
            value = got_row[key]
            if isinstance(expected, float):
                assert value is not None and math.isclose(value, expected, abs_tol=1e-9), (key, got_row, want_row)
            else:
                assert value == expected, (key, got_row, want_row)
