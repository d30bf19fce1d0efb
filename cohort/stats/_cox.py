"""Cox proportional-hazards models (Efron ties) with a PH check beside every model.

Rows with one time each and model-based standard errors are fitted by lifelines; (start, stop]
rows (``entry_col``: the Andersen-Gill model, delayed entry) and every cluster-robust fit by
:func:`cohort.stats._counting_cox.fit_counting_cox`, whose robust variance honours the entry
times (lifelines' does not) and takes sorted sums rather than a loop over rows. The two give the
same coefficients and model-based variance (Efron ties; tests on the Rossi data).

Every fit reports hazard ratios with Wald intervals, the scaled Schoenfeld residual test of
proportional hazards for each term (Grambsch and Therneau 1994; lifelines'
``proportional_hazard_test`` with the Kaplan-Meier time transform, the default of R's
``cox.zph``) and, when a person contributes several rows, cluster-robust (sandwich) standard
errors by person (Lin and Wei 1989).

The PH test is computed here (:func:`schoenfeld_ph_test`) rather than by lifelines, because
lifelines has no Schoenfeld residuals for (start, stop] data; on ordinary data the two agree
(tested on the Rossi data).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
from lifelines import CoxPHFitter, KaplanMeierFitter
from lifelines.exceptions import ConvergenceError, ConvergenceWarning
from scipy import stats as sps

from cohort._errors import InputError
from cohort.stats._counting_cox import fit_counting_cox
from cohort.stats._common import (
    FrameLike,
    as_list,
    build_design,
    check_durations,
    check_min_events,
    check_one_definition,
    describe_dropped,
    drop_incomplete,
    event_indicator,
    events_per_parameter_warning,
    join_notes,
    require_columns,
    to_pandas,
    z_value,
)

__all__ = ["cox_model", "schoenfeld_ph_test"]

#: A log hazard ratio this large (a hazard ratio beyond e^15, about 3 million) means the partial
#: likelihood has no finite maximum (monotone likelihood, the survival analogue of separation);
#: such a number is reported as an error, never as an estimate. Common practice.
MONOTONE_LIKELIHOOD_COEF = 15.0

#: Columns that may be null in every row of a result; typed so empty columns stay typed.
_NULLABLE = {
    "reference": pl.String,
    "warning": pl.String,
    "left_out": pl.String,
    "n_clusters": pl.Int64,
    "ph_statistic": pl.Float64,
    "ph_p": pl.Float64,
    "ph_transform": pl.String,
}

_DURATION = "_duration"
_EVENT = "_event"
_ENTRY = "_entry"
_CLUSTER = "_cluster"


def _fit(
    fit_df: pd.DataFrame,
    *,
    strata: list[str],
    table: str,
    what: str,
) -> tuple[CoxPHFitter, list[str]]:
    """lifelines' Cox fit with model-based variance (robust fits go to fit_counting_cox)."""
    cph = CoxPHFitter()
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        try:
            cph.fit(
                fit_df,
                duration_col=_DURATION,
                event_col=_EVENT,
                strata=strata or None,
            )
        except (ConvergenceError, np.linalg.LinAlgError) as exc:
            raise InputError(
                f"{what} on table `{table}` did not converge: {str(exc).splitlines()[0]} "
                "This usually means a covariate separates events from non-events perfectly "
                "or two covariates carry the same information; drop or pool them."
            ) from None
    for record in records:
        if issubclass(record.category, ConvergenceWarning | RuntimeWarning):
            caught.append(str(record.message).splitlines()[0])
    return cph, caught


