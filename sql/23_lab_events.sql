-- 23_lab_events: the usable lab results of the DKA analytes, in canonical units.
-- grain:  one row per usable measurement row (reason is null in dka_measurement_checked and not
--         a repeated copy listed in dka_measurement_duplicates)
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

duplicates as (
    select
        dka_measurement_duplicates.measurement_id
    from dka_measurement_duplicates
),

usable as (
    select
        checked.person_id,
        checked.measurement_id,
        checked.visit_occurrence_id,
        checked.event_datetime,
        checked.analyte,
        checked.specimen,
        checked.value
    from checked
    left join duplicates
        on duplicates.measurement_id = checked.measurement_id
    where checked.reason is null
        and duplicates.measurement_id is null
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
