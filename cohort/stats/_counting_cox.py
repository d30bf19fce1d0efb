"""Cox model on (start, stop] counting-process data: Efron ties, cluster-robust variance.

The partial likelihood of the Andersen-Gill model (Andersen PK, Gill RD. Cox's regression model
for counting processes: a large sample study. Ann Stat 1982;10:1100-1120): a row is at risk at
an event time ``t`` when ``start < t <= stop``; tied event times are handled by Efron's method
(Efron B. The efficiency of Cox's likelihood function for censored data. J Am Stat Assoc
1977;72:557-565). The cluster-robust (sandwich) variance sums the score residuals of each
person's rows (Lin DY, Wei LJ. The robust inference for the Cox proportional hazards model. J Am
Stat Assoc 1989;84:1074-1078), with risk sets honouring the entry times; the residual at a
tied time is the Breslow form (on right-censored data with ties the robust standard errors equal
statsmodels' ``PHReg(...).fit(groups=...)``, checked on the Rossi data).

Why not lifelines: its ``CoxPHFitter(entry_col=...)`` fits the coefficients with a Python loop
over event times (158 s of the statistics stage at a million persons) and computes robust score
residuals as though every row were at risk from time 0 (lifelines 0.30: splitting an interval
at a time with no event changes its robust standard errors, which the counting-process identity
forbids; ``tests/test_stats_cox.py``). Every sum here is a sort, a cumulative sum and a
``searchsorted``: one pass per Newton step.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CountingCoxFit", "fit_counting_cox"]


@dataclass(frozen=True)
class CountingCoxFit:
    """A fitted counting-process Cox model.

    Attributes
    ----------
    params
        Log hazard ratios, shape (p,).
    variance
        Model-based variance (the inverse of the observed information), (p, p).
    robust_variance
        Cluster-robust (sandwich) variance, (p, p); None without clusters.
    log_likelihood
        Log partial likelihood at ``params``.
    iterations
        Newton-Raphson steps taken.
    converged
        True when the step met the tolerance within the allowed steps.
    """

    params: np.ndarray
    variance: np.ndarray
    robust_variance: np.ndarray | None
    log_likelihood: float
    iterations: int
    converged: bool


@dataclass(frozen=True)
class _Stratum:
    """One stratum's rows, with the index arrays every Newton step reuses."""

    x: np.ndarray            # (n, p), centred
    start: np.ndarray
    stop: np.ndarray
    event: np.ndarray        # bool
    times: np.ndarray        # distinct event times, ascending (K,)
    stop_order: np.ndarray   # rows by stop, descending
    start_order: np.ndarray  # rows by start, descending
    stop_cut: np.ndarray     # per time: rows (in stop_order) with stop >= t
    start_cut: np.ndarray    # per time: rows (in start_order) with start >= t
    event_rows: np.ndarray   # rows with an event
    event_time: np.ndarray   # per event row: index of its time
    tie_rank: np.ndarray     # per event row: l / d (Efron), l = 0 .. d - 1 within its time
    deaths: np.ndarray       # per time: number of events (K,)


def _stratum(x: np.ndarray, start: np.ndarray, stop: np.ndarray, event: np.ndarray) -> _Stratum:
    times = np.unique(stop[event])
    stop_order = np.argsort(-stop, kind="stable")
    start_order = np.argsort(-start, kind="stable")
    # number of rows with stop >= t: stop sorted descending, so count those >= t
    stop_sorted = stop[stop_order]
    start_sorted = start[start_order]
    stop_cut = np.searchsorted(-stop_sorted, -times, side="right")
    start_cut = np.searchsorted(-start_sorted, -times, side="right")
    event_rows = np.flatnonzero(event)
    event_time = np.searchsorted(times, stop[event_rows])
    deaths = np.bincount(event_time, minlength=len(times)).astype(float)
    # the rank of each event within its tied time (any order: Efron's sum is symmetric)
    order = np.argsort(event_time, kind="stable")
    first = np.searchsorted(event_time[order], event_time[order], side="left")
    rank = np.empty(len(event_rows), dtype=float)
    rank[order] = np.arange(len(event_rows)) - first
    tie_rank = rank / deaths[event_time]
    return _Stratum(x, start, stop, event, times, stop_order, start_order, stop_cut, start_cut,
                    event_rows, event_time, tie_rank, deaths)


def _risk_sums(s: _Stratum, values: np.ndarray) -> np.ndarray:
    """Per event time, the sum of ``values`` (rows first) over the rows at risk then."""
    zero = np.zeros((1, *values.shape[1:]))
    by_stop = np.concatenate([zero, np.cumsum(values[s.stop_order], axis=0)])
    by_start = np.concatenate([zero, np.cumsum(values[s.start_order], axis=0)])
    # at risk: stop >= t minus start >= t (such a row also has stop >= t)
    return by_stop[s.stop_cut] - by_start[s.start_cut]


