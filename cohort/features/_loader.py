"""Pull the feature inputs from an extract's DuckDB session.

The SQL here is a light select and filter by the concept tables of recipes 12-15
(``dka_concept_drug``, ``dka_concept_route``, ``dka_concept_visit``, ``dka_concept_condition``)
and the lab events of recipe 21 (``dka_lab_events``); the clinical logic lives in the polars
builders. Each query keeps the recipe style of ``sql/`` (header with grain, inputs and output;
import CTEs, ``final``, explicit columns) and uses only portable constructs. Dates are turned into
datetimes in polars, not in SQL.

The persons with an episode, with the span of time their features look at, are registered in the
session as ``dka_feature_persons`` for the duration of the load.
"""

from __future__ import annotations

import datetime as dt

import polars as pl

from cohort._errors import InputError, SchemaError
from cohort._labs import checked_in_scope
from cohort._sql import Fragment
from cohort.features._inputs import FeatureInputs, check_episodes
from cohort.features._options import FeatureOptions

__all__ = ["load_feature_inputs"]

DT = pl.Datetime("us")

SQL_INFUSIONS = """
-- features_infusions: intravenous regular insulin of persons with an episode
-- grain:  one row per drug_exposure row of class insulin_regular with route intravenous
-- inputs: drug_exposure (CDM), dka_concept_drug, dka_concept_route, dka_feature_persons
-- output: person_id, drug_exposure_id, visit_occurrence_id, start_datetime, end_datetime
with

exposures as (
    select
        drug_exposure.drug_exposure_id,
        drug_exposure.person_id,
        drug_exposure.visit_occurrence_id,
        drug_exposure.drug_concept_id,
        drug_exposure.route_concept_id,
        drug_exposure.drug_exposure_start_datetime,
        drug_exposure.drug_exposure_end_datetime
    from drug_exposure
),

regular_insulin as (
    select distinct
        dka_concept_drug.concept_id
    from dka_concept_drug
    where dka_concept_drug.drug_class = 'insulin_regular'
),

intravenous as (
    select distinct
        dka_concept_route.concept_id
    from dka_concept_route
    where dka_concept_route.route = 'intravenous'
),

persons as (
    select
        dka_feature_persons.person_id
    from dka_feature_persons
),

final as (
    select
        exposures.person_id,
        exposures.drug_exposure_id,
        exposures.visit_occurrence_id,
        exposures.drug_exposure_start_datetime as start_datetime,
        exposures.drug_exposure_end_datetime as end_datetime
    from exposures
    inner join persons
        on persons.person_id = exposures.person_id
    inner join regular_insulin
        on regular_insulin.concept_id = exposures.drug_concept_id
    inner join intravenous
        on intravenous.concept_id = exposures.route_concept_id
)

select
    person_id,
    drug_exposure_id,
    visit_occurrence_id,
    start_datetime,
    end_datetime
from final
"""

SQL_DRUG_CLASS = """
-- features_drug_class: exposures of one drug class (basal insulin, SGLT2 inhibitors) of persons
-- with an episode, by any route but intravenous
-- grain:  one row per drug_exposure row of the class
-- inputs: drug_exposure (CDM), dka_concept_drug, dka_concept_route, dka_feature_persons
-- output: person_id, drug_exposure_id, start_datetime, start_date, end_datetime, end_date,
--         days_supply
with

exposures as (
    select
        drug_exposure.drug_exposure_id,
        drug_exposure.person_id,
        drug_exposure.drug_concept_id,
        drug_exposure.route_concept_id,
        drug_exposure.drug_exposure_start_datetime,
        drug_exposure.drug_exposure_start_date,
        drug_exposure.drug_exposure_end_datetime,
        drug_exposure.drug_exposure_end_date,
        drug_exposure.days_supply
    from drug_exposure
),

class_concepts as (
    select distinct
        dka_concept_drug.concept_id
    from dka_concept_drug
    where dka_concept_drug.drug_class in {{ drug_classes }}
),

routes as (
    select
        dka_concept_route.concept_id,
        dka_concept_route.route
    from dka_concept_route
),

persons as (
    select
        dka_feature_persons.person_id
    from dka_feature_persons
),

final as (
    select
        exposures.person_id,
        exposures.drug_exposure_id,
        exposures.drug_exposure_start_datetime as start_datetime,
        exposures.drug_exposure_start_date as start_date,
        exposures.drug_exposure_end_datetime as end_datetime,
        exposures.drug_exposure_end_date as end_date,
        exposures.days_supply
    from exposures
    inner join persons
        on persons.person_id = exposures.person_id
    inner join class_concepts
        on class_concepts.concept_id = exposures.drug_concept_id
    left join routes
        on routes.concept_id = exposures.route_concept_id
    where routes.route is null or routes.route <> 'intravenous'
)

select
    person_id,
    drug_exposure_id,
    start_datetime,
    start_date,
    end_datetime,
    end_date,
    days_supply
from final
"""

