"""The scenario: the fictional Harrowmere Valley Health network and the planted effects.

Everything here is invented for the demo. The numbers are chosen to look like a plausible
regional network, not taken from any real data; where a number follows a clinical source
(thresholds, unit factors) the source is named (see also /work/shared/CLINICAL.md).
All planted effects are written to ``truth/effects.json`` so analyses can be checked against them.
"""

from __future__ import annotations

import datetime as dt

# Calendar of the extract: 2019-01-01 .. 2025-12-31 (inclusive).
START = dt.date(2019, 1, 1)
END = dt.date(2025, 12, 31)
EPOCH_DAY = (START - dt.date(1970, 1, 1)).days  # days since 1970-01-01 of START
N_DAYS = (END - START).days + 1
MIN_PER_DAY = 1440.0
MIN_PER_YEAR = 525_960.0  # 365.25 days

# Unit factors (CLINICAL.md "Formulas and conversions"):
GLUCOSE_MG_DL_PER_MMOL_L = 18.016  # molar mass of glucose 180.16 g/mol
BHB_MG_DL_PER_MMOL_L = 10.41  # beta-hydroxybutyrate 104.1 g/mol
CREATININE_UMOL_L_PER_MG_DL = 88.42  # [M] in CLINICAL.md


def hba1c_percent_from_mmol_mol(mmol_mol: float) -> float:
    """NGSP % from IFCC mmol/mol by the IFCC-NGSP master equation (CLINICAL.md, [M]).

    Examples
    --------
    >>> round(hba1c_percent_from_mmol_mol(53.0), 2)
    7.0
    """
    return mmol_mol / 10.929 + 2.15


# --- hospitals ---------------------------------------------------------------------------------
# Each hospital has its own recording practice. Codes are LOINC (see _vocab.py).
HOSPITALS: list[dict] = [
    {
        "care_site_id": 1, "name": "Harrowmere Valley General Hospital", "source": "HVG",
        "town": "Harrowmere", "share": 0.28, "arrival_visit": "ERIP",
        "glucose_plasma": ("14749-6", "mmol/L"), "glucose_capillary": ("14743-9", "mmol/L"),
        "glucose_gas": ("15074-8", "mmol/L"), "bhb": ("66441-7", "mmol/L"), "bhb_every_h": 1,
        "ph_venous": "2746-6", "bicarbonate": ("1963-8", "mmol/L"), "gas_every_h": 2,
        "bicarbonate_gas": ("14627-4", "mmol/L"), "ph_children": "2745-8",
        "reports_anion_gap": "33037-3", "hba1c": ("59261-8", "mmol/mol"),
        "creatinine": ("14682-9", "umol/L"), "urine_ketone_style": "concept",
        "insulin_drug": ("RxNorm", "253182"), "delay_median_h": 0.75, "date_only_outpatient": 0.0,
    },
    {
        "care_site_id": 2, "name": "Quillaby Moor Hospital", "source": "QMH",
        "town": "Quillaby", "share": 0.24, "arrival_visit": "ER+IP",
        "glucose_plasma": ("2345-7", "mg/dL"), "glucose_capillary": ("41653-7", "mg/dL"),
        "glucose_gas": None, "bhb": ("53060-9", "mmol/L"), "bhb_every_h": 2,
        "ph_venous": "2746-6", "bicarbonate": ("2028-9", "mmol/L"), "bicarbonate_gas": None, "ph_children": None,
        "gas_every_h": 4,
        "reports_anion_gap": None, "hba1c": ("4548-4", "%"),
        "creatinine": ("2160-0", "mg/dL"), "urine_ketone_style": "text",
        "insulin_drug": ("HVH Formulary", "HVH-INS-0101"), "delay_median_h": 1.0,
        "date_only_outpatient": 0.0,
    },
    {
        "care_site_id": 3, "name": "Ostwinder Cross Hospital", "source": "OXH",
        "town": "Ostwinder", "share": 0.20, "arrival_visit": "ERIP",
        "glucose_plasma": ("14749-6", "mmol/L"), "glucose_capillary": ("14743-9", "mmol/L"),
        "glucose_gas": None, "bhb": ("53060-9", "mg/dL"), "bhb_every_h": 2,
        "ph_venous": "2746-6", "bicarbonate": ("1963-8", "mmol/L"), "bicarbonate_gas": None, "ph_children": None,
        "gas_every_h": 3,
        "reports_anion_gap": "33037-3", "hba1c": ("59261-8", "mmol/mol"),
        "creatinine": ("14682-9", "umol/L"), "urine_ketone_style": "concept",
        "insulin_drug": ("RxNorm", "253182"), "delay_median_h": 1.5,
        "date_only_outpatient": 0.25,
    },
    {
        "care_site_id": 4, "name": "Fennacre Infirmary", "source": "FNI",
        "town": "Fennacre", "share": 0.16, "arrival_visit": "ER+IP",
        "glucose_plasma": ("2345-7", "mg/dL"), "glucose_capillary": ("41653-7", "mg/dL"),
        "glucose_gas": ("2339-0", "mg/dL"), "bhb": ("66441-7", "mmol/L"), "bhb_every_h": 1,
        "ph_venous": "11558-4", "bicarbonate": ("2028-9", "mmol/L"), "bicarbonate_gas": None, "ph_children": None,
        "gas_every_h": 2,
        "reports_anion_gap": None, "hba1c": ("4548-4", "%"),
        "creatinine": ("2160-0", "mg/dL"), "urine_ketone_style": "text",
        "insulin_drug": ("RxNorm", "5856"), "delay_median_h": 2.0, "date_only_outpatient": 0.0,
    },
    {
        "care_site_id": 5, "name": "Sallowmede Hospital", "source": "SMH",
        "town": "Sallowmede", "share": 0.12, "arrival_visit": "ERIP",
        "glucose_plasma": ("14749-6", "mmol/L"), "glucose_capillary": ("14743-9", "mmol/L"),
        "glucose_gas": None, "bhb": ("66441-7", "mmol/L"), "bhb_every_h": 2,
        "ph_venous": "2746-6", "bicarbonate": ("1963-8", "mmol/L"), "gas_every_h": 4,
        "bicarbonate_gas": ("14627-4", "mmol/L"), "ph_children": None,
        "reports_anion_gap": "10466-1", "hba1c": ("59261-8", "mmol/mol"),
        "creatinine": ("14682-9", "umol/L"), "urine_ketone_style": "concept",
        "insulin_drug": ("RxNorm", "253182"), "delay_median_h": 2.75,
        "date_only_outpatient": 0.0,
    },
]

