"""Prediction of 365-day recurrence: DeLong AUROC, Brier, calibration (cohort.stats)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.ensemble import RandomForestClassifier
from sklearn.metrics import roc_auc_score

from cohort import InputError
from cohort.stats import delong_auc, recurrence_prediction


def test_auc_on_hanley_mcneil_ct_ratings():
    """Hanley JA, McNeil BJ. The meaning and use of the area under a receiver operating
    characteristic (ROC) curve. Radiology 1982;143:29-36, Table 1: CT ratings 1-5 of 58
    normal and 51 abnormal subjects; area 0.893 [from memory]. Ties count one half."""
    normal = [33, 6, 6, 11, 2]
    abnormal = [3, 2, 2, 11, 33]
    y = np.r_[np.zeros(sum(normal)), np.ones(sum(abnormal))]
    score = np.r_[np.repeat(np.arange(1, 6), normal), np.repeat(np.arange(1, 6), abnormal)]
    out = delong_auc(y, score)
    assert round(out["auc"], 3) == 0.893
    assert out["lower"] < out["auc"] < out["upper"]


def _delong_by_definition(y: np.ndarray, s: np.ndarray) -> tuple[float, float]:
    """DeLong et al. (1988) from their definitions: psi(X, Y) = 1, 1/2, 0 for X > Y, X = Y,
    X < Y; V10(X_i) = mean_j psi(X_i, Y_j); V01(Y_j) = mean_i psi(X_i, Y_j);
    var = S10 / m + S01 / n with sample variances S10, S01."""
    pos, neg = s[y == 1], s[y == 0]
    psi = (pos[:, None] > neg[None, :]) + 0.5 * (pos[:, None] == neg[None, :])
    v10 = psi.mean(axis=1)
    v01 = psi.mean(axis=0)
    var = v10.var(ddof=1) / len(pos) + v01.var(ddof=1) / len(neg)
    return float(psi.mean()), float(np.sqrt(var))


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 1), st.integers(0, 6)), min_size=6, max_size=60))
def test_fast_delong_equals_the_definition(pairs):
    y = np.array([p[0] for p in pairs])
    s = np.array([p[1] for p in pairs], dtype=float)
    if min(y.sum(), len(y) - y.sum()) < 2:
        return
    auc, se = _delong_by_definition(y, s)
    out = delong_auc(y, s)
    assert out["auc"] == pytest.approx(auc, abs=1e-12)
    assert out["auc"] == pytest.approx(roc_auc_score(y, s), abs=1e-12)
    assert out["se"] == pytest.approx(se, abs=1e-12)


def _cohort(seed: int = 21, persons: int = 700) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    person = np.repeat(np.arange(persons), rng.integers(1, 3, persons))
    n = len(person)
    hba1c = rng.normal(75, 15, n)
    sglt2 = rng.random(n) < 0.3
    sex = rng.choice(["F", "M"], n)
    lin = -1.0 + 0.04 * (hba1c - 75) + 0.9 * sglt2
    y = rng.random(n) < 1 / (1 + np.exp(-lin))
    flag = np.where(rng.random(n) < 0.1, None, y)
    return pl.DataFrame({"person_id": person, "hba1c_mmol_mol": hba1c,
                         "is_sglt2i_at_onset": sglt2, "sex": sex,
                         "recurs_within_365d": pl.Series(flag.tolist(), dtype=pl.Boolean)})


def test_prediction_metrics_on_a_well_specified_model():
    d = _cohort()
    res = recurrence_prediction(d, numeric_covariates=["hba1c_mmol_mol"],
                                categorical_covariates=["is_sglt2i_at_onset", "sex"])
    metrics = {r["metric"]: r for r in res.metrics.iter_rows(named=True)}
    assert set(metrics) == {"auroc", "brier", "calibration_intercept", "calibration_slope"}
    assert "DeLong" in metrics["auroc"]["method"] and "persons repeat" in metrics["auroc"]["method"]
    known = d.filter(pl.col("recurs_within_365d").is_not_null())
    assert metrics["auroc"]["n"] == known.height
    # The model is the data-generating one, so out-of-fold calibration should be near ideal:
    # intercept 0 and slope 1 inside their 95% intervals (Steyerberg 2019, ch. 15).
    cal_a, cal_b = metrics["calibration_intercept"], metrics["calibration_slope"]
    assert cal_a["lower"] < 0 < cal_a["upper"]
    assert cal_b["lower"] < 1 < cal_b["upper"]
    p = res.predictions
    assert metrics["brier"]["estimate"] == pytest.approx(
        float(((p["predicted"] - p["outcome"]) ** 2).mean()), rel=1e-12)
    assert 0.6 < metrics["auroc"]["estimate"] < 0.9
    assert res.calibration_curve["n"].sum() == known.height
    assert res.metrics["left_out"][0].startswith("left out:")


def test_folds_never_split_a_person():
    res = recurrence_prediction(_cohort(), numeric_covariates=["hba1c_mmol_mol"])
    folds_per_person = res.predictions.group_by("person_id").agg(pl.col("fold").n_unique())
    assert folds_per_person["fold"].max() == 1
    assert sorted(res.predictions["fold"].unique().to_list()) == [1, 2, 3, 4, 5]


def test_another_estimator_can_be_plugged_in():
    res = recurrence_prediction(
        _cohort(persons=300), numeric_covariates=["hba1c_mmol_mol"],
        estimator=RandomForestClassifier(n_estimators=20, max_depth=3, random_state=0))
    assert res.metrics.filter(metric="auroc")["estimate"][0] > 0.5


def test_bad_input_messages():
    d = _cohort(persons=50)
    with pytest.raises(InputError, match="at least one predictor"):
        recurrence_prediction(d)
    with pytest.raises(InputError, match="n_splits"):
        recurrence_prediction(d, numeric_covariates=["hba1c_mmol_mol"], n_splits=1)
    rare = d.with_columns(recurs_within_365d=pl.int_range(pl.len()) < 3)
    with pytest.raises(InputError, match="too few"):
        recurrence_prediction(rare, numeric_covariates=["hba1c_mmol_mol"])
    with pytest.raises(InputError, match="at least 2 events"):
        delong_auc(np.array([1, 0, 0]), np.array([0.2, 0.1, 0.3]))