#: The measurement rows the features' lab query can keep (cohort._labs.checked_in_scope).
_FEATURE_PERSONS_SCOPE = Fragment(
    "measurement.person_id in (select dka_feature_persons.person_id from dka_feature_persons)")

SQL_LABS = """
-- features_labs: lab events the course, hypoglycaemia, hypokalaemia and HbA1c features read
-- grain:  one row per usable lab result of persons with an episode, in their time span
-- inputs: dka_lab_events (recipe 23), dka_feature_persons
-- output: person_id, event_datetime, analyte, value
with

events as (
    select
        dka_lab_events.person_id,
        dka_lab_events.event_datetime,
        dka_lab_events.analyte,
        dka_lab_events.value
    from dka_lab_events
    where dka_lab_events.analyte in ('glucose', 'bhb', 'bicarbonate', 'potassium', 'hba1c')
),

persons as (
    select
        dka_feature_persons.person_id,
        dka_feature_persons.span_start,
        dka_feature_persons.hba1c_start,
        dka_feature_persons.span_end
    from dka_feature_persons
),

final as (
    select
        events.person_id,
        events.event_datetime,
        events.analyte,
        events.value
    from events
    inner join persons
        on persons.person_id = events.person_id
    where events.event_datetime <= persons.span_end
        and (
            events.event_datetime >= persons.span_start
            or (events.analyte = 'hba1c' and events.event_datetime >= persons.hba1c_start)
        )
)

select
    person_id,
    event_datetime,
    analyte,
    value
from final
"""

SQL_VISITS = """
-- features_visits: visits of persons with an episode, with their kind
-- grain:  one row per visit_occurrence row
-- inputs: visit_occurrence (CDM), dka_concept_visit, dka_feature_persons
-- output: visit_occurrence_id, person_id, start/end datetimes and dates, care_site_id, visit_kind
with

visits as (
    select
        visit_occurrence.visit_occurrence_id,
        visit_occurrence.person_id,
        visit_occurrence.visit_concept_id,
        visit_occurrence.visit_start_datetime,
        visit_occurrence.visit_start_date,
        visit_occurrence.visit_end_datetime,
        visit_occurrence.visit_end_date,
        visit_occurrence.care_site_id
    from visit_occurrence
),

kinds as (
    select
        dka_concept_visit.concept_id,
        min(dka_concept_visit.visit_kind) as visit_kind
    from dka_concept_visit
    group by dka_concept_visit.concept_id
),

persons as (
    select
        dka_feature_persons.person_id
    from dka_feature_persons
),

final as (
    select
        visits.visit_occurrence_id,
        visits.person_id,
        visits.visit_start_datetime,
        visits.visit_start_date,
        visits.visit_end_datetime,
        visits.visit_end_date,
        visits.care_site_id,
        kinds.visit_kind
    from visits
    inner join persons
        on persons.person_id = visits.person_id
    left join kinds
        on kinds.concept_id = visits.visit_concept_id
)

select
    visit_occurrence_id,
    person_id,
    visit_start_datetime,
    visit_start_date,
    visit_end_datetime,
    visit_end_date,
    care_site_id,
    visit_kind
from final
"""

