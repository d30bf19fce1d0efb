"""Audit summary: by definition, hospital and calendar month of onset (and over all months), and
the same for every hospital together (``all_hospitals`` true).

For each timing: the number of episodes with a value, its median and interquartile range
(quartiles by linear interpolation between order statistics, as numpy's default and R's type 7).
For each standard: numerator (episodes meeting it), denominator (episodes where it can be judged:
the flag is not null) and the share. ``period`` is ``YYYY-MM`` of the onset, or ``all``.
"""

from __future__ import annotations

import polars as pl

from cohort.features._columns import Column

__all__ = ["AUDIT_COLUMNS", "STANDARDS", "TIMINGS", "audit_summary"]

#: timing measures: the column of episode_features summarised
TIMINGS: tuple[str, ...] = (
    "hours_arrival_to_onset",
    "hours_arrival_to_insulin",
    "hours_onset_to_insulin",
    "hours_to_resolution",
    "hours_on_infusion",
    "hours_resolution_to_closure",
    "hours_basal_before_closure",
    "length_of_stay_days",
)


def _met(column: str) -> pl.Expr:
    return pl.when(pl.col(column) != "not_measurable").then(pl.col(column) == "met")


#: standards: measure name -> expression that is true when met, false when not, null when not judged
STANDARDS: dict[str, pl.Expr] = {
    "insulin_within_target": pl.col("is_insulin_within_target"),
    "resolved_within_target": pl.col("is_resolved_within_target"),
    "no_premature_closure": ~pl.col("is_premature_closure"),
    "no_early_stop_and_restart": ~pl.col("has_restart_after_early_stop"),
    "basal_before_closure": pl.col("has_basal_before_closure"),
    "basal_overlap_met": pl.col("is_basal_overlap_met"),
    "no_hypoglycaemia": ~pl.col("has_hypoglycaemia"),
    "no_hypokalaemia": ~pl.col("has_hypokalaemia"),
    "ketone_fall_target_met": _met("ketone_fall_target"),
    "bicarbonate_rise_target_met": _met("bicarbonate_rise_target"),
    "glucose_fall_target_met": _met("glucose_fall_target"),
    "glucose_monitoring_met": pl.col("is_glucose_monitoring_met"),
    "ketone_monitoring_met": pl.col("is_ketone_monitoring_met"),
}

AUDIT_COLUMNS: tuple[Column, ...] = (
    Column("definition", pl.String(), "", "Definition the episodes come from"),
    Column("all_hospitals", pl.Boolean(), "", "True for the rows of every hospital together (care_site_id then null)"),
    Column("care_site_id", pl.Int64(), "", "Hospital (null with all_hospitals false: hospital unknown)"),
    Column("period", pl.String(), "", "Calendar month of onset as YYYY-MM, or all for every month together"),
    Column("measure", pl.String(), "", "episodes, a timing column of episode_features, or a standard"),
    Column("kind", pl.String(), "", "count | timing | standard"),
    Column("episodes", pl.Int64(), "", "Episodes in the hospital and period"),
    Column("n", pl.Int64(), "", "Timing: episodes with a value"),
    Column("median", pl.Float64(), "unit of the timing", "Timing: median"),
    Column("q1", pl.Float64(), "unit of the timing", "Timing: first quartile (linear interpolation)"),
    Column("q3", pl.Float64(), "unit of the timing", "Timing: third quartile (linear interpolation)"),
    Column("numerator", pl.Int64(), "", "Standard: episodes meeting it"),
    Column("denominator", pl.Int64(), "", "Standard: episodes where it can be judged"),
    Column("share", pl.Float64(), "share", "Standard: numerator / denominator (null when the denominator is 0)"),
)

_CELL = ["definition", "all_hospitals", "care_site_id", "period"]


def audit_summary(features: pl.DataFrame) -> pl.DataFrame:
    """Summarise episode features by hospital and month.

    Parameters
    ----------
    features
        The episode_features table.

    Returns
    -------
    polars.DataFrame
        The :data:`AUDIT_COLUMNS`, one row per definition, hospital, period and measure.

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> from cohort.features._episode import EPISODE_COLUMNS
    >>> frame = pl.DataFrame(schema={c.name: c.dtype for c in EPISODE_COLUMNS})
    >>> audit_summary(frame).height
    0
    """
    narrow = features.select(
        "definition",
        "care_site_id",
        "onset_datetime",
        *[pl.col(name).cast(pl.Float64) for name in TIMINGS],
        *[expr.alias(name) for name, expr in STANDARDS.items()],
    )
    monthly = narrow.with_columns(pl.col("onset_datetime").dt.strftime("%Y-%m").alias("period"))
    overall = narrow.with_columns(pl.lit("all").alias("period"))
    by_hospital = pl.concat([monthly, overall], how="vertical").with_columns(
        pl.lit(False).alias("all_hospitals")
    )
    network = by_hospital.with_columns(
        pl.lit(None, dtype=pl.Int64).alias("care_site_id"), pl.lit(True).alias("all_hospitals")
    )
    cells = pl.concat([by_hospital, network], how="vertical")
    counts = cells.group_by(_CELL).agg(pl.len().cast(pl.Int64).alias("episodes"))
    timing = (
        cells.select(*_CELL, *TIMINGS)
        .unpivot(on=list(TIMINGS), index=_CELL, variable_name="measure", value_name="value")
        .group_by([*_CELL, "measure"])
        .agg(
            pl.col("value").count().cast(pl.Int64).alias("n"),
            pl.col("value").median().alias("median"),
            pl.col("value").quantile(0.25, interpolation="linear").alias("q1"),
            pl.col("value").quantile(0.75, interpolation="linear").alias("q3"),
        )
        .with_columns(pl.lit("timing").alias("kind"))
    )
    standard = (
        cells.select(*_CELL, *STANDARDS)
        .unpivot(on=list(STANDARDS), index=_CELL, variable_name="measure", value_name="value")
        .group_by([*_CELL, "measure"])
        .agg(
            pl.col("value").sum().cast(pl.Int64).alias("numerator"),
            pl.col("value").count().cast(pl.Int64).alias("denominator"),
        )
        .with_columns(
            pl.when(pl.col("denominator") > 0)
            .then(pl.col("numerator") / pl.col("denominator"))
            .alias("share"),
            pl.lit("standard").alias("kind"),
        )
    )
    episodes = counts.with_columns(pl.lit("episodes").alias("measure"), pl.lit("count").alias("kind"))
    measure_order = {name: index for index, name in enumerate(["episodes", *TIMINGS, *STANDARDS])}
    out = pl.concat(
        [
            episodes,
            timing.join(counts, on=_CELL, how="left"),
            standard.join(counts, on=_CELL, how="left"),
        ],
        how="diagonal_relaxed",
    )
    return out.with_columns(
        pl.col("measure").replace_strict(measure_order, return_dtype=pl.Int64).alias("_order")
    ).sort(["definition", "all_hospitals", "care_site_id", "period", "_order"], nulls_last=True).drop("_order")
