"""Intravenous insulin infusions: linking to episodes, restarts, closure, basal insulin overlap.

Pure polars functions. Inputs are the episodes frame (checked by ``check_episodes``) and the
``infusions`` and ``basal_doses`` frames of :class:`~cohort.features.FeatureInputs`.

Rules (options in :class:`~cohort.features.FeatureOptions`):

- An infusion row belongs to the episode of the same person and definition whose window
  ``[onset - link_hours_before_onset, end + link_hours_after_end]`` contains its start; where
  windows overlap, to the episode with the later onset. Rows with no start, or an end before the
  start, are never linked and are reported in ``unlinked_infusions`` with the reason.
- Linked rows form runs: a row starting more than ``restart_gap_hours`` after every earlier row of
  the episode has ended opens a new run (a restart). Closure is the end of the last run; the
  episode table flags a closure before resolution (premature) and, apart, a first run that
  stopped before resolution and was restarted.
- A row with no end leaves the episode's last end (and the closure measures) null.
- Basal insulin near closure: a subcutaneous basal dose starting in
  ``[closure - basal_hours_before_closure, closure + basal_hours_after_closure]`` where closure is
  the last end; the latest dose at or before closure is taken, else the first one after it.
"""

from __future__ import annotations

import polars as pl

from cohort.features._columns import Column
from cohort.features._options import FeatureOptions
from cohort.features._time import KEY, hours_between

__all__ = ["UNLINKED_COLUMNS", "basal_features", "infusion_features", "link_infusions"]

DT = pl.Datetime("us")

UNLINKED_COLUMNS: tuple[Column, ...] = (
    Column("definition", pl.String(), "", "Definition whose episodes the infusion was matched against"),
    Column("drug_exposure_id", pl.Int64(), "", "drug_exposure row of the intravenous regular insulin"),
    Column("person_id", pl.Int64(), "", "Person (OMOP person_id)"),
    Column("visit_occurrence_id", pl.Int64(), "", "Visit recorded on the drug_exposure row, if any"),
    Column("start_datetime", DT, "local time", "drug_exposure_start_datetime of the infusion"),
    Column("end_datetime", DT, "local time", "drug_exposure_end_datetime of the infusion"),
    Column(
        "reason",
        pl.String(),
        "",
        "Why it is not linked: no_time (no start datetime), end_before_start, "
        "person_has_no_episode (no episode of this definition), outside_link_window",
    ),
)