SQL_VISIT_DETAILS = """
-- features_visit_details: visit_detail rows (ICU stays) of persons with an episode
-- grain:  one row per visit_detail row
-- inputs: visit_detail (CDM, optional table), dka_concept_visit, dka_feature_persons
-- output: visit_detail_id, person_id, visit_occurrence_id, visit_kind
with

details as (
    select
        visit_detail.visit_detail_id,
        visit_detail.person_id,
        visit_detail.visit_occurrence_id,
        visit_detail.visit_detail_concept_id
    from visit_detail
),

kinds as (
    select
        dka_concept_visit.concept_id,
        min(dka_concept_visit.visit_kind) as visit_kind
    from dka_concept_visit
    group by dka_concept_visit.concept_id
),

persons as (
    select
        dka_feature_persons.person_id
    from dka_feature_persons
),

final as (
    select
        details.visit_detail_id,
        details.person_id,
        details.visit_occurrence_id,
        kinds.visit_kind
    from details
    inner join persons
        on persons.person_id = details.person_id
    left join kinds
        on kinds.concept_id = details.visit_detail_concept_id
)

select
    visit_detail_id,
    person_id,
    visit_occurrence_id,
    visit_kind
from final
"""

SQL_PERSONS = """
-- features_persons: every person of the extract with birth and sex
-- grain:  one row per person
-- inputs: person (CDM), concept (CDM vocabulary: Gender F and M)
-- output: person_id, birth_datetime, year/month/day_of_birth, sex_code, care_site_id
with

people as (
    select
        person.person_id,
        person.birth_datetime,
        person.year_of_birth,
        person.month_of_birth,
        person.day_of_birth,
        person.gender_concept_id,
        person.care_site_id
    from person
),

genders as (
    select
        concept.concept_id,
        concept.concept_code
    from concept
    where concept.vocabulary_id = 'Gender'
),

final as (
    select
        people.person_id,
        people.birth_datetime,
        people.year_of_birth,
        people.month_of_birth,
        people.day_of_birth,
        genders.concept_code as sex_code,
        people.care_site_id
    from people
    left join genders
        on genders.concept_id = people.gender_concept_id
)

select
    person_id,
    birth_datetime,
    year_of_birth,
    month_of_birth,
    day_of_birth,
    sex_code,
    care_site_id
from final
"""

SQL_DEATHS = """
-- features_deaths: recorded deaths
-- grain:  one row per death row
-- inputs: death (CDM)
-- output: person_id, death_date, death_datetime
with

deaths as (
    select
        death.person_id,
        death.death_date,
        death.death_datetime
    from death
),

final as (
    select
        person_id,
        death_date,
        death_datetime
    from deaths
    where person_id is not null
)

select
    person_id,
    death_date,
    death_datetime
from final
"""

SQL_OBSERVATION = """
-- features_observation_periods: observation periods of every person
-- grain:  one row per observation_period row
-- inputs: observation_period (CDM)
-- output: person_id, observation_period_start_date, observation_period_end_date
with

periods as (
    select
        observation_period.person_id,
        observation_period.observation_period_start_date,
        observation_period.observation_period_end_date
    from observation_period
),

final as (
    select
        person_id,
        observation_period_start_date,
        observation_period_end_date
    from periods
    where person_id is not null
)

select
    person_id,
    observation_period_start_date,
    observation_period_end_date
from final
"""

SQL_DIABETES = """
-- features_diabetes_records: coded days of diabetes by type, for every person
-- grain:  one row per person, calendar day and diabetes type
-- inputs: condition_occurrence (CDM), dka_concept_condition (recipe 12)
-- output: person_id, record_date, diabetes_type (type1 | type2 | other | unspecified)
-- A record counts when condition_concept_id (usually SNOMED CT) or condition_source_concept_id
-- (usually ICD-10-CM) is in a diabetes group; a ketoacidosis-only code (group dka) is
-- `unspecified`: it dates the diabetes but does not type it.
with

conditions as (
    select
        condition_occurrence.person_id,
        condition_occurrence.condition_concept_id,
        condition_occurrence.condition_source_concept_id,
        condition_occurrence.condition_start_date,
        condition_occurrence.condition_start_datetime
    from condition_occurrence
),

groups as (
    select
        dka_concept_condition.concept_id,
        case dka_concept_condition.concept_group
            when 'diabetes_type1' then 'type1'
            when 'diabetes_type2' then 'type2'
            when 'diabetes_other' then 'other'
            else 'unspecified'
        end as diabetes_type
    from dka_concept_condition
    where dka_concept_condition.concept_group in ('diabetes_type1', 'diabetes_type2', 'diabetes_other', 'dka')
),

matched as (
    select
        conditions.person_id,
        coalesce(cast(conditions.condition_start_datetime as date), conditions.condition_start_date) as record_date,
        groups.diabetes_type
    from conditions
    inner join groups
        on groups.concept_id = conditions.condition_concept_id
    union all
    select
        conditions.person_id,
        coalesce(cast(conditions.condition_start_datetime as date), conditions.condition_start_date) as record_date,
        groups.diabetes_type
    from conditions
    inner join groups
        on groups.concept_id = conditions.condition_source_concept_id
),

final as (
    select distinct
        person_id,
        record_date,
        diabetes_type
    from matched
    where person_id is not null and record_date is not null
)

select
    person_id,
    record_date,
    diabetes_type
from final
"""

