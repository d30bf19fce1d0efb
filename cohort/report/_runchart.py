"""Run-chart rules: median line, shift, trend, too few or too many runs, astronomical point.

The rules are those of Perla RJ, Provost LP, Murray SK. The run chart: a simple analytical tool
for learning from variation in healthcare processes. BMJ Qual Saf 2011;20:46-51:

1. **Shift**: six or more consecutive points all above or all below the median. Points on the
   median neither add to nor break a shift: they are skipped.
2. **Trend**: five or more consecutive points all going up or all going down. When two or more
   successive points have the same value, only one of them is counted; like values neither make
   nor break a trend.
3. **Too few or too many runs**: a run is a series of consecutive points on one side of the
   median (points on the median are left out). The number of runs is compared with the limits of
   the paper's Table 1 for the number of *useful observations* (points not on the median), bundled
   as ``data/runs_limits_perla2011.csv``. The table covers 10 to 60 useful observations; below 10
   the rule is not applied; above 60 the limits come from the exact distribution of the number of
   runs (Swed F, Eisenhart C. Ann Math Stat 1943;14:66-87) with 2.5% in each tail.
4. **Astronomical point**: the paper leaves this to judgement ("a blatantly obvious different
   value"). This module's operational reading: a point beyond Tukey's outer fences, more than 3
   interquartile ranges below the first or above the third quartile (Tukey JW. Exploratory Data
   Analysis. Addison-Wesley, 1977: "far out" values); quartiles by linear interpolation. The report
   says it marks candidates for a reader's judgement, not a test.

Missing values (months whose figure is withheld by disclosure control, or months with no episode)
are left out of every rule; point indices always refer to positions in the input sequence.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources

import numpy as np

from cohort._errors import InputError

__all__ = [
    "RULES",
    "RuleSignal",
    "RunChartAnalysis",
    "analyse_run_chart",
    "astronomical_points",
    "count_runs",
    "exact_runs_distribution",
    "exact_runs_limits",
    "median_line",
    "perla_runs_table",
    "runs_limits",
    "shift_signals",
    "trend_signals",
]

#: Names of the rules, in the order the report lists them.
RULES: tuple[str, ...] = ("shift", "trend", "too_few_runs", "too_many_runs", "astronomical")

SHIFT_LENGTH = 6
TREND_LENGTH = 5
TABLE_FIRST, TABLE_LAST = 10, 60


def _values(values: Sequence[float | None]) -> np.ndarray:
    try:
        array = np.array([math.nan if value is None else float(value) for value in values], dtype=float)
    except (TypeError, ValueError) as error:
        msg = f"run chart: values must be numbers or None, got {list(values)[:5]!r}...: {error}"
        raise InputError(msg) from error
    if np.isinf(array).any():
        msg = f"run chart: values must be finite, found {int(np.isinf(array).sum())} infinite value(s)"
        raise InputError(msg)
    return array


def median_line(values: Sequence[float | None]) -> float:
    """Median of the observed values (the run chart's centre line).

    Parameters
    ----------
    values
        The series in time order; ``None`` or NaN for a missing point.

    Returns
    -------
    float
        The median of the non-missing values; NaN when there is none.

    Examples
    --------
    >>> median_line([3, 1, None, 2, 10])
    2.5
    """
    array = _values(values)
    observed = array[~np.isnan(array)]
    return float(np.median(observed)) if observed.size else math.nan


def _sides(array: np.ndarray, median: float) -> list[tuple[int, int]]:
    """(index, side) of the useful observations: side +1 above the median, -1 below."""
    return [
        (index, 1 if value > median else -1)
        for index, value in enumerate(array)
        if not math.isnan(value) and value != median
    ]


def shift_signals(
    values: Sequence[float | None], median: float | None = None, *, min_length: int = SHIFT_LENGTH
) -> list[tuple[int, ...]]:
    """Shifts: ``min_length`` or more consecutive useful points on one side of the median.

    Parameters
    ----------
    values
        The series in time order (``None``/NaN missing).
    median
        The centre line; the median of ``values`` when ``None``.
    min_length
        Shortest shift (Perla et al. 2011: 6).

    Returns
    -------
    list of tuple of int
        One tuple per shift: the indices of its points (points on the median are not part of it).

    Examples
    --------
    >>> shift_signals([1, 2, 1, 2, 1, 2, 9, 9, 9, 9, 9, 9], median=5)
    [(0, 1, 2, 3, 4, 5), (6, 7, 8, 9, 10, 11)]
    """
    array = _values(values)
    centre = median_line(array) if median is None else float(median)
    found: list[tuple[int, ...]] = []
    current: list[int] = []
    current_side = 0
    for index, side in _sides(array, centre):
        if side != current_side:
            if len(current) >= min_length:
                found.append(tuple(current))
            current, current_side = [], side
        current.append(index)
    if len(current) >= min_length:
        found.append(tuple(current))
    return found


def trend_signals(values: Sequence[float | None], *, min_length: int = TREND_LENGTH) -> list[tuple[int, ...]]:
    """Trends: ``min_length`` or more consecutive points all going up or all going down.

    Successive equal values count once (they neither make nor break a trend); missing values are
    skipped.

    Parameters
    ----------
    values
        The series in time order.
    min_length
        Fewest points in a trend (Perla et al. 2011: 5).

    Returns
    -------
    list of tuple of int
        One tuple per trend: the indices of every point from its first to its last (equal
        repeats included).

    Examples
    --------
    >>> trend_signals([5, 4, 4, 3, 2, 1, 7])
    [(0, 1, 2, 3, 4, 5)]
    """
    array = _values(values)
    observed = [(index, value) for index, value in enumerate(array) if not math.isnan(value)]
    # collapse runs of equal successive values: keep the first index and the last index of each
    collapsed: list[tuple[int, int, float]] = []
    for index, value in observed:
        if collapsed and collapsed[-1][2] == value:
            first, _, _ = collapsed[-1]
            collapsed[-1] = (first, index, value)
        else:
            collapsed.append((index, index, value))
    found: list[tuple[int, ...]] = []
    start = 0
    direction = 0
    for position in range(1, len(collapsed) + 1):
        step = 0
        if position < len(collapsed):
            step = 1 if collapsed[position][2] > collapsed[position - 1][2] else -1
        if position == len(collapsed) or (direction != 0 and step != direction):
            if position - start >= min_length:
                members = [
                    index for index, _ in observed
                    if collapsed[start][0] <= index <= collapsed[position - 1][1]
                ]
                found.append(tuple(members))
            start = position - 1
        direction = step
    return found


def count_runs(values: Sequence[float | None], median: float | None = None) -> tuple[int, int]:
    """Number of runs and of useful observations (points not on the median, not missing).

    Examples
    --------
    >>> count_runs([1, 9, 5, 1, 1, 9], median=5)   # runs: 1 | 9 | 1 1 | 9
    (4, 5)
    """
    array = _values(values)
    centre = median_line(array) if median is None else float(median)
    sides = [side for _, side in _sides(array, centre)]
    if not sides:
        return 0, 0
    crossings = sum(1 for before, after in zip(sides, sides[1:]) if before != after)
    return crossings + 1, len(sides)


@lru_cache(maxsize=1)
def perla_runs_table() -> dict[int, tuple[int, int]]:
    """The bundled Table 1 of Perla et al. (2011): useful observations -> (fewest, most) runs.

    Fewer runs than ``fewest`` is "too few"; more than ``most`` is "too many". See
    ``cohort/report/data/README.md`` for the source and the state of its check.

    Examples
    --------
    >>> perla_runs_table()[10]
    (3, 9)
    """
    text = resources.files("cohort.report").joinpath("data/runs_limits_perla2011.csv").read_text("utf-8")
    rows = csv.DictReader(text.splitlines())
    return {
        int(row["useful_observations"]): (int(row["fewest_runs"]), int(row["most_runs"])) for row in rows
    }


def exact_runs_distribution(above: int, below: int) -> dict[int, float]:
    """Exact distribution of the number of runs of a random arrangement of two kinds of points.

    With ``above`` points of one kind and ``below`` of the other, all arrangements equally likely
    (Swed F, Eisenhart C. Tables for testing randomness of grouping in a sequence of alternatives.
    Ann Math Stat 1943;14:66-87):
    ``P(R = 2k) = 2 C(a-1, k-1) C(b-1, k-1) / C(a+b, a)`` and
    ``P(R = 2k+1) = [C(a-1, k-1) C(b-1, k) + C(a-1, k) C(b-1, k-1)] / C(a+b, a)``.

    Examples
    --------
    >>> {runs: round(p, 4) for runs, p in exact_runs_distribution(2, 2).items()}
    {2: 0.3333, 3: 0.3333, 4: 0.3333}
    """
    if above < 0 or below < 0 or above + below == 0:
        msg = f"exact_runs_distribution needs counts of 0 or more, not both 0; got {above}, {below}"
        raise InputError(msg)
    if above == 0 or below == 0:
        return {1: 1.0}
    total = math.comb(above + below, above)
    out: dict[int, float] = {}
    for runs in range(2, 2 * min(above, below) + 2):
        k = runs // 2
        if runs % 2 == 0:
            ways = 2 * math.comb(above - 1, k - 1) * math.comb(below - 1, k - 1)
        else:
            ways = (math.comb(above - 1, k - 1) * math.comb(below - 1, k)
                    + math.comb(above - 1, k) * math.comb(below - 1, k - 1))
        if ways:
            out[runs] = ways / total
    return out


def exact_runs_limits(useful: int, *, tail: float = 0.025) -> tuple[int, int]:
    """Limits for the number of runs from the exact distribution, points split half and half.

    ``fewest`` is the largest L with ``P(R < L) <= tail``; ``most`` the smallest U with
    ``P(R > U) <= tail``; the useful observations are split ``useful // 2`` and the rest, as a
    median splits them.

    Examples
    --------
    >>> exact_runs_limits(10)
    (3, 9)
    """
    if useful < 2:
        msg = f"exact_runs_limits needs 2 or more useful observations, got {useful}"
        raise InputError(msg)
    distribution = exact_runs_distribution(useful // 2, useful - useful // 2)
    cumulative = 0.0
    fewest = 1
    for runs in sorted(distribution):
        if cumulative + 1e-12 >= tail:
            break
        if cumulative + distribution[runs] <= tail + 1e-12:
            fewest = runs + 1
        cumulative += distribution[runs]
    upper_tail = 0.0
    most = max(distribution)
    for runs in sorted(distribution, reverse=True):
        if upper_tail + distribution[runs] > tail + 1e-12:
            most = runs
            break
        upper_tail += distribution[runs]
    return fewest, most


def runs_limits(useful: int) -> tuple[int, int] | None:
    """(fewest, most) runs expected for ``useful`` observations; ``None`` below 10.

    Perla et al. (2011) Table 1 for 10-60 useful observations; the exact distribution with 2.5%
    in each tail beyond 60.

    Examples
    --------
    >>> runs_limits(9) is None, runs_limits(20)
    (True, (6, 16))
    """
    if useful < TABLE_FIRST:
        return None
    table = perla_runs_table()
    if useful in table:
        return table[useful]
    return exact_runs_limits(useful)


def astronomical_points(values: Sequence[float | None], *, fence: float = 3.0) -> tuple[int, ...]:
    """Points beyond Tukey's outer fences (``fence`` interquartile ranges outside the quartiles).

    The tool's operational reading of Perla's "astronomical data point" (see the module notes).
    Needs at least 4 observed values; returns no point otherwise.

    Examples
    --------
    >>> astronomical_points([10, 11, 9, 10, 12, 11, 10, 60])
    (7,)
    """
    array = _values(values)
    observed = array[~np.isnan(array)]
    if observed.size < 4:
        return ()
    q1, q3 = np.quantile(observed, [0.25, 0.75])
    spread = q3 - q1
    low, high = q1 - fence * spread, q3 + fence * spread
    return tuple(
        index for index, value in enumerate(array)
        if not math.isnan(value) and (value < low or value > high)
    )


@dataclass(frozen=True)
class RuleSignal:
    """One rule that fired: its name, the points involved and a sentence for the report."""

    rule: str
    points: tuple[int, ...]
    detail: str


@dataclass(frozen=True)
class RunChartAnalysis:
    """Every run-chart rule applied to one series.

    Attributes
    ----------
    median
        The centre line.
    observed
        Points with a value.
    useful_observations
        Points with a value not on the median.
    runs
        Number of runs.
    runs_limits
        (fewest, most) expected runs, or None when there are fewer than 10 useful observations.
    signals
        The rules that fired.
    """

    median: float
    observed: int
    useful_observations: int
    runs: int
    runs_limits: tuple[int, int] | None
    signals: tuple[RuleSignal, ...] = field(default_factory=tuple)

    def fired(self, rule: str) -> bool:
        """True when ``rule`` (one of :data:`RULES`) fired."""
        return any(signal.rule == rule for signal in self.signals)

    def points(self, rule: str) -> tuple[int, ...]:
        """Indices of the points marked by ``rule``, sorted."""
        return tuple(sorted({point for signal in self.signals if signal.rule == rule for point in signal.points}))


def analyse_run_chart(values: Sequence[float | None]) -> RunChartAnalysis:
    """Apply the four run-chart rules of Perla et al. (2011) to a series.

    Parameters
    ----------
    values
        The series in time order (e.g. the monthly median of hours to resolution); ``None`` for a
        missing or withheld point.

    Returns
    -------
    RunChartAnalysis
        The median, the number of runs and its limits, and each rule that fired.

    Examples
    --------
    >>> result = analyse_run_chart([1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12])
    >>> [signal.rule for signal in result.signals]
    ['shift', 'shift', 'trend', 'too_few_runs']
    """
    array = _values(values)
    centre = median_line(array)
    observed = int((~np.isnan(array)).sum())
    if observed == 0:
        return RunChartAnalysis(math.nan, 0, 0, 0, None, ())
    signals: list[RuleSignal] = []
    for points in shift_signals(array, centre):
        signals.append(RuleSignal("shift", points, f"{len(points)} consecutive points on one side of the median"))
    for points in trend_signals(array):
        signals.append(RuleSignal("trend", points, f"{len(points)} points going one way (equal repeats counted once)"))
    runs, useful = count_runs(array, centre)
    limits = runs_limits(useful)
    useful_points = tuple(index for index, _ in _sides(array, centre))
    if limits is not None:
        fewest, most = limits
        if runs < fewest:
            signals.append(RuleSignal("too_few_runs", useful_points,
                                      f"{runs} runs in {useful} useful observations; fewer than {fewest} is too few"))
        if runs > most:
            signals.append(RuleSignal("too_many_runs", useful_points,
                                      f"{runs} runs in {useful} useful observations; more than {most} is too many"))
    far = astronomical_points(array)
    if far:
        signals.append(RuleSignal("astronomical", far, "beyond 3 interquartile ranges from the quartiles (Tukey)"))
    return RunChartAnalysis(centre, observed, useful, runs, limits, tuple(signals))
