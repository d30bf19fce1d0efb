-- 41_resolution_candidates: the lab time points at which the resolution criteria could hold.
-- grain:  one row per (person_id, state_datetime) of dka_lab_state, for persons with at least one
--         onset candidate, where the resolution criterion holds on the rs_<analyte> values
-- inputs: dka_lab_state (sql/31), dka_onset_candidates (sql/40)
-- output: dka_resolution_candidates (person_id, state_datetime, known_diabetes, rs_<analyte>,
--         rs_<analyte>_datetime)
-- slots:  resolution_screen (the resolution criterion compiled over lab_state.rs_<analyte>)
--
-- A superset: 44_episode_step applies the same criterion again with every value measured at or
-- before the onset blanked out (rs_<analyte>_datetime > onset_datetime). The criterion grammar has
-- no negation, so blanking values can only turn it false, never true: every time point that
-- resolves an episode is in this table.

with

lab_state as (
    select
        dka_lab_state.person_id,
        dka_lab_state.state_datetime,
        dka_lab_state.known_diabetes,
        dka_lab_state.rs_glucose,
        dka_lab_state.rs_glucose_datetime,
        dka_lab_state.rs_ph,
        dka_lab_state.rs_ph_datetime,
        dka_lab_state.rs_bicarbonate,
        dka_lab_state.rs_bicarbonate_datetime,
        dka_lab_state.rs_bhb,
        dka_lab_state.rs_bhb_datetime,
        dka_lab_state.rs_urine_ketones,
        dka_lab_state.rs_urine_ketones_datetime,
        dka_lab_state.rs_sodium,
        dka_lab_state.rs_sodium_datetime,
        dka_lab_state.rs_chloride,
        dka_lab_state.rs_chloride_datetime,
        dka_lab_state.rs_potassium,
        dka_lab_state.rs_potassium_datetime,
        dka_lab_state.rs_anion_gap,
        dka_lab_state.rs_anion_gap_datetime,
        dka_lab_state.rs_anion_gap_with_k,
        dka_lab_state.rs_anion_gap_with_k_datetime,
        dka_lab_state.rs_hba1c,
        dka_lab_state.rs_hba1c_datetime,
        dka_lab_state.rs_creatinine,
        dka_lab_state.rs_creatinine_datetime
    from dka_lab_state
),

candidate_persons as (
    select distinct
        dka_onset_candidates.person_id
    from dka_onset_candidates
),

final as (
    select
        lab_state.person_id,
        lab_state.state_datetime,
        lab_state.known_diabetes,
        lab_state.rs_glucose,
        lab_state.rs_glucose_datetime,
        lab_state.rs_ph,
        lab_state.rs_ph_datetime,
        lab_state.rs_bicarbonate,
        lab_state.rs_bicarbonate_datetime,
        lab_state.rs_bhb,
        lab_state.rs_bhb_datetime,
        lab_state.rs_urine_ketones,
        lab_state.rs_urine_ketones_datetime,
        lab_state.rs_sodium,
        lab_state.rs_sodium_datetime,
        lab_state.rs_chloride,
        lab_state.rs_chloride_datetime,
        lab_state.rs_potassium,
        lab_state.rs_potassium_datetime,
        lab_state.rs_anion_gap,
        lab_state.rs_anion_gap_datetime,
        lab_state.rs_anion_gap_with_k,
        lab_state.rs_anion_gap_with_k_datetime,
        lab_state.rs_hba1c,
        lab_state.rs_hba1c_datetime,
        lab_state.rs_creatinine,
        lab_state.rs_creatinine_datetime
    from lab_state
    inner join candidate_persons
        on candidate_persons.person_id = lab_state.person_id
    where {{ resolution_screen }}
)

select
    final.person_id,
    final.state_datetime,
    final.known_diabetes,
    final.rs_glucose,
    final.rs_glucose_datetime,
    final.rs_ph,
    final.rs_ph_datetime,
    final.rs_bicarbonate,
    final.rs_bicarbonate_datetime,
    final.rs_bhb,
    final.rs_bhb_datetime,
    final.rs_urine_ketones,
    final.rs_urine_ketones_datetime,
    final.rs_sodium,
    final.rs_sodium_datetime,
    final.rs_chloride,
    final.rs_chloride_datetime,
    final.rs_potassium,
    final.rs_potassium_datetime,
    final.rs_anion_gap,
    final.rs_anion_gap_datetime,
    final.rs_anion_gap_with_k,
    final.rs_anion_gap_with_k_datetime,
    final.rs_hba1c,
    final.rs_hba1c_datetime,
    final.rs_creatinine,
    final.rs_creatinine_datetime
from final