def _derivatives(strata: list[_Stratum], beta: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Log partial likelihood (Efron), its gradient and its Hessian at ``beta``."""
    p = len(beta)
    log_lik = 0.0
    gradient = np.zeros(p)
    hessian = np.zeros((p, p))
    for s in strata:
        if not len(s.times):
            continue
        eta = s.x @ beta
        w = np.exp(eta)
        wx = w[:, None] * s.x
        wxx = wx[:, :, None] * s.x[:, None, :]
        s0, s1, s2 = _risk_sums(s, w), _risk_sums(s, wx), _risk_sums(s, wxx)
        rows, k, f = s.event_rows, s.event_time, s.tie_rank
        e0 = np.bincount(k, weights=w[rows], minlength=len(s.times))
        e1 = np.zeros((len(s.times), p))
        np.add.at(e1, k, wx[rows])
        e2 = np.zeros((len(s.times), p, p))
        np.add.at(e2, k, wxx[rows])
        den = s0[k] - f * e0[k]
        mean = (s1[k] - f[:, None] * e1[k]) / den[:, None]
        second = (s2[k] - f[:, None, None] * e2[k]) / den[:, None, None]
        log_lik += float(eta[rows].sum() - np.log(den).sum())
        gradient += s.x[rows].sum(axis=0) - mean.sum(axis=0)
        hessian -= (second - mean[:, :, None] * mean[:, None, :]).sum(axis=0)
    return log_lik, gradient, hessian


def _score_residuals(strata: list[_Stratum], beta: np.ndarray) -> list[np.ndarray]:
    """Per stratum, each row's score residual (n, p), Breslow form at tied times.

    ``U_i = d_i (x_i - xbar(stop_i)) - w_i sum over event times t in (start_i, stop_i] of
    (x_i - xbar(t)) dN(t) / S0(t)``, with ``xbar = S1 / S0`` over the rows at risk at t.
    """
    out = []
    for s in strata:
        n, p = s.x.shape
        if not len(s.times):
            out.append(np.zeros((n, p)))
            continue
        w = np.exp(s.x @ beta)
        s0 = _risk_sums(s, w)
        xbar = _risk_sums(s, w[:, None] * s.x) / s0[:, None]
        hazard = s.deaths / s0
        # cumulative over event times t_k <= t, evaluated at each row's start and stop
        cum_h = np.concatenate([[0.0], np.cumsum(hazard)])
        cum_g = np.concatenate([np.zeros((1, p)), np.cumsum(hazard[:, None] * xbar, axis=0)])
        at_stop = np.searchsorted(s.times, s.stop, side="right")
        at_start = np.searchsorted(s.times, s.start, side="right")
        h = cum_h[at_stop] - cum_h[at_start]
        g = cum_g[at_stop] - cum_g[at_start]
        resid = -w[:, None] * (s.x * h[:, None] - g)
        rows = s.event_rows
        resid[rows] += s.x[rows] - xbar[s.event_time]
        out.append(resid)
    return out


def fit_counting_cox(
    x: np.ndarray,
    start: np.ndarray,
    stop: np.ndarray,
    event: np.ndarray,
    *,
    strata: np.ndarray | None = None,
    cluster: np.ndarray | None = None,
    max_steps: int = 50,
    tolerance: float = 1e-9,
) -> CountingCoxFit:
    """Fit a Cox model to (start, stop] rows by Newton-Raphson with step halving.

    Parameters
    ----------
    x
        Covariates, shape (n, p).
    start, stop
        Interval ends per row, ``start < stop``; a row is at risk at ``t`` when
        ``start < t <= stop``.
    event
        1 (or True) when the row's interval ends with an event.
    strata
        Stratum label per row (each stratum its own baseline hazard); None for one.
    cluster
        Cluster (person) label per row, for the robust variance; None for none.
    max_steps, tolerance
        Newton-Raphson limits: stop when the largest change of a coefficient is below
        ``tolerance``.

    Returns
    -------
    CountingCoxFit

    Examples
    --------
    >>> x = np.array([[0.0], [1.0], [0.0], [1.0]])
    >>> fit = fit_counting_cox(x, np.zeros(4), np.array([1.0, 2.0, 3.0, 4.0]), np.array([1, 1, 1, 0]))
    >>> round(float(fit.params[0]), 4), fit.converged
    (-0.9406, True)
    """
    x = np.asarray(x, dtype=float)
    if x.ndim != 2:
        msg = f"x must be a 2-d array (rows, covariates), got shape {x.shape}"
        raise ValueError(msg)
    n, p = x.shape
    start = np.asarray(start, dtype=float)
    stop = np.asarray(stop, dtype=float)
    event = np.asarray(event).astype(bool)
    centred = x - x.mean(axis=0) if n else x
    labels = np.zeros(n, dtype=int) if strata is None else np.unique(np.asarray(strata), return_inverse=True)[1]
    parts = [np.flatnonzero(labels == level) for level in np.unique(labels)]
    strata_rows = [_stratum(centred[rows], start[rows], stop[rows], event[rows]) for rows in parts]

    beta = np.zeros(p)
    log_lik, gradient, hessian = _derivatives(strata_rows, beta)
    converged = False
    steps = 0
    for steps in range(1, max_steps + 1):
        try:
            step = np.linalg.solve(-hessian, gradient)
        except np.linalg.LinAlgError:
            step = np.linalg.lstsq(-hessian, gradient, rcond=None)[0]
        trial = beta + step
        trial_ll, trial_gradient, trial_hessian = _derivatives(strata_rows, trial)
        halvings = 0
        while (not np.isfinite(trial_ll) or trial_ll < log_lik - 1e-12) and halvings < 30:
            step = step / 2
            trial = beta + step
            trial_ll, trial_gradient, trial_hessian = _derivatives(strata_rows, trial)
            halvings += 1
        beta, log_lik, gradient, hessian = trial, trial_ll, trial_gradient, trial_hessian
        if np.max(np.abs(step)) < tolerance:
            converged = True
            break
    variance = np.linalg.pinv(-hessian)
    robust = None
    if cluster is not None:
        residuals = np.zeros((n, p))
        for rows, part in zip(parts, _score_residuals(strata_rows, beta), strict=True):
            residuals[rows] = part
        dfbeta = residuals @ variance
        groups = np.unique(np.asarray(cluster), return_inverse=True)[1]
        summed = np.zeros((int(groups.max()) + 1 if n else 0, p))
        np.add.at(summed, groups, dfbeta)
        robust = summed.T @ summed
    return CountingCoxFit(beta, variance, robust, log_lik, steps, converged)
