"""Competing risks: Aalen-Johansen cumulative incidence and cause-specific Cox models.

For time to resolution, resolution is the event of interest, death and discharge before
resolution compete with it (after either, resolution can no longer be observed), and the end
of the data censors. ``1 - Kaplan-Meier`` with the competing events censored overstates the
chance of resolution; the Aalen-Johansen estimator does not.

The estimator is written out here (rather than lifelines' ``AalenJohansenFitter``, which
jitters tied times) so that tied times, common in hour-rounded records, are handled exactly:
at each distinct time ``t_j`` with ``n_j`` at risk, ``d_j`` events of any cause and ``d_kj`` of
cause ``k``, ``S(t_j) = prod (1 - d_i / n_i)`` and ``F_k(t) = sum_{t_j <= t} S(t_{j-1}) d_kj /
n_j``. The variance is the delta-method (Greenwood-type) formula in Collett D, Modelling
Survival Data in Medical Research, 3rd ed. 2015, p. 411 (page as cited by lifelines'
``AalenJohansenFitter``; the same formula as Marubini E, Valsecchi MG, Analysing Survival Data
from Clinical Trials and Observational Studies, 1995), and the interval
is built on the log(-log) scale so it stays inside [0, 1]; lifelines uses the same formulas.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import polars as pl

from cohort._errors import InputError
from cohort.stats._common import (
    FrameLike,
    as_list,
    check_durations,
    describe_dropped,
    drop_incomplete,
    group_label,
    iter_groups,
    to_pandas,
    z_value,
)
from cohort.stats._cox import cox_model

__all__ = ["aalen_johansen_arrays", "cause_specific_cox", "cumulative_incidence"]


def aalen_johansen_arrays(
    durations: np.ndarray, causes: np.ndarray, cause: Any, *, censor_value: Any
) -> dict[str, np.ndarray]:
    """Aalen-Johansen cumulative incidence of one cause, as plain arrays.

    Parameters
    ----------
    durations
        Follow-up times (non-negative).
    causes
        What ended each follow-up: a cause, or ``censor_value`` for censoring.
    cause
        The cause whose cumulative incidence is returned.
    censor_value
        The value of ``causes`` that means censored.

    Returns
    -------
    dict
        ``time`` (distinct times with any event), ``estimate`` (F_k), ``variance``,
        ``at_risk``, ``events`` (of this cause), ``all_events``, ``survival`` (overall
        event-free survival just after each time).

    Examples
    --------
    >>> import numpy as np
    >>> out = aalen_johansen_arrays(np.array([1., 2, 3, 4, 5]), np.array(["a", "b", "c", "a", "a"]),
    ...                             "a", censor_value="c")
    >>> [round(float(v), 3) for v in out["estimate"]]
    [0.2, 0.2, 0.5, 0.8]
    """
    durations = np.asarray(durations, dtype=float)
    causes = np.asarray(causes, dtype=object)
    is_event = causes != censor_value
    times = np.unique(durations[is_event])
    if len(times) == 0:
        empty = np.array([], dtype=float)
        return {k: empty for k in ("time", "estimate", "variance", "at_risk", "events",
                                   "all_events", "survival")}
    order = np.sort(durations)
    at_risk = len(durations) - np.searchsorted(order, times, side="left")
    event_times = np.sort(durations[is_event])
    cause_times = np.sort(durations[causes == cause])
    d_all = np.searchsorted(event_times, times, side="right") - np.searchsorted(
        event_times, times, side="left"
    )
    d_k = np.searchsorted(cause_times, times, side="right") - np.searchsorted(
        cause_times, times, side="left"
    )
    n = at_risk.astype(float)
    surv = np.cumprod(1.0 - d_all / n)
    lag_surv = np.concatenate([[1.0], surv[:-1]])
    increments = lag_surv * d_k / n
    cif = np.cumsum(increments)
    # Collett (2015) p. 411: Var F(t) = sum_{j: t_j <= t} {
    #   [F(t) - F(t_j)]^2 d_j / (n_j (n_j - d_j)) + S(t_{j-1})^2 d_kj (n_j - d_kj) / n_j^3 - 2 [F(t) - F(t_j)] S(t_{j-1}) d_kj / n_j^2 }.
    # The first coefficient is undefined when n_j = d_j; then S falls to 0 and F(t) = F(t_j) for
    # every later t, so the term is 0.
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(n > d_all, d_all / (n * (n - d_all)), 0.0)
    b = lag_surv**2 * d_k * (n - d_k) / n**3
    c = lag_surv * d_k / n**2
    a1, a2, a3 = np.cumsum(a), np.cumsum(a * cif), np.cumsum(a * cif**2)
    c1, c2 = np.cumsum(c), np.cumsum(c * cif)
    variance = (cif**2 * a1 - 2 * cif * a2 + a3) + np.cumsum(b) - 2 * (cif * c1 - c2)
    variance = np.maximum(variance, 0.0)
    return {
        "time": times,
        "estimate": cif,
        "variance": variance,
        "at_risk": at_risk,
        "events": d_k,
        "all_events": d_all,
        "survival": surv,
    }


def _loglog_interval(
    estimate: np.ndarray, variance: np.ndarray, z: float
) -> tuple[np.ndarray, np.ndarray]:
    lower = np.zeros_like(estimate)
    upper = np.zeros_like(estimate)
    inside = (estimate > 0) & (estimate < 1)
    f = estimate[inside]
    se = np.sqrt(variance[inside]) / (f * np.abs(np.log(f)))
    centre = np.log(-np.log(f))
    lower[inside] = np.exp(-np.exp(centre + z * se))
    upper[inside] = np.exp(-np.exp(centre - z * se))
    at_one = estimate >= 1
    lower[at_one] = 1.0
    upper[at_one] = 1.0
    return lower, upper


def cumulative_incidence(
    data: FrameLike,
    *,
    duration_col: str = "hours_to_event",
    event_col: str = "event_type",
    censor_value: Any = "data_end",
    causes: Sequence[Any] | None = None,
    group_cols: str | Sequence[str] | None = None,
    alpha: float = 0.05,
    table: str = "episodes",
) -> pl.DataFrame:
    """Aalen-Johansen cumulative incidence of each cause with 95% intervals, by group.

    Parameters
    ----------
    data
        One row per subject.
    duration_col
        Time to the first event of any cause, or to censoring.
    event_col
        What ended follow-up: a cause (e.g. ``resolved``, ``died``,
        ``discharged_unresolved``) or ``censor_value``.
    censor_value
        The value of ``event_col`` meaning censored (``data_end`` for episodes).
    causes
        Causes to report (default: every value other than ``censor_value``).
    group_cols
        Column(s) defining groups.
    alpha
        1 - confidence level (pointwise, log(-log) scale).
    table
        Name of the input used in error messages.

    Returns
    -------
    polars.DataFrame
        One row per group, cause and event time (time 0 included): ``group``, group columns,
        ``cause``, ``time``, ``estimate``, ``lower``, ``upper``, ``se``, ``at_risk``,
        ``events``, ``n``, ``left_out``.

    Examples
    --------
    >>> import polars as pl
    >>> d = pl.DataFrame({"t": [1.0, 2, 3, 4, 5], "why": ["a", "b", "censored", "a", "a"]})
    >>> cif = cumulative_incidence(d, duration_col="t", event_col="why", censor_value="censored")
    >>> cif.filter(pl.col("cause") == "a")["estimate"].round(3).to_list()
    [0.0, 0.2, 0.2, 0.5, 0.8]
    """
    groups = as_list(group_cols)
    frame = to_pandas(data, table=table)
    frame, dropped = drop_incomplete(frame, [duration_col, event_col, *groups], table=table)
    durations_all = frame[duration_col].astype(float).to_numpy()
    check_durations(durations_all, column=duration_col, table=table)
    present = [v for v in pd.unique(frame[event_col]) if v != censor_value]
    if causes is None:
        causes = sorted(present, key=str)
    if not causes:
        raise InputError(
            f"table `{table}`: every row of `{event_col}` is the censoring value "
            f"{censor_value!r}; there is no event whose incidence could be estimated."
        )
    z = z_value(alpha)
    note = describe_dropped(dropped)
    parts: list[pl.DataFrame] = []
    for values, sub in iter_groups(frame, groups):
        label = group_label(groups, values)
        durations = sub[duration_col].astype(float).to_numpy()
        why = sub[event_col].to_numpy(dtype=object)
        for cause in causes:
            out = aalen_johansen_arrays(durations, why, cause, censor_value=censor_value)
            lower, upper = _loglog_interval(out["estimate"], out["variance"], z)
            # A time-0 row starts every curve at 0, unless events happen at time 0 itself.
            head = [] if len(out["time"]) and out["time"][0] == 0 else [0.0]
            n_head = [len(sub)] if head else []
            zero = [0] if head else []
            part = pl.DataFrame(
                {
                    "time": np.concatenate([head, out["time"]]),
                    "estimate": np.concatenate([head, out["estimate"]]),
                    "lower": np.concatenate([head, lower]),
                    "upper": np.concatenate([head, upper]),
                    "se": np.concatenate([head, np.sqrt(out["variance"])]),
                    "at_risk": np.concatenate([n_head, out["at_risk"]]).astype(np.int64),
                    "events": np.concatenate([zero, out["events"]]).astype(np.int64),
                }
            ).with_columns(
                pl.lit(label).alias("group"),
                *[pl.lit(v).alias(k) for k, v in zip(groups, values, strict=True)],
                pl.lit(str(cause)).alias("cause"),
                pl.lit(len(sub)).alias("n"),
                pl.lit(note, dtype=pl.String).alias("left_out"),
            )
            parts.append(part)
    ordered = ["group", *groups, "cause", "time", "estimate", "lower", "upper", "se",
               "at_risk", "events", "n", "left_out"]
    return pl.concat(parts, how="vertical_relaxed").select(ordered)


def cause_specific_cox(
    data: FrameLike,
    *,
    covariates: Sequence[str],
    duration_col: str = "hours_to_event",
    event_col: str = "event_type",
    censor_value: Any = "data_end",
    causes: Sequence[Any] | None = None,
    cluster_col: str | None = "person_id",
    strata: str | Sequence[str] | None = None,
    reference: dict[str, Any] | None = None,
    alpha: float = 0.05,
    min_events: int = 5,
    table: str = "episodes",
) -> pl.DataFrame:
    """Cause-specific Cox models: one per cause, the other causes censored at their time.

    A cause-specific hazard ratio describes the rate of that cause among those still at risk;
    it is the estimand for aetiology (Austin, Lee and Fine, Circulation 2016;133:601-609).

    Parameters
    ----------
    data, covariates, duration_col, event_col, censor_value, causes
        As in :func:`cumulative_incidence`; ``covariates`` as in :func:`cox_model`.
    cluster_col, strata, reference, alpha, min_events, table
        Passed to :func:`cox_model`.

    Returns
    -------
    polars.DataFrame
        :func:`cox_model` rows for every cause, with ``model = "cause-specific: <cause>"``
        and a ``cause`` column.

    Examples
    --------
    >>> import numpy as np, polars as pl
    >>> rng = np.random.default_rng(3)
    >>> d = pl.DataFrame({"t": rng.exponential(10, 200), "x": rng.integers(0, 2, 200),
    ...     "why": rng.choice(["resolved", "died", "data_end"], 200, p=[0.7, 0.15, 0.15])})
    >>> out = cause_specific_cox(d, covariates=["x"], duration_col="t", event_col="why",
    ...                          cluster_col=None)
    >>> sorted(out["cause"].unique().to_list())
    ['died', 'resolved']
    """
    frame = to_pandas(data, table=table)
    if causes is None:
        causes = sorted((v for v in pd.unique(frame[event_col].dropna()) if v != censor_value),
                        key=str)
    parts = []
    for cause in causes:
        fit = cox_model(
            frame,
            covariates=covariates,
            duration_col=duration_col,
            event_col=event_col,
            event_value=cause,
            strata=strata,
            cluster_col=cluster_col,
            reference=reference,
            alpha=alpha,
            min_events=min_events,
            model=f"cause-specific: {cause}",
            table=table,
        )
        parts.append(fit.with_columns(pl.lit(str(cause)).alias("cause")))
    return pl.concat(parts, how="vertical_relaxed")
