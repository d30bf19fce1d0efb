-- 18_measurement_duplicates: measurement rows that repeat an earlier row of a DKA analyte.
-- grain:  one row per duplicate measurement_id (a later copy; the copy with the lowest
--         measurement_id is kept and is not listed)
-- inputs: measurement (CDM view); dka_concept_lab
-- output: dka_measurement_duplicates (measurement_id)
--
-- A duplicate has the same person, concept, datetime, unit and value (value_as_number,
-- value_as_concept_id and, with no number, the value_source_value text without case or spaces)
-- as a row with a lower measurement_id. sql/20 gives these rows the reason `duplicate` (the last
-- reason: copies share every other reason, so only usable rows are ever listed there).
--
-- Two passes, so that the full comparison runs on a few rows only:
-- 1. time points that may hold a repeat: the (person, datetime) groups of DKA-analyte rows where
--    some concept occurs twice. Each row gets the bit 2^(|concept_id mod 29|); a group where the
--    sum of its rows' bits differs from their bitwise or has two rows sharing a bit: the same
--    concept, or two concepts sharing a bit (then the full comparison below finds no repeat and
--    nothing is lost; a repeat is never missed). One narrow hash aggregate over three
--    columns; at a million persons it replaced a window over every row ordered by concept and
--    time (benchmarks/bench_labs.py; it finds the same rows).
-- 2. the rows at those time points, ranked within the full duplicate key by measurement_id.
with

lab_concepts as (
    select
        dka_concept_lab.concept_id
    from dka_concept_lab
),

concept_bits as (
    select
        measurement.person_id,
        measurement.measurement_datetime,
        cast(power(2, abs(measurement.measurement_concept_id % 29)) as bigint) as concept_bit
    from measurement
    where measurement.measurement_datetime is not null
        and measurement.person_id is not null
        and measurement.measurement_concept_id in (select lab_concepts.concept_id from lab_concepts)
),

time_point_bits as (
    select
        concept_bits.person_id,
        concept_bits.measurement_datetime,
        sum(concept_bits.concept_bit) as bit_sum,
        bit_or(concept_bits.concept_bit) as bit_union
    from concept_bits
    group by concept_bits.person_id, concept_bits.measurement_datetime
),

collision_points as (
    select
        time_point_bits.person_id,
        time_point_bits.measurement_datetime
    from time_point_bits
    where time_point_bits.bit_sum <> time_point_bits.bit_union
),

collisions as (
    select
        measurement.measurement_id,
        measurement.person_id,
        measurement.measurement_concept_id,
        measurement.measurement_datetime,
        case when measurement.unit_concept_id = 0 then null else measurement.unit_concept_id end as unit_concept_id,
        measurement.value_as_number,
        measurement.value_as_concept_id,
        case
            when measurement.value_as_number is null
                then lower(replace(trim(measurement.value_source_value), ' ', ''))
        end as value_text_key
    from measurement
    inner join collision_points
        on collision_points.person_id = measurement.person_id
        and collision_points.measurement_datetime = measurement.measurement_datetime
    -- implied by the join; stated so the scan skips other analytes' rows and date-only rows
    -- before reading their other columns (a semi-join: a concept listed twice adds no row)
    where measurement.measurement_datetime is not null
        and measurement.measurement_concept_id in (select lab_concepts.concept_id from lab_concepts)
),

duplicate_ranks as (
    select
        collisions.measurement_id,
        row_number() over (
            partition by
                collisions.person_id,
                collisions.measurement_concept_id,
                collisions.measurement_datetime,
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
