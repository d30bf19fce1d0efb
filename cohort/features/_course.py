"""The course on treatment: hourly targets, hypoglycaemia and hypokalaemia, monitoring frequency.

Pure polars functions over a frame of infusion spans (one row per episode with
definition, episode_id, person_id, insulin_start_datetime, insulin_end_datetime, end_datetime)
and the ``labs`` input frame (canonical units; analytes ``glucose``, ``bhb``, ``bicarbonate``,
``potassium``; every specimen counts).

- Course: baseline is the last value in ``[start - course_baseline_hours_before, start]``, else
  the first in ``(start, start + course_baseline_hours_after]``; the follow-up value is the last
  one at least ``course_min_interval_hours`` after the baseline and at most ``course_hours``
  after the start. Rate per hour = change / hours between the two. Status ``met`` when the rate
  reaches the target, ``not_met`` when not, ``not_measurable`` when either value is missing or
  there is no infusion.
- On the infusion means from the first start to the last end (to the episode's end when the
  last end is unknown), both ends included. A hypoglycaemia (hypokalaemia) event is a reading
  below the threshold whose previous reading on the infusion was not below it; the count is
  the number of events, the first datetime that of the first low reading. No reading on the
  infusion leaves the flag and count null (not measurable), no infusion too.
- Monitoring: complete intervals of ``monitoring_interval_hours`` from the infusion start to its
  last end; share = intervals with at least one reading / complete intervals (null when the
  infusion lasted less than one interval or its end is unknown).
"""

from __future__ import annotations

import polars as pl

from cohort.features._options import FeatureOptions
from cohort.features._time import KEY, hours_between
from cohort.features._windows import labs_in_windows

__all__ = [
    "COURSE_ANALYTES",
    "course_features",
    "infusion_lab_features",
    "low_value_features",
    "monitoring_features",
]

DT = pl.Datetime("us")

#: analyte -> (column stem, sign of the change that is good, option holding the target)
COURSE_ANALYTES: dict[str, tuple[str, int, str]] = {
    "bhb": ("ketone_fall", -1, "ketone_fall_per_hour"),
    "bicarbonate": ("bicarbonate_rise", 1, "bicarbonate_rise_per_hour"),
    "glucose": ("glucose_fall", -1, "glucose_fall_per_hour"),
}


def _hours(value: float) -> pl.Expr:
    return pl.duration(microseconds=int(round(value * 3_600_000_000)))


def _started(spans: pl.DataFrame) -> pl.DataFrame:
    return spans.filter(pl.col("insulin_start_datetime").is_not_null())


def course_features(
    spans: pl.DataFrame, labs: pl.DataFrame, options: FeatureOptions, *, presorted: bool = False
) -> pl.DataFrame:
    """Rates of change against the hourly targets.

    Returns
    -------
    polars.DataFrame
        One row per episode with an infusion start: definition, episode_id and, for each stem in
        :data:`COURSE_ANALYTES`, ``<stem>_mmol_l_per_h`` (float, null when not measurable) and
        ``<stem>_target`` (``met`` | ``not_met`` | ``not_measurable``).
    """
    started = (
        _started(spans).select(*KEY, "person_id", "insulin_start_datetime").with_row_index("_ep")
    )
    start = pl.col("insulin_start_datetime")
    windows = started.select("_ep", "definition", "person_id", "insulin_start_datetime").with_columns(
        (start - _hours(options.course_baseline_hours_before)).alias("window_start"),
        (start + _hours(max(options.course_hours, options.course_baseline_hours_after))).alias("window_end"),
    )
    joined = labs_in_windows(windows, labs, list(COURSE_ANALYTES), presorted=presorted).select(
        "_ep", "analyte", "event_datetime", "value", "insulin_start_datetime"
    )
    group = ["_ep", "analyte"]
    # rows of each window are in (event_datetime, value) order (labs_in_windows), kept by
    # filters and left-ordered joins, so first/last are the earliest/latest readings
    before = (
        joined.filter(pl.col("event_datetime") <= start)
        .group_by(group)
        .agg(
            pl.col("event_datetime").max().alias("_base_t"),
            pl.col("value").last().alias("_base_v"),
        )
    )
    after = (
        joined.filter(
            (pl.col("event_datetime") > start)
            & (pl.col("event_datetime") <= start + _hours(options.course_baseline_hours_after))
        )
        .group_by(group)
        .agg(
            pl.col("event_datetime").min().alias("_after_t"),
            pl.col("value").first().alias("_after_v"),
        )
    )
    baseline = (
        before.join(after, on=group, how="full", coalesce=True)
        .select(
            *group,
            pl.coalesce("_base_t", "_after_t").alias("_base_t"),
            pl.when(pl.col("_base_t").is_not_null())
            .then(pl.col("_base_v"))
            .otherwise(pl.col("_after_v"))
            .alias("_base_v"),
        )
    )
    follow = (
        joined.join(baseline, on=group, how="inner", maintain_order="left")
        .filter(
            (pl.col("event_datetime") >= pl.col("_base_t") + _hours(options.course_min_interval_hours))
            & (pl.col("event_datetime") <= start + _hours(options.course_hours))
        )
        .group_by(group)
        .agg(
            pl.col("event_datetime").max().alias("_follow_t"),
            pl.col("value").last().alias("_follow_v"),
            pl.col("_base_t").first(),
            pl.col("_base_v").first(),
        )
        .with_columns(
            (
                (pl.col("_follow_v") - pl.col("_base_v"))
                / hours_between(pl.col("_follow_t"), pl.col("_base_t"))
            ).alias("_rate")
        )
        .select(*group, "_rate")
    )
    out = started.select("_ep", *KEY)
    for analyte, (stem, sign, option_name) in COURSE_ANALYTES.items():
        target = float(getattr(options, option_name))
        rate = follow.filter(pl.col("analyte") == analyte).select(
            "_ep", (pl.col("_rate") * sign).alias(f"{stem}_mmol_l_per_h")
        )
        out = out.join(rate, on="_ep", how="left").with_columns(
            pl.when(pl.col(f"{stem}_mmol_l_per_h").is_null())
            .then(pl.lit("not_measurable"))
            .when(pl.col(f"{stem}_mmol_l_per_h") >= target)
            .then(pl.lit("met"))
            .otherwise(pl.lit("not_met"))
            .alias(f"{stem}_target")
        )
    return out.drop("_ep")


