"""Recurrence within a definition, the counting-process table and the person summary (pure polars).

Recurrence is counted among episodes of the same person and the same definition. Time at risk
for the next episode starts at this episode's end (``end_datetime``: resolution, or the
censoring time of an unresolved episode) and runs to the next onset (event) or to the end of
follow-up: the earlier of death (its datetime, else the end of the death day) and the end of the
observation period holding the onset (its end date included; the person's latest period end when
none holds the onset).

``recurs_within_<N>d`` is true when the next onset comes within N days of the end, false when it
comes later or when follow-up reaches N days without one, and null when follow-up ends (death,
end of observation) before N days without a recurrence: too short to know, not false.

The counting-process table has one row per interval at risk, from an episode's end to the next
onset or the end of follow-up, in total time (days since the end of the person's first episode
of that definition: ``start_days``, ``stop_days``; time inside later episodes is not at risk, so
intervals have gaps) and in gap time (``gap_start_days`` = 0, ``gap_stop_days``). Intervals of
zero length (death at the end of an episode) are left out, as survival software requires
stop > start.
"""

from __future__ import annotations

import polars as pl

from cohort.features._columns import Column
from cohort.features._covariates import pick_diabetes_type
from cohort.features._options import FeatureOptions
from cohort.features._time import KEY, days_between

__all__ = [
    "COUNTING_COLUMNS",
    "PERSON_COLUMNS",
    "RECURRENCE_WINDOWS_DAYS",
    "counting_process",
    "person_summary",
    "recurrence_features",
]

DT = pl.Datetime("us")

#: recurrence windows of the recurs_within_<N>d flags (issue 4: 30, 90 and 365 days)
RECURRENCE_WINDOWS_DAYS = (30, 90, 365)

COVARIATES = (
    "age_at_onset",
    "sex",
    "diabetes_type",
    "hba1c_mmol_mol",
    "is_sglt2i_at_onset",
    "care_site_id",
    "severity",
)

COUNTING_COLUMNS: tuple[Column, ...] = (
    Column("definition", pl.String(), "", "Definition the episodes come from"),
    Column("person_id", pl.Int64(), "", "Person (OMOP person_id)"),
    Column("episode_id", pl.String(), "", "Episode whose end opens the interval"),
    Column("episode_number", pl.Int64(), "", "1 for the interval after the person's first episode, 2 after the second, ..."),
    Column("start_days", pl.Float64(), "days", "Total time: interval start, days since the end of the person's first episode"),
    Column("stop_days", pl.Float64(), "days", "Total time: interval stop (next onset or end of follow-up)"),
    Column("gap_start_days", pl.Float64(), "days", "Gap time: interval start (always 0, the clock restarts at each episode's end)"),
    Column("gap_stop_days", pl.Float64(), "days", "Gap time: interval stop, days from this episode's end to the next onset or end of follow-up"),
    Column("event", pl.Int64(), "", "1 when the interval ends with a new episode of the same definition, 0 when censored"),
    Column("age_at_onset", pl.Int64(), "years", "Covariate: age in completed years at the onset of the episode opening the interval"),
    Column("sex", pl.String(), "", "Covariate: female | male | unknown"),
    Column("diabetes_type", pl.String(), "", "Covariate: type1 | type2 | other | unknown (see episode_features)"),
    Column("hba1c_mmol_mol", pl.Float64(), "mmol/mol", "Covariate: latest HbA1c in the year before that onset"),
    Column("is_sglt2i_at_onset", pl.Boolean(), "", "Covariate: SGLT2 inhibitor exposure at that onset"),
    Column("care_site_id", pl.Int64(), "", "Covariate: hospital of that episode"),
    Column("severity", pl.String(), "", "Covariate: severity of that episode at onset"),
)

PERSON_COLUMNS: tuple[Column, ...] = (
    Column("definition", pl.String(), "", "Definition whose episodes are counted"),
    Column("person_id", pl.Int64(), "", "Person (OMOP person_id); every person of the extract, with or without episodes"),
    Column("sex", pl.String(), "", "female | male | unknown (person.gender_concept_id)"),
    Column("birth_datetime", DT, "local time", "Birth datetime (person.birth_datetime, else from year/month/day of birth)"),
    Column("diabetes_type", pl.String(), "", "Diabetes type from all the person's condition codes (most coded days; tie rule as for episodes)"),
    Column("care_site_id", pl.Int64(), "", "The person's care site (person.care_site_id)"),
    Column("observation_start_date", pl.Date(), "date", "First observation_period_start_date"),
    Column("observation_end_date", pl.Date(), "date", "Last observation_period_end_date"),
    Column("person_years_observed", pl.Float64(), "years", "Sum over observation periods of (end - start + 1 day), in years of 365.25 days"),
    Column("death_date", pl.Date(), "date", "Death date (null if none recorded)"),
    Column("episode_count", pl.Int64(), "", "Episodes of this definition"),
    Column("first_onset_datetime", DT, "local time", "Onset of the first episode (null if none)"),
    Column("last_onset_datetime", DT, "local time", "Onset of the last episode (null if none)"),
)


