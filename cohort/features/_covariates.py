"""Hospital stay and person covariates at onset (pure polars).

Hospital stay
    Emergency, emergency-and-inpatient, inpatient and ICU visits of one person form a stay when
    each starts within ``visit_chain_hours`` of the latest end so far (an ER visit followed by an
    inpatient admission is one stay). The stay of an episode is the one holding its linked
    visit (a linked visit of another kind is a stay by itself). Arrival is the stay's first start,
    discharge its last end (null if any end is missing), hospital the linked visit's care site
    (else the person's). ICU stay: a visit_detail (or visit) of kind ``icu`` in the stay. Died in
    hospital: a death dated from the stay's first to its last calendar day, or an episode that
    ended by death; null when the episode has no linked visit and did not end by death.

Person covariates
    Age in completed years at onset (age at last birthday); sex; diabetes type from condition
    codes on or before the episode's end (the type with the most distinct coded days; a type 1 /
    type 2 tie goes to ``diabetes_type_tie``; other-specified loses ties to either; no code:
    ``unknown``; a ketoacidosis-only code, type ``unspecified``, dates the diabetes but does not
    type it); years from the first diabetes record on or before onset to onset (days /
    365.25); latest HbA1c in ``[onset - hba1c_lookback_days, onset]``; SGLT2 inhibitor at onset
    when an exposure started on or before onset and ended no more than ``sglt2_grace_days``
    before it (an exposure's end is its end datetime, else start + days_supply, else start +
    ``sglt2_default_days``); prior episodes of the same person and definition.
"""

from __future__ import annotations

import polars as pl

from cohort.features._options import FeatureOptions
from cohort.features._time import KEY, days_between, hours_between

__all__ = ["HOSPITAL_KINDS", "person_covariates", "pick_diabetes_type", "stay_features"]

DT = pl.Datetime("us")

#: visit kinds (from dka_concept_visit) that make up a hospital stay
HOSPITAL_KINDS = ("emergency", "emergency_inpatient", "inpatient", "icu")


def _days(value: float) -> pl.Expr:
    return pl.duration(microseconds=int(round(value * 86_400_000_000)))


def _stays(visits: pl.DataFrame, options: FeatureOptions) -> pl.DataFrame:
    """Assign every hospital visit a stay number per person; other visits are stays alone."""
    gap = pl.duration(microseconds=int(round(options.visit_chain_hours * 3_600_000_000)))
    hospital = visits.filter(pl.col("visit_kind").is_in(HOSPITAL_KINDS)).sort(
        ["person_id", "visit_start_datetime", "visit_occurrence_id"]
    )
    hospital = hospital.with_columns(
        pl.coalesce("visit_end_datetime", "visit_start_datetime")
        .cum_max()
        .over("person_id")
        .alias("_reach")
    ).with_columns(
        (
            pl.col("_reach").shift(1).over("person_id").is_null()
            | (pl.col("visit_start_datetime") > pl.col("_reach").shift(1).over("person_id") + gap)
        )
        .cast(pl.Int64)
        .cum_sum()
        .over("person_id")
        .alias("_stay")
    )
    other = visits.filter(~pl.col("visit_kind").is_in(HOSPITAL_KINDS) | pl.col("visit_kind").is_null())
    other = other.with_columns(
        (-pl.int_range(1, pl.len() + 1)).cast(pl.Int64).over("person_id").alias("_stay")
    )
    return pl.concat(
        [hospital.drop("_reach"), other], how="diagonal_relaxed"
    ).select("visit_occurrence_id", "person_id", "visit_start_datetime", "visit_end_datetime",
             "care_site_id", "visit_kind", "_stay")