def _on_infusion(spans: pl.DataFrame, options: FeatureOptions) -> pl.DataFrame:
    """One row per episode with an infusion start: _ep, KEY, person_id, start, span end and the
    number of complete monitoring intervals (null when the last end is unknown)."""
    interval = float(options.monitoring_interval_hours)
    return _started(spans).with_row_index("_ep").select(
        "_ep",
        *KEY,
        "person_id",
        "insulin_start_datetime",
        pl.coalesce("insulin_end_datetime", "end_datetime").alias("_span_end"),
        (hours_between(pl.col("insulin_end_datetime"), pl.col("insulin_start_datetime")) / interval)
        .floor()
        .cast(pl.Int64)
        .alias("monitoring_intervals"),
    )


def _place_on_infusion(
    started: pl.DataFrame, labs: pl.DataFrame, analytes: list[str], *, presorted: bool = False
) -> pl.DataFrame:
    """Readings of ``analytes`` from the first infusion start to the span end, keyed by _ep."""
    windows = started.select(
        "_ep",
        "definition",
        "person_id",
        pl.col("insulin_start_datetime").alias("window_start"),
        pl.col("_span_end").alias("window_end"),
    )
    return labs_in_windows(windows, labs, analytes, presorted=presorted).select(
        "_ep", "analyte", "event_datetime", "value"
    )


def _low_value_summary(
    started: pl.DataFrame, placed: pl.DataFrame, *, analyte: str, threshold: float, stem: str
) -> pl.DataFrame:
    readings = (
        placed.filter(pl.col("analyte") == analyte)
        .select("_ep", "event_datetime", "value")
        .sort("_ep", maintain_order=True)  # stable: time order kept within each episode
        .with_columns((pl.col("value") < threshold).alias("_low"))
        .with_columns(
            (
                pl.col("_low")
                & ~(pl.col("_low").shift(1) & (pl.col("_ep").shift(1) == pl.col("_ep"))).fill_null(False)
            ).alias("_event")
        )
    )
    summary = readings.group_by("_ep").agg(
        pl.len().cast(pl.Int64).alias(f"{stem}_readings"),
        pl.col("_event").sum().cast(pl.Int64).alias(f"{stem}_count"),
        pl.col("event_datetime").filter(pl.col("_low")).min().alias(f"first_{stem}_datetime"),
        pl.col("value").min().alias(f"lowest_{stem}_value"),
    )
    return started.select("_ep", *KEY).join(summary, on="_ep", how="inner").drop("_ep")


