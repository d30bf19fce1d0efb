-- 24_quarantine: every source row the pipeline cannot use, with one reason.
-- grain:  one row per excluded source row (source_table, source_row_id)
-- inputs: dka_measurement_checked (sql/20), dka_measurement_duplicates (sql/22); drug_exposure,
--         person (CDM views); dka_concept_drug, dka_concept_route
-- output: dka_quarantine (source_table, source_row_id, person_id, reason, detail)
--
-- measurement: the rows sql/20 gave a reason, and the repeated copies of usable rows (sql/22,
-- kept = false; one row each, so a row given twice with its own measurement_id is quarantined
-- once) as `duplicate` (the last reason). (In DuckDB, sql/20 is read here in the scope of the time points
-- sql/21 found holding an excluded row or a repeated concept, and of rows with no person or no
-- time: the same rows, from a fraction of the work; cohort/_labs.py.)
-- drug_exposure: intravenous regular-insulin rows (the infusions the features read), first
-- reason that applies: person_unknown, no_time (drug_exposure_start_datetime null: an infusion
-- cannot be placed within hours), end_before_start (drug_exposure_end_datetime earlier than the
-- start). Other drug rows are read by date and are not checked here.
-- data_quality.csv counts this table by source_table and reason.
with

checked as (
    select
        measurement_id,
        person_id,
        reason,
        detail
    from dka_measurement_checked
),

repeats as (
    select
        measurement_id,
        kept_measurement_id,
        person_id
    from dka_measurement_duplicates
    where not kept
),

-- the rows sql/20 gave a reason, and each repeated copy of a usable row (the last reason)
measurement_reasons as (
    select
        checked.measurement_id,
        checked.person_id,
        checked.reason,
        checked.detail
    from checked
    where checked.reason is not null
    union all
    select
        repeats.measurement_id,
        repeats.person_id,
        'duplicate' as reason,
        case
            when repeats.measurement_id = repeats.kept_measurement_id
                then 'the same row given twice (measurement_id, person, concept, time, unit and value); one copy is kept'
            else 'same person, concept, time, unit and value as measurement_id '
                || cast(repeats.kept_measurement_id as varchar) || ', which is kept'
        end as detail
    from repeats
),

regular_insulin as (
    select distinct
        concept_id
    from dka_concept_drug
    where drug_class = 'insulin_regular'
),

intravenous as (
    select distinct
        concept_id
    from dka_concept_route
    where route = 'intravenous'
),

persons as (
    select distinct
        person_id
    from person
),

measurement_rows as (
    select
        'measurement' as source_table,
        measurement_id as source_row_id,
        person_id,
        reason,
        detail
    from measurement_reasons
    where reason is not null
),

infusions as (
    select
        drug_exposure.drug_exposure_id,
        drug_exposure.person_id,
        drug_exposure.drug_exposure_start_date,
        drug_exposure.drug_exposure_start_datetime,
        drug_exposure.drug_exposure_end_datetime,
        persons.person_id as known_person_id
    from drug_exposure
    inner join regular_insulin
        on regular_insulin.concept_id = drug_exposure.drug_concept_id
    inner join intravenous
        on intravenous.concept_id = drug_exposure.route_concept_id
    left join persons
        on persons.person_id = drug_exposure.person_id
),

infusion_reasons as (
    select
        drug_exposure_id,
        person_id,
        drug_exposure_start_date,
        drug_exposure_start_datetime,
        drug_exposure_end_datetime,
        case
            when known_person_id is null then 'person_unknown'
            when drug_exposure_start_datetime is null then 'no_time'
            when drug_exposure_end_datetime < drug_exposure_start_datetime then 'end_before_start'
        end as reason
    from infusions
),

infusion_rows as (
    select
        'drug_exposure' as source_table,
        drug_exposure_id as source_row_id,
        person_id,
        reason,
        case reason
            when 'person_unknown' then 'person_id ' || coalesce(cast(person_id as varchar), 'null') || ' is not in person'
            when 'no_time' then 'intravenous insulin with drug_exposure_start_datetime null (start date '
                || coalesce(cast(drug_exposure_start_date as varchar), 'null') || ')'
            when 'end_before_start' then 'intravenous insulin ends ' || cast(drug_exposure_end_datetime as varchar)
                || ', before its start ' || cast(drug_exposure_start_datetime as varchar)
        end as detail
    from infusion_reasons
    where reason is not null
),

combined as (
    select source_table, source_row_id, person_id, reason, detail from measurement_rows
    union all
    select source_table, source_row_id, person_id, reason, detail from infusion_rows
),

final as (
    select
        cast(source_table as varchar) as source_table,
        cast(source_row_id as bigint) as source_row_id,
        cast(person_id as bigint) as person_id,
        cast(reason as varchar) as reason,
        cast(detail as varchar) as detail
    from combined
)

select
    source_table,
    source_row_id,
    person_id,
    reason,
    detail
from final
