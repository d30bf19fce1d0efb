"""Cox models: Efron ties, PH test beside every model, cluster-robust SEs (cohort.stats._cox)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
from lifelines import CoxPHFitter, CoxTimeVaryingFitter
from lifelines.datasets import load_rossi
from lifelines.statistics import proportional_hazard_test
from statsmodels.duration.hazard_regression import PHReg

from cohort import InputError
from cohort.stats import andersen_gill, cox_model

ROSSI_TERMS = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]

# Fox J, Weisberg S. Cox proportional-hazards regression for survival data in R. Appendix to
# An R Companion to Applied Regression, 2nd ed. 2011 (3rd ed. 2018 edition prints the same
# fit): summary of coxph(Surv(week, arrest) ~ fin + age + race + wexp + mar + paro + prio,
# data = Rossi), Efron ties. coef and se(coef) as printed [from memory; fin -0.379, age -0.0574
# and prio 0.0915 also quoted in the project brief].
FOX_WEISBERG = {
    "fin": (-0.37942, 0.19138),
    "age": (-0.05744, 0.02200),
    "race": (0.31390, 0.30799),
    "wexp": (-0.14980, 0.21222),
    "mar": (-0.43370, 0.38187),
    "paro": (-0.08487, 0.19576),
    "prio": (0.09150, 0.02865),
}


@pytest.fixture(scope="module")
def rossi() -> pd.DataFrame:
    return load_rossi()


@pytest.fixture(scope="module")
def rossi_fit(rossi) -> pl.DataFrame:
    return cox_model(rossi, duration_col="week", event_col="arrest", covariates=ROSSI_TERMS,
                     cluster_col=None)


def test_rossi_coefficients_match_fox_and_weisberg(rossi_fit):
    assert rossi_fit["term"].to_list() == ROSSI_TERMS
    for row in rossi_fit.iter_rows(named=True):
        coef, se = FOX_WEISBERG[row["term"]]
        assert row["coef"] == pytest.approx(coef, abs=5e-5)  # printed to 5 decimals
        assert row["se"] == pytest.approx(se, abs=5e-5)
        assert row["estimate"] == pytest.approx(np.exp(coef), rel=1e-3)
    assert rossi_fit["events"][0] == 114 and rossi_fit["n"][0] == 432  # Rossi: 114 arrests of 432
    fin = rossi_fit.filter(term="fin").row(0, named=True)
    # exp(coef) 0.684 with 95% limits 0.470 and 0.996 (Fox and Weisberg, same appendix)
    # [from memory].
    assert (round(fin["estimate"], 3), round(fin["lower"], 3), round(fin["upper"], 3)) == (
        0.684, 0.470, 0.996)
    assert fin["p"] == pytest.approx(0.0474, abs=5e-5)


def test_rossi_coefficients_equal_statsmodels_phreg(rossi, rossi_fit):
    """A second reference library (statsmodels PHReg, Efron ties)."""
    ref = PHReg(rossi.week, rossi[ROSSI_TERMS], status=rossi.arrest, ties="efron").fit()
    np.testing.assert_allclose(rossi_fit["coef"], ref.params, rtol=1e-5)
    np.testing.assert_allclose(rossi_fit["se"], ref.bse, rtol=1e-4)


def test_ph_test_equals_lifelines_and_flags_age_and_wexp(rossi, rossi_fit):
    """Our scaled Schoenfeld test equals lifelines' proportional_hazard_test (km transform),
    and, as Fox and Weisberg's cox.zph discussion reports, age and wexp depart from
    proportional hazards while the others do not [from memory]."""
    cph = CoxPHFitter().fit(rossi, "week", "arrest")
    ref = proportional_hazard_test(cph, rossi, time_transform="km").summary["test_statistic"]
    for row in rossi_fit.iter_rows(named=True):
        assert row["ph_statistic"] == pytest.approx(float(ref.loc[row["term"]]), rel=1e-6)
    flagged = set(rossi_fit.filter(pl.col("ph_p") < 0.05)["term"])
    assert flagged == {"age", "wexp"}


@pytest.mark.parametrize("transform", ["rank", "identity", "log"])
def test_other_time_transforms_equal_lifelines(rossi, transform):
    fit = cox_model(rossi, duration_col="week", event_col="arrest", covariates=["fin", "age"],
                    cluster_col=None, ph_time_transform=transform)
    cph = CoxPHFitter().fit(rossi[["week", "arrest", "fin", "age"]], "week", "arrest")
    ref = proportional_hazard_test(cph, rossi[["week", "arrest", "fin", "age"]],
                                   time_transform=transform).summary["test_statistic"]
    np.testing.assert_allclose(fit["ph_statistic"], ref.loc[["fin", "age"]], rtol=1e-6)


def _repeated_persons(seed: int = 4, persons: int = 150) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for pid in range(persons):
        frailty = rng.gamma(2.0, 0.5)
        x = int(rng.integers(0, 2))
        for _ in range(int(rng.integers(1, 4))):
            t = rng.exponential(20 / (frailty * np.exp(0.4 * x)))
            rows.append({"person_id": pid, "x": x, "z": rng.normal(),
                         "hours": min(t, 40.0), "resolved": int(t < 40)})
    return pd.DataFrame(rows)


def test_cluster_robust_se_by_person_equals_lifelines_robust(rossi):
    d = _repeated_persons()
    fit = cox_model(d, duration_col="hours", event_col="resolved", covariates=["x", "z"])
    assert fit["se_type"].to_list() == ["robust_cluster"] * 2
    assert fit["n_clusters"][0] == 150
    ref = CoxPHFitter().fit(d[["hours", "resolved", "x", "z", "person_id"]], "hours",
                            "resolved", cluster_col="person_id", robust=True)
    # the robust fit is the project's own (cohort.stats._counting_cox; no tied event times
    # here, where lifelines' residuals and the Breslow form agree); its Newton-Raphson stops at
    # a tighter tolerance than lifelines', so equal to 1e-6
    np.testing.assert_allclose(fit["se"], ref.standard_errors_.loc[["x", "z"]], rtol=1e-6)
    naive = cox_model(d, duration_col="hours", event_col="resolved", covariates=["x", "z"],
                      cluster_col=None)
    np.testing.assert_allclose(fit["coef"], naive["coef"], rtol=1e-5)  # same point estimates
    assert naive["se_type"][0] == "model"


def test_unique_persons_use_model_based_se(rossi):
    d = rossi.assign(person_id=np.arange(len(rossi)))
    fit = cox_model(d, duration_col="week", event_col="arrest", covariates=["fin"])
    assert fit["se_type"][0] == "model"


def test_andersen_gill_equals_statsmodels_phreg_with_entry_and_groups():
    """(start, stop] data: a row is at risk at t when start < t <= stop.

    References: lifelines' CoxTimeVaryingFitter, and statsmodels PHReg with `entry`. PHReg
    counts a row as at risk at t == entry (checked: its estimate moves when entries move by
    1e-9), which double-counts a person at their own episode time, so it is given entries
    nudged by 1e-9 to express start < t. Splitting intervals at times without events leaves
    the estimates unchanged (counting-process identity)."""
    rng = np.random.default_rng(12)
    rows = []
    for pid in range(120):
        x = int(rng.integers(0, 2))
        start = 0.0
        for k in range(int(rng.integers(1, 4))):
            gap = rng.exponential(200 / np.exp(0.5 * x))
            last = k == 2 or rng.random() < 0.3
            rows.append({"person_id": pid, "start": start, "stop": start + gap,
                         "event": 0 if last else 1, "x": x, "w": rng.normal()})
            start += gap
            if last:
                break
    cp = pd.DataFrame(rows)
    ag = andersen_gill(cp, covariates=["x", "w"], start_col="start", stop_col="stop")
    nudged = cp.start + 1e-9 * (cp.start > 0)
    ref = PHReg(cp.stop, cp[["x", "w"]], status=cp.event, entry=nudged, ties="efron").fit()
    np.testing.assert_allclose(ag["coef"], ref.params, rtol=1e-5)
    ctv = CoxTimeVaryingFitter().fit(cp, id_col="person_id", start_col="start",
                                     stop_col="stop", event_col="event")
    np.testing.assert_allclose(ag["coef"], ctv.params_.loc[["x", "w"]], rtol=1e-5)
    assert ag["se_type"][0] == "robust_cluster" and ag["model"][0] == "andersen-gill"
    # Split each interval in two at its midpoint, the first half without an event.
    mid = (cp.start + cp.stop) / 2
    first = cp.assign(stop=mid, event=0)
    second = cp.assign(start=mid)
    split = andersen_gill(pd.concat([first, second], ignore_index=True), covariates=["x", "w"],
                          start_col="start", stop_col="stop")
    np.testing.assert_allclose(split["coef"], ag["coef"], rtol=1e-6)
    assert ag["ph_statistic"].is_not_null().all()
    # The robust (sandwich) SE by person (Lin DY, Wei LJ. J Am Stat Assoc 1989;84:1074-1078),
    # written out below with loops over the risk sets, at lifelines CoxTimeVaryingFitter's
    # coefficients and model-based variance; and unchanged by the split (lifelines 0.30's
    # CoxPHFitter(entry_col=..., robust=True) fails this: its score residuals treat every row as
    # at risk from time 0). statsmodels 0.15's PHReg is no reference here: its robust SE is NaN
    # when an interval holds no event time, and its score residuals credit such an interval
    # with the event time before it (they do not sum to the score; checked on these data).
    beta = ctv.params_.loc[["x", "w"]].to_numpy()
    variance = ctv.variance_matrix_.to_numpy()  # rows named, columns numbered, in params_ order
    assert list(ctv.params_.index) == ["x", "w"]
    np.testing.assert_allclose(ag["se"], np.sqrt(np.diag(_lin_wei(cp, ["x", "w"], beta, variance))),
                               rtol=1e-5)
    np.testing.assert_allclose(split["se"], ag["se"], rtol=1e-6)


def _lin_wei(cp: pd.DataFrame, names: list[str], beta: np.ndarray, variance: np.ndarray) -> np.ndarray:
    """Robust variance V (sum over persons of U_c U_c') V, U_i the score residual of row i:
    d_i (x_i - xbar(stop_i)) - sum over event times t in (start_i, stop_i] of
    w_i (x_i - xbar(t)) dN(t) / S0(t); plain loops (Breslow form at tied times)."""
    x = cp[names].to_numpy(float)
    start, stop, event = cp.start.to_numpy(), cp.stop.to_numpy(), cp.event.to_numpy().astype(bool)
    w = np.exp(x @ beta)
    residual = np.zeros_like(x)
    for t in np.unique(stop[event]):
        at_risk = (start < t) & (t <= stop)
        s0 = w[at_risk].sum()
        xbar = (w[at_risk, None] * x[at_risk]).sum(axis=0) / s0
        dead = event & (stop == t)
        residual[dead] += x[dead] - xbar
        residual[at_risk] -= w[at_risk, None] * (x[at_risk] - xbar) * dead.sum() / s0
    summed = pd.DataFrame(residual).groupby(cp.person_id.to_numpy()).sum().to_numpy()
    return variance @ (summed.T @ summed) @ variance


def test_counting_process_fit_equals_lifelines_and_statsmodels_on_rossi(rossi):
    """Rossi recidivism data (Rossi, Berk and Lenihan 1980, shipped with lifelines), entered as
    (0, week] rows, then with each follow-up longer than 20 weeks split at week 20: the
    coefficients and model-based SEs equal lifelines' CoxPHFitter (Efron), the robust SEs
    statsmodels PHReg's with groups, before and after the split."""
    d = rossi.assign(person_id=np.arange(len(rossi)), start=0.0)
    long = d[d.week > 20]
    split = pd.concat([d[d.week <= 20], long.assign(week=20.0, arrest=0), long.assign(start=20.0)],
                      ignore_index=True)
    ref = CoxPHFitter().fit(rossi[["week", "arrest", "fin", "age", "prio"]], "week", "arrest")
    robust = PHReg(rossi.week, rossi[["fin", "age", "prio"]], status=rossi.arrest,
                   ties="efron").fit(groups=np.arange(len(rossi)))
    for frame in (d, split):
        cluster = "person_id" if frame is split else None
        fit = cox_model(frame, duration_col="week", event_col="arrest", entry_col="start",
                        covariates=["fin", "age", "prio"], cluster_col=cluster)
        np.testing.assert_allclose(fit["coef"], ref.params_.loc[["fin", "age", "prio"]], rtol=1e-7)
        if cluster is None:
            np.testing.assert_allclose(fit["se"], ref.standard_errors_.loc[["fin", "age", "prio"]], rtol=1e-7)
        else:
            assert fit["se_type"][0] == "robust_cluster"
            np.testing.assert_allclose(fit["se"], robust.bse, rtol=1e-7)


def test_text_covariate_uses_most_frequent_level_as_reference():
    d = _repeated_persons()
    d["site"] = np.where(d.index % 3 == 0, "Harrowmere General", "Eastbrook Infirmary")
    fit = cox_model(d, duration_col="hours", event_col="resolved", covariates=["site", "x"])
    row = fit.filter(covariate="site").row(0, named=True)
    assert row["term"] == "site=Harrowmere General"
    assert row["reference"] == "Eastbrook Infirmary"
    other = cox_model(d, duration_col="hours", event_col="resolved", covariates=["site", "x"],
                      reference={"site": "Harrowmere General"})
    # Swapping the reference flips the sign of the log hazard ratio and nothing else.
    assert other.filter(covariate="site")["coef"][0] == pytest.approx(-row["coef"], rel=1e-6)


def test_strata_give_each_level_its_own_baseline(rossi):
    fit = cox_model(rossi, duration_col="week", event_col="arrest", covariates=["fin", "age"],
                    strata="wexp", cluster_col=None)
    ref = CoxPHFitter().fit(rossi[["week", "arrest", "fin", "age", "wexp"]], "week", "arrest",
                            strata=["wexp"])
    np.testing.assert_allclose(fit["coef"], ref.params_.loc[["fin", "age"]], rtol=1e-8)
    assert fit["ph_statistic"].is_not_null().all()


def test_too_few_events_is_a_clear_error(rossi):
    small = rossi.head(40).assign(arrest=0)
    small.loc[small.index[:3], "arrest"] = 1
    with pytest.raises(InputError, match="at least 5 events; found 3"):
        cox_model(small, duration_col="week", event_col="arrest", covariates=["fin"],
                  cluster_col=None)


def test_constant_covariate_is_a_clear_error(rossi):
    with pytest.raises(InputError, match="covariate `fin` is constant"):
        cox_model(rossi.assign(fin=1), duration_col="week", event_col="arrest",
                  covariates=["fin", "age"], cluster_col=None)


def test_monotone_likelihood_is_a_clear_error():
    """Every event in the x = 1 group before any event in x = 0 leaves, for x = 0, no event
    at all: the hazard ratio for x runs to infinity."""
    rng = np.random.default_rng(1)
    d = pd.DataFrame({"t": np.arange(1.0, 61.0), "x": [1] * 30 + [0] * 30,
                      "e": [1] * 30 + [0] * 30, "z": rng.normal(size=60)})
    with pytest.raises(InputError, match="separates events from non-events"):
        cox_model(d, duration_col="t", event_col="e", covariates=["x", "z"], cluster_col=None)


def test_few_events_per_parameter_carry_a_warning(rossi):
    fit = cox_model(rossi.head(80), duration_col="week", event_col="arrest",
                    covariates=ROSSI_TERMS, cluster_col=None)
    assert "events per parameter" in fit["warning"][0]


def test_missing_cluster_column_is_named(rossi):
    with pytest.raises(InputError, match="`person_id`"):
        cox_model(rossi, duration_col="week", event_col="arrest", covariates=["fin"])


def test_counting_process_score_residuals_sum_to_the_score():
    """Score residuals add up to the score vector (Therneau TM, Grambsch PM. Modeling Survival
    Data: Extending the Cox Model, Springer 2000, chapter on residuals; section from memory),
    which is zero at the maximum: on untied (start, stop] data with
    delayed entries and intervals holding no event time, at the fitted coefficients."""
    from cohort.stats._counting_cox import _score_residuals, _stratum, fit_counting_cox

    rng = np.random.default_rng(5)
    n = 400
    start = rng.uniform(0, 50, n)
    stop = start + rng.exponential(30, n)
    event = rng.random(n) < 0.6
    x = rng.normal(size=(n, 2))
    fit = fit_counting_cox(x, start, stop, event)
    assert fit.converged
    residuals = _score_residuals([_stratum(x - x.mean(axis=0), start, stop, event)], fit.params)[0]
    np.testing.assert_allclose(residuals.sum(axis=0), 0.0, atol=1e-8)
