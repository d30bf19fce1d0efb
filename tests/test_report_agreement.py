"""The report's agreement table: no hidden count follows from the sums published beside it.

Rule checked: in a table whose totals are published, a suppressed cell must not be the only
hidden cell of any additive group (complementary or "secondary" suppression; Hundepool A et al.,
Statistical Disclosure Control, Wiley 2012, chapter 4 on tabular data [from memory]). agreement.csv
publishes three sums per row: episodes_a = both + only_a, episodes_b = both_b + only_b and
visits = visits_both + visits_only_a + visits_only_b + visits_neither (cohort/_agreement.py).
"""

from __future__ import annotations

import polars as pl
import pytest

from cohort.report._html import AGREEMENT_SUMS, _suppress_agreement

HIDDEN = {"<10", "withheld"}


def _row(**values: object) -> pl.DataFrame:
    base = {"definition_a": "ada-2009", "definition_b": "consensus-2024", "episodes_a": 167, "episodes_b": 200,
            "both": 163, "both_b": 163, "only_a": 4, "only_b": 37, "visits": 645, "visits_both": 287,
            "visits_only_a": 1, "visits_only_b": 48, "visits_neither": 309, "kappa": 0.85}
    base.update(values)
    return pl.DataFrame([base])


def _assert_protected(shown: pl.DataFrame) -> None:
    for record in shown.iter_rows(named=True):
        for group in AGREEMENT_SUMS:
            hidden = [c for c in group if record[c] in HIDDEN]
            assert len(hidden) != 1, f"{group}: only {hidden} hidden, recoverable by subtraction: {record}"


def test_only_a_small_hides_a_second_cell_of_its_sum() -> None:
    # 167 - 163 = 4: with only_a hidden alone, the subtraction gives it back
    shown = _suppress_agreement(_row(visits_only_a=20), 10)
    record = shown.row(0, named=True)
    assert record["only_a"] == "<10"
    assert record["both"] == "withheld" or record["episodes_a"] == "withheld"
    _assert_protected(shown)


def test_small_visit_cell_withholds_kappa_and_a_second_visit_cell() -> None:
    shown = _suppress_agreement(_row(), 10)
    record = shown.row(0, named=True)
    assert record["visits_only_a"] == "<10"
    assert record["kappa"] is None
    _assert_protected(shown)


def test_large_counts_pass_unchanged() -> None:
    shown = _suppress_agreement(_row(only_a=40, episodes_a=203, visits_only_a=12, visits=656), 10)
    record = shown.row(0, named=True)
    assert record["only_a"] == "40" and record["episodes_a"] == "203" and record["kappa"] == pytest.approx(0.85)
    assert not any(value in HIDDEN for value in record.values())


@pytest.mark.parametrize("only_a", [1, 5, 9])
def test_every_small_value_is_protected(only_a: int) -> None:
    shown = _suppress_agreement(_row(only_a=only_a, episodes_a=163 + only_a, only_b=3, episodes_b=166), 10)
    _assert_protected(shown)