def _follow_up_end(
    episodes: pl.DataFrame, deaths: pl.DataFrame, observation_periods: pl.DataFrame
) -> pl.DataFrame:
    """End of follow-up per episode: min(death, end of the observation period holding onset)."""
    base = episodes.select(*KEY, "person_id", "onset_datetime")
    periods = base.join(observation_periods, on="person_id", how="inner")
    holding = (
        periods.filter(
            (pl.col("observation_period_start_date") <= pl.col("onset_datetime").dt.date())
            & (pl.col("observation_period_end_date") >= pl.col("onset_datetime").dt.date())
        )
        .group_by(KEY)
        .agg(pl.col("observation_period_end_date").max().alias("_holding_end"))
    )
    latest = periods.group_by(KEY).agg(pl.col("observation_period_end_date").max().alias("_latest_end"))
    death = deaths.group_by("person_id").agg(
        pl.coalesce(
            pl.col("death_datetime"),
            pl.col("death_date").cast(DT) + pl.duration(days=1),
        )
        .min()
        .alias("_death_at")
    )
    return (
        base.join(holding, on=KEY, how="left")
        .join(latest, on=KEY, how="left")
        .join(death, on="person_id", how="left")
        .select(
            *KEY,
            pl.min_horizontal(
                pl.coalesce("_holding_end", "_latest_end").cast(DT) + pl.duration(days=1),
                pl.col("_death_at"),
            ).alias("follow_up_end_datetime"),
        )
    )


def recurrence_features(
    episodes: pl.DataFrame,
    deaths: pl.DataFrame,
    observation_periods: pl.DataFrame,
    options: FeatureOptions | None = None,
) -> pl.DataFrame:
    """Days to the next episode, recurrence flags and time at risk, one row per episode.

    Returns
    -------
    polars.DataFrame
        definition, episode_id, next_episode_id, follow_up_end_datetime, days_to_next_episode,
        days_of_follow_up, days_at_risk, has_next_episode, recurs_within_30d,
        recurs_within_90d, recurs_within_365d.

    Examples
    --------
    An episode ending 1 Jan 2024, observation to 31 Jan 2024, no later episode: 31 days of
    follow-up, so no recurrence within 30 days (false) and 90 days unknown (null).

    >>> import datetime as dt, polars as pl
    >>> episodes = pl.DataFrame({"definition": ["d"], "episode_id": ["e"], "person_id": [1],
    ...     "onset_datetime": [dt.datetime(2023, 12, 31)], "end_datetime": [dt.datetime(2024, 1, 1)]})
    >>> periods = pl.DataFrame({"person_id": [1], "observation_period_start_date": [dt.date(2020, 1, 1)],
    ...     "observation_period_end_date": [dt.date(2024, 1, 31)]})
    >>> deaths = pl.DataFrame(schema={"person_id": pl.Int64, "death_date": pl.Date,
    ...     "death_datetime": pl.Datetime("us")})
    >>> out = recurrence_features(episodes, deaths, periods)
    >>> out.select("days_of_follow_up", "recurs_within_30d", "recurs_within_90d").row(0)
    (31.0, False, None)
    """
    del options  # no options yet: the windows are fixed by the issue
    ordered = episodes.select(*KEY, "person_id", "onset_datetime", "end_datetime").sort(
        ["definition", "person_id", "onset_datetime", "episode_id"]
    )
    group = ["definition", "person_id"]
    ordered = ordered.with_columns(
        pl.col("onset_datetime").shift(-1).over(group).alias("_next_onset"),
        pl.col("episode_id").shift(-1).over(group).alias("next_episode_id"),
    ).join(_follow_up_end(episodes, deaths, observation_periods), on=KEY, how="left")
    to_next = days_between(pl.col("_next_onset"), pl.col("end_datetime"))
    follow = days_between(pl.col("follow_up_end_datetime"), pl.col("end_datetime")).clip(lower_bound=0.0)
    out = ordered.with_columns(
        to_next.alias("days_to_next_episode"),
        follow.alias("days_of_follow_up"),
        pl.col("_next_onset").is_not_null().alias("has_next_episode"),
    ).with_columns(
        pl.when(pl.col("has_next_episode"))
        .then(pl.col("days_to_next_episode"))
        .otherwise(pl.col("days_of_follow_up"))
        .alias("days_at_risk")
    )
    flags = []
    for days in RECURRENCE_WINDOWS_DAYS:
        flags.append(
            pl.when(pl.col("days_to_next_episode") <= days)
            .then(pl.lit(True))
            .when(pl.col("has_next_episode"))
            .then(pl.lit(False))
            .when(pl.col("days_of_follow_up") >= days)
            .then(pl.lit(False))
            .otherwise(pl.lit(None, dtype=pl.Boolean))
            .alias(f"recurs_within_{days}d")
        )
    return out.with_columns(flags).select(
        *KEY,
        "next_episode_id",
        "follow_up_end_datetime",
        "days_to_next_episode",
        "days_of_follow_up",
        "days_at_risk",
        "has_next_episode",
        *[f"recurs_within_{days}d" for days in RECURRENCE_WINDOWS_DAYS],
    )


