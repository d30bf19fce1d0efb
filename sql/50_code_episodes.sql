-- 50_code_episodes: the code-based finder, for comparison with the lab-based definitions.
-- grain:  one row per visit holding a diabetic ketoacidosis condition code (or, for a code on no
--         visit, one row per person and condition start day)
-- inputs: condition_occurrence, visit_occurrence (CDM), dka_concept_condition (sql/12),
--         dka_concept_visit (sql/14)
-- output: dka_code_episodes (person_id, visit_occurrence_id, visit_kind, onset_datetime,
--         end_datetime, condition_rows)
--
-- A condition row counts when condition_concept_id or condition_source_concept_id is in group
-- `dka` (ICD-10-CM E08.1x, E09.1x, E10.1x, E11.1x, E13.1x; SNOMED CT 420422005). The episode is
-- the visit the row names (visit_occurrence_id); a row naming no visit is placed in the hospital
-- visit (ERIP, inpatient, emergency) containing its start, else it stands alone as the day of its
-- start. onset = visit start, end = visit end (an end known only as a date runs to the end of
-- that day; an open visit ends at its start). Codes carry no onset time, no resolution and no
-- severity: that is the point of the comparison.

with

dka_concepts as (
    select
        dka_concept_condition.concept_id
    from dka_concept_condition
    where dka_concept_condition.concept_group = 'dka'
),

dka_conditions as (
    select
        condition_occurrence.condition_occurrence_id,
        condition_occurrence.person_id,
        condition_occurrence.visit_occurrence_id,
        coalesce(
            condition_occurrence.condition_start_datetime,
            cast(condition_occurrence.condition_start_date as timestamp)
        ) as condition_datetime
    from condition_occurrence
    where condition_occurrence.condition_concept_id in (select dka_concepts.concept_id from dka_concepts)
        or condition_occurrence.condition_source_concept_id in (select dka_concepts.concept_id from dka_concepts)
),

visit_kinds as (
    select
        dka_concept_visit.concept_id,
        dka_concept_visit.visit_kind
    from dka_concept_visit
),

visits as (
    select
        visit_occurrence.visit_occurrence_id,
        visit_occurrence.person_id,
        visit_kinds.visit_kind,
        coalesce(
            visit_occurrence.visit_start_datetime,
            cast(visit_occurrence.visit_start_date as timestamp)
        ) as visit_start_datetime,
        coalesce(
            visit_occurrence.visit_end_datetime,
            cast(visit_occurrence.visit_end_date as timestamp) + interval '1 day' - interval '1 second'
        ) as visit_end_datetime
    from visit_occurrence
    left join visit_kinds
        on visit_kinds.concept_id = visit_occurrence.visit_concept_id
    where visit_occurrence.person_id in (select dka_conditions.person_id from dka_conditions)
),

placed_by_time as (
    select
        dka_conditions.condition_occurrence_id,
        visits.visit_occurrence_id,
        row_number() over (
            partition by dka_conditions.condition_occurrence_id
            order by visits.visit_start_datetime, visits.visit_occurrence_id
        ) as visit_order
    from dka_conditions
    inner join visits
        on visits.person_id = dka_conditions.person_id
        and visits.visit_kind in ('emergency_inpatient', 'inpatient', 'emergency')
        and cast(visits.visit_start_datetime as date) <= cast(dka_conditions.condition_datetime as date)
        and (visits.visit_end_datetime is null or visits.visit_end_datetime >= dka_conditions.condition_datetime)
    where dka_conditions.visit_occurrence_id is null
),

placed as (
    select
        dka_conditions.person_id,
        dka_conditions.condition_datetime,
        case
            when dka_conditions.visit_occurrence_id is not null then dka_conditions.visit_occurrence_id
            else placed_by_time.visit_occurrence_id
        end as visit_occurrence_id
    from dka_conditions
    left join placed_by_time
        on placed_by_time.condition_occurrence_id = dka_conditions.condition_occurrence_id
        and placed_by_time.visit_order = 1
),

on_visits as (
    select
        placed.person_id,
        placed.visit_occurrence_id,
        min(placed.condition_datetime) as first_condition_datetime,
        count(*) as condition_rows
    from placed
    where placed.visit_occurrence_id is not null
    group by placed.person_id, placed.visit_occurrence_id
),

off_visits as (
    select
        placed.person_id,
        cast(placed.condition_datetime as date) as condition_date,
        count(*) as condition_rows
    from placed
    where placed.visit_occurrence_id is null
    group by placed.person_id, cast(placed.condition_datetime as date)
),

final as (
    select
        cast(on_visits.person_id as bigint) as person_id,
        cast(on_visits.visit_occurrence_id as bigint) as visit_occurrence_id,
        visits.visit_kind,
        coalesce(visits.visit_start_datetime, on_visits.first_condition_datetime) as onset_datetime,
        coalesce(visits.visit_end_datetime, visits.visit_start_datetime, on_visits.first_condition_datetime) as end_datetime,
        on_visits.condition_rows
    from on_visits
    left join visits
        on visits.visit_occurrence_id = on_visits.visit_occurrence_id
    union all
    select
        cast(off_visits.person_id as bigint) as person_id,
        cast(null as bigint) as visit_occurrence_id,
        cast(null as varchar) as visit_kind,
        cast(off_visits.condition_date as timestamp) as onset_datetime,
        cast(off_visits.condition_date as timestamp) + interval '1 day' - interval '1 second' as end_datetime,
        off_visits.condition_rows
    from off_visits
)

select
    final.person_id,
    final.visit_occurrence_id,
    final.visit_kind,
    final.onset_datetime,
    final.end_datetime,
    final.condition_rows
from final