def schoenfeld_ph_test(
    x: np.ndarray,
    stop: np.ndarray,
    event: np.ndarray,
    beta: np.ndarray,
    variance: np.ndarray,
    *,
    entry: np.ndarray | None = None,
    strata: np.ndarray | None = None,
    time_transform: str = "km",
) -> tuple[np.ndarray, np.ndarray]:
    """Scaled Schoenfeld residual test of proportional hazards, one statistic per covariate.

    Schoenfeld residuals ``r_k = x_k - xbar(t_k)`` use the Efron-weighted risk-set mean at
    tied times; the scaled residuals are ``s_k = beta + D V r_k`` (``D`` events, ``V`` the
    model-based variance), and the statistic for covariate ``j`` is
    ``(sum_k (g_k - gbar) s_kj)^2 / (D V_jj sum_k (g_k - gbar)^2)``, chi-square on 1 df, with
    ``g`` the transformed event time (Grambsch PM, Therneau TM. Proportional hazards tests and
    diagnostics based on weighted residuals. Biometrika 1994;81:515-526; the same statistic as
    lifelines' ``proportional_hazard_test``). Risk sets honour ``entry`` ((start, stop] data)
    and ``strata``.

    Parameters
    ----------
    x
        Covariates, shape (n, p).
    stop, event
        Stop time and 0/1 event per row.
    beta, variance
        Fitted coefficients (p,) and their model-based variance matrix (p, p).
    entry
        Start time per row (``None``: every row at risk from time 0).
    strata
        Stratum label per row (``None``: one stratum).
    time_transform
        ``km`` (1 - Kaplan-Meier at the event time), ``rank``, ``identity`` or ``log``.

    Returns
    -------
    tuple of numpy arrays
        ``(statistic, p)``, each of length p.
    """
    x = np.asarray(x, dtype=float)
    x = x - x.mean(axis=0)
    stop = np.asarray(stop, dtype=float)
    event = np.asarray(event).astype(bool)
    entry_arr = np.full(len(stop), -np.inf) if entry is None else np.asarray(entry, dtype=float)
    strata_arr = np.zeros(len(stop)) if strata is None else np.asarray(strata)
    risk = np.exp(np.clip(x @ beta, -700, 700))
    residuals: list[np.ndarray] = []
    event_times: list[np.ndarray] = []
    for level in pd.unique(strata_arr):
        rows = strata_arr == level
        xs, ws, st, en, ev = x[rows], risk[rows], stop[rows], entry_arr[rows], event[rows]
        if not ev.any():
            continue
        times, tie_index, tie_count = np.unique(st[ev], return_inverse=True, return_counts=True)
        order_stop = np.argsort(st)
        order_entry = np.argsort(en)
        cw_stop = np.concatenate([np.cumsum(ws[order_stop][::-1])[::-1], [0.0]])
        cwx_stop = np.vstack([np.cumsum((ws[:, None] * xs)[order_stop][::-1], axis=0)[::-1],
                              np.zeros((1, xs.shape[1]))])
        cw_entry = np.concatenate([np.cumsum(ws[order_entry][::-1])[::-1], [0.0]])
        cwx_entry = np.vstack([np.cumsum((ws[:, None] * xs)[order_entry][::-1], axis=0)[::-1],
                               np.zeros((1, xs.shape[1]))])
        at_stop = np.searchsorted(st[order_stop], times, side="left")
        at_entry = np.searchsorted(en[order_entry], times, side="left")
        s0 = cw_stop[at_stop] - cw_entry[at_entry]
        s1 = cwx_stop[at_stop] - cwx_entry[at_entry]
        xe, we = xs[ev], ws[ev]
        d0 = np.zeros(len(times))
        d1 = np.zeros((len(times), xs.shape[1]))
        np.add.at(d0, tie_index, we)
        np.add.at(d1, tie_index, we[:, None] * xe)
        # Efron: the l-th of m tied events sees the risk set minus l/m of the tied events.
        order = np.argsort(tie_index, kind="stable")
        rank_in_tie = np.empty(len(tie_index), dtype=int)
        starts = np.concatenate([[0], np.cumsum(tie_count)[:-1]])
        rank_in_tie[order] = np.arange(len(tie_index)) - np.repeat(starts, tie_count)
        frac = rank_in_tie / tie_count[tie_index]
        means_l = (s1[tie_index] - frac[:, None] * d1[tie_index]) / (
            s0[tie_index] - frac * d0[tie_index]
        )[:, None]
        xbar = np.zeros_like(d1)
        np.add.at(xbar, tie_index, means_l)
        xbar /= tie_count[:, None]
        residuals.append(xe - xbar[tie_index])
        event_times.append(st[ev])
    r = np.vstack(residuals)
    t_events = np.concatenate(event_times)
    n_events = len(t_events)
    if time_transform == "km":
        kmf = KaplanMeierFitter().fit(
            stop, event, entry=None if entry is None else entry_arr
        )
        g = 1.0 - kmf.survival_function_at_times(t_events).to_numpy()
    elif time_transform == "rank":
        g = sps.rankdata(t_events, method="ordinal").astype(float)
    elif time_transform == "identity":
        g = t_events
    elif time_transform == "log":
        g = np.log(t_events)
    else:
        raise InputError(
            f"`ph_time_transform` must be 'km', 'rank', 'identity' or 'log', got "
            f"{time_transform!r}."
        )
    scaled = beta + n_events * r @ variance
    gc = g - g.mean()
    statistic = (gc[:, None] * scaled).sum(axis=0) ** 2 / (
        n_events * np.diag(variance) * (gc**2).sum()
    )
    return statistic, sps.chi2.sf(statistic, 1)


