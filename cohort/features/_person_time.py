"""Person-time for incidence rates: person-years and episodes by calendar year, age, sex and
diabetes type (pure polars).

Each observation period (end date included) is cut at every 1 January, at every birthday and at
the person's first diabetes record, so each piece has one calendar year, one age in completed
years and one diabetes status. Before the first diabetes record the piece counts as
``none_recorded``; from that day on as the person's diabetes type (all records, the same rule as
the person summary: most coded days, tie to ``diabetes_type_tie``; ``unknown`` when the only codes
are ketoacidosis codes that do not type the diabetes). A 29 February birthday falls on 1 March in
other years (common practice). Person-years are days / 365.25.

Episodes are counted in the cell of their onset (calendar year, age at onset, sex, diabetes status
on the onset day), so numerator and denominator share the cells; episodes outside every
observation period are counted too and show as cells with episodes but no person-time.
"""

from __future__ import annotations

import polars as pl

from cohort.features._columns import Column
from cohort.features._covariates import pick_diabetes_type
from cohort.features._options import FeatureOptions

__all__ = ["PERSON_TIME_COLUMNS", "person_time"]

PERSON_TIME_COLUMNS: tuple[Column, ...] = (
    Column("definition", pl.String(), "", "Definition whose episodes are counted"),
    Column("calendar_year", pl.Int64(), "year", "Calendar year"),
    Column("age_years", pl.Int64(), "years", "Age in completed years"),
    Column("age_band", pl.String(), "", "Five-year age band (0-4, 5-9, ..., 85+)"),
    Column("sex", pl.String(), "", "female | male | unknown"),
    Column("diabetes_type", pl.String(), "", "none_recorded before the first diabetes record; then type1 | type2 | other | unknown"),
    Column("person_years", pl.Float64(), "years", "Observed person-time in the cell (days / 365.25)"),
    Column("episodes", pl.Int64(), "", "Episodes with onset in the cell"),
)


_SEX_CODES = {"female": 0, "male": 1}
_TYPE_CODES = {"type1": 1, "type2": 2, "other": 3, "unknown": 4}


