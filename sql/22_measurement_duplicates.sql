-- 22_measurement_duplicates: usable measurement rows that repeat an earlier row of a DKA analyte,
-- and the copy kept where a repeat carries the kept row's own measurement_id.
-- grain:  one row per repeated copy (kept = false: a later copy, quarantined as `duplicate`), and
--         one row per kept copy whose measurement_id is also a repeated copy's (kept = true: the
--         same row given twice, ids included, as an overlapping part file does)
-- inputs: dka_measurement_checked (sql/20); dka_lab_points (sql/21)
-- output: dka_measurement_duplicates (measurement_id, kept, kept_measurement_id, person_id,
--         visit_occurrence_id, event_datetime, analyte, specimen, value)
--
-- A repeated copy has the same person, concept, datetime, unit and value (value_as_number,
-- value_as_concept_id and, with no number, the value_source_value text without case or spaces:
-- the repeat key sql/20 passes on) as a usable row ranked before it by measurement_id; the first
-- of each key is kept (kept_measurement_id names it). Only usable rows are compared: a copy of an
-- excluded row has that row's reason too (every reason of sql/20 follows from the key's columns),
-- so it is quarantined under it and is not listed here.
-- sql/23 leaves out every row whose measurement_id is listed and adds back the kept = true rows;
-- sql/24 quarantines the kept = false rows as `duplicate` (the last reason). Two rows with one
-- measurement_id cannot be told apart by any column; which of them is kept does not matter, as
-- they agree on every column the lab events carry, or differ only in the visit.
--
-- The full comparison runs on a few rows only:
-- 1. time points that may hold a repeat: those of dka_lab_points whose usable rows' bits
--    2^(|concept_id mod 29|) sum to more than their bitwise or (two usable rows share a bit: the
--    same concept, or two concepts sharing a bit, where the comparison below finds no repeat;
--    a repeat of a usable row is never missed). The bits come with the time points, which are
--    built anyway, so finding repeats costs no pass of its own over every row.
-- 2. the usable checked rows at those time points, ranked within the full repeat key by
--    measurement_id. (In DuckDB the checked rows read here are the ones kept for the quarantine,
--    which hold every row at these time points; cohort/_labs.py.)
with

collision_points as (
    select
        dka_lab_points.person_id,
        dka_lab_points.point_datetime
    from dka_lab_points
    where dka_lab_points.concept_bits <> dka_lab_points.concept_bit_union
),

collisions as (
    select
        dka_measurement_checked.measurement_id,
        dka_measurement_checked.person_id,
        dka_measurement_checked.measurement_concept_id,
        dka_measurement_checked.visit_occurrence_id,
        dka_measurement_checked.event_datetime,
        dka_measurement_checked.analyte,
        dka_measurement_checked.specimen,
        dka_measurement_checked.value,
        dka_measurement_checked.unit_concept_id,
        dka_measurement_checked.value_as_number,
        dka_measurement_checked.value_as_concept_id,
        dka_measurement_checked.value_text_key
    from dka_measurement_checked
    inner join collision_points
        on collision_points.person_id = dka_measurement_checked.person_id
        and collision_points.point_datetime = dka_measurement_checked.event_datetime
    where dka_measurement_checked.reason is null
),

ranked as (
    select
        collisions.measurement_id,
        collisions.person_id,
        collisions.visit_occurrence_id,
        collisions.event_datetime,
        collisions.analyte,
        collisions.specimen,
        collisions.value,
        row_number() over repeat_order as copy_number,
        first_value(collisions.measurement_id) over repeat_order as kept_measurement_id
    from collisions
    window repeat_order as (
        partition by
            collisions.person_id,
            collisions.measurement_concept_id,
            collisions.event_datetime,
            collisions.unit_concept_id,
            collisions.value_as_number,
            collisions.value_as_concept_id,
            collisions.value_text_key
        order by collisions.measurement_id, collisions.visit_occurrence_id
    )
),

repeated_ids as (
    select distinct
        ranked.measurement_id
    from ranked
    where ranked.copy_number > 1
),

-- every repeat (kept false), and a kept copy whose id a repeat shares (kept true: sql/23 removes
-- every row of a listed id, so it is listed to be added back)
combined as (
    select
        ranked.measurement_id,
        ranked.copy_number = 1 as kept,
        ranked.kept_measurement_id,
        ranked.person_id,
        ranked.visit_occurrence_id,
        ranked.event_datetime,
        ranked.analyte,
        ranked.specimen,
        ranked.value
    from ranked
    left join repeated_ids
        on repeated_ids.measurement_id = ranked.measurement_id
    where ranked.copy_number > 1
        or repeated_ids.measurement_id is not null
),

final as (
    select
        cast(combined.measurement_id as bigint) as measurement_id,
        cast(combined.kept as boolean) as kept,
        cast(combined.kept_measurement_id as bigint) as kept_measurement_id,
        cast(combined.person_id as bigint) as person_id,
        cast(combined.visit_occurrence_id as bigint) as visit_occurrence_id,
        cast(combined.event_datetime as timestamp) as event_datetime,
        cast(combined.analyte as varchar) as analyte,
        cast(combined.specimen as varchar) as specimen,
        cast(combined.value as double) as value
    from combined
)

select
    final.measurement_id,
    final.kept,
    final.kept_measurement_id,
    final.person_id,
    final.visit_occurrence_id,
    final.event_datetime,
    final.analyte,
    final.specimen,
    final.value
from final
