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

from collections.abc import Sequence

import polars as pl

from cohort._errors import DisclosureError

__all__ = ["DEFAULT_THRESHOLD", "SECONDARY_LABEL", "suppress_counts", "suppressed_label"]

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
    groups = list(group_by) if group_by is not None else None
    out = table.with_row_index("__row")
    label = suppressed_label(threshold)
    for column in count_columns:
        values = out[column]
        if values.null_count() == 0 and (values < 0).any():
            msg = f"suppress_counts: column `{column}` holds negative counts; counts must be >= 0"
            raise DisclosureError(msg)
        primary = ((values >= 1) & (values < threshold)).fill_null(False)
        flag = f"__hide_{column}"
        out = out.with_columns(primary.alias(flag))
        if groups is None or groups:
            out = _secondary(out, column, flag, groups or [])
        out = out.with_columns(
            pl.when(primary)
            .then(pl.lit(label))
            .when(pl.col(flag))
            .then(pl.lit(SECONDARY_LABEL))
            .otherwise(pl.col(column).cast(pl.Int64).cast(pl.String))
            .alias(column)
        )
        for dependent, source in (dependent_columns or {}).items():
            if source == column:
                out = out.with_columns(
                    pl.when(pl.col(flag)).then(None).otherwise(pl.col(dependent)).alias(dependent)
                )
    return out.sort("__row").drop(["__row", *[c for c in out.columns if c.startswith("__hide_")]])


def _secondary(frame: pl.DataFrame, column: str, flag: str, groups: list[str]) -> pl.DataFrame:
    """Hide the smallest other non-zero count of every group with exactly one hidden count."""
    keys = groups or ["__all"]
    work = frame.with_columns(pl.lit(0).alias("__all")) if not groups else frame
    hidden_per_group = work.group_by(keys).agg(pl.col(flag).sum().alias("__hidden"))
    work = work.join(hidden_per_group, on=keys, how="left")
    candidates = (
        work.filter((pl.col("__hidden") == 1) & ~pl.col(flag) & (pl.col(column) > 0))
        .sort([*keys, column, "__row"])
        .group_by(keys, maintain_order=True)
        .first()
        .select("__row")
    )
    extra = set(candidates["__row"].to_list())
    result = work.with_columns((pl.col(flag) | pl.col("__row").is_in(list(extra))).alias(flag))
    return result.drop([name for name in ("__hidden", "__all") if name in result.columns])
