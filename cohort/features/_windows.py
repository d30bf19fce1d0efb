"""Assign lab results to episode windows fast, without multiplying rows per episode.

Each window is ``[window_start, window_end]`` (both included) of one episode. Within a
definition and person the windows rarely overlap; for those that do not, an as-of join (latest
window starting at or before the result, then a check of its end) places each result in its one
window in O(n log n). Windows that overlap a neighbour go through an exact join on person and a
range filter, so the result is the same as that plain join, only faster.
"""

from __future__ import annotations

import polars as pl

__all__ = ["labs_in_windows"]


def labs_in_windows(
    windows: pl.DataFrame, labs: pl.DataFrame, analytes: list[str], *, presorted: bool = False
) -> pl.DataFrame:
    """Lab results of ``analytes`` inside each window.

    Parameters
    ----------
    windows
        definition, person_id, window_start, window_end and any further columns (an episode
        key, carried to the output with the window bounds). Rows with a null start or end are
        dropped.
    labs
        person_id, event_datetime, analyte, value.
    analytes
        Analytes to keep.
    presorted
        ``labs`` is already sorted by (event_datetime, value): skip the sort.

    Returns
    -------
    polars.DataFrame
        One row per (window, lab result inside it): the window's columns and analyte,
        event_datetime, value. The rows of each window come in (event_datetime, value) order, so
        ``first`` and ``last`` in a group-by over a window key are the earliest and latest.

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> windows = pl.DataFrame({"definition": ["d", "d"], "episode_id": ["a", "b"], "person_id": [1, 1],
    ...     "window_start": [dt.datetime(2024, 1, 1), dt.datetime(2024, 1, 1, 5)],
    ...     "window_end": [dt.datetime(2024, 1, 1, 6), dt.datetime(2024, 1, 1, 9)]})
    >>> labs = pl.DataFrame({"person_id": [1, 1], "event_datetime": [dt.datetime(2024, 1, 1, 5, 30),
    ...     dt.datetime(2024, 1, 1, 8)], "analyte": ["glucose"] * 2, "value": [9.0, 8.0]})
    >>> sorted(labs_in_windows(windows, labs, ["glucose"]).select("episode_id", "value").rows())
    [('a', 9.0), ('b', 8.0), ('b', 9.0)]
    """
    results = labs.filter(
        pl.col("analyte").is_in(analytes)
        & pl.col("value").is_not_null()
        & pl.col("event_datetime").is_not_null()
    ).select("person_id", "event_datetime", "analyte", "value")
    extra = [name for name in windows.columns if name not in ("definition", "person_id", "window_start", "window_end")]
    group = ["definition", "person_id"]
    ordered = (
        windows.filter(pl.col("window_start").is_not_null() & pl.col("window_end").is_not_null())
        .sort([*group, "window_start", "window_end"], maintain_order=True)
        .with_columns(
            (pl.col("window_start") <= pl.col("window_end").cum_max().shift(1).over(group))
            .fill_null(False)
            .alias("_overlaps_previous")
        )
        .with_columns(
            (
                pl.col("_overlaps_previous")
                | pl.col("_overlaps_previous").shift(-1).over(group).fill_null(False)
            ).alias("_dirty")
        )
    )
    columns = ["definition", "person_id", "window_start", "window_end", *extra, "analyte", "event_datetime", "value"]
    parts = []
    clean = ordered.filter(~pl.col("_dirty")).drop("_overlaps_previous", "_dirty")
    if not presorted:
        results = results.sort(["event_datetime", "value"])
    if clean.height and results.height:
        sorted_results = results
        for (definition,), frame in clean.partition_by("definition", as_dict=True).items():
            del definition
            placed = sorted_results.join_asof(
                frame.sort("window_start"),
                left_on="event_datetime",
                right_on="window_start",
                by="person_id",
                strategy="backward",
                check_sortedness=False,
            ).filter(pl.col("window_end").is_not_null() & (pl.col("event_datetime") <= pl.col("window_end")))
            parts.append(placed.select(columns))
    dirty = ordered.filter(pl.col("_dirty")).drop("_overlaps_previous", "_dirty")
    if dirty.height and results.height:
        joined = dirty.join(results, on="person_id", how="inner", maintain_order="right").filter(
            (pl.col("event_datetime") >= pl.col("window_start")) & (pl.col("event_datetime") <= pl.col("window_end"))
        )
        parts.append(joined.select(columns))
    if not parts:
        schema = {**windows.select("definition", "person_id", "window_start", "window_end", *extra).schema,
                  **results.select("analyte", "event_datetime", "value").schema}
        return pl.DataFrame(schema=schema).select(columns)
    return pl.concat(parts, how="vertical")
