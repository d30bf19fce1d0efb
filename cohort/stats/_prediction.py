"""Prediction of 365-day recurrence: a scikit-learn pipeline with person-grouped cross-validation.

Out-of-fold predicted risks come from ``GroupKFold`` by person, so no person is in both the
training and the test folds. On those predictions:

- AUROC with a DeLong interval (DeLong ER, DeLong DM, Clarke-Pearson DL. Comparing the areas
  under two or more correlated receiver operating characteristic curves: a nonparametric
  approach. Biometrics 1988;44:837-845), computed with the fast algorithm of Sun X, Xu W
  (IEEE Signal Process Lett 2014;21:1389-1393). It treats episodes as independent; when
  persons repeat, ``method`` says so.
- Brier score (mean squared error of the predicted risk).
- Calibration intercept (calibration-in-the-large: logistic intercept with the logit of the
  predicted risk as offset) and calibration slope (logistic slope on that logit), both with
  Wald intervals (Steyerberg EW. Clinical Prediction Models, 2nd ed. 2019, chapter 15).
- Calibration-curve data: observed share against mean predicted risk in quantile bins.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl
import statsmodels.api as sm
from sklearn.compose import ColumnTransformer
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss, roc_auc_score
from sklearn.model_selection import GroupKFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import OneHotEncoder, StandardScaler

from cohort._errors import InputError
from cohort.stats._common import (
    check_one_definition,
    FrameLike,
    describe_dropped,
    drop_incomplete,
    require_columns,
    to_pandas,
    z_value,
)

__all__ = ["PredictionResult", "delong_auc", "recurrence_prediction"]


@dataclass(frozen=True)
class PredictionResult:
    """Cross-validated performance of a recurrence prediction model.

    Attributes
    ----------
    metrics
        One row per metric (``auroc``, ``brier``, ``calibration_intercept``,
        ``calibration_slope``): ``estimate``, ``lower``, ``upper``, ``method``, ``n``,
        ``events``, ``folds``.
    calibration_curve
        One row per bin: ``bin``, ``mean_predicted``, ``observed``, ``lower``, ``upper``
        (Wilson interval of the observed share), ``n``, ``events``.
    predictions
        One row per episode: ``row`` (position in the rows used), the group id, ``fold``,
        ``outcome``, ``predicted``.
    """

    metrics: pl.DataFrame
    calibration_curve: pl.DataFrame
    predictions: pl.DataFrame


def _midrank(x: np.ndarray) -> np.ndarray:
    order = np.argsort(x, kind="mergesort")
    z = x[order]
    n = len(x)
    ranks = np.zeros(n, dtype=float)
    i = 0
    while i < n:
        j = i
        while j < n and z[j] == z[i]:
            j += 1
        ranks[i:j] = 0.5 * (i + j - 1) + 1
        i = j
    out = np.empty(n, dtype=float)
    out[order] = ranks
    return out


def delong_auc(y_true: np.ndarray, score: np.ndarray, *, alpha: float = 0.05) -> dict[str, float]:
    """AUROC with its DeLong (1988) variance and a Wald interval on the AUC scale.

    Parameters
    ----------
    y_true
        0/1 outcomes.
    score
        Predicted risk or any score (higher = more likely an event); ties count one half.
    alpha
        1 - confidence level.

    Returns
    -------
    dict
        ``auc``, ``se``, ``lower``, ``upper`` (clipped to [0, 1]).

    Examples
    --------
    >>> import numpy as np
    >>> out = delong_auc(np.array([0, 0, 1, 1]), np.array([0.1, 0.4, 0.35, 0.8]))
    >>> out["auc"]
    0.75
    """
    y = np.asarray(y_true).astype(int)
    s = np.asarray(score, dtype=float)
    pos, neg = s[y == 1], s[y == 0]
    m, n = len(pos), len(neg)
    if m < 2 or n < 2:
        raise InputError(
            f"an AUROC interval needs at least 2 events and 2 non-events; found {m} and {n}."
        )
    tx, ty, tz = _midrank(pos), _midrank(neg), _midrank(np.concatenate([pos, neg]))
    auc = (tz[:m].sum() - m * (m + 1) / 2) / (m * n)
    v01 = (tz[:m] - tx) / n  # structural components of the events
    v10 = 1.0 - (tz[m:] - ty) / m  # and of the non-events
    var = np.var(v01, ddof=1) / m + np.var(v10, ddof=1) / n
    se = float(np.sqrt(var))
    z = z_value(alpha)
    return {
        "auc": float(auc),
        "se": se,
        "lower": float(max(0.0, auc - z * se)),
        "upper": float(min(1.0, auc + z * se)),
    }


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, 1e-8, 1 - 1e-8)
    return np.log(p / (1 - p))


def _calibration(y: np.ndarray, p: np.ndarray, z: float) -> list[dict[str, Any]]:
    lp = _logit(p)
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        citl = sm.GLM(y, np.ones((len(y), 1)), family=sm.families.Binomial(), offset=lp).fit()
        slope = sm.GLM(y, sm.add_constant(lp), family=sm.families.Binomial()).fit()
    a, sa = float(citl.params[0]), float(citl.bse[0])
    b, sb = float(slope.params[1]), float(slope.bse[1])
    method_a = "logistic intercept with logit(predicted) as offset (Wald CI)"
    method_b = "logistic slope on logit(predicted) (Wald CI)"
    rows.append({"metric": "calibration_intercept", "estimate": a, "lower": a - z * sa,
                 "upper": a + z * sa, "method": method_a})
    rows.append({"metric": "calibration_slope", "estimate": b, "lower": b - z * sb,
                 "upper": b + z * sb, "method": method_b})
    return rows


def _wilson(events: int, n: int, z: float) -> tuple[float, float]:
    p = events / n
    denom = 1 + z**2 / n
    centre = (p + z**2 / (2 * n)) / denom
    half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
    return float(centre - half), float(centre + half)


def recurrence_prediction(
    episodes: FrameLike,
    *,
    numeric_covariates: Sequence[str] = (),
    categorical_covariates: Sequence[str] = (),
    outcome_col: str = "recurs_within_365d",
    group_col: str = "person_id",
    n_splits: int = 5,
    n_bins: int = 10,
    estimator: Any = None,
    alpha: float = 0.05,
    table: str = "episode_features",
) -> PredictionResult:
    """Cross-validated prediction of recurrence (episodes with a null flag left out).

    The default pipeline imputes missing numbers by the training-fold median (so a missing
    HbA1c does not drop the episode), scales them, one-hot encodes categories and fits an
    L2-penalised logistic regression (scikit-learn defaults, ``C=1``).

    Parameters
    ----------
    episodes
        The episode-features table.
    numeric_covariates, categorical_covariates
        Predictors; at least one in total.
    outcome_col
        Boolean or 0/1 outcome; rows where it is null are left out.
    group_col
        Person identifier: folds never split a person (``GroupKFold``).
    n_splits
        Number of folds (at most the number of persons).
    n_bins
        Quantile bins of the calibration curve.
    estimator
        A scikit-learn classifier with ``predict_proba`` to use instead of logistic
        regression (placed after the same preprocessing).
    alpha
        1 - confidence level.
    table
        Name of the input used in error messages.

    Returns
    -------
    PredictionResult

    Examples
    --------
    >>> import numpy as np, polars as pl
    >>> rng = np.random.default_rng(1)
    >>> x = rng.normal(size=300)
    >>> d = pl.DataFrame({"person_id": np.arange(300) // 2, "x": x,
    ...     "recurs_within_365d": rng.random(300) < 1 / (1 + np.exp(-2 * x))})
    >>> res = recurrence_prediction(d, numeric_covariates=["x"])
    >>> res.metrics["metric"].to_list()
    ['auroc', 'brier', 'calibration_intercept', 'calibration_slope']
    """
    numeric = list(numeric_covariates)
    categorical = list(categorical_covariates)
    if not numeric and not categorical:
        raise InputError("name at least one predictor in `numeric_covariates` or "
                         "`categorical_covariates`.")
    frame = to_pandas(episodes, table=table)
    require_columns(frame, [outcome_col, group_col, *numeric, *categorical], table=table)
    frame, dropped = drop_incomplete(frame, [outcome_col, group_col], table=table)
    check_one_definition(frame, table=table, used=[*numeric, *categorical])
    y = frame[outcome_col].astype(float).to_numpy()
    if not np.isin(y, [0.0, 1.0]).all():
        raise InputError(f"table `{table}`: outcome `{outcome_col}` must be true/false or 0/1.")
    y = y.astype(int)
    events = int(y.sum())
    groups = frame[group_col].to_numpy()
    n_persons = len(np.unique(groups))
    if n_splits < 2 or n_splits > n_persons:
        raise InputError(
            f"`n_splits` must be between 2 and the number of persons ({n_persons}); "
            f"got {n_splits}."
        )
    if min(events, len(y) - events) < n_splits * 2:
        raise InputError(
            f"table `{table}`: {events} events and {len(y) - events} non-events of "
            f"`{outcome_col}` are too few for {n_splits}-fold cross-validation (need at least "
            f"{n_splits * 2} of each)."
        )
    for col in numeric:
        frame[col] = frame[col].astype(float)
    for col in categorical:
        frame[col] = frame[col].astype(str)
    transformers = []
    if numeric:
        transformers.append(("numeric", Pipeline([("impute", SimpleImputer(strategy="median")),
                                                  ("scale", StandardScaler())]), numeric))
    if categorical:
        transformers.append(("categorical", OneHotEncoder(handle_unknown="ignore"), categorical))
    model = estimator if estimator is not None else LogisticRegression(max_iter=1000)
    pipe = Pipeline([("prepare", ColumnTransformer(transformers)), ("model", model)])
    predicted = np.full(len(y), np.nan)
    fold_of = np.zeros(len(y), dtype=int)
    X = frame[numeric + categorical]
    for fold, (train, test) in enumerate(GroupKFold(n_splits=n_splits).split(X, y, groups)):
        if len(np.unique(y[train])) < 2:
            raise InputError(
                f"table `{table}`: fold {fold + 1} has only one outcome class in its training "
                "persons; use fewer folds."
            )
        pipe.fit(X.iloc[train], y[train])
        predicted[test] = pipe.predict_proba(X.iloc[test])[:, 1]
        fold_of[test] = fold + 1
    z = z_value(alpha)
    repeats = n_persons < len(y)
    auc = delong_auc(y, predicted, alpha=alpha)
    if not np.isclose(auc["auc"], roc_auc_score(y, predicted)):  # pragma: no cover
        raise AssertionError("DeLong AUC disagrees with scikit-learn's roc_auc_score")
    auc_method = "DeLong (1988) variance, Wald CI, on out-of-fold predictions" + (
        "; episodes treated as independent although persons repeat" if repeats else ""
    )
    rows: list[dict[str, Any]] = [
        {"metric": "auroc", "estimate": auc["auc"], "lower": auc["lower"],
         "upper": auc["upper"], "method": auc_method},
        {"metric": "brier", "estimate": float(brier_score_loss(y, predicted)), "lower": None,
         "upper": None, "method": "mean squared error of predicted risk (out-of-fold)"},
        *_calibration(y, predicted, z),
    ]
    bounds = {"lower": pl.Float64, "upper": pl.Float64}
    metrics = pl.DataFrame(rows, schema_overrides=bounds).with_columns(
        pl.lit(len(y)).alias("n"),
        pl.lit(events).alias("events"),
        pl.lit(n_splits).alias("folds"),
        pl.lit(describe_dropped(dropped), dtype=pl.String).alias("left_out"),
    )
    edges = np.unique(np.quantile(predicted, np.linspace(0, 1, n_bins + 1)))
    bins = np.clip(np.searchsorted(edges, predicted, side="right") - 1, 0, len(edges) - 2)
    curve_rows = []
    for b in range(len(edges) - 1):
        mask = bins == b
        if not mask.any():
            continue
        n_b = int(mask.sum())
        e_b = int(y[mask].sum())
        lo, hi = _wilson(e_b, n_b, z)
        curve_rows.append({"bin": b + 1, "mean_predicted": float(predicted[mask].mean()),
                           "observed": e_b / n_b, "lower": lo, "upper": hi, "n": n_b,
                           "events": e_b})
    predictions = pl.DataFrame({"row": np.arange(len(y)), group_col: groups, "fold": fold_of,
                                "outcome": y, "predicted": predicted})
    return PredictionResult(metrics=metrics, calibration_curve=pl.DataFrame(curve_rows),
                            predictions=predictions)

