-- 44_episode_step: the next episode of every person still being followed.
-- grain:  one row per person of dka_episode_cutoff who has an onset candidate after the cutoff
-- inputs: dka_episode_cutoff (person_id, episode_number, cutoff_datetime: made by cohort.episodes,
--         null before the first episode), dka_onset_context (sql/43), dka_resolution_candidates
--         (sql/41)
-- output: dka_episode_next (the episode's onset row, resolution_datetime, end_datetime,
--         end_reason, next_cutoff_datetime)
-- slots:  resolution (the resolution criterion compiled over resolution_points.rs_<analyte>, each
--         blanked unless rs_<analyte>_datetime > onsets.onset_datetime), episode_gap_hours
--
-- Run repeatedly by cohort.episodes (one step per episode number) until no person has a next
-- episode; each step reads only the persons still followed, so the loop runs as many times as
-- the largest number of episodes of one person. (A recursive CTE would do the same where every
-- engine supports one.)
-- * onset: the first candidate strictly after the cutoff (the previous episode's end plus
--   episode_gap_hours);
-- * resolution: the first later time point, at or before the censor time, at which the resolution
--   criterion holds using only values measured after the onset;
-- * end: the resolution, else the censor time and reason of sql/43.

with

cutoffs as (
    select
        dka_episode_cutoff.person_id,
        dka_episode_cutoff.episode_number,
        dka_episode_cutoff.cutoff_datetime
    from dka_episode_cutoff
),

context as (
    select
        dka_onset_context.person_id,
        dka_onset_context.onset_datetime,
        dka_onset_context.severity,
        dka_onset_context.glucose_mmol_l,
        dka_onset_context.ph,
        dka_onset_context.bicarbonate_mmol_l,
        dka_onset_context.bhb_mmol_l,
        dka_onset_context.anion_gap_mmol_l,
        dka_onset_context.urine_ketones_ordinal,
        dka_onset_context.potassium_mmol_l,
        dka_onset_context.known_diabetes,
        dka_onset_context.visit_occurrence_id,
        dka_onset_context.visit_kind,
        dka_onset_context.visit_link,
        dka_onset_context.discharge_datetime,
        dka_onset_context.death_datetime,
        dka_onset_context.data_end_datetime,
        dka_onset_context.censor_datetime,
        dka_onset_context.censor_reason
    from dka_onset_context
),

resolution_points as (
    select
        dka_resolution_candidates.person_id,
        dka_resolution_candidates.state_datetime,
        dka_resolution_candidates.known_diabetes,
        dka_resolution_candidates.rs_glucose,
        dka_resolution_candidates.rs_glucose_datetime,
        dka_resolution_candidates.rs_ph,
        dka_resolution_candidates.rs_ph_datetime,
        dka_resolution_candidates.rs_bicarbonate,
        dka_resolution_candidates.rs_bicarbonate_datetime,
        dka_resolution_candidates.rs_bhb,
        dka_resolution_candidates.rs_bhb_datetime,
        dka_resolution_candidates.rs_urine_ketones,
        dka_resolution_candidates.rs_urine_ketones_datetime,
        dka_resolution_candidates.rs_sodium,
        dka_resolution_candidates.rs_sodium_datetime,
        dka_resolution_candidates.rs_chloride,
        dka_resolution_candidates.rs_chloride_datetime,
        dka_resolution_candidates.rs_potassium,
        dka_resolution_candidates.rs_potassium_datetime,
        dka_resolution_candidates.rs_anion_gap,
        dka_resolution_candidates.rs_anion_gap_datetime,
        dka_resolution_candidates.rs_anion_gap_with_k,
        dka_resolution_candidates.rs_anion_gap_with_k_datetime,
        dka_resolution_candidates.rs_hba1c,
        dka_resolution_candidates.rs_hba1c_datetime,
        dka_resolution_candidates.rs_creatinine,
        dka_resolution_candidates.rs_creatinine_datetime
    from dka_resolution_candidates
),

next_onsets as (
    select
        context.person_id,
        min(cutoffs.episode_number) as episode_number,
        min(context.onset_datetime) as onset_datetime
    from context
    inner join cutoffs
        on cutoffs.person_id = context.person_id
    where cutoffs.cutoff_datetime is null or context.onset_datetime > cutoffs.cutoff_datetime
    group by context.person_id
),

onsets as (
    select
        next_onsets.episode_number,
        context.person_id,
        context.onset_datetime,
        context.severity,
        context.glucose_mmol_l,
        context.ph,
        context.bicarbonate_mmol_l,
        context.bhb_mmol_l,
        context.anion_gap_mmol_l,
        context.urine_ketones_ordinal,
        context.potassium_mmol_l,
        context.known_diabetes,
        context.visit_occurrence_id,
        context.visit_kind,
        context.visit_link,
        context.discharge_datetime,
        context.death_datetime,
        context.data_end_datetime,
        context.censor_datetime,
        context.censor_reason
    from context
    inner join next_onsets
        on next_onsets.person_id = context.person_id
        and next_onsets.onset_datetime = context.onset_datetime
),

resolutions as (
    select
        onsets.person_id,
        min(resolution_points.state_datetime) as resolution_datetime
    from onsets
    inner join resolution_points
        on resolution_points.person_id = onsets.person_id
        and resolution_points.state_datetime > onsets.onset_datetime
        and resolution_points.state_datetime <= onsets.censor_datetime
    where {{ resolution }}
    group by onsets.person_id
),

ended as (
    select
        onsets.person_id,
        onsets.episode_number,
        onsets.onset_datetime,
        onsets.severity,
        onsets.glucose_mmol_l,
        onsets.ph,
        onsets.bicarbonate_mmol_l,
        onsets.bhb_mmol_l,
        onsets.anion_gap_mmol_l,
        onsets.urine_ketones_ordinal,
        onsets.potassium_mmol_l,
        onsets.known_diabetes,
        onsets.visit_occurrence_id,
        onsets.visit_kind,
        onsets.visit_link,
        onsets.discharge_datetime,
        onsets.death_datetime,
        onsets.data_end_datetime,
        onsets.censor_datetime,
        onsets.censor_reason,
        resolutions.resolution_datetime,
        case
            when resolutions.resolution_datetime is not null then resolutions.resolution_datetime
            else onsets.censor_datetime
        end as end_datetime,
        case
            when resolutions.resolution_datetime is not null then 'resolved'
            else onsets.censor_reason
        end as end_reason
    from onsets
    left join resolutions
        on resolutions.person_id = onsets.person_id
),

final as (
    select
        ended.person_id,
        ended.episode_number,
        ended.onset_datetime,
        ended.severity,
        ended.glucose_mmol_l,
        ended.ph,
        ended.bicarbonate_mmol_l,
        ended.bhb_mmol_l,
        ended.anion_gap_mmol_l,
        ended.urine_ketones_ordinal,
        ended.potassium_mmol_l,
        ended.known_diabetes,
        ended.visit_occurrence_id,
        ended.visit_kind,
        ended.visit_link,
        ended.discharge_datetime,
        ended.death_datetime,
        ended.data_end_datetime,
        ended.censor_datetime,
        ended.censor_reason,
        ended.resolution_datetime,
        ended.end_datetime,
        ended.end_reason,
        ended.end_datetime + interval '1 hour' * {{ episode_gap_hours }} as next_cutoff_datetime
    from ended
)

select
    final.person_id,
    final.episode_number,
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
    final.censor_reason,
    final.resolution_datetime,
    final.end_datetime,
    final.end_reason,
    final.next_cutoff_datetime
from final
