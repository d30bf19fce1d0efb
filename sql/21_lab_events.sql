-- 21_lab_events: the usable lab results of the DKA analytes, in canonical units.
-- grain:  one row per usable measurement row (reason is null in dka_measurement_checked)
-- inputs: dka_measurement_checked
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

usable as (
    select
        person_id,
        measurement_id,
        visit_occurrence_id,
        event_datetime,
        analyte,
        specimen,
        value
    from checked
    where reason is null
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
