"""Agreement between finders: Cohen's kappa on hand-computed 2x2 tables, episode matching.

Kappa: Cohen J. A coefficient of agreement for nominal scales. Educational and Psychological
Measurement 1960;20(1):37-46: kappa = (p_o - p_e) / (1 - p_e). Checked by hand and against
scikit-learn's ``sklearn.metrics.cohen_kappa_score`` (a general reference library).
"""

from __future__ import annotations

import datetime as dt
import math

import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import cohen_kappa_score

from cohort._agreement import AGREEMENT_COLUMNS, agreement_table, cohens_kappa, match_episodes, visit_table
from cohort._errors import InputError


def labels(both, only_a, only_b, neither):
    a = [1] * both + [1] * only_a + [0] * only_b + [0] * neither
    b = [1] * both + [0] * only_a + [1] * only_b + [0] * neither
    return a, b


def test_kappa_hand_computed_2x2():
    # 50 items: both 20, A only 5, B only 10, neither 15.
    # p_o = (20 + 15) / 50 = 0.70; A yes 25/50 = 0.5, B yes 30/50 = 0.6;
    # p_e = 0.5 * 0.6 + 0.5 * 0.4 = 0.50; kappa = (0.70 - 0.50) / (1 - 0.50) = 0.40.
    assert cohens_kappa(20, 5, 10, 15) == pytest.approx(0.40)
    assert cohens_kappa(20, 5, 10, 15) == pytest.approx(cohen_kappa_score(*labels(20, 5, 10, 15)))


def test_kappa_perfect_and_chance_agreement():
    assert cohens_kappa(10, 0, 0, 40) == pytest.approx(1.0)
    # A and B independent with margins 0.5 / 0.5: p_o = p_e = 0.5, kappa 0
    assert cohens_kappa(25, 25, 25, 25) == pytest.approx(0.0)
    # all disagreement with balanced margins: p_o = 0, p_e = 0.5, kappa -1
    assert cohens_kappa(0, 10, 10, 0) == pytest.approx(-1.0)


def test_kappa_undefined_when_chance_agreement_is_certain():
    assert math.isnan(cohens_kappa(0, 0, 0, 12))


def test_kappa_refuses_bad_counts():
    with pytest.raises(InputError, match="four counts"):
        cohens_kappa(-1, 0, 0, 3)
    with pytest.raises(InputError, match="at least one item"):
        cohens_kappa(0, 0, 0, 0)


@given(st.tuples(*[st.integers(0, 30)] * 4).filter(lambda cells: sum(cells) > 0))
@settings(deadline=None)  # the first call imports scikit-learn; on a shared machine that took 318 ms
def test_kappa_equals_sklearn(cells):
    both, only_a, only_b, neither = cells
    ours = cohens_kappa(*cells)
    a, b = labels(*cells)
    if math.isnan(ours):
        assert len(set(a) | set(b)) == 1
        return
    assert ours == pytest.approx(cohen_kappa_score(a, b), abs=1e-12)


def frame(rows):
    return pl.DataFrame(rows, schema={"person_id": pl.Int64, "onset_datetime": pl.Datetime("us"),
                                      "end_datetime": pl.Datetime("us"), "visit_occurrence_id": pl.Int64},
                        orient="row")


def at(day, hour):
    return dt.datetime(2024, 3, day, hour)


def test_match_by_person_and_overlap():
    a = frame([(1, at(1, 9), at(1, 20), 10),      # overlaps b's first
               (1, at(10, 9), at(10, 20), 11),    # no b episode then
               (2, at(1, 9), at(1, 20), 20)])     # same time, other person in b: no match
    b = frame([(1, at(1, 20), at(2, 9), 10),      # touches a's end at 20:00: inclusive overlap
               (3, at(1, 9), at(1, 20), 30)])
    assert match_episodes(a, b) == {"episodes_a": 3, "episodes_b": 2, "both": 1, "both_b": 1,
                                    "only_a": 2, "only_b": 1}


def test_one_long_episode_overlapping_two():
    a = frame([(1, at(1, 0), at(5, 0), 10)])
    b = frame([(1, at(1, 6), at(1, 12), 10), (1, at(3, 6), at(3, 12), 11)])
    assert match_episodes(a, b)["both"] == 1
    assert match_episodes(a, b)["both_b"] == 2


def test_visit_table_and_stays():
    assert visit_table([1, 2], [2, 3], range(1, 11)) == {
        "visits": 10, "visits_both": 1, "visits_only_a": 1, "visits_only_b": 1, "visits_neither": 7}
    # an emergency visit 5 and the admission 6 it led to are one stay: A links 5, B links 6
    a = frame([(1, at(1, 9), at(1, 20), 5)])
    b = frame([(1, at(1, 12), at(2, 9), 6)])
    table = agreement_table({"a": a, "b": b}, [5, 6, 7, 8], stays={5: 5, 6: 5, 7: 7, 8: 8})
    row = table.row(0, named=True)
    assert tuple(table.columns) == AGREEMENT_COLUMNS
    assert (row["visits"], row["visits_both"], row["visits_only_a"], row["visits_only_b"],
            row["visits_neither"]) == (3, 1, 0, 0, 2)
    assert row["kappa"] == pytest.approx(1.0)
    plain = agreement_table({"a": a, "b": b}, [5, 6, 7, 8]).row(0, named=True)
    assert (plain["visits_both"], plain["visits_only_a"], plain["visits_only_b"]) == (0, 1, 1)


def test_agreement_rows_per_pair():
    a = frame([(1, at(1, 9), at(1, 20), 10)])
    table = agreement_table({"x": a, "y": a, "z": a.head(0)}, [10, 11])
    assert table.select("definition_a", "definition_b").rows() == [("x", "y"), ("x", "z"), ("y", "z")]
    assert table.row(0, named=True)["kappa"] == pytest.approx(1.0)
