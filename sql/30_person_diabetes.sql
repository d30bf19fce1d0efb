-- 30_person_diabetes: when each person's diabetes is first on record, and its type.
-- grain:  one row per person with at least one diabetes condition record
-- inputs: condition_occurrence (CDM), dka_concept_condition (sql/12: concept_id, concept_group)
-- output: dka_person_diabetes (person_id, first_diabetes_datetime, diabetes_type)
--
-- A record counts when either condition_concept_id (usually the SNOMED CT concept) or
-- condition_source_concept_id (usually the ICD-10-CM code) is in a diabetes group
-- (diabetes_type1, diabetes_type2, diabetes_other) or in the `dka` group: a diabetic
-- ketoacidosis code is itself a diabetes diagnosis. Drug exposures do NOT count: insulin is
-- given to people without diabetes (hyperkalaemia, critical care) and SGLT2 inhibitors are
-- prescribed for heart failure and kidney disease, so a prescription is no diagnosis.
-- The record time is condition_start_datetime, or midnight of condition_start_date.
-- diabetes_type: `type1` when any type 1 record exists, else `type2`, else `other`, else
-- `unspecified` (only a ketoacidosis code), a toolkit choice: type 1 codes are the more specific.

with

conditions as (
    select
        condition_occurrence.person_id,
        condition_occurrence.condition_concept_id,
        condition_occurrence.condition_source_concept_id,
        coalesce(
            condition_occurrence.condition_start_datetime,
            cast(condition_occurrence.condition_start_date as timestamp)
        ) as condition_datetime
    from condition_occurrence
    where condition_occurrence.person_id is not null
),

diabetes_concepts as (
    select
        dka_concept_condition.concept_id,
        dka_concept_condition.concept_group
    from dka_concept_condition
    where dka_concept_condition.concept_group in ('diabetes_type1', 'diabetes_type2', 'diabetes_other', 'dka')
),

matched as (
    select
        conditions.person_id,
        conditions.condition_datetime,
        diabetes_concepts.concept_group
    from conditions
    inner join diabetes_concepts
        on diabetes_concepts.concept_id = conditions.condition_concept_id
    where conditions.condition_datetime is not null
    union all
    select
        conditions.person_id,
        conditions.condition_datetime,
        diabetes_concepts.concept_group
    from conditions
    inner join diabetes_concepts
        on diabetes_concepts.concept_id = conditions.condition_source_concept_id
    where conditions.condition_datetime is not null
),

per_person as (
    select
        matched.person_id,
        min(matched.condition_datetime) as first_diabetes_datetime,
        max(case when matched.concept_group = 'diabetes_type1' then 1 else 0 end) as has_type1,
        max(case when matched.concept_group = 'diabetes_type2' then 1 else 0 end) as has_type2,
        max(case when matched.concept_group = 'diabetes_other' then 1 else 0 end) as has_other
    from matched
    group by matched.person_id
),

final as (
    select
        cast(per_person.person_id as bigint) as person_id,
        per_person.first_diabetes_datetime,
        case
            when per_person.has_type1 = 1 then 'type1'
            when per_person.has_type2 = 1 then 'type2'
            when per_person.has_other = 1 then 'other'
            else 'unspecified'
        end as diabetes_type
    from per_person
)

select
    final.person_id,
    final.first_diabetes_datetime,
    final.diabetes_type
from final
