-- 21_lab_points: the lab results of each person gathered by time point.
-- grain:  one row per (person_id, point_datetime) of the checked rows with a person and a time
-- inputs: dka_measurement_checked (sql/20)
-- output: dka_lab_points (person_id, point_datetime, visit_occurrence_id, results, excluded,
--         concept_bits, concept_bit_union, and one column per analyte: glucose, bhb,
--         urine_ketones, sodium, chloride, potassium, anion_gap, anion_gap_with_k, hba1c,
--         creatinine; pH and bicarbonate one column per specimen: ph_<specimen>,
--         bicarbonate_<specimen>)
--
-- Rules (toolkit choices, common practice unless a source is named):
-- * Several results of one analyte at one time point: the most acidotic pH and bicarbonate (min),
--   the highest glucose, ketones, anion gap, HbA1c and creatinine (max), and for sodium, chloride
--   and potassium the midpoint of the lowest and highest (the mean of two results; with three or
--   more at one minute, rare, the midpoint of the range). Every one of these is the same with or
--   without a repeated copy of a row, so the time points are built before the copies are known
--   (sql/22 finds them from concept_bits here).
-- * pH and bicarbonate are kept per specimen (the specimens of cohort._codelists.SPECIMENS), so
--   that each definition's lab state (sql/31) takes the minimum over the specimens it accepts.
-- * Only usable rows (reason null) give values; a time point whose rows are all excluded is kept,
--   with null values, so that excluded counts them.
-- * visit_occurrence_id: the largest among the time point's usable results (copies included).
-- * results: the number of rows usable by sql/20 at the time point, repeated copies included
--   (the reconciliation subtracts the copies sql/24 quarantines); excluded: the number of rows
--   with a reason. concept_bits and concept_bit_union: the sum and the bitwise or, over the
--   usable rows, of 2^(|concept_id mod 29|); they differ where two usable rows share a bit, which
--   two rows of one concept always do (sql/22 compares those rows in full).
-- * sql/24 reads only the rows at time points with excluded > 0 or differing bits (and the rows
--   with no person or no time, which are never usable and have no time point): every row with a
--   reason, and every repeated copy, is among them.
-- Built once per run and read by every definition's lab state, not once per definition.
with

checked as (
    select
        dka_measurement_checked.person_id,
        dka_measurement_checked.measurement_concept_id,
        dka_measurement_checked.event_datetime,
        dka_measurement_checked.visit_occurrence_id,
        dka_measurement_checked.analyte,
        dka_measurement_checked.specimen,
        dka_measurement_checked.value,
        dka_measurement_checked.reason
    from dka_measurement_checked
    where dka_measurement_checked.person_id is not null
        and dka_measurement_checked.event_datetime is not null
),

-- the values of usable rows only (null for a row with a reason)
usable as (
    select
        checked.person_id,
        checked.event_datetime,
        case
            when checked.reason is null
                then cast(power(2, abs(checked.measurement_concept_id % 29)) as bigint)
        end as concept_bit,
        case when checked.reason is null then checked.visit_occurrence_id end as visit_occurrence_id,
        checked.analyte,
        checked.specimen,
        case when checked.reason is null then checked.value end as value,
        checked.reason
    from checked
),

