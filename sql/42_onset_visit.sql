-- 42_onset_visit: the visit each onset candidate belongs to, and when that hospital stay ends.
-- grain:  one row per (person_id, onset_datetime) of dka_onset_candidates that can be an onset:
--         the person's first candidate, and every candidate more than episode_gap_hours after it
-- inputs: dka_onset_candidates (sql/40), visit_occurrence (CDM), dka_concept_visit (sql/14)
-- slots:  episode_gap_hours
-- output: dka_onset_visit (person_id, onset_datetime, visit_occurrence_id, visit_kind,
--         visit_start_datetime, visit_link, discharge_datetime)
--
-- Which candidates: an episode's onset is the first candidate, or a candidate strictly later than
-- the previous episode's end plus episode_gap_hours (44_episode_step); an end is never before its
-- onset (sql/43) and every onset is at or after the first candidate, so a later onset is more than
-- episode_gap_hours after the first candidate. The others (the later time points of each person's
-- first episode; 552,121 of 1,695,446 candidates on the 1,000,000-person synthetic extract, consensus-2024)
-- can never be onsets and get no visit.
-- Link: the hospital visit whose start <= onset <= end (an end known only as a date runs to the
-- end of that day; a visit without an end is still open). Where several contain the onset, the
-- emergency and inpatient visit (ERIP) wins, then inpatient, then emergency, then intensive care;
-- ties go to the earliest start, then the lowest id (visit_link = 'contains_onset'). When no
-- hospital visit contains the onset, the visit the lab result itself names, of any kind, is used
-- (visit_link = 'lab_visit'); null with no visit. Outpatient and other visits are linked only
-- that way: matching every outpatient visit of a person by time costs a join of every onset
-- candidate with years of clinic visits, and a clinic visit is not where DKA is treated.
-- discharge_datetime: the end of the stay, i.e. the latest end among the linked visit and the
-- hospital visits (ERIP, inpatient, emergency) of the person that start inside it (an emergency
-- visit followed by the admission it led to); null when the linked visit has no end or when the
-- stay ended before the onset (a lab visit that does not contain it).

with

candidates as (
    select
        dka_onset_candidates.person_id,
        dka_onset_candidates.onset_datetime,
        dka_onset_candidates.state_visit_occurrence_id,
        min(dka_onset_candidates.onset_datetime) over (partition by dka_onset_candidates.person_id) as first_onset_datetime
    from dka_onset_candidates
),

onsets as (
    select distinct
        candidates.person_id,
        candidates.onset_datetime,
        candidates.state_visit_occurrence_id
    from candidates
    where candidates.onset_datetime = candidates.first_onset_datetime
        or candidates.onset_datetime > candidates.first_onset_datetime + interval '1 hour' * {{ episode_gap_hours }}
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
        case visit_kinds.visit_kind
            when 'emergency_inpatient' then 1
            when 'inpatient' then 2
            when 'emergency' then 3
            when 'icu' then 4
            when 'outpatient' then 5
            else 6
        end as kind_rank,
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
    where visit_occurrence.person_id in (select onsets.person_id from onsets)
),

containing as (
    select
        onsets.person_id,
        onsets.onset_datetime,
        visits.visit_occurrence_id,
        row_number() over (
            partition by onsets.person_id, onsets.onset_datetime
            order by visits.kind_rank, visits.visit_start_datetime, visits.visit_occurrence_id
        ) as visit_order
    from onsets
    inner join visits
        on visits.person_id = onsets.person_id
        and visits.kind_rank <= 4
        and visits.visit_start_datetime <= onsets.onset_datetime
        and (visits.visit_end_datetime is null or visits.visit_end_datetime >= onsets.onset_datetime)
),

linked as (
    select
        onsets.person_id,
        onsets.onset_datetime,
        case
            when containing.visit_occurrence_id is not null then containing.visit_occurrence_id
            else lab_visits.visit_occurrence_id
        end as visit_occurrence_id,
        case
            when containing.visit_occurrence_id is not null then 'contains_onset'
            when lab_visits.visit_occurrence_id is not null then 'lab_visit'
        end as visit_link
    from onsets
    left join containing
        on containing.person_id = onsets.person_id
        and containing.onset_datetime = onsets.onset_datetime
        and containing.visit_order = 1
    left join visits as lab_visits
        on lab_visits.visit_occurrence_id = onsets.state_visit_occurrence_id
        and lab_visits.person_id = onsets.person_id
),

linked_visits as (
    select
        linked.person_id,
        linked.onset_datetime,
        linked.visit_occurrence_id,
        linked.visit_link,
        visits.visit_kind,
        visits.visit_start_datetime,
        visits.visit_end_datetime
    from linked
    left join visits
        on visits.visit_occurrence_id = linked.visit_occurrence_id
),

stays as (
    select
        linked_visits.person_id,
        linked_visits.onset_datetime,
        max(hospital_visits.visit_end_datetime) as stay_end_datetime
    from linked_visits
    inner join visits as hospital_visits
        on hospital_visits.person_id = linked_visits.person_id
        and hospital_visits.kind_rank <= 3
        and hospital_visits.visit_start_datetime >= linked_visits.visit_start_datetime
        and hospital_visits.visit_start_datetime <= linked_visits.visit_end_datetime
    group by linked_visits.person_id, linked_visits.onset_datetime
),

final as (
    select
        linked_visits.person_id,
        linked_visits.onset_datetime,
        cast(linked_visits.visit_occurrence_id as bigint) as visit_occurrence_id,
        linked_visits.visit_kind,
        linked_visits.visit_start_datetime,
        linked_visits.visit_link,
        case
            when linked_visits.visit_end_datetime is null then null
            when linked_visits.visit_end_datetime < linked_visits.onset_datetime then null
            when stays.stay_end_datetime > linked_visits.visit_end_datetime then stays.stay_end_datetime
            else linked_visits.visit_end_datetime
        end as discharge_datetime
    from linked_visits
    left join stays
        on stays.person_id = linked_visits.person_id
        and stays.onset_datetime = linked_visits.onset_datetime
)

select
    final.person_id,
    final.onset_datetime,
    final.visit_occurrence_id,
    final.visit_kind,
    final.visit_start_datetime,
    final.visit_link,
    final.discharge_datetime
from final
