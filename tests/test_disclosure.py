"""Small-cell suppression with secondary suppression.

The rule follows common practice of statistical disclosure control for frequency tables
(Hundepool A, Domingo-Ferrer J, Franconi L, et al. Statistical Disclosure Control. Wiley 2012,
chapter 4: primary suppression of small cells, then complementary suppression so that a
suppressed cell cannot be recovered from the margins). Issue 6 fixes the default threshold (10)
and "0 shown as 0". The expected tables below follow from that rule by hand.
"""

from __future__ import annotations

import doctest

import polars as pl
import pytest
from hypothesis import given
from hypothesis import strategies as st

import cohort.disclosure as disclosure
from cohort._errors import DisclosureError
from cohort.disclosure import suppress_counts


def test_docstring_examples_run() -> None:
    assert doctest.testmod(disclosure).failed == 0


def test_zero_shown_small_hidden_large_kept_and_one_complement() -> None:
    table = pl.DataFrame({"reason": ["a", "b", "c", "d"], "rows": [0, 3, 57, 12]})
    out = suppress_counts(table, ["rows"])
    # 3 is small -> "<10"; exactly one small cell, so the smallest other non-zero (12) is withheld
    assert out["rows"].to_list() == ["0", "<10", "57", "withheld"]


def test_two_small_cells_need_no_complement() -> None:
    table = pl.DataFrame({"reason": ["a", "b", "c"], "rows": [2, 9, 400]})
    assert suppress_counts(table, ["rows"])["rows"].to_list() == ["<10", "<10", "400"]


def test_threshold_is_exclusive_and_configurable() -> None:
    table = pl.DataFrame({"rows": [9, 10, 4, 5]})
    assert suppress_counts(table, ["rows"], group_by=[])["rows"].to_list() == ["<10", "10", "<10", "<10"]
    assert suppress_counts(table, ["rows"], threshold=5, group_by=[])["rows"].to_list() == ["9", "10", "<5", "5"]
    assert suppress_counts(table, ["rows"], threshold=1)["rows"].to_list() == ["9", "10", "4", "5"]


def test_groups_are_handled_separately() -> None:
    table = pl.DataFrame(
        {"source": ["m", "m", "m", "d", "d"], "reason": ["x", "y", "z", "x", "y"], "rows": [5, 20, 30, 40, 50]}
    )
    out = suppress_counts(table, ["rows"], group_by=["source"])
    assert out["rows"].to_list() == ["<10", "withheld", "30", "40", "50"]


def test_dependent_figures_are_withheld_with_their_count() -> None:
    table = pl.DataFrame({"group": ["a", "b", "c"], "n": [4, 50, 60], "median_hours": [11.0, 13.5, 14.0]})
    out = suppress_counts(table, ["n"], dependent_columns={"median_hours": "n"})
    assert out["median_hours"].to_list() == [None, None, 14.0]


def test_bad_arguments_are_named() -> None:
    with pytest.raises(DisclosureError, match="threshold must be a whole number"):
        suppress_counts(pl.DataFrame({"n": [1]}), ["n"], threshold=0)
    with pytest.raises(DisclosureError, match=r"columns \['m'\] not in the table"):
        suppress_counts(pl.DataFrame({"n": [1]}), ["m"])
    with pytest.raises(DisclosureError, match="negative counts"):
        suppress_counts(pl.DataFrame({"n": [-1, 3]}), ["n"])


@given(st.lists(st.integers(min_value=0, max_value=60), min_size=1, max_size=12))
def test_no_small_count_is_shown_or_recoverable_from_the_total(counts: list[int]) -> None:
    out = suppress_counts(pl.DataFrame({"n": counts}), ["n"])["n"].to_list()
    shown = [cell for cell in out if cell.isdigit()]
    assert all(int(cell) == 0 or int(cell) >= 10 for cell in shown)
    hidden = [count for count, cell in zip(counts, out, strict=True) if not cell.isdigit()]
    # the total minus the shown cells gives only the sum of the hidden ones: never a single small
    # count, unless no other non-zero cell exists to hide beside it (then the total is small too)
    if len(hidden) == 1:
        assert sum(counts) == hidden[0] < 10
