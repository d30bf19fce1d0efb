-- 40_onset_candidates: the lab time points at which a person meets the diagnostic criteria.
-- grain:  one row per (person_id, state_datetime) of dka_lab_state where the diagnosis holds
-- inputs: dka_lab_state (sql/31)
-- output: dka_onset_candidates (person_id, onset_datetime, state_visit_occurrence_id, severity,
--         the onset values in canonical units, known_diabetes)
-- slots:  diagnosis (compiled criterion over lab_state.dx_<analyte> and lab_state.known_diabetes),
--         severity (compiled case over the same columns, null where the definition grades none)
--
-- Every qualifying time point is a candidate; 44_episode_step picks the onsets among them (the
-- first candidate after the previous episode's end plus the gap) and 45_episode_rebound looks for
-- candidates inside the rebound window. Severity and the onset values are read at the time point
-- itself, so an episode's onset row carries its grade ("graded at onset").

with

lab_state as (
    select
        dka_lab_state.person_id,
        dka_lab_state.state_datetime,
        dka_lab_state.visit_occurrence_id,
        dka_lab_state.known_diabetes,
        dka_lab_state.dx_glucose,
        dka_lab_state.dx_ph,
        dka_lab_state.dx_bicarbonate,
        dka_lab_state.dx_bhb,
        dka_lab_state.dx_urine_ketones,
        dka_lab_state.dx_sodium,
        dka_lab_state.dx_chloride,
        dka_lab_state.dx_potassium,
        dka_lab_state.dx_anion_gap,
        dka_lab_state.dx_anion_gap_with_k,
        dka_lab_state.dx_hba1c,
        dka_lab_state.dx_creatinine
    from dka_lab_state
),

qualifying as (
    select
        lab_state.person_id,
        lab_state.state_datetime,
        lab_state.visit_occurrence_id,
        lab_state.known_diabetes,
        {{ severity }} as severity,
        lab_state.dx_glucose,
        lab_state.dx_ph,
        lab_state.dx_bicarbonate,
        lab_state.dx_bhb,
        lab_state.dx_urine_ketones,
        lab_state.dx_potassium,
        lab_state.dx_anion_gap
    from lab_state
    where {{ diagnosis }}
),

final as (
    select
        qualifying.person_id,
        qualifying.state_datetime as onset_datetime,
        qualifying.visit_occurrence_id as state_visit_occurrence_id,
        qualifying.severity,
        qualifying.dx_glucose as glucose_mmol_l,
        qualifying.dx_ph as ph,
        qualifying.dx_bicarbonate as bicarbonate_mmol_l,
        qualifying.dx_bhb as bhb_mmol_l,
        qualifying.dx_anion_gap as anion_gap_mmol_l,
        qualifying.dx_urine_ketones as urine_ketones_ordinal,
        qualifying.dx_potassium as potassium_mmol_l,
        qualifying.known_diabetes
    from qualifying
)

select
    final.person_id,
    final.onset_datetime,
    final.state_visit_occurrence_id,
    final.severity,
    final.glucose_mmol_l,
    final.ph,
    final.bicarbonate_mmol_l,
    final.bhb_mmol_l,
    final.anion_gap_mmol_l,
    final.urine_ketones_ordinal,
    final.potassium_mmol_l,
    final.known_diabetes
from final
