"""Incidence rates, exact Poisson limits, direct standardisation, rate ratios (cohort.stats)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from cohort import InputError
from cohort.stats import (
    age_standardised_rates,
    fay_feuer_interval,
    incidence_rates,
    parse_age_band,
    poisson_exact_interval,
    rate_regression,
    standard_population,
)

DATA = Path(__file__).parent / "data" / "stats"

# Exact (Garwood 1936) 95% limits for a Poisson count, as tabulated in handbooks (e.g. the
# table of exact Poisson confidence limits reproduced in Breslow NE, Day NE, Statistical Methods
# in Cancer Research vol. II, IARC 1987) [from memory, four significant figures], except where
# a source seen is named: x = 0 upper 3.689 (epitools R package manual, pois.exact: "When x = 0
# ... pois.exact returns 3.689"); x = 10: 4.80 to 18.39 (calculatorhub.com Poisson confidence
# interval calculator, Garwood method); x = 25 (GraphPad QuickCalcs FAQ "How QuickCalcs computes
# the confidence interval of a count", Garwood method): 95% 16.18 to 36.90, 90% 17.38 to 34.92,
# 99% 14.00 to 41.00.
GARWOOD_95 = {
    0: (0.0, 3.689),
    1: (0.0253, 5.572),
    2: (0.2422, 7.225),
    3: (0.6186, 8.767),
    4: (1.090, 10.24),
    5: (1.623, 11.67),
    10: (4.795, 18.39),
}


@pytest.mark.parametrize(("count", "limits"), sorted(GARWOOD_95.items()))
def test_exact_poisson_limits_match_the_published_table(count, limits):
    lower, upper = poisson_exact_interval(count)
    assert lower == pytest.approx(limits[0], rel=5e-4, abs=5e-5)
    assert upper == pytest.approx(limits[1], rel=5e-4)


@pytest.mark.parametrize(("alpha", "limits"), [(0.05, (16.18, 36.90)), (0.10, (17.38, 34.92)),
                                               (0.01, (14.00, 41.00))])
def test_exact_poisson_limits_for_25_match_graphpad(alpha, limits):
    lower, upper = poisson_exact_interval(25, alpha=alpha)
    assert (round(lower, 2), round(upper, 2)) == limits


def test_incidence_rates_per_1000_person_years_by_stratum():
    t = pl.DataFrame({"sex": ["F", "F", "M"], "diabetes_type": ["type1", "type2", "type1"],
                      "episodes": [6, 4, 0], "person_years": [1200.0, 800.0, 500.0]})
    out = incidence_rates(t, by="sex").sort("sex")
    female = out.row(0, named=True)
    assert female["events"] == 10 and female["person_years"] == 2000.0
    assert female["estimate"] == pytest.approx(5.0)  # 10 / 2000 x 1000
    assert female["lower"] == pytest.approx(4.795 / 2, rel=1e-3)
    assert female["upper"] == pytest.approx(18.39 / 2, rel=1e-3)
    male = out.row(1, named=True)
    assert male["estimate"] == 0 and male["upper"] == pytest.approx(3.689 / 500 * 1000, rel=1e-3)
    both = incidence_rates(t, by=["sex", "diabetes_type"])
    assert both.height == 3
    overall = incidence_rates(t)
    assert overall["events"][0] == 10


def test_direct_standardisation_matches_frome_worked_example():
    """Frome EL (Oak Ridge National Laboratory), "Directly adjusted rates" worked example,
    Example 1 (ten-year intervals, US 1970 standard weights): R = 19.3490, seR = 6.2478."""
    ex = pl.read_csv(DATA / "frome_direct_adjustment_example1.csv")
    t = ex.select("age_band", pl.col("events").alias("episodes"),
                  (pl.col("events") / pl.col("rate_printed")).alias("person_years"))
    standard = ex.select("age_band", pl.col("weight").alias("population"))
    out = age_standardised_rates(t, standard=standard, per=1.0).row(0, named=True)
    assert out["estimate"] == pytest.approx(19.3490, abs=5e-4)
    assert out["se"] == pytest.approx(6.2478, abs=5e-4)
    assert out["standard"] == "user-supplied" and out["bands"] == 5
    # The page's second interval is log-normal: R exp(+-1.96 seR / R) = 10.2754 to 36.4347;
    # the gamma interval (Fay and Feuer 1997) is wider below and above for 22 events.
    assert out["lower"] < 10.2754 and out["upper"] > 36.4347
    # And with the printed person-time (rounded to 4 decimals) the rate agrees to 0.1%.
    printed = ex.select("age_band", pl.col("events").alias("episodes"),
                        pl.col("person_time_printed").alias("person_years"))
    rough = age_standardised_rates(printed, standard=standard, per=1.0)["estimate"][0]
    assert rough == pytest.approx(19.349, rel=1e-3)


def test_fay_feuer_is_exact_poisson_when_standard_is_proportional_to_the_study():
    """Fay and Feuer (1997, abstract and section 2): the gamma interval is exact whenever the
    standard population is proportional to the study population."""
    t = pl.DataFrame({"age_band": ["18-39", "40-64", "65+"], "episodes": [3, 7, 12],
                      "person_years": [3000.0, 2500.0, 1500.0]})
    standard = t.select("age_band", pl.col("person_years").alias("population"))
    out = age_standardised_rates(t, standard=standard).row(0, named=True)
    lower, upper = poisson_exact_interval(22)
    assert out["estimate"] == pytest.approx(22 / 7000 * 1000)
    assert out["lower"] == pytest.approx(lower / 7000 * 1000, rel=1e-10)
    assert out["upper"] == pytest.approx(upper / 7000 * 1000, rel=1e-10)


def test_fay_feuer_zero_events_upper_limit():
    # y = 0, v = 0: upper = w_M x gamma quantile with shape 1 = w_M x 3.689 (Fay and Feuer 1997).
    out = fay_feuer_interval(np.array([0.0, 0.0]), np.array([0.2, 0.5]))
    assert out["estimate"] == 0 and out["lower"] == 0
    assert out["upper"] == pytest.approx(0.5 * 3.6889, rel=1e-4)


def test_bundled_standards_sum_as_published():
    esp = standard_population("esp2013")
    assert esp.height == 19 and esp["population"].sum() == 100_000
    assert esp.filter(age_band="90+")["population"][0] == 1000
    who = standard_population("who2000")
    assert who.height == 21 and who["population"].sum() == 100_035  # as published (rounded)
    assert who["weight"].sum() == pytest.approx(1.0)
    with pytest.raises(InputError, match="unknown standard population"):
        standard_population("us2000")


def test_adult_bands_take_their_share_of_the_standard():
    """ESP 2013, band 18-24: 2/5 of 15-19 (5,500) + 20-24 (6,000) = 8,200; band 25+ takes the
    rest of ages 25 and over (100,000 - 27,500 under 25 = 72,500). With equal
    rates in both bands the standardised rate equals that rate."""
    t = pl.DataFrame({"age_band": ["18-24", "25+"], "episodes": [4, 20],
                      "person_years": [1000.0, 5000.0]})
    out = age_standardised_rates(t).row(0, named=True)
    assert out["estimate"] == pytest.approx(4.0)
    t2 = t.with_columns(episodes=pl.Series([8, 20]))
    expected = (8200 * 8 / 1000 + 72500 * 20 / 5000) / (8200 + 72500) * 1000
    assert age_standardised_rates(t2)["estimate"][0] == pytest.approx(expected)


def test_standardised_rates_by_group_and_band_checks():
    t = pl.DataFrame({"sex": ["F", "F", "M", "M"], "age_band": ["18-44", "45+"] * 2,
                      "episodes": [2, 9, 1, 0], "person_years": [900.0, 700.0, 800.0, 0.0]})
    out = age_standardised_rates(t, by="sex", standard="who2000").sort("sex")
    assert out["sex"].to_list() == ["F", "M"]
    assert "45+" in out.filter(sex="M")["note"][0]
    with pytest.raises(InputError, match="events but no person-time"):
        age_standardised_rates(t.with_columns(episodes=pl.Series([2, 9, 1, 3])), by="sex")
    with pytest.raises(InputError, match="overlap"):
        age_standardised_rates(t.with_columns(age_band=pl.Series(["18-44", "40+"] * 2)))
    with pytest.raises(InputError, match="cuts the open standard band"):
        age_standardised_rates(t.with_columns(age_band=pl.Series(["18-91", "92+"] * 2)))
    assert parse_age_band("90+") == (90, float("inf"))
    with pytest.raises(InputError, match="not of the form"):
        parse_age_band("adults")


def test_poisson_rate_ratio_equals_ratio_of_rates_with_textbook_se():
    """One binary covariate: the Poisson MLE rate ratio is the ratio of crude rates and the SE
    of its log is sqrt(1/d1 + 1/d0) (Rothman KJ, Greenland S, Lash TL. Modern Epidemiology,
    3rd ed. 2008, ch. 14)."""
    t = pl.DataFrame({"sglt2i": [1, 1, 0, 0], "age_band": ["18-44", "45+"] * 2,
                      "episodes": [12, 18, 20, 25], "person_years": [400.0, 600.0, 1500.0, 1600.0]})
    fit = rate_regression(t, covariates=["sglt2i"])
    row = fit.filter(term="sglt2i").row(0, named=True)
    assert row["estimate"] == pytest.approx((30 / 1000) / (45 / 3100), rel=1e-7)
    assert row["se"] == pytest.approx(np.sqrt(1 / 30 + 1 / 45), rel=1e-6)
    assert fit.filter(term="intercept")["estimate"][0] == pytest.approx(45 / 3100, rel=1e-7)


def test_negative_binomial_reports_dispersion_and_wider_intervals():
    rng = np.random.default_rng(4)
    n = 400
    x = rng.integers(0, 2, n)
    py = rng.uniform(1, 5, n)
    mu = py * 0.3 * np.exp(0.5 * x) * rng.gamma(1.0, 1.0, n)  # gamma frailty: overdispersed
    t = pl.DataFrame({"x": x, "episodes": rng.poisson(mu), "person_years": py})
    pois = rate_regression(t, covariates=["x"])
    nb = rate_regression(t, covariates=["x"], family="negative_binomial")
    assert pois["dispersion"][0] > 1.5  # Pearson chi-square / df flags overdispersion
    alpha = nb.filter(term="alpha (NB2 dispersion)").row(0, named=True)
    assert 0.5 < alpha["estimate"] < 2.0  # gamma(1, 1) frailty has variance 1
    assert nb.filter(term="x")["se"][0] > pois.filter(term="x")["se"][0]
    assert nb.filter(term="x")["lower"][0] < np.exp(0.5) < nb.filter(term="x")["upper"][0]


def test_rate_regression_bad_input():
    t = pl.DataFrame({"x": ["a", "b", "c"], "episodes": [3, 0, 4], "person_years": [10.0] * 3})
    with pytest.raises(InputError, match="no events where `x=b`"):
        rate_regression(t, covariates=["x"], reference={"x": "a"})
    with pytest.raises(InputError, match="family"):
        rate_regression(t, covariates=["x"], family="binomial")
    with pytest.raises(InputError, match="whole numbers"):
        incidence_rates(t.with_columns(episodes=pl.Series([1.5, 0.0, 1.0])))
    with pytest.raises(InputError, match="constant"):
        rate_regression(t.with_columns(x=pl.lit("a")), covariates=["x"])
