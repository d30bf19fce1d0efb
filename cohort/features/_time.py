"""Small time helpers shared by the builders (pure polars expressions)."""

from __future__ import annotations

import polars as pl

__all__ = ["days_between", "hours_between", "KEY"]

#: The key of an episode in every feature frame: one row per episode and definition.
KEY = ["definition", "episode_id"]

_US_PER_HOUR = 3_600_000_000.0


def hours_between(later: pl.Expr, earlier: pl.Expr) -> pl.Expr:
    """Hours from ``earlier`` to ``later`` as a float (negative when ``later`` is earlier).

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> frame = pl.DataFrame({"a": [dt.datetime(2024, 1, 1, 12, 30)], "b": [dt.datetime(2024, 1, 1, 10)]})
    >>> frame.select(hours_between(pl.col("a"), pl.col("b"))).item()
    2.5
    """
    return (later - earlier).dt.total_microseconds().cast(pl.Float64) / _US_PER_HOUR


def days_between(later: pl.Expr, earlier: pl.Expr) -> pl.Expr:
    """Days from ``earlier`` to ``later`` as a float (24-hour days)."""
    return hours_between(later, earlier) / 24.0