def _monitoring_summary(started: pl.DataFrame, placed: pl.DataFrame, options: FeatureOptions) -> pl.DataFrame:
    interval = float(options.monitoring_interval_hours)
    binned = (
        placed.filter(pl.col("analyte").is_in(["glucose", "bhb"]))
        .join(
            started.filter(pl.col("monitoring_intervals") > 0).select(
                "_ep", "insulin_start_datetime", "monitoring_intervals"
            ),
            on="_ep",
            how="inner",
        )
        .with_columns(
            (hours_between(pl.col("event_datetime"), pl.col("insulin_start_datetime")) / interval)
            .floor()
            .cast(pl.Int64)
            .alias("_bin")
        )
        .filter((pl.col("_bin") >= 0) & (pl.col("_bin") < pl.col("monitoring_intervals")))
        .group_by(["_ep", "analyte"])
        .agg(pl.col("_bin").n_unique().cast(pl.Int64).alias("_bins"))
    )
    out = started.select("_ep", *KEY, "monitoring_intervals")
    for analyte, name in (("glucose", "glucose_monitoring_share"), ("bhb", "ketone_monitoring_share")):
        part = binned.filter(pl.col("analyte") == analyte).select("_ep", "_bins")
        out = (
            out.join(part, on="_ep", how="left")
            .with_columns(
                pl.when(pl.col("monitoring_intervals") > 0)
                .then(pl.col("_bins").fill_null(0) / pl.col("monitoring_intervals"))
                .otherwise(pl.lit(None, dtype=pl.Float64))
                .alias(name)
            )
            .drop("_bins")
        )
    return out.drop("_ep")


def low_value_features(
    spans: pl.DataFrame, labs: pl.DataFrame, *, analyte: str, threshold: float, stem: str
) -> pl.DataFrame:
    """Readings below ``threshold`` on the infusion.

    Returns
    -------
    polars.DataFrame
        One row per episode with at least one reading of ``analyte`` on the infusion:
        definition, episode_id, ``<stem>_readings`` (readings on the infusion),
        ``<stem>_count`` (events), ``first_<stem>_datetime``, ``lowest_<stem>_value``.

    Examples
    --------
    Readings 5.0, 3.8, 3.5, 4.4, 3.9 on the infusion are two events (3.8-3.5, then 3.9):

    >>> import datetime as dt, polars as pl
    >>> spans = pl.DataFrame({"definition": ["d"], "episode_id": ["e"], "person_id": [1],
    ...     "insulin_start_datetime": [dt.datetime(2024, 1, 1, 0)],
    ...     "insulin_end_datetime": [dt.datetime(2024, 1, 1, 10)],
    ...     "end_datetime": [dt.datetime(2024, 1, 1, 10)]})
    >>> labs = pl.DataFrame({"person_id": [1] * 5, "analyte": ["glucose"] * 5,
    ...     "event_datetime": [dt.datetime(2024, 1, 1, h) for h in (1, 2, 3, 4, 5)],
    ...     "value": [5.0, 3.8, 3.5, 4.4, 3.9]})
    >>> low_value_features(spans, labs, analyte="glucose", threshold=4.0, stem="hypo")["hypo_count"].item()
    2
    """
    started = _on_infusion(spans, FeatureOptions())
    placed = _place_on_infusion(started, labs, [analyte])
    return _low_value_summary(started, placed, analyte=analyte, threshold=threshold, stem=stem)


def monitoring_features(spans: pl.DataFrame, labs: pl.DataFrame, options: FeatureOptions) -> pl.DataFrame:
    """Share of complete monitoring intervals on the infusion with a glucose and a ketone reading.

    Returns
    -------
    polars.DataFrame
        One row per episode with an infusion start: definition, episode_id,
        monitoring_intervals (complete intervals, null when the end is unknown),
        glucose_monitoring_share, ketone_monitoring_share (null when no complete interval).
    """
    started = _on_infusion(spans, options)
    placed = _place_on_infusion(started, labs, ["glucose", "bhb"])
    return _monitoring_summary(started, placed, options)


def infusion_lab_features(
    spans: pl.DataFrame, labs: pl.DataFrame, options: FeatureOptions, *, presorted: bool = False
) -> pl.DataFrame:
    """Hypoglycaemia, hypokalaemia and monitoring in one pass over the readings on the infusion.

    The same values as :func:`low_value_features` (glucose below ``hypoglycaemia_mmol_l``,
    potassium below ``hypokalaemia_mmol_l``) and :func:`monitoring_features`, joined on the
    episode; the lowest values are named ``lowest_glucose_on_infusion_mmol_l`` and
    ``lowest_potassium_on_infusion_mmol_l``.
    """
    started = _on_infusion(spans, options)
    placed = _place_on_infusion(started, labs, ["glucose", "bhb", "potassium"], presorted=presorted)
    hypo = _low_value_summary(
        started, placed, analyte="glucose", threshold=options.hypoglycaemia_mmol_l, stem="hypoglycaemia"
    ).rename({"lowest_hypoglycaemia_value": "lowest_glucose_on_infusion_mmol_l"})
    hypok = _low_value_summary(
        started, placed, analyte="potassium", threshold=options.hypokalaemia_mmol_l, stem="hypokalaemia"
    ).rename({"lowest_hypokalaemia_value": "lowest_potassium_on_infusion_mmol_l"})
    return (
        _monitoring_summary(started, placed, options)
        .join(hypo, on=KEY, how="left")
        .join(hypok, on=KEY, how="left")
    )
