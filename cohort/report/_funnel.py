"""Funnel-plot limits for a proportion: exact binomial limits around a target, by denominator.

Spiegelhalter DJ. Funnel plots for comparing institutional performance. Stat Med
2005;24:1185-1202 (section on proportions and the appendix on exact limits). For a target share
``theta`` and a unit with denominator ``n``, the ``p`` limit uses ``r_p``, the smallest count
``r`` with ``P(R <= r) >= p`` for ``R ~ Binomial(n, theta)``, and the paper's interpolation
between the discrete steps:

    alpha = (P(R <= r_p) - p) / (P(R <= r_p) - P(R <= r_p - 1))
    limit = (r_p - alpha) / n

so the limits are smooth in ``n`` and a unit's share equal to the limit lies exactly on it
[from memory: the formula's form as recalled from the paper's appendix; it equals the binomial
quantile ``r_p / n`` less the interpolated part of the step]. The 95% limits take
``p = 0.025, 0.975`` and the 99.8% limits ``p = 0.001, 0.999`` (about 2 and 3 standard errors).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import polars as pl
from scipy import stats

from cohort._errors import InputError

__all__ = ["LEVELS", "binomial_limit", "funnel_limits", "funnel_position"]

#: Two-sided coverage of the plotted limits: (name, lower p, upper p).
LEVELS: tuple[tuple[str, float, float], ...] = (("95", 0.025, 0.975), ("99.8", 0.001, 0.999))


def _check(target: float, n: int) -> None:
    if not (isinstance(target, (int, float)) and 0.0 < float(target) < 1.0):
        msg = f"funnel limits: the target share must be strictly between 0 and 1, got {target!r}"
        raise InputError(msg)
    if isinstance(n, bool) or int(n) != n or n < 1:
        msg = f"funnel limits: a denominator must be a whole number of 1 or more, got {n!r}"
        raise InputError(msg)


def binomial_limit(target: float, n: int, p: float) -> float:
    """The ``p`` funnel limit for a share at denominator ``n`` (Spiegelhalter 2005, interpolated).

    Parameters
    ----------
    target
        The target (or pooled) share, in (0, 1).
    n
        The unit's denominator.
    p
        The cumulative probability of the limit (0.025 and 0.975 for 95%; 0.001 and 0.999 for 99.8%).

    Returns
    -------
    float
        The limit as a share, in [0, 1].

    Examples
    --------
    >>> round(binomial_limit(0.5, 100, 0.975), 4)
    0.5932
    """
    _check(target, n)
    if not 0.0 < p < 1.0:
        msg = f"binomial_limit: p must be strictly between 0 and 1, got {p!r}"
        raise InputError(msg)
    r_p = float(stats.binom.ppf(p, n, target))
    at = float(stats.binom.cdf(r_p, n, target))
    below = float(stats.binom.cdf(r_p - 1, n, target)) if r_p >= 1 else 0.0
    step = at - below
    alpha = (at - p) / step if step > 0 else 0.0
    return min(1.0, max(0.0, (r_p - alpha) / n))


def funnel_limits(target: float, denominators: Sequence[int]) -> pl.DataFrame:
    """Funnel limits at each denominator.

    Returns
    -------
    polars.DataFrame
        ``denominator``, ``target``, ``lower_95``, ``upper_95``, ``lower_99_8``, ``upper_99_8``.

    Examples
    --------
    >>> funnel_limits(0.8, [20, 200]).columns
    ['denominator', 'target', 'lower_95', 'upper_95', 'lower_99_8', 'upper_99_8']
    """
    rows = []
    for n in denominators:
        row: dict[str, float] = {"denominator": int(n), "target": float(target)}
        for name, low, high in LEVELS:
            key = name.replace(".", "_")
            row[f"lower_{key}"] = binomial_limit(target, int(n), low)
            row[f"upper_{key}"] = binomial_limit(target, int(n), high)
        rows.append(row)
    schema = {"denominator": pl.Int64, "target": pl.Float64, "lower_95": pl.Float64, "upper_95": pl.Float64,
              "lower_99_8": pl.Float64, "upper_99_8": pl.Float64}
    return pl.DataFrame(rows, schema=schema)


def funnel_position(numerator: int, denominator: int, target: float) -> str:
    """Where a unit lies on the funnel: ``within``, ``above_95``, ``above_99_8``, ``below_95``, ``below_99_8``.

    Examples
    --------
    >>> funnel_position(95, 100, 0.8)
    'above_99_8'
    """
    share = numerator / denominator
    lower95, upper95 = binomial_limit(target, denominator, 0.025), binomial_limit(target, denominator, 0.975)
    lower998, upper998 = binomial_limit(target, denominator, 0.001), binomial_limit(target, denominator, 0.999)
    if share > upper998:
        return "above_99_8"
    if share > upper95:
        return "above_95"
    if share < lower998:
        return "below_99_8"
    if share < lower95:
        return "below_95"
    return "within"


def curve_denominators(largest: int, points: int = 120) -> list[int]:
    """Denominators at which to draw the funnel: 1 to ``largest`` on a log-like grid."""
    if largest < 1 or math.isnan(largest):
        return []
    grid = np.unique(np.round(np.geomspace(1, max(largest, 2) * 1.1, points)).astype(int))
    return [int(value) for value in grid if value >= 1]