def counting_process(features: pl.DataFrame) -> pl.DataFrame:
    """Counting-process rows (total time and gap time) from the episode features.

    Parameters
    ----------
    features
        Episode features with definition, episode_id, person_id, onset_datetime, end_datetime,
        days_at_risk, has_next_episode and the covariates in :data:`COVARIATES`.

    Returns
    -------
    polars.DataFrame
        The :data:`COUNTING_COLUMNS` (cast by the caller).
    """
    group = ["definition", "person_id"]
    ordered = features.sort(["definition", "person_id", "onset_datetime", "episode_id"])
    rows = ordered.with_columns(
        pl.int_range(1, pl.len() + 1).over(group).cast(pl.Int64).alias("episode_number"),
        days_between(pl.col("end_datetime"), pl.col("end_datetime").first().over(group)).alias("start_days"),
    ).filter(pl.col("days_at_risk").is_not_null() & (pl.col("days_at_risk") > 0))
    return rows.select(
        "definition",
        "person_id",
        "episode_id",
        "episode_number",
        "start_days",
        (pl.col("start_days") + pl.col("days_at_risk")).alias("stop_days"),
        pl.lit(0.0).alias("gap_start_days"),
        pl.col("days_at_risk").alias("gap_stop_days"),
        pl.col("has_next_episode").cast(pl.Int64).alias("event"),
        *COVARIATES,
    )


def person_summary(
    episodes: pl.DataFrame,
    persons: pl.DataFrame,
    observation_periods: pl.DataFrame,
    deaths: pl.DataFrame,
    diabetes_records: pl.DataFrame,
    options: FeatureOptions,
) -> pl.DataFrame:
    """One row per person of the extract and definition: episodes and person-years observed.

    Persons come from ``persons`` together with any person of ``episodes`` missing there.
    """
    definitions = episodes.select("definition").unique()
    everyone = (
        pl.concat(
            [persons.select("person_id"), episodes.select("person_id")], how="vertical"
        )
        .unique()
        .join(persons, on="person_id", how="left")
    )
    observed = observation_periods.group_by("person_id").agg(
        pl.col("observation_period_start_date").min().alias("observation_start_date"),
        pl.col("observation_period_end_date").max().alias("observation_end_date"),
        (
            (
                pl.col("observation_period_end_date") - pl.col("observation_period_start_date")
            ).dt.total_days()
            + 1
        )
        .sum()
        .truediv(365.25)
        .alias("person_years_observed"),
    )
    typed = (
        diabetes_records.filter(pl.col("diabetes_type") != "unspecified")
        .pipe(pick_diabetes_type, ["person_id"], options.diabetes_type_tie)
        .select("person_id", "diabetes_type")
    )
    counts = episodes.group_by(["definition", "person_id"]).agg(
        pl.len().cast(pl.Int64).alias("episode_count"),
        pl.col("onset_datetime").min().alias("first_onset_datetime"),
        pl.col("onset_datetime").max().alias("last_onset_datetime"),
    )
    death = deaths.group_by("person_id").agg(pl.col("death_date").min())
    return (
        everyone.join(definitions, how="cross")
        .join(observed, on="person_id", how="left")
        .join(typed, on="person_id", how="left")
        .join(death, on="person_id", how="left")
        .join(counts, on=["definition", "person_id"], how="left")
        .with_columns(
            pl.col("sex").fill_null("unknown"),
            pl.col("diabetes_type").fill_null("unknown"),
            pl.col("episode_count").fill_null(0),
            pl.col("person_years_observed").fill_null(0.0),
        )
        .sort(["definition", "person_id"])
    )
