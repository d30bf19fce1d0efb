"""Recurrence: first recurrence, Andersen-Gill, gap time, 365-day logistic (cohort.stats)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.api as sm

from cohort import InputError
from cohort.stats import (
    first_recurrence_table,
    gap_time_model,
    recurrence_logistic,
    time_to_first_recurrence,
)


def _episodes() -> pl.DataFrame:
    """Hand-built: person 1 recurs at day 40 then is censored; person 2 dies at day 100 without
    recurring; person 3 is followed 365 days without recurring; person 4 recurs at day 200."""
    return pl.DataFrame(
        {
            "person_id": [1, 1, 2, 3, 4, 4],
            "onset_datetime": [1, 5, 1, 1, 1, 9],
            "days_to_next_episode": [40.0, None, None, None, 200.0, None],
            "days_at_risk": [40.0, 300.0, 100.0, 365.0, 200.0, 50.0],
            "died_in_follow_up": [False, False, True, False, False, True],
        }
    )


def test_first_recurrence_table_by_hand():
    out = first_recurrence_table(_episodes(), death_col="died_in_follow_up")
    assert out["person_id"].to_list() == [1, 2, 3, 4]
    assert out["days"].to_list() == [40.0, 100.0, 365.0, 200.0]
    assert out["event_type"].to_list() == ["recurrence", "died", "censored", "recurrence"]


def test_time_to_first_recurrence_with_death_competing_by_hand():
    """Four persons; times 40 (recurrence), 100 (death), 200 (recurrence), 365 (censored).

    Aalen-Johansen: t=40: n=4, F_rec = 1/4, S = 3/4; t=100: n=3, death, F_died = (3/4)(1/3)
    = 1/4, S = 1/2; t=200: n=2, F_rec = 1/4 + (1/2)(1/2) = 1/2, S = 1/4.
    Kaplan-Meier with death censored: S(40) = 3/4, S(200) = 3/4 x 1/2 = 3/8, so
    1 - KM = 5/8 > 1/2: ignoring the competing death overstates recurrence.
    """
    res = time_to_first_recurrence(_episodes(), death_col="died_in_follow_up")
    rec = res.cumulative_incidence.filter(cause="recurrence")
    assert rec["estimate"].max() == pytest.approx(0.5)
    died = res.cumulative_incidence.filter(cause="died")
    assert died["estimate"].max() == pytest.approx(0.25)
    km_last = res.kaplan_meier.curve.filter(time=200.0)["estimate"][0]
    assert 1 - km_last == pytest.approx(5 / 8)
    assert res.kaplan_meier.at_risk.filter(time=90.0)["at_risk"][0] == 3


def _episode_features(seed: int = 3, persons: int = 600) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for pid in range(persons):
        sglt2 = int(rng.random() < 0.3)
        hba1c = rng.normal(75, 15)
        for k in range(int(rng.integers(1, 4))):
            lin = -1.2 + 0.8 * sglt2 + 0.03 * (hba1c - 75)
            flag = rng.random() < 1 / (1 + np.exp(-lin))
            known = rng.random() > 0.15
            rows.append({"person_id": pid, "is_sglt2i_at_onset": bool(sglt2),
                         "hba1c_mmol_mol": hba1c, "prior_episode_count": k,
                         "sex": rng.choice(["F", "M"]),
                         "recurs_within_365d": bool(flag) if known else None})
    return pd.DataFrame(rows)


def test_logistic_excludes_null_flags_and_uses_cluster_robust_se():
    d = _episode_features()
    fit = recurrence_logistic(d, covariates=["is_sglt2i_at_onset", "hba1c_mmol_mol", "sex"],
                              reference={"sex": "F"})
    known = d.dropna(subset=["recurs_within_365d"])
    assert fit["n"][0] == len(known)
    nulls = int(d["recurs_within_365d"].isna().sum())
    assert fit["left_out"][0] == f"left out: {nulls} row(s) null in `recurs_within_365d`"
    assert fit["se_type"][0] == "robust_cluster"
    # Reference library: statsmodels GLM with the same cluster-robust covariance.
    X = sm.add_constant(pd.DataFrame({
        "is_sglt2i_at_onset": known["is_sglt2i_at_onset"].astype(float),
        "hba1c_mmol_mol": known["hba1c_mmol_mol"],
        "sex=M": (known["sex"] == "M").astype(float),
    }))
    ref = sm.GLM(known["recurs_within_365d"].astype(float), X, family=sm.families.Binomial()).fit(
        cov_type="cluster", cov_kwds={"groups": pd.factorize(known["person_id"])[0]})
    np.testing.assert_allclose(fit["coef"], ref.params.to_numpy(), rtol=1e-8)
    np.testing.assert_allclose(fit["se"], ref.bse.to_numpy(), rtol=1e-8)
    assert fit["term"].to_list() == ["intercept", "is_sglt2i_at_onset", "hba1c_mmol_mol", "sex=M"]


def test_odds_ratio_from_a_two_by_two_table():
    """With one binary covariate the logistic MLE odds ratio equals the cross-product ratio
    ad/bc of the 2x2 table (a textbook identity, e.g. Hosmer DW, Lemeshow S. Applied Logistic
    Regression, 2nd ed. 2000, section 3.3)."""
    a, b, c, e = 30, 20, 15, 35  # exposed recur / not, unexposed recur / not
    x = [1] * (a + b) + [0] * (c + e)
    y = [1] * a + [0] * b + [1] * c + [0] * e
    d = pl.DataFrame({"person_id": range(len(x)), "x": x, "recurs_within_365d": y})
    fit = recurrence_logistic(d, covariates=["x"])
    assert fit.filter(term="x")["estimate"][0] == pytest.approx((a * e) / (b * c), rel=1e-8)
    assert fit["se_type"][0] == "model"  # no person repeats
    # Woolf standard error of the log odds ratio: sqrt(1/a + 1/b + 1/c + 1/d).
    assert fit.filter(term="x")["se"][0] == pytest.approx(
        np.sqrt(1 / a + 1 / b + 1 / c + 1 / e), rel=1e-6)


def test_perfect_separation_is_a_clear_error():
    d = pl.DataFrame({"person_id": range(40), "x": [1] * 20 + [0] * 20,
                      "z": np.random.default_rng(0).normal(size=40),
                      "recurs_within_365d": [True] * 20 + [False] * 12 + [True] * 8})
    with pytest.raises(InputError, match="perfect separation"):
        recurrence_logistic(d, covariates=["x", "z"])


def test_continuous_separation_is_a_clear_error():
    z = np.linspace(-1, 1, 60)
    d = pl.DataFrame({"person_id": range(60), "z": z, "recurs_within_365d": z > 0.1})
    with pytest.raises(InputError, match="separation"):
        recurrence_logistic(d, covariates=["z"])


def test_too_few_events_and_constant_covariate():
    d = pl.DataFrame({"person_id": range(50), "x": [i % 2 for i in range(50)],
                      "recurs_within_365d": [i < 3 for i in range(50)]})
    with pytest.raises(InputError, match="at least 5 events; found 3"):
        recurrence_logistic(d, covariates=["x"])
    with pytest.raises(InputError, match="constant"):
        recurrence_logistic(d.with_columns(x=pl.lit(1), recurs_within_365d=pl.Series(
            [i % 3 == 0 for i in range(50)])), covariates=["x"])


def _counting_process(seed: int = 8, persons: int = 300) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for pid in range(persons):
        x = int(rng.integers(0, 2))
        start, follow = 0.0, rng.uniform(400, 1500)
        number = 1
        while True:
            gap = rng.exponential(600 / np.exp(0.6 * x) / (1 + 0.3 * (number - 1)))
            stop = min(start + gap, follow)
            event = int(start + gap <= follow)
            rows.append({"person_id": pid, "start": start, "stop": stop, "event": event,
                         "episode_number": number, "x": x})
            if not event:
                break
            start, number = stop, number + 1
    return pd.DataFrame(rows)


def test_gap_time_model_equals_stratified_cox_on_gap_times():
    """The gap-time model is a Cox model of (stop - start) stratified by episode number
    (pooled above max_stratum), robust by person; check against lifelines directly."""
    from lifelines import CoxPHFitter

    cp = _counting_process()
    fit = gap_time_model(cp, covariates=["x"], max_stratum=3, start_col="start", stop_col="stop")
    ref_df = pd.DataFrame({"gap": cp.stop - cp.start, "event": cp.event, "x": cp.x,
                           "stratum": np.minimum(cp.episode_number, 3), "pid": cp.person_id})
    ref = CoxPHFitter().fit(ref_df, "gap", "event", strata=["stratum"], cluster_col="pid",
                            robust=True)
    # robust fits are the project's own (cohort.stats._counting_cox), which iterates to a
    # tighter tolerance than lifelines: equal to 1e-5, not to the last digits
    assert fit["coef"][0] == pytest.approx(float(ref.params_["x"]), rel=1e-5)
    assert fit["se"][0] == pytest.approx(float(ref.standard_errors_["x"]), rel=1e-5)
    assert fit["se_type"][0] == "robust_cluster"
    # A table already in gap time (start_col=None) gives the same fit.
    gap_only = cp.assign(stop=cp.stop - cp.start)
    same = gap_time_model(gap_only, covariates=["x"], start_col=None, stop_col="stop")
    assert same["coef"][0] == pytest.approx(fit["coef"][0], rel=1e-10)


def test_gap_time_rejects_bad_max_stratum():
    with pytest.raises(InputError, match="max_stratum"):
        gap_time_model(_counting_process(persons=20), covariates=["x"], max_stratum=0)


def test_nullable_boolean_covariate_is_one_term_and_null_rows_are_counted():
    rng = np.random.default_rng(0)
    flags = [bool(v) if i % 10 else None for i, v in enumerate(rng.integers(0, 2, 200))]
    d = pl.DataFrame({"person_id": range(200), "x": pl.Series(flags, dtype=pl.Boolean),
                      "recurs_within_365d": rng.random(200) < 0.4})
    fit = recurrence_logistic(d, covariates=["x"])
    assert fit["term"].to_list() == ["intercept", "x"]
    assert fit["n"][0] == 180
    assert fit["left_out"][0] == "left out: 20 row(s) null in `x`"


def test_recurrence_stays_within_a_definition():
    """The features tables hold one row per episode and definition (H5 contract): the first
    episode is taken per definition, curves are never pooled, and models refuse a mix."""
    eps = _episodes()
    both = pl.concat([eps.with_columns(definition=pl.lit("jbds-2023")),
                      eps.with_columns(definition=pl.lit("consensus-2024"))])
    table = first_recurrence_table(both, death_col="died_in_follow_up")
    assert table.height == 8 and set(table["definition"]) == {"jbds-2023", "consensus-2024"}
    res = time_to_first_recurrence(both, death_col="died_in_follow_up")
    assert set(res.cumulative_incidence["definition"]) == {"jbds-2023", "consensus-2024"}
    d = pl.from_pandas(_episode_features(persons=100))
    mixed = pl.concat([d.with_columns(definition=pl.lit("jbds-2023")),
                       d.with_columns(definition=pl.lit("ada-2009"))])
    with pytest.raises(InputError, match="holds 2 definitions"):
        recurrence_logistic(mixed, covariates=["hba1c_mmol_mol"])
    one = recurrence_logistic(mixed.filter(definition="ada-2009"), covariates=["hba1c_mmol_mol"])
    assert one["n"][0] == d["recurs_within_365d"].is_not_null().sum()
