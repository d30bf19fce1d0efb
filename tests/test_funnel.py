"""Funnel-plot limits (cohort.report._funnel) against the binomial distribution of scipy.

Spiegelhalter DJ. Funnel plots for comparing institutional performance. Stat Med
2005;24:1185-1202: exact binomial limits with interpolation between the discrete steps. No value
printed in the paper is used here: none could be confirmed (the checks are against
scipy.stats.binom and the normal approximation the paper says the exact limits approach).
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from cohort._errors import InputError
from cohort.report._funnel import binomial_limit, funnel_limits, funnel_position


@settings(max_examples=80, deadline=None)
@given(
    target=st.floats(min_value=0.02, max_value=0.98),
    n=st.integers(min_value=1, max_value=2000),
    p=st.sampled_from([0.001, 0.025, 0.975, 0.999]),
)
def test_limit_interpolates_within_the_binomial_quantile_step(target, n, p):
    # r_p = smallest r with P(R <= r) >= p (scipy's binom.ppf); the limit lies in [(r_p-1)/n, r_p/n]
    # and the interpolation weight recovers p on the binomial cdf.
    r_p = stats.binom.ppf(p, n, target)
    limit = binomial_limit(target, n, p)
    assert (r_p - 1) / n - 1e-12 <= limit <= r_p / n + 1e-12
    at, below = stats.binom.cdf(r_p, n, target), stats.binom.cdf(r_p - 1, n, target)
    alpha = r_p - limit * n
    if 0 < limit < 1:
        assert at - alpha * (at - below) == pytest.approx(p, abs=1e-9)


@pytest.mark.parametrize("target", [0.1, 0.5, 0.8])
@pytest.mark.parametrize(("p", "z"), [(0.975, 1.959964), (0.999, 3.090232), (0.025, -1.959964)])
def test_large_denominators_approach_the_normal_limits(target, p, z):
    # Spiegelhalter 2005: for large n the exact limits approach target +/- z sqrt(target(1-target)/n);
    # z from the standard normal quantiles (0.975: 1.959964; 0.999: 3.090232).
    n = 20000
    normal = target + z * (target * (1 - target) / n) ** 0.5
    assert binomial_limit(target, n, p) == pytest.approx(normal, abs=3 / n)


def test_funnel_narrows_with_the_denominator():
    table = funnel_limits(0.8, [10, 50, 200, 1000])
    widths = (table["upper_99_8"] - table["lower_99_8"]).to_list()
    assert widths == sorted(widths, reverse=True)
    assert (table["lower_99_8"] <= table["lower_95"]).all() and (table["upper_95"] <= table["upper_99_8"]).all()


def test_positions():
    assert funnel_position(80, 100, 0.8) == "within"
    assert funnel_position(95, 100, 0.8) == "above_99_8"
    assert funnel_position(60, 100, 0.8) == "below_99_8"
    share95 = binomial_limit(0.8, 100, 0.975)
    share998 = binomial_limit(0.8, 100, 0.999)
    count = next(k for k in range(101) if share95 < k / 100 <= share998)
    assert funnel_position(count, 100, 0.8) == "above_95"


@pytest.mark.parametrize(("target", "n", "match"), [(0.0, 10, "strictly between"), (0.5, 0, "whole number")])
def test_bad_input(target, n, match):
    with pytest.raises(InputError, match=match):
        binomial_limit(target, n, 0.975)
