-- 46_episodes: the episodes of one definition, in the output contract (shared DESIGN.md), for the
-- definition's population.
-- grain:  one row per episode whose person's age at onset lies in [min_age_years, max_age_years)
-- inputs: dka_episode_chain (44_episode_step, all steps), dka_episode_rebound (sql/45), person (CDM)
-- output: dka_episodes (person_id, visit_occurrence_id, onset_datetime, resolution_datetime,
--         end_datetime, end_reason, hours_to_resolution, severity, glucose_mmol_l, ph,
--         bicarbonate_mmol_l, bhb_mmol_l, anion_gap_mmol_l, and the extras: episode_number,
--         is_rebound, rebound_datetime, age_years_at_onset, urine_ketones_ordinal,
--         potassium_mmol_l, known_diabetes, visit_kind, visit_link, discharge_datetime)
-- slots:  min_age_years, max_age_years (cohort.episodes passes 0 and 200 for an open bound)
--
-- Age at onset is in completed years from the birth date: birth_datetime when given, else
-- year_of_birth with month_of_birth and day_of_birth, a missing month read as 1 July and a
-- missing day as the 15th (mid-point of what is known; common practice). A person without a
-- person row has no age and falls outside every population. The definition name and episode_id
-- are added by cohort.episodes (a name is text, and no text reaches SQL).

with

chain as (
    select
        dka_episode_chain.person_id,
        dka_episode_chain.episode_number,
        dka_episode_chain.onset_datetime,
        dka_episode_chain.severity,
        dka_episode_chain.glucose_mmol_l,
        dka_episode_chain.ph,
        dka_episode_chain.bicarbonate_mmol_l,
        dka_episode_chain.bhb_mmol_l,
        dka_episode_chain.anion_gap_mmol_l,
        dka_episode_chain.urine_ketones_ordinal,
        dka_episode_chain.potassium_mmol_l,
        dka_episode_chain.known_diabetes,
        dka_episode_chain.visit_occurrence_id,
        dka_episode_chain.visit_kind,
        dka_episode_chain.visit_link,
        dka_episode_chain.discharge_datetime,
        dka_episode_chain.resolution_datetime,
        dka_episode_chain.end_datetime,
        dka_episode_chain.end_reason
    from dka_episode_chain
),

rebounds as (
    select
        dka_episode_rebound.person_id,
        dka_episode_rebound.onset_datetime,
        dka_episode_rebound.is_rebound,
        dka_episode_rebound.rebound_datetime
    from dka_episode_rebound
),

births as (
    select
        person.person_id,
        case
            when person.birth_datetime is not null then cast(person.birth_datetime as date)
            when person.year_of_birth is not null then make_date(
                cast(person.year_of_birth as integer),
                cast(coalesce(person.month_of_birth, 7) as integer),
                cast(coalesce(person.day_of_birth, case when person.month_of_birth is null then 1 else 15 end) as integer)
            )
        end as birth_date
    from person
    where person.person_id in (select chain.person_id from chain)
),

aged as (
    select
        chain.person_id,
        chain.onset_datetime,
        extract(year from chain.onset_datetime) - extract(year from births.birth_date)
        - case
            when extract(month from chain.onset_datetime) < extract(month from births.birth_date) then 1
            when extract(month from chain.onset_datetime) = extract(month from births.birth_date)
                and extract(day from chain.onset_datetime) < extract(day from births.birth_date) then 1
            else 0
        end as age_years_at_onset
    from chain
    left join births
        on births.person_id = chain.person_id
),

final as (
    select
        cast(chain.person_id as bigint) as person_id,
        cast(chain.visit_occurrence_id as bigint) as visit_occurrence_id,
        chain.onset_datetime,
        chain.resolution_datetime,
        chain.end_datetime,
        chain.end_reason,
        case
            when chain.resolution_datetime is not null
                then (extract(epoch from chain.resolution_datetime) - extract(epoch from chain.onset_datetime)) / 3600.0
        end as hours_to_resolution,
        chain.severity,
        chain.glucose_mmol_l,
        chain.ph,
        chain.bicarbonate_mmol_l,
        chain.bhb_mmol_l,
        chain.anion_gap_mmol_l,
        chain.episode_number,
        coalesce(rebounds.is_rebound, false) as is_rebound,
        rebounds.rebound_datetime,
        cast(aged.age_years_at_onset as integer) as age_years_at_onset,
        chain.urine_ketones_ordinal,
        chain.potassium_mmol_l,
        chain.known_diabetes,
        chain.visit_kind,
        chain.visit_link,
        chain.discharge_datetime
    from chain
    left join rebounds
        on rebounds.person_id = chain.person_id
        and rebounds.onset_datetime = chain.onset_datetime
    left join aged
        on aged.person_id = chain.person_id
        and aged.onset_datetime = chain.onset_datetime
    where aged.age_years_at_onset >= {{ min_age_years }}
        and aged.age_years_at_onset < {{ max_age_years }}
)

select
    final.person_id,
    final.visit_occurrence_id,
    final.onset_datetime,
    final.resolution_datetime,
    final.end_datetime,
    final.end_reason,
    final.hours_to_resolution,
    final.severity,
    final.glucose_mmol_l,
    final.ph,
    final.bicarbonate_mmol_l,
    final.bhb_mmol_l,
    final.anion_gap_mmol_l,
    final.episode_number,
    final.is_rebound,
    final.rebound_datetime,
    final.age_years_at_onset,
    final.urine_ketones_ordinal,
    final.potassium_mmol_l,
    final.known_diabetes,
    final.visit_kind,
    final.visit_link,
    final.discharge_datetime
from final
