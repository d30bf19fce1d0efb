"""p-chart limits (cohort.report._control) against a textbook worked example."""

from __future__ import annotations

import numpy as np
import pytest

from cohort._errors import InputError
from cohort.report._control import p_chart

# Montgomery DC. Introduction to Statistical Quality Control (6th ed., Wiley 2009), chapter 7
# "Control charts for attributes", Example 7.1 (frozen orange juice cans, 30 samples of n = 50,
# 347 nonconforming cans): p-bar = 0.2313, UCL = 0.4102, LCL = 0.0524; samples 15 and 23 plot
# above the UCL. [from memory: numbers and sample values recalled, not checked against the book]
ORANGE_JUICE = [12, 15, 8, 10, 4, 7, 16, 9, 14, 10, 5, 6, 17, 12, 22, 8, 10, 5, 13, 11, 20, 18, 24, 15, 9,
                12, 7, 13, 9, 6]


def test_montgomery_orange_juice_example():
    chart = p_chart(ORANGE_JUICE, [50] * 30)
    assert sum(ORANGE_JUICE) == 347
    assert chart.centre == pytest.approx(0.2313, abs=5e-5)
    assert chart.upper == pytest.approx(np.full(30, 0.4102), abs=5e-5)
    assert chart.lower == pytest.approx(np.full(30, 0.0524), abs=5e-5)
    assert [index + 1 for index in chart.outside] == [15, 23]


def test_limits_widen_for_small_subgroups_and_clip_at_zero_and_one():
    # Montgomery, same chapter: with variable sample size the limits are p-bar +/- 3
    # sqrt(p-bar (1 - p-bar) / n_i); a negative lower limit is set to 0.
    chart = p_chart([1, 10, 50], [10, 100, 500])
    half = 3 * np.sqrt(chart.centre * (1 - chart.centre) / np.array([10, 100, 500]))
    assert chart.upper == pytest.approx(np.minimum(chart.centre + half, 1.0))
    assert chart.lower == pytest.approx(np.maximum(chart.centre - half, 0.0))
    assert chart.lower[0] == 0.0
    high = p_chart([9, 98], [10, 100])
    assert high.upper[0] == 1.0


def test_empty_subgroup_has_no_limits():
    chart = p_chart([5, 0], [20, 0])
    assert np.isnan(chart.share[1]) and np.isnan(chart.upper[1])
    assert chart.outside == ()


@pytest.mark.parametrize(
    ("numerators", "denominators", "match"),
    [([1, 2], [5], "one length"), ([6], [5], "numerator <= denominator"), ([-1], [5], "whole"),
     ([0], [0], "every denominator is 0")],
)
def test_bad_counts(numerators, denominators, match):
    with pytest.raises(InputError, match=match):
        p_chart(numerators, denominators)