# --- population ----------------------------------------------------------------------------------
POPULATION = {
    "share_type1": 0.14,  # enriched far above a general population so a small demo has episodes
    "share_type2": 0.20,
    "share_type1_children": 0.30,  # of type 1 persons, aged 2-17 on 2019-01-01
    "share_enrolled_at_start": 0.55,
    "share_leaving_early": 0.12,
    "share_missed_insulin_type1": 0.18,
    "share_missed_insulin_type2_insulin": 0.08,
    "share_basal_type2": 0.30,
    "share_sglt2i_type2": 0.35,
    "share_sglt2i_type1": 0.04,
    "share_metformin_type2": 0.70,
    "outpatient_lab_visits_per_year": {"none": 0.6, "type1": 2.6, "type2": 2.3},
}

# --- DKA hazard model (recurrence from the same model) ------------------------------------------
# hazard(t) = base[type] * exp(sum beta * x), per person-year; x fixed at observation start
# except prior_episodes (number of earlier episodes in the extract, capped at 3).
DKA_HAZARD = {
    "base_per_person_year": {"type1": 0.03, "type2": 0.004},
    "log_hr": {
        "missed_insulin": 1.2,
        "age_under_18": 0.4,
        "age_18_to_25": 0.5,
        "hba1c_per_10_mmol_mol_above_64": 0.25,
        "sglt2i": 1.0,
        "female": 0.2,
        "per_prior_episode_capped_3": 0.7,
    },
    "refractory_days_after_discharge": 14,
}

SEVERITY_SHARES = {"mild": 0.35, "moderate": 0.45, "severe": 0.20}

# Time to resolution, hours from infusion start: Weibull proportional hazards,
# h(t) = lambda * rho * t^(rho-1) * exp(beta x); baseline (mild, adult, no SGLT2i, hospital 1).
RESOLUTION = {
    "weibull_shape": 2.2,
    "baseline_median_hours": 10.0,
    "log_hr": {
        "moderate": -0.5,
        "severe": -1.0,
        "sglt2i": -0.4,
        "age_under_18": -0.25,
        "hospital": {"1": 0.0, "2": -0.1, "3": 0.0, "4": -0.2, "5": -0.3},
    },
    "note": "applies to the planned time; rebound ketosis after premature closure delays resolution further",
}

CARE = {
    "delay_lognormal_sigma": 0.5,  # arrival-to-insulin delay: median by hospital, this log-sd
    "closure_before_resolution_share": 0.15,
    "closure_before_resolution_reference": (
        "documented resolution: the first draw whose reported ketones < 0.6 mmol/L and venous pH >= 7.30;"
        " premature closures also precede the physiological resolution and the consensus bicarbonate arm,"
        " on-time closures also follow the JBDS pH > 7.3 reading"
    ),
    "premature_closure_at_fraction_of_time_to_resolution": [0.5, 0.9],
    "closure_after_resolution_hours": [0.25, 4.0],  # after the documented resolution
    "basal_before_closure_share": 0.55,
    "basal_after_closure_share": 0.35,
    "basal_before_closure_hours": [0.5, 3.0],
    "rebound_share_premature_without_basal": 0.5,
    "rebound_share_premature_with_basal": 0.1,
    "infusion_interruption_share": 0.10,
    "hypoglycaemia_share": 0.12,
    "hypokalaemia_share": 0.15,
    "sglt2i_euglycaemic_share": 0.60,
    "icu_share": {"mild": 0.0, "moderate": 0.12, "severe": 0.65},
    "death_share": {"mild": 0.001, "moderate": 0.005, "severe": 0.025},
    "icd_dka_code_share_true_episodes": 0.85,
    "urine_ketones_at_arrival_share": 0.5,
    "follow_up_dka_code_share": 0.05,
}

MIMICS = {
    # kind: (eligible groups, rate per person-year)
    "hhs": {"groups": ["type2"], "rate": 0.004, "icd_dka_share": 0.20},
    "alcoholic_ketoacidosis": {"groups": ["none"], "rate": 0.0012, "icd_dka_share": 0.10},
    "starvation_ketosis": {"groups": ["none", "type1", "type2"], "rate": 0.0010, "icd_dka_share": 0.05},
    "lactic_acidosis": {"groups": ["none", "type2"], "rate": 0.0010, "icd_dka_share": 0.05},
    "hyperglycaemia_without_ketosis": {"groups": ["type1", "type2"], "rate": 0.010, "icd_dka_share": 0.08},
}

FAULTS = {
    "missing_unit_share_glucose_bicarbonate": 0.002,
    "decimal_slip_share_ph": 0.004,
    "date_only_share_any": 0.001,
    "duplicate_share": 0.004,
    "after_death_share_of_deceased": 0.3,
}