_SEX = {"F": "female", "M": "male"}

#: hours of look-back before the first onset and look-ahead after the last end for lab events,
#: generous so every window of the builders (link, course baseline, infusion after the end) fits
_SPAN_BEFORE_HOURS = 48.0
_SPAN_AFTER_HOURS = 24.0 * 7


def _query(con: object, sql: str) -> pl.DataFrame:
    return con.sql(sql).pl()  # type: ignore[attr-defined]


def _has_table(con: object, name: str) -> bool:
    import duckdb

    try:
        con.sql(f"select 1 from {name} limit 0").fetchall()  # type: ignore[attr-defined]
    except duckdb.CatalogException:
        return False
    return True


def _birth_datetime(frame: pl.DataFrame) -> pl.Expr:
    """birth_datetime, else year/month/day of birth (missing month: 1 July; missing day: the
    15th, or the 1st with the month missing too), the reading sql/46_episodes.sql takes."""
    del frame
    month = pl.col("month_of_birth").fill_null(7).cast(pl.Int32)
    day = (
        pl.when(pl.col("day_of_birth").is_not_null())
        .then(pl.col("day_of_birth"))
        .when(pl.col("month_of_birth").is_null())
        .then(pl.lit(1))
        .otherwise(pl.lit(15))
        .cast(pl.Int32)
    )
    made = pl.datetime(pl.col("year_of_birth").cast(pl.Int32), month, day, time_unit="us")
    return pl.coalesce(pl.col("birth_datetime").cast(DT), made).alias("birth_datetime")


def _date_start(datetime_col: str, date_col: str) -> pl.Expr:
    return pl.coalesce(pl.col(datetime_col).cast(DT), pl.col(date_col).cast(DT))


def _date_end(datetime_col: str, date_col: str) -> pl.Expr:
    """End datetime, else the end of the end date (midnight after it)."""
    return pl.coalesce(pl.col(datetime_col).cast(DT), pl.col(date_col).cast(DT) + pl.duration(days=1))


