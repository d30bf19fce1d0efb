-- 23_lab_events: the usable lab results of the DKA analytes, in canonical units.
-- grain:  one row per usable measurement row (reason is null in dka_measurement_checked and not
--         a repeated copy listed in dka_measurement_duplicates): every row whose measurement_id
--         sql/22 lists is left out, and the copies it lists as kept are added back (so that one
--         copy of a row given twice, ids included, is used)
-- inputs: dka_measurement_checked (sql/20), dka_measurement_duplicates (sql/22)
-- output: dka_lab_events (person_id, measurement_id, visit_occurrence_id, event_datetime,
--         analyte, specimen, value)
-- Canonical units: mmol/L (glucose, ketones, bicarbonate, electrolytes, anion gap), pH unitless,
-- HbA1c mmol/mol, creatinine umol/L, urine ketones ordinal 0..4.
with

checked as (
    select
        person_id,
        measurement_id,
        visit_occurrence_id,
        event_datetime,
        analyte,
        specimen,
        value,
        reason
    from dka_measurement_checked
),

listed_ids as (
    select distinct
        dka_measurement_duplicates.measurement_id
    from dka_measurement_duplicates
),

kept_copies as (
    select
        dka_measurement_duplicates.person_id,
        dka_measurement_duplicates.measurement_id,
        dka_measurement_duplicates.visit_occurrence_id,
        dka_measurement_duplicates.event_datetime,
        dka_measurement_duplicates.analyte,
        dka_measurement_duplicates.specimen,
        dka_measurement_duplicates.value
    from dka_measurement_duplicates
    where dka_measurement_duplicates.kept
),

unlisted as (
    select
        checked.person_id,
        checked.measurement_id,
        checked.visit_occurrence_id,
        checked.event_datetime,
        checked.analyte,
        checked.specimen,
        checked.value
    from checked
    left join listed_ids
        on listed_ids.measurement_id = checked.measurement_id
    where checked.reason is null
        and listed_ids.measurement_id is null
),

usable as (
    select person_id, measurement_id, visit_occurrence_id, event_datetime, analyte, specimen, value
    from unlisted
    union all
    select person_id, measurement_id, visit_occurrence_id, event_datetime, analyte, specimen, value
    from kept_copies
),

final as (
    select
        cast(person_id as bigint) as person_id,
        cast(measurement_id as bigint) as measurement_id,
        cast(visit_occurrence_id as bigint) as visit_occurrence_id,
        cast(event_datetime as timestamp) as event_datetime,
        cast(analyte as varchar) as analyte,
        cast(specimen as varchar) as specimen,
        cast(value as double) as value
    from usable
)

select
    person_id,
    measurement_id,
    visit_occurrence_id,
    event_datetime,
    analyte,
    specimen,
    value
from final