def stay_features(
    episodes: pl.DataFrame,
    visits: pl.DataFrame,
    visit_details: pl.DataFrame,
    deaths: pl.DataFrame,
    persons: pl.DataFrame,
    options: FeatureOptions,
) -> pl.DataFrame:
    """Arrival, discharge, hospital, ICU, death in hospital and length of stay per episode.

    Returns
    -------
    polars.DataFrame
        One row per episode: definition, episode_id, arrival_datetime, discharge_datetime,
        care_site_id, has_icu_stay, died_in_hospital, length_of_stay_days.
    """
    stays = _stays(visits, options)
    icu_visits = (
        visit_details.filter(pl.col("visit_kind") == "icu")
        .select("visit_occurrence_id")
        .unique()
        .with_columns(pl.lit(True).alias("_icu"))
    )
    stays = stays.join(icu_visits, on="visit_occurrence_id", how="left").with_columns(
        (pl.col("_icu").fill_null(False) | (pl.col("visit_kind") == "icu").fill_null(False)).alias("_icu")
    )
    stay_summary = stays.group_by(["person_id", "_stay"]).agg(
        pl.col("visit_start_datetime").min().alias("arrival_datetime"),
        pl.when(pl.col("visit_end_datetime").is_null().any())
        .then(pl.lit(None, dtype=DT))
        .otherwise(pl.col("visit_end_datetime").max())
        .alias("discharge_datetime"),
        pl.col("_icu").any().alias("has_icu_stay"),
    )
    linked = (
        episodes.select(*KEY, "person_id", "visit_occurrence_id", "end_reason")
        .join(
            stays.select(
                "visit_occurrence_id", "_stay", pl.col("care_site_id").alias("_visit_site")
            ),
            on="visit_occurrence_id",
            how="left",
        )
        .join(stay_summary, on=["person_id", "_stay"], how="left")
        .join(
            persons.select("person_id", pl.col("care_site_id").alias("_person_site")),
            on="person_id",
            how="left",
        )
        .join(
            deaths.group_by("person_id").agg(pl.col("death_date").min().alias("_death_date")),
            on="person_id",
            how="left",
        )
    )
    died_by_end = (pl.col("end_reason") == "died").fill_null(False)
    in_stay = (pl.col("_death_date") >= pl.col("arrival_datetime").dt.date()) & (
        pl.col("discharge_datetime").is_null()
        | (pl.col("_death_date") <= pl.col("discharge_datetime").dt.date())
    )
    return linked.select(
        *KEY,
        "arrival_datetime",
        "discharge_datetime",
        pl.coalesce("_visit_site", "_person_site").alias("care_site_id"),
        pl.when(pl.col("_stay").is_null())
        .then(pl.lit(None, dtype=pl.Boolean))
        .otherwise(pl.col("has_icu_stay"))
        .alias("has_icu_stay"),
        pl.when(died_by_end)
        .then(pl.lit(True))
        .when(pl.col("_stay").is_null())
        .then(pl.lit(None, dtype=pl.Boolean))
        .otherwise(in_stay.fill_null(False))
        .alias("died_in_hospital"),
        (hours_between(pl.col("discharge_datetime"), pl.col("arrival_datetime")) / 24.0).alias(
            "length_of_stay_days"
        ),
    )


def pick_diabetes_type(records: pl.DataFrame, key: list[str], tie: str) -> pl.DataFrame:
    """The diabetes type with the most distinct coded days per ``key``, ties to ``tie``.

    ``records`` holds the key columns, diabetes_type (type1 | type2 | other; ``unspecified``
    rows are left out by the caller) and record_date. Returns the key columns, diabetes_type
    and has_diabetes_type_conflict (codes of more than one type).

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> records = pl.DataFrame({"person_id": [1, 1, 1, 2], "diabetes_type": ["type2", "type1", "type1", "other"],
    ...     "record_date": [dt.date(2020, 1, 1), dt.date(2020, 1, 1), dt.date(2021, 1, 1), dt.date(2020, 1, 1)]})
    >>> pick_diabetes_type(records, ["person_id"], "type1").sort("person_id").rows()
    [(1, 'type1', True), (2, 'other', False)]
    """
    order = {"type1": 0, "type2": 1, "other": 2} if tie == "type1" else {"type2": 0, "type1": 1, "other": 2}
    return (
        records.group_by([*key, "diabetes_type"])
        .agg(pl.col("record_date").n_unique().cast(pl.Int64).alias("_days"))
        .with_columns(pl.col("diabetes_type").replace_strict(order, return_dtype=pl.Int64).alias("_rank"))
        .sort(["_days", "_rank"], descending=[True, False])
        .group_by(key)
        .agg(
            pl.col("diabetes_type").first(),
            (pl.len() > 1).alias("has_diabetes_type_conflict"),
        )
    )


