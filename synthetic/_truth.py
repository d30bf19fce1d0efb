"""The truth folder's README and the planted effects document."""

from __future__ import annotations

from synthetic import _params as P


def truth_readme() -> str:
    """The README of the truth folder, with the recording practice of each hospital."""
    lines = ["", "## Recording practice by hospital", "",
             "| care_site_id | name | arrival visits | plasma glucose | capillary glucose | ketones | venous pH | bicarbonate | gas every (h) | ketones every (h) | HbA1c | creatinine | urine ketone answers | IV insulin concept | median arrival-to-insulin (h) |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for h in P.HOSPITALS:
        def code(key: str) -> str:
            v = h[key]
            return f"{v[0]} ({v[1]})" if v else "-"
        lines.append(
            f"| {h['care_site_id']} | {h['name']} | {h['arrival_visit']} | {code('glucose_plasma')} | "
            f"{code('glucose_capillary')} | {code('bhb')} | {h['ph_venous']} | {code('bicarbonate')} | "
            f"{h['gas_every_h']} | {h['bhb_every_h']} | {code('hba1c')} | {code('creatinine')} | "
            f"{h['urine_ketone_style']} | {h['insulin_drug'][0]} {h['insulin_drug'][1]} | {h['delay_median_h']} |"
        )
    return TRUTH_README + "\n".join(lines) + "\n"


def effects_json() -> dict:
    """Every planted effect and rate, as written to truth/effects.json."""
    return {
        "calendar": {"start": P.START.isoformat(), "end": P.END.isoformat()},
        "population": P.POPULATION,
        "dka_hazard": P.DKA_HAZARD,
        "severity_shares": P.SEVERITY_SHARES,
        "resolution": P.RESOLUTION,
        "care": P.CARE,
        "arrival_to_insulin_delay_median_hours_by_care_site": {
            str(h["care_site_id"]): h["delay_median_h"] for h in P.HOSPITALS
        },
        "hospitals": [
            {k: (list(v) if isinstance(v, tuple) else v) for k, v in h.items()} for h in P.HOSPITALS
        ],
        "mimics": P.MIMICS,
        "fault_rates": P.FAULTS,
    }


TRUTH_README = r"""# Ground truth of this synthetic extract

This folder sits beside `extract/` (never inside it). It holds what the generator planted in the
fictional **Harrowmere Valley Health** network (5 invented hospitals, calendar 2019-01-01 to
2025-12-31), so that an analysis of `extract/` can be checked against the truth. Nothing here
describes real people, places or organisations. For research, audit and teaching only.

Files:

| file | content |
|---|---|
| `episodes.parquet` | one row per true DKA episode and per mimic presentation |
| `persons.parquet` | one row per person: diabetes type and the covariates of the hazard model |
| `effects.json` | every planted effect and rate (hazard ratios, shares, delays by hospital, fault rates) |
| `faults.json` | the number of rows (or episodes / visits) of every recording fault, with its definition |

Times are naive local timestamps, like the CDM's. Concentrations are in canonical units
(mmol/L; pH unitless) whatever unit the hospital used in `extract/`.

## Definitions the truth uses

- **Onset** (`onset_datetime`): the time of the first diagnostic blood draw of the stay (5-40 min
  after arrival and always before insulin). All arrival laboratory tests carry this time (serum
  tests 1-2 minutes later, urine ketones 20 minutes later).
- **Physiological resolution** (`resolution_datetime`): the first time the *true* (noise-free)
  beta-hydroxybutyrate is below 0.6 mmol/L **and** the true venous pH is at or above 7.30. This
  follows the JBDS 2023 and 2024 consensus ketone-and-pH reading (CLINICAL.md); it is not any one
  guideline's full rule (no glucose, no bicarbonate criterion). Null when the person died first.
- **Documented resolution** (`documented_resolution_datetime`): the first scheduled draw after
  onset at which the *reported* values (noisy, rounded as the extract holds them) meet
  ketones < 0.6 mmol/L and venous pH >= 7.30, reading the latest ketone and the latest gas at
  each hourly slot. These are the ketone-and-pH criteria of the 2024 consensus report
  (Umpierrez GE et al., Diabetes Care 2024;47:1257-1275), which JBDS 2023 shares (pH > 7.3) and
  which the physiological resolution above uses; bicarbonate is left out, as JBDS leaves it out,
  because hyperchloraemia keeps it low after ketosis clears. The labs reveal the physiological
  resolution only at a later draw (median about 1 h later; noise can also document it earlier).
  Null when the person died first.
- **Severity** (`severity`) from the true venous pH, bicarbonate and beta-hydroxybutyrate at
  onset, drawn inside the 2024 consensus bands of the class (which agree with the ADA 2009 table
  for pH and bicarbonate): mild pH 7.27-7.295, bicarbonate 16-17.6, ketones 3.2-5.0; moderate pH
  7.04-7.22, bicarbonate 11-14, ketones 3.5-5.2; severe pH 6.85-6.97, bicarbonate 4-9, ketones
  6.6-9.0 mmol/L. Each range stays about two measurement-noise SDs inside the band edges that
  would regrade the episode (consensus: severe if pH < 7.00, bicarbonate < 10 or ketones > 6;
  moderate if pH <= 7.25 or bicarbonate < 15), so a definition grading from the onset draw
  finds the planted class in about 98% of episodes. Beta-hydroxybutyrate at onset is always
  >= 3.2 mmol/L for true episodes.
- **Premature closure** (`is_premature_closure`): the (last) IV insulin infusion ends before the
  *documented* resolution, as clinicians close the infusion on what the labs show. Planted in
  `care.closure_before_resolution_share` of the episodes that did not end in death. A premature
  closure falls at `care.premature_closure_at_fraction_of_time_to_resolution` of the way from
  insulin start to the earliest of: the physiological resolution and the first draw at which any
  published reading of the labs documents resolution (including the consensus "or bicarbonate
  >= 18" arm). An on-time closure falls `care.closure_after_resolution_hours` after the latest of:
  the physiological resolution, the documented resolution and the first draw meeting JBDS's
  stricter pH > 7.3. So the flag is the same whether an analysis reads resolution by the 2024
  consensus or by JBDS 2023. Measurement noise and rounding (bhb to 0.1 in the hospital's unit,
  pH to 0.01, bicarbonate to whole mmol/L) are the same in the truth's reading and in the extract;
  recording faults (a pH decimal slip, a date-only row) on the deciding draw can still move an
  analysis's resolution to the next draw.
- **Rebound** (`has_rebound`): after a premature closure, ketones rise again (by 0.8-2.5 mmol/L over
  2-5 h) before falling under subcutaneous insulin; this delays resolution. The infusion is not
  restarted, so the last infusion end stays before resolution.
- **Hypoglycaemia / hypokalaemia** (`has_hypoglycaemia`, `has_hypokalaemia`): a *recorded* glucose
  < 4.0 mmol/L / potassium < 3.5 mmol/L between the first infusion start and the last infusion end
  (canonical value before any recording fault). `planned_*` gives the intended event; the
  recorded flag can miss a planned hypokalaemia when no draw falls at the low point.

## Models

- **DKA hazard** (`effects.json: dka_hazard`): per person-year, `base[type] * exp(sum beta x)` with
  x fixed at the start of observation (missed insulin, age < 18, age 18-25, HbA1c per 10 mmol/mol
  above 64, SGLT2 inhibitor, female) plus `per_prior_episode_capped_3` times the number of earlier
  episodes in the extract (at most 3). Episodes are drawn in rounds: a waiting time from the
  current hazard, starting at observation start and then 14 days after each discharge (the person
  is not at risk during a stay and the 14 days after it), with no cap on the number of rounds.
  `persons.parquet:
  dka_log_hazard_without_prior` is the linear predictor of each person.
- **Time to resolution** (`effects.json: resolution`): hours from infusion start to planned
  resolution follow a Weibull proportional-hazards model (shape 2.2, baseline median 10 h for a
  mild episode of an adult without SGLT2 inhibitor at care site 1) with the listed log-hazard
  ratios (moderate, severe, SGLT2 inhibitor, age < 18, hospital). The exact linear predictor is
  `resolution_log_hazard`. Times are limited to 0.75-150 h. Rebound episodes resolve later than
  planned. Ketones fall exponentially to a floor of 0.2 mmol/L; venous pH and bicarbonate recover
  exponentially; one of the two criteria (ketones in 60%) is the last to be met, at exactly the
  planned time.
- **Arrival to insulin** (`arrival_to_insulin_delay_median_hours_by_care_site`): log-normal with the
  hospital's median and log-sd `care.delay_lognormal_sigma`, measured from the start of the arrival
  visit (ER or ERIP) to the start of the first IV insulin row.
- Glucose falls exponentially (rate 0.12-0.25 /h) towards 6.5-10 mmol/L; 10% glucose (dextrose,
  RxNorm 4850) runs from the time the true glucose crosses 14 mmol/L until closure. SGLT2-inhibitor
  episodes are euglycaemic (onset glucose 7-10.9 mmol/L) in `care.sglt2i_euglycaemic_share`.
- Mimics are drawn per person-year (`effects.json: mimics`), never within 10 days of a DKA stay:
  `hhs` (glucose 34-60 mmol/L, pH > 7.30, bhb < 3), `alcoholic_ketoacidosis` (no diabetes, glucose
  3-8.5, bhb 3.5-8, pH 7.05-7.29), `starvation_ketosis` (bhb 1-4, pH 7.31-7.40, bicarbonate >= 18),
  `lactic_acidosis` (pH 6.95-7.25, bicarbonate 6-16, bhb < 1, lactate 6-15 mmol/L) and
  `hyperglycaemia_without_ketosis` (glucose 15-32, bhb < 1.2, pH >= 7.33). Values recover towards
  normal over 3-4 draws.

## Other recording details

- Diabetes and hypertension are on the problem list from the first day of observation
  (condition rows dated that day, no time, no visit); diabetes codes (ICD-10-CM E10.9/E11.9, or
  E10.65/E11.65 with a high HbA1c) recur at 30% of outpatient visits, with the SNOMED concept in
  `condition_concept_id` and the ICD-10-CM concept in `condition_source_concept_id`. Mimic codes
  without a confident SNOMED mapping (E11.00 for HHS, E87.2 for lactic acidosis) have
  `condition_concept_id` 0, as unmapped source codes do in real CDMs.
- Arterial gases (2744-1 with 1960-4) replace the venous gas at arrival in 40% of severe episodes
  and 5% of the others; one hospital records children's gases as capillary pH (2745-8); two
  hospitals add the gas analyser's venous bicarbonate (14627-4) beside the serum bicarbonate.
- At most one outpatient laboratory visit per person and day, none within a day of a hospital stay.
- Recording faults are mutually exclusive on a row (a duplicate is never also date-only, etc.).

## Drugs

Outpatient basal insulin, SGLT2 inhibitors and metformin are 90-day prescriptions (dates only).
In hospital: IV insulin infusion rows with start and end datetimes (one row, or two when the
infusion was interrupted and restarted), SC basal insulin doses, IV glucose, potassium chloride
and sodium chloride. Drug concepts are RxNorm **ingredients** plus products of an invented local
formulary (vocabulary `HVH Formulary`, codes `HVH-...`) linked to their ingredient through
`concept_ancestor`. No real RxNorm product codes are used (we were not confident of them).

## `episodes.parquet` (one row per true DKA episode or mimic)

| column | meaning |
|---|---|
| `truth_id` | sequential id of the truth row (stable for a given persons, seed, chunk_persons) |
| `person_id` | the person (extract `person.person_id`) |
| `kind` | `dka`, or the mimic: `hhs`, `alcoholic_ketoacidosis`, `starvation_ketosis`, `lactic_acidosis`, `hyperglycaemia_without_ketosis` |
| `care_site_id` | the hospital of the stay |
| `visit_occurrence_id` | the arrival visit (ER visit at hospitals recording ER then IP; else the ERIP visit) |
| `inpatient_visit_occurrence_id` | the IP visit that followed the ER visit, else the same as `visit_occurrence_id` |
| `arrival_datetime` | start of the arrival visit |
| `onset_datetime` | true onset: time of the first diagnostic blood draw |
| `resolution_datetime` | true physiological resolution (definition above); null if not resolved |
| `documented_resolution_datetime` | first draw whose reported values meet resolution (definition above); null if not resolved |
| `discharge_datetime` | end of the stay (death time for in-hospital deaths) |
| `severity` | `mild`, `moderate`, `severe` (DKA only) |
| `onset_glucose_mmol_l` | true glucose at onset |
| `onset_ph` | true venous pH at onset |
| `onset_bicarbonate_mmol_l` | true bicarbonate at onset |
| `onset_bhb_mmol_l` | true beta-hydroxybutyrate at onset |
| `is_euglycaemic` | SGLT2-inhibitor euglycaemic presentation (onset glucose < 11 mmol/L) |
| `insulin_start_datetime` | start of the first IV insulin row |
| `insulin_end_datetime` | end of the last IV insulin row (closure) |
| `infusion_rows` | number of IV insulin drug_exposure rows (2 after an interruption) |
| `hours_arrival_to_insulin` | arrival to first infusion start, hours |
| `hours_insulin_to_resolution` | infusion start to true resolution, hours |
| `hours_onset_to_resolution` | onset to true resolution, hours |
| `hours_onset_to_documented_resolution` | onset to documented resolution, hours (the time scale of a lab-based definition) |
| `is_premature_closure` | infusion ended before the documented resolution |
| `has_basal_before_closure` | SC basal insulin given before the infusion ended |
| `hours_basal_before_closure` | infusion end minus SC basal dose time, hours (positive when basal came first, negative when after; null if none) |
| `has_hypoglycaemia` | recorded glucose < 4.0 mmol/L on the infusion |
| `has_hypokalaemia` | recorded potassium < 3.5 mmol/L on the infusion |
| `planned_hypoglycaemia` | a hypoglycaemia was planted |
| `planned_hypokalaemia` | a low potassium course was planted |
| `has_rebound` | rebound ketosis after premature closure |
| `has_icu` | an ICU stay (visit_detail with Visit code ICU) |
| `died` | died during the stay (before resolution) |
| `is_icd_coded_dka` | an ICD-10-CM DKA code (E10.1x, E11.1x, E13.1x) sits on the stay's visits |
| `age_years` | age at arrival, years |
| `diabetes_type` | `type1`, `type2` or `none` |
| `has_sglt2i` | the person takes an SGLT2 inhibitor |
| `prior_episodes` | number of earlier DKA episodes of the person in the extract |
| `resolution_log_hazard` | linear predictor of the time-to-resolution model |

## `persons.parquet` (one row per person)

| column | meaning |
|---|---|
| `person_id` | the person |
| `diabetes_type` | `type1`, `type2` or `none` |
| `sex` | `F` or `M` |
| `age_years_2019_01_01` | age on 2019-01-01, years |
| `age_years_at_observation_start` | age at the start of observation (used by the hazard model) |
| `care_site_id` | home hospital |
| `hba1c_mmol_mol` | the person's usual HbA1c (IFCC mmol/mol) |
| `has_missed_insulin` | recurrent insulin omission (hazard covariate) |
| `has_basal_insulin` | outpatient basal insulin |
| `has_sglt2i` | outpatient SGLT2 inhibitor |
| `has_metformin` | outpatient metformin |
| `observation_start_date` | start of observation |
| `observation_end_date` | end of observation (death, leaving, or 2025-12-31) |
| `death_date` | date of death, null if alive |
| `dka_episodes` | number of true DKA episodes |
| `dka_log_hazard_without_prior` | the person's DKA log-hazard without the prior-episode term |

## Recording faults (`faults.json`)

`counts` gives, for each fault, how many rows of `extract/` carry it (or episodes / visits for
the ICD faults); `definitions` says exactly how each is counted, so the count can be reproduced
from the Parquet files; `by_hospital` splits the unit faults by care site. Faults: glucose in
mg/dL (Quillaby Moor, Fennacre), beta-hydroxybutyrate in mg/dL (Ostwinder Cross), missing units,
duplicate postings, pH decimal slips, date-only results (mostly Ostwinder Cross outpatient
results), results dated after death, ordinal urine ketones (SNOMED answers with "1+".."4+" text,
or text only such as "moderate" with value_as_concept_id 0), ICD-10-CM DKA codes that miss true
episodes and that label mimics and follow-up clinic visits.
"""
