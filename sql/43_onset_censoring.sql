-- 43_onset_censoring: where an episode starting at each onset candidate would be censored.
-- grain:  one row per (person_id, onset_datetime) of dka_onset_visit (sql/42: the candidates that
--         can be an onset)
-- inputs: dka_onset_candidates (sql/40), dka_onset_visit (sql/42), dka_lab_state (sql/31),
--         death (CDM), observation_period (CDM)
-- output: dka_onset_context: the candidate's columns, its visit, and death_datetime,
--         data_end_datetime, censor_datetime, censor_reason
--
-- An episode that does not resolve ends at the first of:
-- * death (`died`): the person died on or before the day the stay (or the data) ends. The
--   episode ends at death_datetime, or at the discharge / end of data when only the date of death
--   is known (the CDM often stores only death_date), never before the onset;
-- * discharge (`discharged_unresolved`): the end of the stay the onset belongs to (sql/42), when
--   it comes before the end of the observation period holding the onset;
-- * end of data (`data_end`): the end of that observation period (its last day's end) when it
--   comes first; for an onset in no stay, the person's last lab time point, or the observation
--   end if that is earlier (without a stay nothing else bounds the episode, and an end years
--   later would hide every later episode behind the gap).
-- A resolution counts only at or before censor_datetime (44_episode_step).

with

candidates as (
    select
        dka_onset_candidates.person_id,
        dka_onset_candidates.onset_datetime,
        dka_onset_candidates.state_visit_occurrence_id,
        dka_onset_candidates.severity,
        dka_onset_candidates.glucose_mmol_l,
        dka_onset_candidates.ph,
        dka_onset_candidates.bicarbonate_mmol_l,
        dka_onset_candidates.bhb_mmol_l,
        dka_onset_candidates.anion_gap_mmol_l,
        dka_onset_candidates.urine_ketones_ordinal,
        dka_onset_candidates.potassium_mmol_l,
        dka_onset_candidates.known_diabetes
    from dka_onset_candidates
    inner join dka_onset_visit
        on dka_onset_visit.person_id = dka_onset_candidates.person_id
        and dka_onset_visit.onset_datetime = dka_onset_candidates.onset_datetime
),

onset_visits as (
    select
        dka_onset_visit.person_id,
        dka_onset_visit.onset_datetime,
        dka_onset_visit.visit_occurrence_id,
        dka_onset_visit.visit_kind,
        dka_onset_visit.visit_link,
        dka_onset_visit.discharge_datetime
    from dka_onset_visit
),

deaths as (
    select
        death.person_id,
        min(coalesce(death.death_date, cast(death.death_datetime as date))) as death_date,
        min(death.death_datetime) as death_datetime
    from death
    where death.person_id in (select candidates.person_id from candidates)
    group by death.person_id
),

last_time_points as (
    select
        dka_lab_state.person_id,
        max(dka_lab_state.state_datetime) as last_state_datetime
    from dka_lab_state
    where dka_lab_state.person_id in (select candidates.person_id from candidates)
    group by dka_lab_state.person_id
),

observation_ends as (
    select
        candidates.person_id,
        candidates.onset_datetime,
        max(
            cast(observation_period.observation_period_end_date as timestamp)
            + interval '1 day' - interval '1 second'
        ) as observation_end_datetime
    from candidates
    inner join observation_period
        on observation_period.person_id = candidates.person_id
        and cast(observation_period.observation_period_start_date as timestamp) <= candidates.onset_datetime
        and cast(observation_period.observation_period_end_date as timestamp)
            + interval '1 day' - interval '1 second' >= candidates.onset_datetime
    group by candidates.person_id, candidates.onset_datetime
),

bounds as (
    select
        candidates.person_id,
        candidates.onset_datetime,
        onset_visits.discharge_datetime,
        deaths.death_datetime,
        deaths.death_date,
        observation_ends.observation_end_datetime,
        case
            when observation_ends.observation_end_datetime is not null
                and observation_ends.observation_end_datetime < last_time_points.last_state_datetime
                then observation_ends.observation_end_datetime
            else last_time_points.last_state_datetime
        end as last_data_datetime
    from candidates
    left join onset_visits
        on onset_visits.person_id = candidates.person_id
        and onset_visits.onset_datetime = candidates.onset_datetime
    left join deaths
        on deaths.person_id = candidates.person_id
    left join last_time_points
        on last_time_points.person_id = candidates.person_id
    left join observation_ends
        on observation_ends.person_id = candidates.person_id
        and observation_ends.onset_datetime = candidates.onset_datetime
),

censor_points as (
    select
        bounds.person_id,
        bounds.onset_datetime,
        bounds.death_datetime,
        bounds.death_date,
        case
            when bounds.discharge_datetime is not null then bounds.observation_end_datetime
            else bounds.last_data_datetime
        end as data_end_datetime,
        case
            when bounds.discharge_datetime is not null
                and (bounds.observation_end_datetime is null or bounds.discharge_datetime <= bounds.observation_end_datetime)
                then bounds.discharge_datetime
            when bounds.discharge_datetime is not null then bounds.observation_end_datetime
            else bounds.last_data_datetime
        end as alive_censor_datetime,
        case
            when bounds.discharge_datetime is not null
                and (bounds.observation_end_datetime is null or bounds.discharge_datetime <= bounds.observation_end_datetime)
                then 'discharged_unresolved'
            else 'data_end'
        end as alive_censor_reason
    from bounds
),

censored as (
    select
        censor_points.person_id,
        censor_points.onset_datetime,
        censor_points.death_datetime,
        censor_points.data_end_datetime,
        case
            when censor_points.death_date is not null
                and censor_points.death_date <= cast(censor_points.alive_censor_datetime as date)
                then 'died'
            else censor_points.alive_censor_reason
        end as censor_reason,
        case
            when censor_points.death_date is not null
                and censor_points.death_date <= cast(censor_points.alive_censor_datetime as date)
                and censor_points.death_datetime < censor_points.alive_censor_datetime
                and censor_points.death_datetime > censor_points.onset_datetime
                then censor_points.death_datetime
            when censor_points.alive_censor_datetime < censor_points.onset_datetime
                then censor_points.onset_datetime
            else censor_points.alive_censor_datetime
        end as censor_datetime
    from censor_points
),

final as (
    select
        cast(candidates.person_id as bigint) as person_id,
        candidates.onset_datetime,
        candidates.severity,
        candidates.glucose_mmol_l,
        candidates.ph,
        candidates.bicarbonate_mmol_l,
        candidates.bhb_mmol_l,
        candidates.anion_gap_mmol_l,
        candidates.urine_ketones_ordinal,
        candidates.potassium_mmol_l,
        candidates.known_diabetes,
        onset_visits.visit_occurrence_id,
        onset_visits.visit_kind,
        onset_visits.visit_link,
        onset_visits.discharge_datetime,
        censored.death_datetime,
        censored.data_end_datetime,
        censored.censor_datetime,
        censored.censor_reason
    from candidates
    left join onset_visits
        on onset_visits.person_id = candidates.person_id
        and onset_visits.onset_datetime = candidates.onset_datetime
    left join censored
        on censored.person_id = candidates.person_id
        and censored.onset_datetime = candidates.onset_datetime
)

select
    final.person_id,
    final.onset_datetime,
    final.severity,
    final.glucose_mmol_l,
    final.ph,
    final.bicarbonate_mmol_l,
    final.bhb_mmol_l,
    final.anion_gap_mmol_l,
    final.urine_ketones_ordinal,
    final.potassium_mmol_l,
    final.known_diabetes,
    final.visit_occurrence_id,
    final.visit_kind,
    final.visit_link,
    final.discharge_datetime,
    final.death_datetime,
    final.data_end_datetime,
    final.censor_datetime,
    final.censor_reason
from final
