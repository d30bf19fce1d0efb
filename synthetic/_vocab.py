"""The synthetic vocabulary: real codes, invented concept ids.

Every concept the generator writes is listed here with its real ``vocabulary_id`` and
``concept_code`` and gets an invented ``concept_id`` at or above 2,000,000,000, so nothing
downstream can depend on the numbers of a real OMOP vocabulary release.

Sources of the codes:

* the project's bundled code lists (``cohort/codelists/*.csv``): every code there is here, and
  a test checks it;
* further laboratory analytes that have nothing to do with DKA (haemoglobin, ALT, ...), so that
  filtering the measurement table is real work. Those LOINC codes are marked ``[from memory]``;
* a few RxNorm ingredients outside the code lists (metformin, glucose, potassium chloride,
  sodium chloride), also ``[from memory]``;
* drug *products* are NOT real RxNorm products: we are not confident of RxNorm product codes,
  so products live in an invented local vocabulary ``HVH Formulary`` and are linked to their
  RxNorm ingredient through ``concept_ancestor``, as a local formulary mapped into a CDM would be.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass

CONCEPT_ID_BASE = 2_000_000_000
"""Invented concept ids start above this number (0 stays "no matching concept")."""


@dataclass(frozen=True)
class Concept:
    """One concept of the synthetic vocabulary."""

    vocabulary_id: str
    concept_code: str
    concept_name: str
    domain_id: str
    concept_class_id: str
    standard_concept: str | None


def _c(vocab: str, code: str, name: str, domain: str, cls: str, std: str | None = "S") -> Concept:
    return Concept(vocab, code, name, domain, cls, std)


# --- laboratory tests (LOINC) ----------------------------------------------------------------
# DKA analytes: exactly the codes of cohort/codelists/labs.csv.
_LABS_DKA = [
    ("2345-7", "Glucose [Mass/volume] in Serum or Plasma"),
    ("14749-6", "Glucose [Moles/volume] in Serum or Plasma"),
    ("2339-0", "Glucose [Mass/volume] in Blood"),
    ("15074-8", "Glucose [Moles/volume] in Blood"),
    ("41653-7", "Glucose [Mass/volume] in Capillary blood by Glucometer"),
    ("14743-9", "Glucose [Moles/volume] in Capillary blood by Glucometer"),
    ("2744-1", "pH of Arterial blood"),
    ("2746-6", "pH of Venous blood"),
    ("2745-8", "pH of Capillary blood"),
    ("11558-4", "pH of Blood"),
    ("1963-8", "Bicarbonate [Moles/volume] in Serum or Plasma"),
    ("1959-6", "Bicarbonate [Moles/volume] in Blood"),
    ("1960-4", "Bicarbonate [Moles/volume] in Arterial blood"),
    ("14627-4", "Bicarbonate [Moles/volume] in Venous blood"),
    ("2028-9", "Carbon dioxide, total [Moles/volume] in Serum or Plasma"),
    ("20565-8", "Carbon dioxide, total [Moles/volume] in Blood"),
    ("53060-9", "Beta-hydroxybutyrate in Serum or Plasma"),
    ("6873-4", "Beta-hydroxybutyrate in Serum or Plasma"),
    ("29512-1", "Beta-hydroxybutyrate in Serum or Plasma"),
    ("66441-7", "Beta-hydroxybutyrate in Blood by Test strip"),
    ("2514-8", "Ketones [Presence] in Urine by Test strip"),
    ("5797-6", "Ketones [Mass/volume] in Urine by Test strip"),
    ("33903-6", "Ketones [Presence] in Urine"),
    ("2951-2", "Sodium [Moles/volume] in Serum or Plasma"),
    ("2947-0", "Sodium [Moles/volume] in Blood"),
    ("2075-0", "Chloride [Moles/volume] in Serum or Plasma"),
    ("2069-3", "Chloride [Moles/volume] in Blood"),
    ("2823-3", "Potassium [Moles/volume] in Serum or Plasma"),
    ("6298-4", "Potassium [Moles/volume] in Blood"),
    ("33037-3", "Anion gap in Serum or Plasma"),
    ("10466-1", "Anion gap 3 in Serum or Plasma"),
    ("1863-0", "Anion gap 4 in Serum or Plasma"),
    ("4548-4", "Hemoglobin A1c/Hemoglobin.total in Blood"),
    ("17856-6", "Hemoglobin A1c/Hemoglobin.total in Blood by HPLC"),
    ("59261-8", "Hemoglobin A1c/Hemoglobin.total in Blood by IFCC protocol"),
    ("2160-0", "Creatinine [Mass/volume] in Serum or Plasma"),
    ("38483-4", "Creatinine [Mass/volume] in Blood"),
    ("14682-9", "Creatinine [Moles/volume] in Serum or Plasma"),
]
# Non-DKA analytes, all LOINC codes [from memory]; the names are the LOINC long names as
# remembered and only label the rows.
_LABS_OTHER = [
    ("718-7", "Hemoglobin [Mass/volume] in Blood"),
    ("6690-2", "Leukocytes [#/volume] in Blood by Automated count"),
    ("777-3", "Platelets [#/volume] in Blood by Automated count"),
    ("4544-3", "Hematocrit [Volume Fraction] of Blood by Automated count"),
    ("787-2", "MCV [Entitic volume] by Automated count"),
    ("1742-6", "Alanine aminotransferase [Enzymatic activity/volume] in Serum or Plasma"),
    ("1920-8", "Aspartate aminotransferase [Enzymatic activity/volume] in Serum or Plasma"),
    ("6768-6", "Alkaline phosphatase [Enzymatic activity/volume] in Serum or Plasma"),
    ("1975-2", "Bilirubin.total [Mass/volume] in Serum or Plasma"),
    ("1751-7", "Albumin [Mass/volume] in Serum or Plasma"),
    ("2093-3", "Cholesterol [Mass/volume] in Serum or Plasma"),
    ("2085-9", "Cholesterol in HDL [Mass/volume] in Serum or Plasma"),
    ("13457-7", "Cholesterol in LDL [Mass/volume] in Serum or Plasma by calculation"),
    ("2571-8", "Triglyceride [Mass/volume] in Serum or Plasma"),
    ("3094-0", "Urea nitrogen [Mass/volume] in Serum or Plasma"),
    ("33914-3", "Glomerular filtration rate/1.73 sq M.predicted [Volume Rate/Area] in Serum or Plasma by Creatinine-based formula (MDRD)"),
    ("3016-3", "Thyrotropin [Units/volume] in Serum or Plasma"),
    ("1988-5", "C reactive protein [Mass/volume] in Serum or Plasma"),
    ("9318-7", "Albumin/Creatinine [Mass Ratio] in Urine"),
    ("2524-7", "Lactate [Moles/volume] in Serum or Plasma"),
]

# --- units (UCUM) ------------------------------------------------------------------------------
_UNITS = [
    ("mmol/L", "millimole per liter"),
    ("mg/dL", "milligram per deciliter"),
    ("meq/L", "milliequivalent per liter"),
    ("[pH]", "pH"),
    ("%", "percent"),
    ("mmol/mol", "millimole per mole"),
    ("umol/L", "micromole per liter"),
    ("g/dL", "gram per deciliter"),  # [from memory] UCUM code
    ("10*3/uL", "thousand per microliter"),  # [from memory] UCUM code
    ("fL", "femtoliter"),
    ("U/L", "unit per liter"),
    ("mL/min/{1.73_m2}", "milliliter per minute per 1.73 square meter"),  # [from memory]
    ("m[IU]/L", "milli international unit per liter"),  # [from memory]
    ("mg/L", "milligram per liter"),
    ("mg/g", "milligram per gram"),
]

# --- conditions --------------------------------------------------------------------------------
_CONDITIONS = [
    # exactly the codes of cohort/codelists/conditions.csv (prefix rows expand to real leaf codes)
    ("ICD10CM", "E10.10", "Type 1 diabetes mellitus with ketoacidosis without coma", None),
    ("ICD10CM", "E10.11", "Type 1 diabetes mellitus with ketoacidosis with coma", None),
    ("ICD10CM", "E11.10", "Type 2 diabetes mellitus with ketoacidosis without coma", None),
    ("ICD10CM", "E11.11", "Type 2 diabetes mellitus with ketoacidosis with coma", None),
    ("ICD10CM", "E13.10", "Other specified diabetes mellitus with ketoacidosis without coma", None),
    ("ICD10CM", "E13.11", "Other specified diabetes mellitus with ketoacidosis with coma", None),
    ("ICD10CM", "E08.10", "Diabetes mellitus due to underlying condition with ketoacidosis without coma", None),
    ("ICD10CM", "E08.11", "Diabetes mellitus due to underlying condition with ketoacidosis with coma", None),
    ("ICD10CM", "E09.10", "Drug or chemical induced diabetes mellitus with ketoacidosis without coma", None),
    ("ICD10CM", "E09.11", "Drug or chemical induced diabetes mellitus with ketoacidosis with coma", None),
    ("ICD10CM", "E10", "Type 1 diabetes mellitus", None),
    ("ICD10CM", "E11", "Type 2 diabetes mellitus", None),
    ("ICD10CM", "E13", "Other specified diabetes mellitus", None),
    # leaf codes under the E10/E11 prefixes used for routine diabetes records [from memory]
    ("ICD10CM", "E10.9", "Type 1 diabetes mellitus without complications", None),
    ("ICD10CM", "E11.9", "Type 2 diabetes mellitus without complications", None),
    ("ICD10CM", "E10.65", "Type 1 diabetes mellitus with hyperglycemia", None),
    ("ICD10CM", "E11.65", "Type 2 diabetes mellitus with hyperglycemia", None),
    ("ICD10CM", "E11.00", "Type 2 diabetes mellitus with hyperosmolarity without NKHHC", None),
    ("ICD10CM", "E87.2", "Acidosis", None),  # [from memory]
    ("ICD10CM", "I10", "Essential (primary) hypertension", None),  # [from memory]
    ("SNOMED", "420422005", "Diabetic ketoacidosis", "S"),
    ("SNOMED", "46635009", "Type 1 diabetes mellitus", "S"),
    ("SNOMED", "44054006", "Type 2 diabetes mellitus", "S"),
    ("SNOMED", "38341003", "Hypertensive disorder, systemic arterial", "S"),  # [from memory]
]

# --- urine ketone answers (SNOMED qualifiers of cohort/codelists/ketone_ordinals.csv) ----------
KETONE_ANSWERS = [
    ("260385009", "Negative", 0),
    ("260405006", "Trace", 1),
    ("260347006", "+", 1),
    ("260348001", "++", 2),
    ("260349009", "+++", 3),
    ("260350009", "++++", 4),
]

# --- routes (SNOMED) ---------------------------------------------------------------------------
_ROUTES = [
    ("47625008", "Intravenous route"),
    ("34206005", "Subcutaneous route"),
    ("26643006", "Oral route"),  # [from memory]
]

# --- drugs: RxNorm ingredients -----------------------------------------------------------------
_INGREDIENTS = [
    ("253182", "insulin regular, human"),
    ("5856", "insulin, human"),  # name as in the code list; used by one hospital for infusions
    ("274783", "insulin glargine"),
    ("139825", "insulin detemir"),
    ("1670007", "insulin degludec"),
    ("1373458", "canagliflozin"),
    ("1488564", "dapagliflozin"),
    ("1545653", "empagliflozin"),
    ("1992672", "ertugliflozin"),
    ("2638675", "sotagliflozin"),
    ("6809", "metformin"),  # [from memory]
    ("4850", "glucose"),  # [from memory] (dextrose)
    ("8591", "potassium chloride"),  # [from memory]
    ("9863", "sodium chloride"),  # [from memory]
]

# --- drugs: invented local formulary products, each below one RxNorm ingredient ----------------
# (local code, name, ingredient RxNorm code)
LOCAL_PRODUCTS = [
    ("HVH-INS-0101", "insulin regular human 1 unit/mL in sodium chloride 0.9% 50 mL infusion", "253182"),
    ("HVH-INS-0201", "insulin glargine 100 units/mL 3 mL prefilled pen", "274783"),
    ("HVH-INS-0202", "insulin glargine 300 units/mL 1.5 mL prefilled pen", "274783"),
    ("HVH-INS-0301", "insulin detemir 100 units/mL 3 mL prefilled pen", "139825"),
    ("HVH-INS-0401", "insulin degludec 100 units/mL 3 mL prefilled pen", "1670007"),
    ("HVH-SGL-0101", "dapagliflozin 10 mg tablet", "1488564"),
    ("HVH-SGL-0201", "empagliflozin 10 mg tablet", "1545653"),
    ("HVH-SGL-0202", "empagliflozin 25 mg tablet", "1545653"),
    ("HVH-SGL-0301", "canagliflozin 100 mg tablet", "1373458"),
]

_VISITS = [
    ("IP", "Inpatient Visit"),
    ("ER", "Emergency Room Visit"),
    ("ERIP", "Emergency Room and Inpatient Visit"),
    ("OP", "Outpatient Visit"),
    ("ICU", "Intensive Care"),
]

_GENDER = [("F", "FEMALE"), ("M", "MALE")]


def _all_concepts() -> list[Concept]:
    out: list[Concept] = []
    for code, name in _LABS_DKA + _LABS_OTHER:
        out.append(_c("LOINC", code, name, "Measurement", "Lab Test"))
    for code, name in _UNITS:
        out.append(_c("UCUM", code, name, "Unit", "Unit"))
    for vocab, code, name, std in _CONDITIONS:
        cls = "Clinical Finding" if vocab == "SNOMED" else ("3-char nonbill code" if "." not in code else "5-char billing code")
        out.append(_c(vocab, code, name, "Condition", cls, std))
    for code, name, _ordinal in KETONE_ANSWERS:
        out.append(_c("SNOMED", code, name, "Meas Value", "Qualifier Value"))
    for code, name in _ROUTES:
        out.append(_c("SNOMED", code, name, "Route", "Qualifier Value"))
    for code, name in _INGREDIENTS:
        out.append(_c("RxNorm", code, name, "Drug", "Ingredient"))
    for code, name, _ing in LOCAL_PRODUCTS:
        out.append(_c("HVH Formulary", code, name, "Drug", "Local Drug Product"))
    for code, name in _VISITS:
        out.append(_c("Visit", code, name, "Visit", "Visit"))
    for code, name in _GENDER:
        out.append(_c("Gender", code, name, "Gender", "Gender"))
    return out


CONCEPTS: list[Concept] = _all_concepts()
"""Every concept of the synthetic vocabulary, in concept_id order."""

CONCEPT_ID: dict[tuple[str, str], int] = {
    (c.vocabulary_id, c.concept_code): CONCEPT_ID_BASE + 1 + i for i, c in enumerate(CONCEPTS)
}
"""(vocabulary_id, concept_code) -> invented concept_id."""

if len(CONCEPT_ID) != len(CONCEPTS):  # pragma: no cover - guards the lists above
    raise RuntimeError("duplicate (vocabulary_id, concept_code) in the synthetic vocabulary")


def cid(vocabulary_id: str, concept_code: str) -> int:
    """Return the invented concept_id of a real (vocabulary_id, concept_code).

    Examples
    --------
    >>> cid("LOINC", "2345-7") >= 2_000_000_000
    True
    """
    return CONCEPT_ID[(vocabulary_id, concept_code)]


VALID_START = _dt.date(1970, 1, 1)
VALID_END = _dt.date(2099, 12, 31)


def ancestor_rows() -> list[tuple[int, int, int, int]]:
    """Rows of concept_ancestor: each drug ingredient to itself and to its local products.

    Returns (ancestor_concept_id, descendant_concept_id, min_levels, max_levels).
    """
    rows: list[tuple[int, int, int, int]] = []
    for code, _name in _INGREDIENTS:
        ing = cid("RxNorm", code)
        rows.append((ing, ing, 0, 0))
    for code, _name, ing_code in LOCAL_PRODUCTS:
        prod = cid("HVH Formulary", code)
        rows.append((prod, prod, 0, 0))
        rows.append((cid("RxNorm", ing_code), prod, 1, 1))
    return rows
