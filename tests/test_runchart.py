"""Run-chart rules (cohort.report._runchart) against the published rules and reference distributions.

Rules: Perla RJ, Provost LP, Murray SK. The run chart: a simple analytical tool for learning from
variation in healthcare processes. BMJ Qual Saf 2011;20:46-51 (rule text and Table 1).
"""

from __future__ import annotations

import itertools
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cohort._errors import InputError
from cohort.report._runchart import (
    analyse_run_chart,
    astronomical_points,
    count_runs,
    exact_runs_distribution,
    exact_runs_limits,
    median_line,
    perla_runs_table,
    runs_limits,
    shift_signals,
    trend_signals,
)


# --------------------------------------------------------------------------- shift
def test_shift_needs_six_points_on_one_side():
    # Perla et al. 2011, rule 1: "six or more consecutive points either all above or all below
    # the median"; five are not a shift.
    assert shift_signals([9, 9, 9, 9, 9, 1, 1], median=5) == []
    assert shift_signals([9, 9, 9, 9, 9, 9, 1], median=5) == [(0, 1, 2, 3, 4, 5)]


def test_points_on_the_median_neither_break_nor_count_for_a_shift():
    # Perla et al. 2011, rule 1: "Values that fall on the median do not add to nor break a shift.
    # Skip values that fall on the median and continue counting."
    series = [9, 9, 9, 5, 9, 9, 9, 1]
    assert shift_signals(series, median=5) == [(0, 1, 2, 4, 5, 6)]
    # five above with a median point among them are still only five
    assert shift_signals([9, 9, 5, 9, 9, 9, 1], median=5) == []


# --------------------------------------------------------------------------- trend
def test_trend_needs_five_points_going_one_way():
    # Perla et al. 2011, rule 2: "five points or more all going up or all going down".
    assert trend_signals([1, 2, 3, 4, 2]) == []
    assert trend_signals([1, 2, 3, 4, 5, 2]) == [(0, 1, 2, 3, 4)]
    assert trend_signals([9, 7, 5, 3, 1]) == [(0, 1, 2, 3, 4)]


def test_equal_neighbours_count_once_in_a_trend():
    # Perla et al. 2011, rule 2: "If the value of two or more successive points is the same,
    # ignore one of the points when counting; like values do not make or break a trend."
    assert trend_signals([1, 2, 2, 3, 4]) == []               # only four distinct steps
    assert trend_signals([1, 2, 2, 3, 4, 5]) == [(0, 1, 2, 3, 4, 5)]


# --------------------------------------------------------------------------- runs
def test_runs_counted_across_the_median_points_on_it_left_out():
    # Perla et al. 2011, rule 3: a run is one or more consecutive points on one side of the
    # median; points on the median are ignored; number of runs = crossings + 1.
    assert count_runs([1, 9, 5, 9, 1, 1, 9], median=5) == (4, 6)


def test_too_few_runs_worked_example_of_16_points():
    # Balestracci D. An underrated test for run charts. Quality Digest, October 2008, figures 1-2:
    # 16 points in runs of 7 above, 7 below, 1 above, 1 below give 4 runs, and with 16 points
    # 5 or more runs are expected, so the chart has too few runs. (The series values are ours;
    # the pattern and the conclusion are the article's.)
    series = [20] * 7 + [10] * 7 + [20, 10]
    result = analyse_run_chart(series)
    assert (result.runs, result.useful_observations) == (4, 16)
    assert result.runs_limits is not None and result.runs_limits[0] == 5
    assert result.fired("too_few_runs")


def test_too_many_runs_alternating_series():
    # Perla et al. 2011, rule 3 and Table 1: 20 useful observations alternating about the median
    # make 20 runs, above the table's upper limit for 20 (16 [from memory]).
    result = analyse_run_chart([1, 9] * 10)
    assert result.runs == 20
    assert result.fired("too_many_runs") and not result.fired("too_few_runs")


def test_runs_rule_not_applied_below_ten_useful_observations():
    # Perla et al. 2011, Table 1 starts at 10 useful observations.
    assert runs_limits(9) is None
    assert not analyse_run_chart([1, 9, 1, 9, 1, 9, 1, 9, 1]).fired("too_many_runs")


def _brute_force_runs(above: int, below: int) -> dict[int, float]:
    # every distinct arrangement = every choice of the positions of the "above" points
    n = above + below
    counts: dict[int, int] = {}
    total = 0
    for positions in itertools.combinations(range(n), above):
        chosen = set(positions)
        arrangement = [index in chosen for index in range(n)]
        runs = 1 + sum(1 for x, y in zip(arrangement, arrangement[1:]) if x != y)
        counts[runs] = counts.get(runs, 0) + 1
        total += 1
    return {runs: count / total for runs, count in counts.items()}


