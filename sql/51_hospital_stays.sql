-- 51_hospital_stays: hospital visits grouped into stays, the unit of visit-level agreement.
-- grain:  one row per hospital visit (visit kind emergency_inpatient, inpatient or emergency)
-- inputs: visit_occurrence (CDM), dka_concept_visit (sql/14)
-- output: dka_hospital_stays (visit_occurrence_id, person_id, stay_visit_occurrence_id)
--
-- An admission that follows an emergency visit is one stay with it: a visit belongs to the stay
-- of the hospital visit named by its preceding_visit_occurrence_id, or else of a hospital visit of
-- the same person that started earlier and had not ended when this one started. The stay is
-- named by its first visit's id. One level of chaining (emergency -> admission) is followed;
-- a longer chain is rare and then splits into more than one stay. Without this, a lab-based
-- episode linked to the emergency visit and a code recorded on the admission would count as two
-- disagreeing visits.

with

visit_kinds as (
    select
        dka_concept_visit.concept_id,
        dka_concept_visit.visit_kind
    from dka_concept_visit
    where dka_concept_visit.visit_kind in ('emergency_inpatient', 'inpatient', 'emergency')
),

hospital_visits as (
    select
        visit_occurrence.visit_occurrence_id,
        visit_occurrence.person_id,
        visit_occurrence.preceding_visit_occurrence_id,
        coalesce(
            visit_occurrence.visit_start_datetime,
            cast(visit_occurrence.visit_start_date as timestamp)
        ) as visit_start_datetime,
        coalesce(
            visit_occurrence.visit_end_datetime,
            cast(visit_occurrence.visit_end_date as timestamp) + interval '1 day' - interval '1 second'
        ) as visit_end_datetime
    from visit_occurrence
    inner join visit_kinds
        on visit_kinds.concept_id = visit_occurrence.visit_concept_id
),

by_overlap as (
    select
        later_visits.visit_occurrence_id,
        min(earlier_visits.visit_occurrence_id) as earlier_visit_occurrence_id
    from hospital_visits as later_visits
    inner join hospital_visits as earlier_visits
        on earlier_visits.person_id = later_visits.person_id
        and earlier_visits.visit_occurrence_id <> later_visits.visit_occurrence_id
        and earlier_visits.visit_start_datetime < later_visits.visit_start_datetime
        and earlier_visits.visit_end_datetime >= later_visits.visit_start_datetime
    group by later_visits.visit_occurrence_id
),

final as (
    select
        cast(hospital_visits.visit_occurrence_id as bigint) as visit_occurrence_id,
        cast(hospital_visits.person_id as bigint) as person_id,
        cast(
            case
                when preceding_visits.visit_occurrence_id is not null then preceding_visits.visit_occurrence_id
                when by_overlap.earlier_visit_occurrence_id is not null then by_overlap.earlier_visit_occurrence_id
                else hospital_visits.visit_occurrence_id
            end as bigint
        ) as stay_visit_occurrence_id
    from hospital_visits
    left join hospital_visits as preceding_visits
        on preceding_visits.visit_occurrence_id = hospital_visits.preceding_visit_occurrence_id
        and preceding_visits.person_id = hospital_visits.person_id
    left join by_overlap
        on by_overlap.visit_occurrence_id = hospital_visits.visit_occurrence_id
)

select
    final.visit_occurrence_id,
    final.person_id,
    final.stay_visit_occurrence_id
from final