points as (
    select
        usable.person_id,
        usable.event_datetime as point_datetime,
        max(usable.visit_occurrence_id) as visit_occurrence_id,
        count(case when usable.reason is null then 1 end) as results,
        count(usable.reason) as excluded,
        sum(usable.concept_bit) as concept_bits,
        bit_or(usable.concept_bit) as concept_bit_union,
        max(case when usable.analyte = 'glucose' then usable.value end) as glucose,
        max(case when usable.analyte = 'bhb' then usable.value end) as bhb,
        max(case when usable.analyte = 'urine_ketones' then usable.value end) as urine_ketones,
        (min(case when usable.analyte = 'sodium' then usable.value end)
            + max(case when usable.analyte = 'sodium' then usable.value end)) / 2 as sodium,
        (min(case when usable.analyte = 'chloride' then usable.value end)
            + max(case when usable.analyte = 'chloride' then usable.value end)) / 2 as chloride,
        (min(case when usable.analyte = 'potassium' then usable.value end)
            + max(case when usable.analyte = 'potassium' then usable.value end)) / 2 as potassium,
        max(case when usable.analyte = 'anion_gap' then usable.value end) as anion_gap,
        max(case when usable.analyte = 'anion_gap_with_k' then usable.value end) as anion_gap_with_k,
        max(case when usable.analyte = 'hba1c' then usable.value end) as hba1c,
        max(case when usable.analyte = 'creatinine' then usable.value end) as creatinine,
        min(case when usable.analyte = 'ph' and usable.specimen = 'arterial' then usable.value end) as ph_arterial,
        min(case when usable.analyte = 'ph' and usable.specimen = 'venous' then usable.value end) as ph_venous,
        min(case when usable.analyte = 'ph' and usable.specimen = 'capillary' then usable.value end) as ph_capillary,
        min(case when usable.analyte = 'ph' and usable.specimen = 'unspecified' then usable.value end) as ph_unspecified,
        min(case when usable.analyte = 'bicarbonate' and usable.specimen = 'serum' then usable.value end) as bicarbonate_serum,
        min(case when usable.analyte = 'bicarbonate' and usable.specimen = 'blood' then usable.value end) as bicarbonate_blood,
        min(case when usable.analyte = 'bicarbonate' and usable.specimen = 'arterial' then usable.value end) as bicarbonate_arterial,
        min(case when usable.analyte = 'bicarbonate' and usable.specimen = 'venous' then usable.value end) as bicarbonate_venous,
        min(case when usable.analyte = 'bicarbonate' and usable.specimen = 'total_co2' then usable.value end) as bicarbonate_total_co2
    from usable
    group by usable.person_id, usable.event_datetime
),

final as (
    select
        cast(points.person_id as bigint) as person_id,
        cast(points.point_datetime as timestamp) as point_datetime,
        cast(points.visit_occurrence_id as bigint) as visit_occurrence_id,
        cast(points.results as bigint) as results,
        cast(points.excluded as bigint) as excluded,
        cast(points.concept_bits as bigint) as concept_bits,
        cast(points.concept_bit_union as bigint) as concept_bit_union,
        cast(points.glucose as double) as glucose,
        cast(points.bhb as double) as bhb,
        cast(points.urine_ketones as double) as urine_ketones,
        cast(points.sodium as double) as sodium,
        cast(points.chloride as double) as chloride,
        cast(points.potassium as double) as potassium,
        cast(points.anion_gap as double) as anion_gap,
        cast(points.anion_gap_with_k as double) as anion_gap_with_k,
        cast(points.hba1c as double) as hba1c,
        cast(points.creatinine as double) as creatinine,
        cast(points.ph_arterial as double) as ph_arterial,
        cast(points.ph_venous as double) as ph_venous,
        cast(points.ph_capillary as double) as ph_capillary,
        cast(points.ph_unspecified as double) as ph_unspecified,
        cast(points.bicarbonate_serum as double) as bicarbonate_serum,
        cast(points.bicarbonate_blood as double) as bicarbonate_blood,
        cast(points.bicarbonate_arterial as double) as bicarbonate_arterial,
        cast(points.bicarbonate_venous as double) as bicarbonate_venous,
        cast(points.bicarbonate_total_co2 as double) as bicarbonate_total_co2
    from points
)

select
    final.person_id,
    final.point_datetime,
    final.visit_occurrence_id,
    final.results,
    final.excluded,
    final.concept_bits,
    final.concept_bit_union,
    final.glucose,
    final.bhb,
    final.urine_ketones,
    final.sodium,
    final.chloride,
    final.potassium,
    final.anion_gap,
    final.anion_gap_with_k,
    final.hba1c,
    final.creatinine,
    final.ph_arterial,
    final.ph_venous,
    final.ph_capillary,
    final.ph_unspecified,
    final.bicarbonate_serum,
    final.bicarbonate_blood,
    final.bicarbonate_arterial,
    final.bicarbonate_venous,
    final.bicarbonate_total_co2
from final