def link_infusions(
    episodes: pl.DataFrame, infusions: pl.DataFrame, options: FeatureOptions
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Link infusion rows to episodes.

    Parameters
    ----------
    episodes
        Checked episodes (columns definition, episode_id, person_id, onset_datetime,
        end_datetime).
    infusions
        The ``infusions`` input frame.
    options
        Feature options (link window).

    Returns
    -------
    tuple of polars.DataFrame
        ``(linked, unlinked)``: linked has one row per (definition, infusion row) with
        definition, episode_id, person_id, drug_exposure_id, start_datetime, end_datetime;
        unlinked has the :data:`UNLINKED_COLUMNS`, one row per definition and infusion row not
        linked for that definition.

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> from cohort.features._inputs import check_episodes
    >>> episodes = check_episodes(pl.DataFrame({"episode_id": ["e1"], "person_id": [1],
    ...     "definition": ["jbds-2023"], "onset_datetime": [dt.datetime(2024, 3, 1, 9)],
    ...     "end_datetime": [dt.datetime(2024, 3, 1, 21)]}))
    >>> infusions = pl.DataFrame({"person_id": [1, 1], "drug_exposure_id": [7, 8],
    ...     "visit_occurrence_id": [None, None],
    ...     "start_datetime": [dt.datetime(2024, 3, 1, 10), dt.datetime(2024, 3, 9)],
    ...     "end_datetime": [dt.datetime(2024, 3, 1, 20), dt.datetime(2024, 3, 9, 5)]},
    ...     schema_overrides={"visit_occurrence_id": pl.Int64})
    >>> linked, unlinked = link_infusions(episodes, infusions, FeatureOptions())
    >>> linked["drug_exposure_id"].to_list(), unlinked["reason"].to_list()
    ([7], ['outside_link_window'])
    """
    before = pl.duration(microseconds=int(options.link_hours_before_onset * 3_600_000_000))
    after = pl.duration(microseconds=int(options.link_hours_after_end * 3_600_000_000))
    usable = infusions.filter(
        pl.col("start_datetime").is_not_null()
        & ~(pl.col("end_datetime") < pl.col("start_datetime")).fill_null(False)
    )
    windows = episodes.select(
        "definition",
        "episode_id",
        "person_id",
        "onset_datetime",
        (pl.col("onset_datetime") - before).alias("_from"),
        (pl.col("end_datetime") + after).alias("_to"),
    )
    candidates = usable.join(windows, on="person_id", how="inner").filter(
        (pl.col("start_datetime") >= pl.col("_from")) & (pl.col("start_datetime") <= pl.col("_to"))
    )
    linked = (
        candidates.sort(["definition", "drug_exposure_id", "onset_datetime", "episode_id"])
        .group_by(["definition", "drug_exposure_id"], maintain_order=True)
        .last()
        .select(
            "definition",
            "episode_id",
            "person_id",
            "drug_exposure_id",
            "start_datetime",
            "end_datetime",
        )
    )
    definitions = episodes.select("definition").unique()
    persons_with = episodes.select("definition", "person_id").unique().with_columns(
        pl.lit(True).alias("_has_episode")
    )
    unlinked = (
        infusions.join(definitions, how="cross")
        .join(
            linked.select("definition", "drug_exposure_id", pl.lit(True).alias("_linked")),
            on=["definition", "drug_exposure_id"],
            how="left",
        )
        .filter(pl.col("_linked").is_null())
        .join(persons_with, on=["definition", "person_id"], how="left")
        .with_columns(
            pl.when(pl.col("start_datetime").is_null())
            .then(pl.lit("no_time"))
            .when((pl.col("end_datetime") < pl.col("start_datetime")).fill_null(False))
            .then(pl.lit("end_before_start"))
            .when(pl.col("_has_episode").is_null())
            .then(pl.lit("person_has_no_episode"))
            .otherwise(pl.lit("outside_link_window"))
            .alias("reason")
        )
        .select([column.name for column in UNLINKED_COLUMNS])
        .sort(["definition", "person_id", "start_datetime", "drug_exposure_id"], nulls_last=True)
    )
    return linked, unlinked


def _last_or_null(column: str) -> pl.Expr:
    """Latest value of a datetime column, null when any value is null (an open end)."""
    return (
        pl.when(pl.col(column).is_null().any())
        .then(pl.lit(None, dtype=DT))
        .otherwise(pl.col(column).max())
    )


def infusion_features(linked: pl.DataFrame, options: FeatureOptions) -> pl.DataFrame:
    """Per-episode infusion timing from the linked rows.

    Returns one row per linked episode (definition, episode_id) with insulin_start_datetime
    (first start), insulin_end_datetime (last end; null if any linked row has no end),
    first_closure_datetime (end of the first run), infusion_count (runs: 1 + restarts),
    infusion_row_count (drug_exposure rows) and hours_infusion_running (sum of run lengths).
    """
    gap = pl.duration(microseconds=int(options.restart_gap_hours * 3_600_000_000))
    index = linked.select(KEY).unique().sort(KEY).with_row_index("_ep")
    rows = (
        linked.join(index, on=KEY, how="inner")
        .select("_ep", "start_datetime", "end_datetime", "drug_exposure_id")
        .sort(["_ep", "start_datetime", "drug_exposure_id"])
    )
    same_episode = pl.col("_ep") == pl.col("_ep").shift(1)
    rows = rows.with_columns(
        pl.coalesce("end_datetime", "start_datetime").cum_max().over("_ep").alias("_reach")
    ).with_columns(
        (
            ~same_episode.fill_null(False)
            | (pl.col("start_datetime") > pl.col("_reach").shift(1) + gap)
        )
        .cast(pl.Int64)
        .cum_sum()
        .alias("_run")
    )
    runs = rows.group_by(["_ep", "_run"]).agg(
        pl.col("start_datetime").min().alias("_run_start"),
        _last_or_null("end_datetime").alias("_run_end"),
        pl.len().alias("_rows"),
    )
    per_episode = runs.group_by("_ep").agg(
        pl.col("_run_start").min().alias("insulin_start_datetime"),
        _last_or_null("_run_end").alias("insulin_end_datetime"),
        pl.col("_run_end").sort_by("_run").first().alias("first_closure_datetime"),
        pl.len().cast(pl.Int64).alias("infusion_count"),
        pl.col("_rows").sum().cast(pl.Int64).alias("infusion_row_count"),
        pl.when(pl.col("_run_end").is_null().any())
        .then(pl.lit(None, dtype=pl.Float64))
        .otherwise(hours_between(pl.col("_run_end"), pl.col("_run_start")).sum())
        .alias("hours_infusion_running"),
    )
    return index.join(per_episode, on="_ep", how="inner").drop("_ep")


def basal_features(
    closures: pl.DataFrame, basal_doses: pl.DataFrame, options: FeatureOptions
) -> pl.DataFrame:
    """Subcutaneous basal insulin near the closure of the infusion.

    Parameters
    ----------
    closures
        One row per episode with definition, episode_id, person_id, insulin_end_datetime.
    basal_doses
        The ``basal_doses`` input frame.
    options
        Feature options (basal window).

    Returns
    -------
    polars.DataFrame
        One row per episode that has a basal dose near closure: definition, episode_id,
        basal_datetime, hours_basal_before_closure (closure minus basal start; positive when
        the basal dose came first, negative when it came after).
    """
    before = pl.duration(microseconds=int(options.basal_hours_before_closure * 3_600_000_000))
    after = pl.duration(microseconds=int(options.basal_hours_after_closure * 3_600_000_000))
    near = (
        closures.filter(pl.col("insulin_end_datetime").is_not_null())
        .select(*KEY, "person_id", "insulin_end_datetime")
        .join(
            basal_doses.filter(pl.col("start_datetime").is_not_null()).select(
                "person_id", pl.col("start_datetime").alias("basal_datetime")
            ),
            on="person_id",
            how="inner",
        )
        .filter(
            (pl.col("basal_datetime") >= pl.col("insulin_end_datetime") - before)
            & (pl.col("basal_datetime") <= pl.col("insulin_end_datetime") + after)
        )
        .with_columns(
            hours_between(pl.col("insulin_end_datetime"), pl.col("basal_datetime")).alias(
                "hours_basal_before_closure"
            )
        )
    )
    return (
        near.sort(
            [
                *KEY,
                pl.col("hours_basal_before_closure") < 0,
                pl.col("hours_basal_before_closure").abs(),
            ]
        )
        .group_by(KEY, maintain_order=True)
        .first()
        .select(*KEY, "basal_datetime", "hours_basal_before_closure")
    )