def load_feature_inputs(
    extract: object,
    episodes: pl.DataFrame,
    *,
    options: FeatureOptions | None = None,
    as_of: dt.date | None = None,
) -> FeatureInputs:
    """Pull the frames the feature builders need from an opened extract.

    Runs :func:`cohort._labs.prepare_lab_events` first, for the persons with an episode, when
    ``dka_lab_events`` is not in the session yet. Drug, visit and lab rows are read only for
    persons with an episode; persons, deaths, observation periods and diabetes records for
    everyone (the person summary counts every person).

    Parameters
    ----------
    extract
        An :class:`cohort.source.Extract` from :func:`cohort.source.open_extract`.
    episodes
        Episodes as in episodes.parquet.
    options
        Feature options (the HbA1c look-back widens the lab span); defaults when None.
    as_of
        The as-of date for the lab quarantine when lab events are prepared here (the episodes
        run's, from its manifest); today when None.

    Returns
    -------
    FeatureInputs

    Examples
    --------
    >>> from cohort.source import open_extract                       # doctest: +SKIP
    >>> with open_extract("demo-output/extract") as extract:          # doctest: +SKIP
    ...     inputs = load_feature_inputs(extract, episodes)
    ...     tables = build_features(episodes, inputs)
    """
    from cohort._sql import render
    from cohort.source import Extract

    if not isinstance(extract, Extract):
        msg = f"load_feature_inputs needs an Extract from open_extract(), got {type(extract).__name__}"
        raise InputError(msg)
    options = options or FeatureOptions()
    checked = check_episodes(episodes)
    con = extract.con
    if not _has_table(con, "dka_lab_events"):
        from cohort._labs import prepare_lab_events

        # the episodes run's as-of date, when known; the persons with an episode only (the lab
        # query below keeps no other), so the lab step reads their rows, not every person's
        prepare_lab_events(extract, as_of=as_of, persons=checked.get_column("person_id"))
    for table in ("dka_concept_drug", "dka_concept_route", "dka_concept_visit", "dka_concept_condition"):
        if not _has_table(con, table):
            msg = (
                f"the session has no `{table}`; run cohort._labs.prepare_lab_events(extract) "
                "(recipes 10-22) before loading feature inputs"
            )
            raise SchemaError(msg)

    before = pl.duration(microseconds=int(_SPAN_BEFORE_HOURS * 3_600_000_000))
    after = pl.duration(microseconds=int(_SPAN_AFTER_HOURS * 3_600_000_000))
    hba1c_back = pl.duration(microseconds=int((options.hba1c_lookback_days + 1) * 86_400_000_000))
    persons_span = checked.group_by("person_id").agg(
        (pl.col("onset_datetime").min() - before).alias("span_start"),
        (pl.col("onset_datetime").min() - hba1c_back).alias("hba1c_start"),
        (pl.col("end_datetime").max() + after).alias("span_end"),
    )
    if persons_span.is_empty():
        persons_span = pl.DataFrame(
            schema={"person_id": pl.Int64, "span_start": DT, "hba1c_start": DT, "span_end": DT}
        )
    con.register("dka_feature_persons", persons_span.to_arrow())
    try:
        infusions = _query(con, SQL_INFUSIONS)
        basal = _query(con, render(SQL_DRUG_CLASS, {"drug_classes": ("insulin_basal",)}))
        sglt2 = _query(con, render(SQL_DRUG_CLASS, {"drug_classes": ("sglt2_inhibitor",)}))
        # the check of sql/20 runs on the feature persons' rows only (the query keeps no other)
        with checked_in_scope(con, _FEATURE_PERSONS_SCOPE):
            labs = _query(con, SQL_LABS)
        visits = _query(con, SQL_VISITS)
        details = (
            _query(con, SQL_VISIT_DETAILS)
            if getattr(extract, "has_table", lambda name: True)("visit_detail")
            else pl.DataFrame(schema={"visit_detail_id": pl.Int64, "person_id": pl.Int64,
                                      "visit_occurrence_id": pl.Int64, "visit_kind": pl.String})
        )
        people = _query(con, SQL_PERSONS)
        deaths = _query(con, SQL_DEATHS)
        periods = _query(con, SQL_OBSERVATION)
        diabetes = _query(con, SQL_DIABETES)
    finally:
        con.unregister("dka_feature_persons")

    return FeatureInputs(
        infusions=infusions,
        basal_doses=basal.filter(pl.col("start_datetime").is_not_null()).select(
            "person_id", "drug_exposure_id", pl.col("start_datetime").cast(DT)
        ),
        labs=labs.filter(pl.col("analyte") != "hba1c"),
        visits=visits.select(
            "visit_occurrence_id",
            "person_id",
            _date_start("visit_start_datetime", "visit_start_date").alias("visit_start_datetime"),
            _date_end("visit_end_datetime", "visit_end_date").alias("visit_end_datetime"),
            "care_site_id",
            "visit_kind",
        ),
        visit_details=details,
        persons=people.select(
            "person_id",
            _birth_datetime(people),
            pl.col("sex_code").replace_strict(_SEX, default="unknown", return_dtype=pl.String).alias("sex"),
            "care_site_id",
        ),
        deaths=deaths.select(
            "person_id",
            pl.coalesce(pl.col("death_date"), pl.col("death_datetime").dt.date()).alias("death_date"),
            pl.col("death_datetime").cast(DT),
        ),
        observation_periods=periods,
        diabetes_records=diabetes,
        hba1c=labs.filter(pl.col("analyte") == "hba1c").select(
            "person_id", "event_datetime", pl.col("value").alias("value_mmol_mol")
        ),
        sglt2_exposures=sglt2.select(
            "person_id",
            _date_start("start_datetime", "start_date").alias("start_datetime"),
            _date_end("end_datetime", "end_date").alias("end_datetime"),
            pl.col("days_supply").cast(pl.Int64),
        ),
    )