@pytest.mark.parametrize(("above", "below"), [(2, 2), (3, 4), (5, 5), (4, 7), (6, 6)])
def test_exact_runs_distribution_equals_enumeration(above, below):
    # Swed F, Eisenhart C. Ann Math Stat 1943;14:66-87: the number of runs of a random arrangement;
    # checked here against enumerating every distinct arrangement.
    exact = exact_runs_distribution(above, below)
    brute = _brute_force_runs(above, below)
    assert exact.keys() == brute.keys()
    for runs, probability in brute.items():
        assert exact[runs] == pytest.approx(probability, abs=1e-12)


@pytest.mark.parametrize(("above", "below"), [(5, 5), (10, 12), (30, 30), (17, 40)])
def test_exact_runs_distribution_mean_and_variance(above, below):
    # Wald A, Wolfowitz J. On a test whether two samples are from the same population. Ann Math
    # Stat 1940;11:147-162: E[R] = 1 + 2ab/(a+b); Var[R] = 2ab(2ab-a-b)/((a+b)^2 (a+b-1)).
    distribution = exact_runs_distribution(above, below)
    n = above + below
    mean = sum(runs * p for runs, p in distribution.items())
    variance = sum((runs - mean) ** 2 * p for runs, p in distribution.items())
    assert sum(distribution.values()) == pytest.approx(1.0, abs=1e-12)
    assert mean == pytest.approx(1 + 2 * above * below / n, rel=1e-12)
    assert variance == pytest.approx(2 * above * below * (2 * above * below - n) / (n**2 * (n - 1)), rel=1e-10)


def test_bundled_table_agrees_with_the_exact_distribution():
    # Perla et al. 2011 Table 1 [from memory: the bundled values were typed from memory] is
    # derived from Swed and Eisenhart (1943) "based on about a 5% risk". Every bundled limit must
    # lie within one run of the exact limit at 2.5% or at 5% per tail; the first row (10 useful
    # observations: 3 and 9) equals the exact 2.5%-per-tail limits.
    table = perla_runs_table()
    assert sorted(table) == list(range(10, 61))
    for useful, (fewest, most) in table.items():
        strict, loose = exact_runs_limits(useful, tail=0.025), exact_runs_limits(useful, tail=0.05)
        assert min(abs(fewest - strict[0]), abs(fewest - loose[0])) <= 1, useful
        assert min(abs(most - strict[1]), abs(most - loose[1])) <= 1, useful
        assert fewest < most
    assert table[10] == exact_runs_limits(10, tail=0.025) == (3, 9)


def test_limits_beyond_the_table_use_the_exact_distribution():
    limits = runs_limits(80)
    assert limits == exact_runs_limits(80)
    distribution = exact_runs_distribution(40, 40)
    assert sum(p for runs, p in distribution.items() if runs < limits[0]) <= 0.025
    assert sum(p for runs, p in distribution.items() if runs < limits[0] + 1) > 0.025


# --------------------------------------------------------------------------- astronomical
def test_astronomical_point_beyond_tukey_outer_fence():
    # Operational reading (module notes): Tukey JW. Exploratory Data Analysis, 1977, "far out"
    # values beyond Q3 + 3 IQR; the highest point of an ordinary series is not astronomical
    # (Perla et al. 2011: "every data set will have a high and a low").
    ordinary = [10, 12, 11, 13, 9, 14, 10, 12]
    assert astronomical_points(ordinary) == ()
    assert astronomical_points([*ordinary, 40]) == (8,)


# --------------------------------------------------------------------------- whole analysis
def test_missing_points_are_skipped_and_indices_keep_their_positions():
    series = [1, None, 2, 3, float("nan"), 4, 5, 9]
    assert median_line(series) == 3.5
    assert trend_signals(series) == [(0, 2, 3, 5, 6, 7)]


def test_empty_and_bad_input():
    assert analyse_run_chart([None, None]).signals == ()
    with pytest.raises(InputError, match="finite"):
        analyse_run_chart([1, math.inf])
    with pytest.raises(InputError, match="numbers"):
        analyse_run_chart(["a", 2])


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=0, max_value=20), min_size=1, max_size=40))
def test_mirroring_the_series_mirrors_every_rule(values):
    # Invariance: negating the values swaps above/below and up/down; no rule changes its points.
    original = analyse_run_chart(values)
    mirrored = analyse_run_chart([-value for value in values])
    assert (original.runs, original.useful_observations) == (mirrored.runs, mirrored.useful_observations)
    for rule in ("shift", "trend", "too_few_runs", "too_many_runs"):
        assert original.points(rule) == mirrored.points(rule)
