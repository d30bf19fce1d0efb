-- 22_measurement_duplicates: measurement rows that repeat an earlier row of a DKA analyte.
-- grain:  one row per duplicate measurement_id (a later copy; the copy with the lowest
--         measurement_id is kept and is not listed)
-- inputs: dka_measurement_checked (sql/20); dka_lab_points (sql/21)
-- output: dka_measurement_duplicates (measurement_id)
--
-- A duplicate has the same person, concept, datetime, unit and value (value_as_number,
-- value_as_concept_id and, with no number, the value_source_value text without case or spaces:
-- the repeat key sql/20 passes on) as a row with a lower measurement_id. sql/24 gives these rows
-- the reason `duplicate` when they have no other (the last reason: copies share every other
-- reason, so a copy of an excluded row keeps that row's reason) and sql/23 leaves them out of the
-- lab events.
--
-- The full comparison runs on a few rows only:
-- 1. time points that may hold a repeat: those of dka_lab_points whose usable rows' bits
--    2^(|concept_id mod 29|) sum to more than their bitwise or (two usable rows share a bit: the
--    same concept, or two concepts sharing a bit, where the comparison below finds no repeat;
--    a repeat of a usable row is never missed). The bits come with the time points, which are
--    built anyway, so finding repeats costs no pass of its own over every row.
-- 2. the checked rows at those time points, ranked within the full duplicate key by
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
        dka_measurement_checked.event_datetime,
        dka_measurement_checked.unit_concept_id,
        dka_measurement_checked.value_as_number,
        dka_measurement_checked.value_as_concept_id,
        dka_measurement_checked.value_text_key
    from dka_measurement_checked
    inner join collision_points
        on collision_points.person_id = dka_measurement_checked.person_id
        and collision_points.point_datetime = dka_measurement_checked.event_datetime
),

duplicate_ranks as (
    select
        collisions.measurement_id,
        row_number() over (
            partition by
                collisions.person_id,
                collisions.measurement_concept_id,
                collisions.event_datetime,
                collisions.unit_concept_id,
                collisions.value_as_number,
                collisions.value_as_concept_id,
                collisions.value_text_key
            order by collisions.measurement_id
        ) as copy_number
    from collisions
),

final as (
    select distinct
        cast(duplicate_ranks.measurement_id as bigint) as measurement_id
    from duplicate_ranks
    where duplicate_ranks.copy_number > 1
)

select
    final.measurement_id
from final
