"""Disclosure control for every aggregate table a user sees.

The rule (on by default): a count from 1 up to, but not including, the threshold (default 10) is
shown as ``"<10"``; 0 is shown as 0. Secondary suppression then hides (shown as ``"withheld"``), in every group of cells
whose sum is published or recoverable (a row of a table with a total, the categories of one
variable), the smallest other non-zero count whenever exactly one count of the group was
suppressed, so that no suppressed count can be recovered by subtraction. Percentages, means and
medians that describe a suppressed count are withheld with it.

This is common practice in statistical disclosure control of tabular health data (small-cell
suppression with complementary suppression: Hundepool A, Domingo-Ferrer J, Franconi L, et al.
Statistical Disclosure Control. Wiley, 2012, chapter 4 on magnitude and frequency tables); the
default threshold of 10 is a common choice of research data services, configurable here.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import polars as pl

from cohort._errors import DisclosureError

__all__ = ["DEFAULT_THRESHOLD", "SECONDARY_LABEL", "is_small", "suppress_cells", "suppress_counts", "suppressed_label"]

DEFAULT_THRESHOLD = 10
SECONDARY_LABEL = "withheld"


def suppressed_label(threshold: int = DEFAULT_THRESHOLD) -> str:
    """Return the text shown in place of a suppressed count, e.g. ``"<10"``."""
    return f"<{threshold}"


def _check_threshold(threshold: int) -> None:
    if isinstance(threshold, bool) or not isinstance(threshold, int) or threshold < 1:
        msg = f"disclosure threshold must be a whole number of 1 or more, got {threshold!r}"
        raise DisclosureError(msg)


def suppress_counts(
    table: pl.DataFrame,
    count_columns: Sequence[str],
    *,
    threshold: int = DEFAULT_THRESHOLD,
    group_by: Sequence[str] | None = None,
    dependent_columns: dict[str, str] | None = None,
) -> pl.DataFrame:
    """Suppress small counts in an aggregate table, with secondary suppression.

    Parameters
    ----------
    table
        The aggregate table.
    count_columns
        Columns holding counts (whole numbers >= 0). Each becomes a text column: the count,
        ``"<threshold"`` where it is small, or ``"withheld"`` where it is hidden only so that a
        small one cannot be recovered.
    threshold
        Counts from 1 to ``threshold - 1`` are suppressed. ``threshold=1`` turns suppression off.
    group_by
        Columns whose distinct values mark groups of rows that add up to a published or
        recoverable total (for example the reasons of one source table). Within each group and
        count column, if exactly one count is suppressed the smallest other non-zero count is
        suppressed too. ``None`` treats the whole column as one group; ``[]`` turns secondary
        suppression off.
    dependent_columns
        ``{column: count_column}``: a percentage, median or other figure describing the rows
        counted in ``count_column``; it is set to null wherever that count is suppressed.

    Returns
    -------
    polars.DataFrame
        The table with count columns as text and dependent figures withheld.

    Examples
    --------
    >>> import polars as pl
    >>> table = pl.DataFrame({"reason": ["a", "b", "c"], "rows": [120, 4, 35]})
    >>> suppress_counts(table, ["rows"])["rows"].to_list()
    ['120', '<10', 'withheld']
    """
    _check_threshold(threshold)
    missing = [name for name in count_columns if name not in table.columns]
    if missing:
        msg = f"suppress_counts: columns {missing} not in the table; it has {table.columns}"
        raise DisclosureError(msg)
    if group_by is None:
        groups = [list(range(table.height))]
    elif not group_by:
        groups = []
    else:
        keyed = table.select(group_by).with_row_index("__row").group_by(list(group_by), maintain_order=True)
        groups = keyed.agg(pl.col("__row"))["__row"].to_list()
    out = table
    hidden_labels = (suppressed_label(threshold), SECONDARY_LABEL)
    for column in count_columns:
        values = table[column].to_list()
        if any(value is not None and value < 0 for value in values):
            msg = f"suppress_counts: column `{column}` holds negative counts; counts must be >= 0"
            raise DisclosureError(msg)
        shown = [None if cell == "" else cell for cell in suppress_cells(values, groups, threshold=threshold)]
        out = out.with_columns(pl.Series(column, shown, dtype=pl.String))
        for dependent, source in (dependent_columns or {}).items():
            if source == column:
                out = out.with_columns(
                    pl.when(pl.col(column).is_in(hidden_labels)).then(None).otherwise(pl.col(dependent)).alias(dependent)
                )
    return out


def is_small(count: int | None, threshold: int) -> bool:
    """True when ``count`` is from 1 to ``threshold - 1`` (a count to suppress).

    Examples
    --------
    >>> is_small(3, 10), is_small(0, 10), is_small(10, 10)
    (True, False, False)
    """
    return count is not None and 1 <= int(count) < threshold


def suppress_cells(values: Sequence[int | None], groups: Sequence[Sequence[int]], *, threshold: int) -> list[str]:
    """Suppress cells that belong to several additive groups (a row and a column of a two-way table).

    Counts from 1 to ``threshold - 1`` become ``"<threshold"``; then, as long as some group holds
    exactly one hidden cell, its smallest other non-zero cell is ``"withheld"`` (repeated until every
    group has none or at least two hidden, so no hidden cell is a total less the others shown).

    Parameters
    ----------
    values
        The cells, flattened (``None`` for a missing cell, shown as ``""``).
    groups
        Each a list of indices into ``values`` whose sum is published or recoverable.

    Examples
    --------
    >>> suppress_cells([40, 3, 48, 12], [[0, 1], [2, 3], [0, 2], [1, 3]], threshold=10)
    ['withheld', '<10', 'withheld', 'withheld']
    """
    label = suppressed_label(threshold)
    hidden = [is_small(v, threshold) for v in values]
    primary = list(hidden)
    changed = True
    while changed:
        changed = False
        for group in groups:
            inside = [i for i in group if hidden[i]]
            if len(inside) != 1:
                continue
            others = [i for i in group if not hidden[i] and values[i] is not None and int(values[i]) > 0]
            if others:
                hidden[min(others, key=lambda i: (int(values[i]), i))] = True
                changed = True
    shown = []
    for index, value in enumerate(values):
        if value is None or (isinstance(value, float) and math.isnan(value)):
            shown.append("")
        elif primary[index]:
            shown.append(label)
        elif hidden[index]:
            shown.append(SECONDARY_LABEL)
        else:
            shown.append(str(int(value)))
    return shown