def cox_model(
    data: FrameLike,
    *,
    covariates: Sequence[str],
    duration_col: str = "hours_to_event",
    event_col: str = "is_resolved",
    event_value: Any = None,
    strata: str | Sequence[str] | None = None,
    cluster_col: str | None = "person_id",
    entry_col: str | None = None,
    reference: dict[str, Any] | None = None,
    alpha: float = 0.05,
    min_events: int = 5,
    ph_test: bool = True,
    ph_time_transform: str = "km",
    model: str = "cox",
    table: str = "episodes",
) -> pl.DataFrame:
    """Fit a Cox model (Efron ties) and return hazard ratios with the PH test beside them.

    Parameters
    ----------
    data
        One row per subject, or per (start, stop] interval when ``entry_col`` is given.
    covariates
        Columns entered in the model; text columns become indicators against a reference
        level (see ``reference``).
    duration_col
        Time to event or censoring (the interval's stop time when ``entry_col`` is given).
    event_col, event_value
        Event indicator (bool or 0/1), or a text column with the value that is the event.
    strata
        Column(s) whose levels get their own baseline hazard.
    cluster_col
        Identifier of the person; when a value repeats, standard errors are cluster-robust by
        it (``se_type = robust_cluster``). ``None`` for independent rows.
    entry_col
        Start of each (start, stop] interval: counting-process (Andersen-Gill) data or delayed
        entry.
    reference
        Reference level per text covariate (default: its most frequent level).
    alpha
        1 - confidence level of the intervals.
    min_events
        Fewer events than this is an error, not an estimate.
    ph_test
        Report the scaled Schoenfeld test per term (``ph_statistic``, ``ph_p``).
    ph_time_transform
        Time transform of that test: ``km`` (R ``cox.zph`` default), ``rank``, ``identity``
        or ``log``.
    model
        Label written in the ``model`` column.
    table
        Name of the input used in error messages.

    Returns
    -------
    polars.DataFrame
        One row per term: ``model``, ``term``, ``covariate``, ``reference``, ``coef``, ``se``,
        ``estimate`` (hazard ratio), ``lower``, ``upper``, ``z``, ``p``, ``se_type``, ``n``,
        ``events``, ``n_clusters``, ``ph_statistic``, ``ph_p``, ``ph_transform``,
        ``warning``, ``left_out``.

    Raises
    ------
    InputError
        Too few events, a constant covariate, non-convergence or a monotone likelihood
        (a covariate separating events from non-events).

    Examples
    --------
    >>> from lifelines.datasets import load_rossi
    >>> fit = cox_model(load_rossi(), duration_col="week", event_col="arrest",
    ...                 covariates=["fin", "age", "prio"], cluster_col=None)
    >>> fit["term"].to_list()
    ['fin', 'age', 'prio']
    """
    covariates = list(covariates)
    if not covariates:
        raise InputError("`covariates` is empty; name at least one column to model.")
    strata_cols = as_list(strata)
    needed = [duration_col, event_col, *covariates, *strata_cols]
    frame = to_pandas(data, table=table)
    if cluster_col is not None:
        require_columns(frame, [cluster_col], table=table)
        needed.append(cluster_col)
    if entry_col is not None:
        needed.append(entry_col)
    frame, dropped = drop_incomplete(frame, list(dict.fromkeys(needed)), table=table)
    check_one_definition(frame, table=table, used=[*covariates, *strata_cols])
    design = build_design(frame, covariates, table=table, reference=reference)
    fit_df = design.matrix.copy()
    fit_df[_DURATION] = frame[duration_col].astype(float).to_numpy()
    fit_df[_EVENT] = event_indicator(frame, event_col, table=table, event_value=event_value)
    check_durations(fit_df[_DURATION].to_numpy(), column=duration_col, table=table)
    what = f"Cox model `{model}`"
    if entry_col is not None:
        fit_df[_ENTRY] = frame[entry_col].astype(float).to_numpy()
        bad = fit_df[_ENTRY] >= fit_df[_DURATION]
        if bad.any():
            raise InputError(
                f"table `{table}`: {int(bad.sum())} interval(s) have `{entry_col}` >= "
                f"`{duration_col}`; every (start, stop] interval must have start < stop."
            )
    for col in strata_cols:
        fit_df[col] = frame[col].to_numpy()
    events = int(fit_df[_EVENT].sum())
    check_min_events(events, min_events=min_events, what=what, table=table)
    robust = False
    n_clusters: int | None = None
    if cluster_col is not None:
        fit_df[_CLUSTER] = frame[cluster_col].to_numpy()
        n_clusters = int(frame[cluster_col].nunique())
        robust = n_clusters < len(frame)
        if not robust:
            fit_df = fit_df.drop(columns=[_CLUSTER])
    terms = list(design.terms)
    strata_labels = (
        fit_df[strata_cols].astype(str).agg("|".join, axis=1).to_numpy() if strata_cols else None
    )
    converged, steps = True, 0
    if entry_col is not None or robust:
        # (start, stop] rows, or a robust variance: the project's own fit
        # (cohort.stats._counting_cox): lifelines' robust variance ignores entry times, and its
        # robust score residuals are a Python loop over rows (114 s of the statistics stage at a
        # million persons)
        fitted = fit_counting_cox(
            fit_df[terms].to_numpy(dtype=float),
            fit_df[_ENTRY].to_numpy() if entry_col is not None else np.full(len(fit_df), -np.inf),
            fit_df[_DURATION].to_numpy(),
            fit_df[_EVENT].to_numpy(),
            strata=strata_labels,
            cluster=fit_df[_CLUSTER].to_numpy() if robust else None,
        )
        caught: list[str] = []
        converged, steps = fitted.converged, fitted.iterations
        coefs = pd.Series(fitted.params, index=terms)
        model_variance = pd.DataFrame(fitted.variance, index=terms, columns=terms)
        chosen = fitted.robust_variance if fitted.robust_variance is not None else fitted.variance
        se = pd.Series(np.sqrt(np.clip(np.diag(chosen), 0.0, None)), index=terms)
    else:
        cph, caught = _fit(fit_df, strata=strata_cols, table=table, what=what)
        coefs = cph.params_[terms]
        # lifelines keeps the model-based variance in variance_matrix_ even for a robust fit
        # (robust SEs go to standard_errors_ only); the Grambsch-Therneau scaling uses it.
        model_variance = cph.variance_matrix_.loc[terms, terms]
        se = cph.summary["se(coef)"][terms]
    huge = coefs[np.abs(coefs) > MONOTONE_LIKELIHOOD_COEF]
    if len(huge) or any("separation" in msg for msg in caught):
        term = huge.index[0] if len(huge) else "a covariate"
        raise InputError(
            f"{what} on table `{table}`: `{term}` separates events from non-events (the "
            "partial likelihood has no finite maximum, log hazard ratio "
            f"{float(huge.iloc[0]) if len(huge) else float('inf'):.1f}); no finite hazard "
            "ratio exists. Drop or pool that covariate, or use a penalised model."
        )
    if not converged:
        raise InputError(
            f"{what} on table `{table}` did not converge in {steps} Newton-Raphson steps. This "
            "usually means a covariate separates events from non-events perfectly or two "
            "covariates carry the same information; drop or pool them."
        )
    z = z_value(alpha)
    wald = coefs / se
    p_value = pd.Series(sps.chi2.sf(wald.to_numpy() ** 2, 1), index=terms)
    ph_stat: dict[str, float] = {}
    ph_p: dict[str, float] = {}
    if ph_test:
        statistic, p_values = schoenfeld_ph_test(
            fit_df[design.terms].to_numpy(),
            fit_df[_DURATION].to_numpy(),
            fit_df[_EVENT].to_numpy(),
            coefs.to_numpy(),
            model_variance.to_numpy(),
            entry=fit_df[_ENTRY].to_numpy() if entry_col is not None else None,
            strata=strata_labels,
            time_transform=ph_time_transform,
        )
        ph_stat = dict(zip(design.terms, statistic.tolist(), strict=True))
        ph_p = dict(zip(design.terms, p_values.tolist(), strict=True))
    warning = join_notes(
        events_per_parameter_warning(events, len(design.terms)),
        "; ".join(caught) if caught else None,
    )
    rows = []
    for term in design.terms:
        coef = float(coefs[term])
        s = float(se[term])
        rows.append(
            {
                "model": model,
                "term": term,
                "covariate": design.covariate_of[term],
                "reference": design.reference_of[term],
                "coef": coef,
                "se": s,
                "estimate": float(np.exp(coef)),
                "lower": float(np.exp(coef - z * s)),
                "upper": float(np.exp(coef + z * s)),
                "z": float(wald[term]),
                "p": float(p_value[term]),
                "se_type": "robust_cluster" if robust else "model",
                "n": len(fit_df),
                "events": events,
                "n_clusters": n_clusters,
                "ph_statistic": ph_stat.get(term),
                "ph_p": ph_p.get(term),
                "ph_transform": ph_time_transform if ph_test else None,
                "warning": warning,
                "left_out": describe_dropped(dropped),
            }
        )
    return pl.DataFrame(rows, schema_overrides=_NULLABLE)