def _age_band(age: pl.Expr) -> pl.Expr:
    low = (age.clip(0, 85) // 5) * 5
    return (
        pl.when(age >= 85)
        .then(pl.lit("85+"))
        .otherwise(low.cast(pl.String) + pl.lit("-") + (low + 4).cast(pl.String))
    )


def _birthday(year: pl.Expr, month: pl.Expr, day: pl.Expr) -> pl.Expr:
    leap = ((year % 4 == 0) & (year % 100 != 0)) | (year % 400 == 0)
    feb29 = (month == 2) & (day == 29) & ~leap
    return (
        pl.when(feb29)
        .then(pl.date(year, 3, 1))
        .otherwise(pl.date(year, month, day))
    )


def _person_types(diabetes_records: pl.DataFrame, options: FeatureOptions) -> pl.DataFrame:
    typed = (
        diabetes_records.filter(pl.col("diabetes_type") != "unspecified")
        .pipe(pick_diabetes_type, ["person_id"], options.diabetes_type_tie)
        .select("person_id", pl.col("diabetes_type").alias("_type"))
    )
    first = diabetes_records.group_by("person_id").agg(pl.col("record_date").min().alias("_diabetes_from"))
    return first.join(typed, on="person_id", how="left").with_columns(pl.col("_type").fill_null("unknown"))


def person_time(
    episodes: pl.DataFrame,
    persons: pl.DataFrame,
    observation_periods: pl.DataFrame,
    diabetes_records: pl.DataFrame,
    options: FeatureOptions,
) -> pl.DataFrame:
    """Person-years and episode counts per definition, calendar year, age, sex and diabetes type.

    Examples
    --------
    Born 1 July 2000, observed 1 January to 31 December 2020, no diabetes record: half a year
    aged 19 and half aged 20 (182 and 184 days of the leap year 2020).

    >>> import datetime as dt, polars as pl
    >>> persons = pl.DataFrame({"person_id": [1], "birth_datetime": [dt.datetime(2000, 7, 1)],
    ...     "sex": ["female"], "care_site_id": [None]})
    >>> periods = pl.DataFrame({"person_id": [1], "observation_period_start_date": [dt.date(2020, 1, 1)],
    ...     "observation_period_end_date": [dt.date(2020, 12, 31)]})
    >>> records = pl.DataFrame(schema={"person_id": pl.Int64, "record_date": pl.Date, "diabetes_type": pl.String})
    >>> episodes = pl.DataFrame({"definition": ["d"], "person_id": [1],
    ...     "onset_datetime": [dt.datetime(2020, 5, 1)]})
    >>> out = person_time(episodes, persons, periods, records, FeatureOptions())
    >>> [round(v * 365.25) for v in out.sort("age_years")["person_years"].to_list()]
    [182, 184]
    >>> out.sort("age_years")["episodes"].to_list()  # onset 1 May 2020, aged 19
    [1, 0]
    """
    types = _person_types(diabetes_records, options)
    people = persons.select(
        "person_id",
        pl.col("birth_datetime").dt.date().alias("_birth"),
        pl.col("sex").fill_null("unknown"),
    ).join(types, on="person_id", how="left")
    # small integer codes for the grouping columns (strings are mapped back after the sums)
    coded = people.select(
        "person_id",
        "_birth",
        "_diabetes_from",
        pl.col("sex").replace_strict(_SEX_CODES, default=len(_SEX_CODES), return_dtype=pl.Int8).alias("_sex"),
        pl.col("_type").replace_strict(_TYPE_CODES, default=_TYPE_CODES["unknown"], return_dtype=pl.Int8).alias("_tcode"),
        pl.col("_birth").dt.year().alias("_byear"),
    )
    periods = observation_periods.filter(
        pl.col("observation_period_start_date").is_not_null()
        & pl.col("observation_period_end_date").is_not_null()
        & (pl.col("observation_period_end_date") >= pl.col("observation_period_start_date"))
    ).select(
        "person_id",
        pl.col("observation_period_start_date").alias("_from"),
        (pl.col("observation_period_end_date") + pl.duration(days=1)).alias("_to"),
    )
    years = periods.join(coded, on="person_id", how="inner").filter(pl.col("_birth").is_not_null()).with_columns(
        pl.int_ranges(pl.col("_from").dt.year(), (pl.col("_to") - pl.duration(days=1)).dt.year() + 1).alias("_year")
    ).explode("_year")
    year = pl.col("_year")
    years = years.with_columns(
        pl.max_horizontal(pl.col("_from"), pl.date(year, 1, 1)).alias("_seg_from"),
        pl.min_horizontal(pl.col("_to"), pl.date(year + 1, 1, 1)).alias("_seg_to"),
        _birthday(year, pl.col("_birth").dt.month(), pl.col("_birth").dt.day()).alias("_bday"),
    )
    # cut points inside the piece (else pushed to its end): the birthday and the diabetes start
    seg_from, seg_to = pl.col("_seg_from"), pl.col("_seg_to")

    def inside(cut: pl.Expr) -> pl.Expr:
        return pl.when((cut > seg_from) & (cut < seg_to)).then(cut).otherwise(seg_to)

    cut = years.with_columns(inside(pl.col("_bday")).alias("_b"), inside(pl.col("_diabetes_from")).alias("_d"))
    cut = cut.with_columns(
        pl.min_horizontal("_b", "_d").alias("_c1"), pl.max_horizontal("_b", "_d").alias("_c2")
    )
    keep = ["_sex", "_tcode", "_byear", "_diabetes_from", "_year", "_bday"]
    cut = cut.select(*keep, "_seg_from", "_c1", "_c2", "_seg_to")
    pieces = pl.concat(
        [
            cut.select(*keep, seg_from.alias("_start"), pl.col("_c1").alias("_stop")),
            cut.filter(pl.col("_c2") > pl.col("_c1")).select(
                *keep, pl.col("_c1").alias("_start"), pl.col("_c2").alias("_stop")
            ),
            cut.filter(seg_to > pl.col("_c2")).select(*keep, pl.col("_c2").alias("_start"), seg_to.alias("_stop")),
        ],
        how="vertical",
    ).filter(pl.col("_stop") > pl.col("_start"))
    age = (
        pl.col("_year") - pl.col("_byear") - (pl.col("_start") < pl.col("_bday")).cast(pl.Int32)
    ).cast(pl.Int64)
    status = (
        pl.when(pl.col("_diabetes_from").is_not_null() & (pl.col("_start") >= pl.col("_diabetes_from")))
        .then(pl.col("_tcode"))
        .otherwise(pl.lit(0, dtype=pl.Int8))
    )
    sex_names = {code: name for name, code in _SEX_CODES.items()} | {len(_SEX_CODES): "unknown"}
    type_names = {code: name for name, code in _TYPE_CODES.items()} | {0: "none_recorded"}
    time = (
        pieces.select(
            pl.col("_year").cast(pl.Int64).alias("calendar_year"),
            age.alias("age_years"),
            "_sex",
            status.alias("_status"),
            (pl.col("_stop") - pl.col("_start")).dt.total_days().alias("_days"),
        )
        .filter(pl.col("age_years") >= 0)
        .group_by(["calendar_year", "age_years", "_sex", "_status"])
        .agg(pl.col("_days").sum())
        .select(
            "calendar_year",
            "age_years",
            pl.col("_sex").replace_strict(sex_names, return_dtype=pl.String).alias("sex"),
            pl.col("_status").replace_strict(type_names, return_dtype=pl.String).alias("diabetes_type"),
            (pl.col("_days") / 365.25).alias("person_years"),
        )
    )
    onset = pl.col("onset_datetime")
    birth = pl.col("_birth")
    before_birthday = (onset.dt.month().cast(pl.Int32) * 100 + onset.dt.day().cast(pl.Int32)) < (birth.dt.month().cast(pl.Int32) * 100 + birth.dt.day().cast(pl.Int32))
    events = (
        episodes.select("definition", "person_id", "onset_datetime")
        .join(people, on="person_id", how="left")
        .select(
            "definition",
            onset.dt.year().cast(pl.Int64).alias("calendar_year"),
            (onset.dt.year() - birth.dt.year() - before_birthday.cast(pl.Int32)).cast(pl.Int64).alias("age_years"),
            pl.col("sex").fill_null("unknown"),
            pl.when(pl.col("_diabetes_from").is_not_null() & (onset.dt.date() >= pl.col("_diabetes_from")))
            .then(pl.col("_type"))
            .otherwise(pl.lit("none_recorded"))
            .alias("diabetes_type"),
        )
        .group_by(["definition", "calendar_year", "age_years", "sex", "diabetes_type"])
        .agg(pl.len().cast(pl.Int64).alias("episodes"))
    )
    cell = ["calendar_year", "age_years", "sex", "diabetes_type"]
    definitions = episodes.select("definition").unique()
    return (
        time.join(definitions, how="cross")
        .join(events, on=["definition", *cell], how="full", coalesce=True)
        .with_columns(
            pl.col("person_years").fill_null(0.0),
            pl.col("episodes").fill_null(0),
            _age_band(pl.col("age_years")).alias("age_band"),
        )
        .sort(["definition", *cell], nulls_last=True)
    )
