"""Reporting codes: how each analyte is written at each hospital (LOINC, UCUM unit, factor).

An *analyte* here is a physiological quantity in its canonical unit (mmol/L for glucose,
ketones and electrolytes, mmol/mol for HbA1c, umol/L for creatinine, ...). A *reporting code*
is one (LOINC code, UCUM unit) pair with the factor from the canonical unit, the number of
decimals the laboratory reports, its reference range and the local test name that goes into
``measurement_source_value``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic import _params as P
from synthetic._vocab import cid


@dataclass(frozen=True)
class ReportingCode:
    loinc: str
    unit: str | None
    factor: float  # reported = canonical * factor (+ offset)
    offset: float
    decimals: int
    low: float | None  # reference range in the reported unit
    high: float | None
    label: str  # local test name (measurement_source_value)
    analyte: str  # DKA analyte name of the code lists, or a local name for the others


# Routine analytes (canonical unit, reporting LOINC, decimals, reference range); codes
# of the non-DKA analytes are [from memory] (see _vocab.py).
ROUTINE_ANALYTES: dict[str, tuple[str, str, int, float | None, float | None]] = {
    "urea_nitrogen": ("3094-0", "mg/dL", 0, 7, 20),
    "egfr": ("33914-3", "mL/min/{1.73_m2}", 0, 60, None),
    "haemoglobin": ("718-7", "g/dL", 1, 12.0, 17.5),
    "wbc": ("6690-2", "10*3/uL", 1, 4.0, 11.0),
    "platelets": ("777-3", "10*3/uL", 0, 150, 400),
    "haematocrit": ("4544-3", "%", 1, 36, 50),
    "mcv": ("787-2", "fL", 0, 80, 100),
    "alt": ("1742-6", "U/L", 0, 7, 56),
    "ast": ("1920-8", "U/L", 0, 10, 40),
    "alp": ("6768-6", "U/L", 0, 44, 147),
    "bilirubin": ("1975-2", "mg/dL", 1, 0.1, 1.2),
    "albumin": ("1751-7", "g/dL", 1, 3.5, 5.0),
    "cholesterol": ("2093-3", "mg/dL", 0, None, 200),
    "hdl": ("2085-9", "mg/dL", 0, 40, None),
    "ldl": ("13457-7", "mg/dL", 0, None, 100),
    "triglycerides": ("2571-8", "mg/dL", 0, None, 150),
    "tsh": ("3016-3", "m[IU]/L", 2, 0.4, 4.0),
    "crp": ("1988-5", "mg/L", 1, None, 10),
    "uacr": ("9318-7", "mg/g", 0, None, 30),
    "lactate": ("2524-7", "mmol/L", 1, 0.5, 2.2),
}

_DKA_FIXED = {
    # analyte: (LOINC, unit, decimals, low, high) for codes that do not vary by hospital
    "sodium": ("2951-2", "mmol/L", 0, 135, 145),
    "potassium": ("2823-3", "mmol/L", 1, 3.5, 5.1),
    "chloride": ("2075-0", "mmol/L", 0, 98, 107),
    "ph_arterial": ("2744-1", "[pH]", 2, 7.35, 7.45),
    "bicarbonate_arterial": ("1960-4", "mmol/L", 0, 22, 26),
}

_LABELS = {
    "14749-6": "GLU", "2345-7": "GLUC", "14743-9": "POC GLU", "41653-7": "BG METER",
    "15074-8": "GAS GLU", "2339-0": "BGA GLUC", "66441-7": "POC KETONE", "53060-9": "BOHB",
    "2746-6": "VBG PH", "11558-4": "PH BLOOD", "2744-1": "ABG PH", "1963-8": "HCO3",
    "2028-9": "TCO2", "33037-3": "ANION GAP", "10466-1": "AGAP", "59261-8": "HBA1C IFCC",
    "4548-4": "HBA1C", "14682-9": "CREAT", "2160-0": "CREA", "2951-2": "NA", "2823-3": "K",
    "2075-0": "CL", "2514-8": "UKET", "33903-6": "URINE KETONES",
}


def _factor(analyte: str, unit: str | None) -> tuple[float, float]:
    if analyte.startswith("glucose") and unit == "mg/dL":
        return P.GLUCOSE_MG_DL_PER_MMOL_L, 0.0
    if analyte == "bhb" and unit == "mg/dL":
        return P.BHB_MG_DL_PER_MMOL_L, 0.0
    if analyte == "hba1c" and unit == "%":
        return 1.0 / 10.929, 2.15
    if analyte == "creatinine" and unit == "mg/dL":
        return 1.0 / P.CREATININE_UMOL_L_PER_MG_DL, 0.0
    return 1.0, 0.0


_CANON_RANGES = {
    "glucose": (3.9, 7.8), "bhb": (0.0, 0.6), "ph": (7.31, 7.41), "bicarbonate": (22, 29),
    "anion_gap": (3, 11), "hba1c": (20, 42), "creatinine": (60, 110),
}
_DECIMALS = {
    ("glucose", "mmol/L"): 1, ("glucose", "mg/dL"): 0, ("bhb", "mmol/L"): 1, ("bhb", "mg/dL"): 1,
    ("ph", "[pH]"): 2, ("bicarbonate", "mmol/L"): 0, ("anion_gap", "mmol/L"): 0,
    ("hba1c", "mmol/mol"): 0, ("hba1c", "%"): 1, ("creatinine", "umol/L"): 0,
    ("creatinine", "mg/dL"): 2,
}


class CodeTable:
    """All reporting codes, with per-hospital lookup by analyte."""

    def __init__(self) -> None:
        self.codes: list[ReportingCode] = []
        self._index: dict[tuple[str, str | None], int] = {}
        n_h = len(P.HOSPITALS)
        self.by_hospital: dict[str, np.ndarray] = {}
        for name, (loinc, unit, dec, low, high) in {**ROUTINE_ANALYTES, **_DKA_FIXED}.items():
            idx = self._add(loinc, unit, 1.0, 0.0, dec, low, high, {"ph_arterial": "ph", "bicarbonate_arterial": "bicarbonate"}.get(name, name))
            self.by_hospital[name] = np.full(n_h, idx, dtype=np.int32)
        per_h = {
            "glucose_plasma": "glucose", "glucose_capillary": "glucose", "glucose_gas": "glucose",
            "bhb": "bhb", "bicarbonate": "bicarbonate", "hba1c": "hba1c", "creatinine": "creatinine",
            "bicarbonate_gas": "bicarbonate",
        }
        for key, base in per_h.items():
            arr = np.full(n_h, -1, dtype=np.int32)
            for h, hosp in enumerate(P.HOSPITALS):
                spec = hosp[key]
                if spec is None:
                    continue
                loinc, unit = spec
                arr[h] = self._canon(base, loinc, unit)
            self.by_hospital[key] = arr
        # venous (or unspecified) pH by hospital; anion gap where the laboratory reports it
        ph = np.full(n_h, -1, dtype=np.int32)
        ag = np.full(n_h, -1, dtype=np.int32)
        ph_child = np.full(n_h, -1, dtype=np.int32)
        for h, hosp in enumerate(P.HOSPITALS):
            ph[h] = self._canon("ph", hosp["ph_venous"], "[pH]")
            ph_child[h] = self._canon("ph", hosp["ph_children"] or hosp["ph_venous"], "[pH]")
            if hosp["reports_anion_gap"]:
                ag[h] = self._canon("anion_gap", hosp["reports_anion_gap"], "mmol/L")
        self.by_hospital["ph_venous"] = ph
        self.by_hospital["ph_children"] = ph_child
        self.by_hospital["anion_gap"] = ag
        # urine ketones: ordinal answers; LOINC by answer style
        uk = np.full(n_h, -1, dtype=np.int32)
        for h, hosp in enumerate(P.HOSPITALS):
            loinc = "2514-8" if hosp["urine_ketone_style"] == "concept" else "33903-6"
            uk[h] = self._add(loinc, None, 1.0, 0.0, 0, None, None, "urine_ketones")
        self.by_hospital["urine_ketones"] = uk
        self._finish()

    def _canon(self, base: str, loinc: str, unit: str) -> int:
        factor, offset = _factor(base, unit)
        low, high = _CANON_RANGES[base]
        low_r = round(low * factor + offset, 2)
        high_r = round(high * factor + offset, 2)
        return self._add(loinc, unit, factor, offset, _DECIMALS[(base, unit)], low_r, high_r, base)

    def _add(self, loinc, unit, factor, offset, dec, low, high, analyte) -> int:
        key = (loinc, unit)
        if key in self._index:
            return self._index[key]
        label = _LABELS.get(loinc, loinc)
        self.codes.append(ReportingCode(loinc, unit, factor, offset, dec, low, high, label, analyte))
        self._index[key] = len(self.codes) - 1
        return self._index[key]

    def _finish(self) -> None:
        c = self.codes
        self.concept = np.array([cid("LOINC", x.loinc) for x in c], dtype=np.int64)
        self.unit_concept = np.array([cid("UCUM", x.unit) if x.unit else 0 for x in c], dtype=np.int64)
        self.has_unit = np.array([x.unit is not None for x in c])
        self.factor = np.array([x.factor for x in c])
        self.offset = np.array([x.offset for x in c])
        self.decimals = np.array([x.decimals for x in c], dtype=np.int64)
        self.low = np.array([np.nan if x.low is None else x.low for x in c])
        self.high = np.array([np.nan if x.high is None else x.high for x in c])
        self.labels = [x.label for x in c]
        self.unit_labels = sorted({x.unit for x in c if x.unit})
        self.unit_label_idx = np.array(
            [self.unit_labels.index(x.unit) if x.unit else -1 for x in c], dtype=np.int32
        )
        self.analyte = [x.analyte for x in c]

    def of(self, key: str, hospital: np.ndarray) -> np.ndarray:
        """Reporting code index of analyte ``key`` at each hospital (0-based array)."""
        return self.by_hospital[key][hospital]

    def analyte_is_tco2(self, hospital: np.ndarray) -> np.ndarray:
        """True where the hospital reports total CO2 (2028-9) as its bicarbonate."""
        tco2 = np.array([self.codes[i].loinc == "2028-9" for i in self.by_hospital["bicarbonate"]])
        return tco2[hospital]

    def mask_analyte(self, code_idx: np.ndarray, analyte: str) -> np.ndarray:
        """Rows whose reporting code measures ``analyte``."""
        lut = np.array([a == analyte for a in self.analyte])
        return lut[code_idx]
