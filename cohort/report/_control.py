"""The p-chart: control limits for the share of episodes meeting a standard, month by month.

Centre line ``p_bar = sum(numerators) / sum(denominators)``; 3-sigma limits for subgroup ``i``
``p_bar +/- 3 * sqrt(p_bar * (1 - p_bar) / n_i)``, clipped to [0, 1], so that months with fewer
episodes get wider limits (Montgomery DC. Introduction to Statistical Quality Control, chapter
"Control charts for attributes", the control chart for fraction nonconforming with variable
sample size). A point outside its limits is a signal of special-cause variation.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from cohort._errors import InputError

__all__ = ["PChart", "p_chart"]


@dataclass(frozen=True)
class PChart:
    """A p-chart.

    Attributes
    ----------
    centre
        p-bar, the pooled share.
    share
        Share of each subgroup (NaN where the denominator is 0).
    lower, upper
        Limits of each subgroup, clipped to [0, 1] (NaN where the denominator is 0).
    outside
        Indices of subgroups whose share lies outside its limits.
    sigma
        Width of the limits in standard errors.
    """

    centre: float
    share: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    outside: tuple[int, ...]
    sigma: float


def p_chart(numerators: Sequence[int], denominators: Sequence[int], *, sigma: float = 3.0) -> PChart:
    """Control limits of a p-chart for subgroups of varying size.

    Parameters
    ----------
    numerators
        Episodes meeting the standard, per subgroup (month).
    denominators
        Episodes where the standard can be judged, per subgroup.
    sigma
        Width of the limits in standard errors (3 by convention: Shewhart's 3-sigma limits).

    Returns
    -------
    PChart
        Centre line, shares, limits and the subgroups outside them.

    Raises
    ------
    InputError
        Lengths differ, a count is negative or not whole, a numerator exceeds its denominator, or
        every denominator is 0.

    Examples
    --------
    >>> chart = p_chart([12, 15, 8], [50, 50, 50])
    >>> round(chart.centre, 4), round(float(chart.upper[0]), 4)
    (0.2333, 0.4128)
    """
    num = np.asarray(numerators, dtype=float)
    den = np.asarray(denominators, dtype=float)
    if num.shape != den.shape or num.ndim != 1:
        msg = f"p_chart: numerators and denominators must be two lists of one length, got {num.shape} and {den.shape}"
        raise InputError(msg)
    bad = (num < 0) | (den < 0) | (num != np.round(num)) | (den != np.round(den)) | (num > den)
    if bad.any():
        first = int(np.argmax(bad))
        msg = (f"p_chart: counts must be whole numbers with 0 <= numerator <= denominator; "
               f"{int(bad.sum())} subgroup(s) break this, the first is subgroup {first} "
               f"({num[first]:g} of {den[first]:g})")
        raise InputError(msg)
    if not math.isfinite(sigma) or sigma <= 0:
        msg = f"p_chart: sigma must be a positive number, got {sigma!r}"
        raise InputError(msg)
    total = den.sum()
    if total == 0:
        msg = "p_chart: every denominator is 0; there is no share to chart"
        raise InputError(msg)
    centre = float(num.sum() / total)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(den > 0, num / den, np.nan)
        half = sigma * np.sqrt(centre * (1.0 - centre) / den)
    half = np.where(den > 0, half, np.nan)
    lower = np.clip(centre - half, 0.0, 1.0)
    upper = np.clip(centre + half, 0.0, 1.0)
    outside = tuple(int(index) for index in np.flatnonzero((share < lower) | (share > upper)))
    return PChart(centre, share, lower, upper, outside, float(sigma))