def person_covariates(
    episodes: pl.DataFrame,
    persons: pl.DataFrame,
    diabetes_records: pl.DataFrame,
    hba1c: pl.DataFrame,
    sglt2_exposures: pl.DataFrame,
    options: FeatureOptions,
) -> pl.DataFrame:
    """Covariates at onset, one row per episode.

    Returns
    -------
    polars.DataFrame
        definition, episode_id, age_at_onset, sex, diabetes_type, has_diabetes_type_conflict,
        years_since_first_diabetes_record, hba1c_mmol_mol, hba1c_datetime, is_sglt2i_at_onset,
        prior_episode_count.

    Examples
    --------
    Born 29 February 2000, onset 28 February 2021: the birthday has not come yet, aged 20.

    >>> import datetime as dt, polars as pl
    >>> from cohort.features._inputs import FeatureInputs, check_episodes
    >>> episodes = check_episodes(pl.DataFrame({"episode_id": ["e"], "person_id": [1],
    ...     "definition": ["d"], "onset_datetime": [dt.datetime(2021, 2, 28, 8)],
    ...     "end_datetime": [dt.datetime(2021, 2, 28, 20)]}))
    >>> empty = FeatureInputs(persons=pl.DataFrame({"person_id": [1],
    ...     "birth_datetime": [dt.datetime(2000, 2, 29)], "sex": ["male"], "care_site_id": [None]}))
    >>> out = person_covariates(episodes, empty.persons, empty.diabetes_records, empty.hba1c,
    ...     empty.sglt2_exposures, FeatureOptions())
    >>> out.select("age_at_onset", "diabetes_type", "prior_episode_count").row(0)
    (20, 'unknown', 0)
    """
    base = episodes.select(*KEY, "person_id", "onset_datetime", "end_datetime")
    onset = pl.col("onset_datetime")
    birth = pl.col("birth_datetime")
    before_birthday = (onset.dt.month().cast(pl.Int32) * 100 + onset.dt.day().cast(pl.Int32)) < (birth.dt.month().cast(pl.Int32) * 100 + birth.dt.day().cast(pl.Int32))
    people = base.join(persons.select("person_id", "birth_datetime", "sex"), on="person_id", how="left")
    ages = people.select(
        *KEY,
        (onset.dt.year() - birth.dt.year() - before_birthday.cast(pl.Int32)).cast(pl.Int64).alias("age_at_onset"),
        pl.col("sex").fill_null("unknown"),
    )

    records = base.join(diabetes_records, on="person_id", how="inner")
    typed = (
        records.filter(
            (pl.col("record_date") <= pl.col("end_datetime").dt.date())
            & (pl.col("diabetes_type") != "unspecified")
        )
        .pipe(pick_diabetes_type, KEY, options.diabetes_type_tie)
    )
    first = (
        records.filter(pl.col("record_date") <= pl.col("onset_datetime").dt.date())
        .group_by(KEY)
        .agg(
            days_between(pl.col("onset_datetime").first(), pl.col("record_date").min().cast(DT))
            .alias("_days_since")
        )
        .select(*KEY, (pl.col("_days_since") / 365.25).alias("years_since_first_diabetes_record"))
    )

    lookback = _days(options.hba1c_lookback_days)
    latest_hba1c = (
        base.join(hba1c.filter(pl.col("value_mmol_mol").is_not_null()), on="person_id", how="inner")
        .filter(
            (pl.col("event_datetime") <= onset) & (pl.col("event_datetime") >= onset - lookback)
        )
        .sort([*KEY, "event_datetime", "value_mmol_mol"])
        .group_by(KEY, maintain_order=True)
        .last()
        .select(
            *KEY,
            pl.col("value_mmol_mol").alias("hba1c_mmol_mol"),
            pl.col("event_datetime").alias("hba1c_datetime"),
        )
    )

    exposure_end = pl.coalesce(
        "end_datetime_right",
        pl.col("start_datetime") + pl.duration(days=pl.col("days_supply")),
        pl.col("start_datetime") + _days(options.sglt2_default_days),
    )
    sglt2 = (
        base.join(
            sglt2_exposures.filter(pl.col("start_datetime").is_not_null()),
            on="person_id",
            how="inner",
            suffix="_right",
        )
        .filter(
            (pl.col("start_datetime") <= onset)
            & (exposure_end + _days(options.sglt2_grace_days) >= onset)
        )
        .select(KEY)
        .unique()
        .with_columns(pl.lit(True).alias("is_sglt2i_at_onset"))
    )

    prior = base.select(
        *KEY,
        (pl.col("onset_datetime").rank("ordinal").over(["definition", "person_id"]) - 1)
        .cast(pl.Int64)
        .alias("prior_episode_count"),
    )
    return (
        ages.join(typed, on=KEY, how="left")
        .join(first, on=KEY, how="left")
        .join(latest_hba1c, on=KEY, how="left")
        .join(sglt2, on=KEY, how="left")
        .join(prior, on=KEY, how="left")
        .with_columns(
            pl.col("diabetes_type").fill_null("unknown"),
            pl.col("has_diabetes_type_conflict").fill_null(False),
            pl.col("is_sglt2i_at_onset").fill_null(False),
        )
    )
