"""Every number in every bundled definition file, checked against its published source.

Each table below lists every comparison of a file, section by section, with the source of the
number beside it. The test compares the file's comparisons with the table as a multiset, so a
number added to a file without an entry here fails, and so does a changed one. Sources are as in
/work/shared/CLINICAL.md; "[from memory]" marks values CLINICAL.md tags [M] (to be checked against
the original); "reading" marks a number the file chooses where the source is ambiguous (the
reading is written in the file and repeated here).

Glucose: mg/dL = mmol/L x 18.016 (molar mass of glucose 180.16 g/mol; CLINICAL.md "Formulas").
Urine ketones are the ordinal 0..4 of cohort/codelists/ketone_ordinals.csv (1 = trace/small/1+,
2 = moderate/2+, 3 = large/3+).
"""

from __future__ import annotations

from collections import Counter

import pytest

from cohort._compile import AtLeast, Flag, _children, iter_comparisons
from cohort.definitions import Definition, Timing, list_definitions, load_definition

Row = tuple[str, str, str, float]

# --------------------------------------------------------------------------- ADA 2009
# Kitabchi AE, Umpierrez GE, Miles JM, Fisher JN. Hyperglycemic crises in adult patients with
# diabetes. Diabetes Care 2009;32(7):1335-1343, Table 1 (diagnostic criteria, [S]) and the
# resolution criteria of the treatment section ([from memory], CLINICAL.md [M]). The Table 1 pH and
# bicarbonate bands were also read in the PubMed Central text of the article (PMC2699725):
# pH 7.25-7.30 / 7.00 to <7.24 / <7.00, bicarbonate 15-18 / 10 to <15 / <10 mEq/L.
ADA_2009: list[Row] = [
    ("diagnosis", "glucose", ">", 13.9),          # Table 1: plasma glucose > 250 mg/dL = 13.9 mmol/L [S]
    ("diagnosis", "urine_ketones", ">=", 1),      # Table 1: urine ketone "positive" -> strip trace/1+ or more (reading)
    ("diagnosis", "bhb", ">=", 3.0),              # Table 1: serum ketone "positive" -> BHB >= 3.0 mmol/L (reading; 2024 report's level)
    ("diagnosis", "ph", "<=", 7.3),               # Table 1: mild arterial pH 7.25-7.30 (upper end inclusive) [S]
    ("diagnosis", "bicarbonate", "<=", 18.0),     # Table 1: mild bicarbonate 15-18 mEq/L (upper end inclusive) [S]
    ("severity.severe", "ph", "<", 7.0),          # Table 1: severe pH < 7.00 [S]
    ("severity.severe", "bicarbonate", "<", 10.0),  # Table 1: severe bicarbonate < 10 [S]
    ("severity.moderate", "ph", "<", 7.25),       # Table 1: moderate 7.00 to < 7.24; gap 7.24-7.25 closed as 2006 (< 7.25) (reading)
    ("severity.moderate", "bicarbonate", "<", 15.0),  # Table 1: moderate bicarbonate 10 to < 15 [S]
    ("severity.mild", "ph", "<=", 7.3),           # Table 1: mild pH 7.25-7.30 [S]
    ("severity.mild", "bicarbonate", "<=", 18.0),  # Table 1: mild bicarbonate 15-18 [S]
    ("resolution", "glucose", "<", 11.1),         # glucose < 200 mg/dL = 11.1 mmol/L [from memory]
    ("resolution", "bicarbonate", ">=", 15.0),    # two of: bicarbonate >= 15 mEq/L [from memory]
    ("resolution", "ph", ">", 7.3),               # two of: venous pH > 7.3 [from memory]
    ("resolution", "anion_gap", "<=", 12.0),      # two of: calculated anion gap <= 12 mEq/L [from memory]
]

# --------------------------------------------------------------------------- 2024 consensus
# Umpierrez GE, Davis GM, ElSayed NA, et al. Hyperglycemic crises in adults with diabetes: a
# consensus report. Diabetes Care 2024;47(8):1257-1275. Diagnosis and severity [S]; resolution
# [from memory] (CLINICAL.md [M]).
CONSENSUS_2024: list[Row] = [
    ("diagnosis", "glucose", ">=", 11.1),         # D: glucose >= 200 mg/dL (11.1 mmol/L) [S]
    ("diagnosis", "bhb", ">=", 3.0),              # K: beta-hydroxybutyrate >= 3.0 mmol/L [S]
    ("diagnosis", "urine_ketones", ">=", 2),      # K: urine ketone strip >= 2+ [S]
    ("diagnosis", "ph", "<", 7.3),                # A: pH < 7.3 [S]
    ("diagnosis", "bicarbonate", "<", 18.0),      # A: and/or bicarbonate < 18 mmol/L [S]
    ("severity.severe", "ph", "<", 7.0),          # severe pH < 7.00 [S]
    ("severity.severe", "bicarbonate", "<", 10.0),  # severe bicarbonate < 10 [S]
    ("severity.severe", "bhb", ">", 6.0),         # severe beta-hydroxybutyrate > 6 [S]
    ("severity.moderate", "ph", "<=", 7.25),      # moderate pH 7.00-7.25 [S]
    ("severity.moderate", "bicarbonate", "<", 15.0),  # moderate bicarbonate 10 to < 15 [S]
    ("severity.mild", "ph", "<", 7.3),            # mild pH > 7.25 to < 7.30 [S]
    ("severity.mild", "bicarbonate", "<", 18.0),  # mild bicarbonate 15 to < 18 [S]
    ("resolution", "bhb", "<", 0.6),              # beta-hydroxybutyrate < 0.6 mmol/L [from memory]
    ("resolution", "ph", ">=", 7.3),              # and venous pH >= 7.3 [from memory]
    ("resolution", "bicarbonate", ">=", 18.0),    # or bicarbonate >= 18 mmol/L [from memory]
]

# --------------------------------------------------------------------------- JBDS
# Joint British Diabetes Societies for Inpatient Care. The management of diabetic ketoacidosis in
# adults, revised 2021, updated March 2023 (summary: Dhatariya KK et al., Diabet Med 2022). [S]
JBDS_2023: list[Row] = [
    ("diagnosis", "bhb", ">=", 3.0),              # ketonaemia >= 3.0 mmol/L [S]
    ("diagnosis", "urine_ketones", ">=", 2),      # or urine ketones >= 2+ [S] (CLINICAL.md; wording noted in the file)
    ("diagnosis", "glucose", ">", 11.0),          # blood glucose over 11 mmol/L (or known diabetes) [S]
    ("diagnosis", "bicarbonate", "<", 15.0),      # bicarbonate < 15 mmol/L [S]
    ("diagnosis", "ph", "<", 7.3),                # and/or venous pH < 7.3 [S]
    ("resolution", "bhb", "<", 0.6),              # ketones < 0.6 mmol/L [S]
    ("resolution", "ph", ">", 7.3),               # and venous pH > 7.3 [S]
]

# --------------------------------------------------------------------------- ISPAD 2022
# Glaser N, Fritsch M, Priyambada L, et al. ISPAD Clinical Practice Consensus Guidelines 2022:
# Diabetic ketoacidosis and hyperglycemic hyperosmolar state. Pediatr Diabetes 2022;23(7):835-856.
# The bicarbonate change to 18 is [S]; other 2022 values [from memory] (2018 values [S]).
ISPAD_2022: list[Row] = [
    ("diagnosis", "glucose", ">", 11.0),          # glucose > 11 mmol/L (200 mg/dL) [S 2018; from memory for 2022]
    ("diagnosis", "ph", "<", 7.3),                # venous pH < 7.3 [S 2018; from memory for 2022]
    ("diagnosis", "bicarbonate", "<", 18.0),      # or bicarbonate < 18 mmol/L (2022 change) [S]
    ("diagnosis", "bhb", ">=", 3.0),              # beta-hydroxybutyrate >= 3 mmol/L [from memory]
    ("diagnosis", "urine_ketones", ">=", 2),      # or moderate/large ketonuria (moderate = 2+) [from memory]
    ("severity.severe", "ph", "<", 7.1),          # severe pH < 7.1 [S 2018; from memory for 2022]
    ("severity.severe", "bicarbonate", "<", 5.0),  # or bicarbonate < 5 [S 2018; from memory for 2022]
    ("severity.moderate", "ph", "<", 7.2),        # moderate pH < 7.2 [S 2018; from memory for 2022]
    ("severity.moderate", "bicarbonate", "<", 10.0),  # or bicarbonate < 10 [S 2018; from memory for 2022]
    ("severity.mild", "ph", "<", 7.3),            # mild pH < 7.3 [S 2018; from memory for 2022]
    ("severity.mild", "bicarbonate", "<", 18.0),  # or bicarbonate < 18 (2022; < 15 in 2018) [from memory]
    ("resolution", "ph", ">", 7.3),               # pH > 7.30 [from memory; not in CLINICAL.md]
    ("resolution", "bicarbonate", ">", 15.0),     # bicarbonate > 15 mmol/L [from memory; not in CLINICAL.md]
    ("resolution", "bhb", "<", 1.0),              # BOHB < 1 mmol/L [from memory; not in CLINICAL.md]
    ("resolution", "anion_gap", "<=", 12.0),      # "and/or closure of the anion gap": <= 12 is ADA 2009's number (reading)
]

EXPECTED: dict[str, list[Row]] = {
    "ada-2009": ADA_2009,
    "consensus-2024": CONSENSUS_2024,
    "jbds-2023": JBDS_2023,
    "ispad-2022": ISPAD_2022,
}

# Population: the adult guidelines apply from 18 (DESIGN.md: adult definitions leave out people
# under 18 at onset); ISPAD covers children and adolescents (ispad-2022 leaves out 18 and over).
POPULATION = {
    "ada-2009": (18.0, None),
    "consensus-2024": (18.0, None),
    "jbds-2023": (18.0, None),
    "ispad-2022": (None, 18.0),
}

# Which files accept known diabetes in place of hyperglycaemia (euglycaemic DKA): the 2024 report
# ("or prior history of diabetes") and JBDS ("or known diabetes"), [S]. ADA 2009 and ISPAD
# require hyperglycaemia.
ALLOWS_KNOWN_DIABETES = {"ada-2009": False, "consensus-2024": True, "jbds-2023": True, "ispad-2022": False}

# Citation fields, CLINICAL.md headings (journal, year, volume(issue), pages).
CITATIONS = {
    "ada-2009": ("Kitabchi AE", "Diabetes Care", 2009, "32(7)", "1335-1343"),
    "consensus-2024": ("Umpierrez GE", "Diabetes Care", 2024, "47(8)", "1257-1275"),
    "jbds-2023": ("Joint British Diabetes Societies for Inpatient Care", None, 2023, None, None),
    "ispad-2022": ("Glaser N", "Pediatric Diabetes", 2022, "23(7)", "835-856"),
}


def _rows(definition: Definition) -> list[Row]:
    rows: list[Row] = []
    for node in iter_comparisons(definition.diagnosis):
        rows.append(("diagnosis", node.analyte, node.op, node.value))
    if definition.severity is not None:
        for grade in definition.severity.grades:
            for node in iter_comparisons(grade.when):
                rows.append((f"severity.{grade.grade}", node.analyte, node.op, node.value))
    for node in iter_comparisons(definition.resolution.when):
        rows.append(("resolution", node.analyte, node.op, node.value))
    return rows


def test_the_four_bundled_definitions_are_the_ones_tested() -> None:
    assert list_definitions() == sorted(EXPECTED)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_every_number_matches_the_source_table(name: str) -> None:
    definition = load_definition(name)
    found = Counter((section, analyte, op, float(value)) for section, analyte, op, value in _rows(definition))
    wanted = Counter((section, analyte, op, float(value)) for section, analyte, op, value in EXPECTED[name])
    assert found - wanted == Counter(), f"{name}: numbers in the file that the source table lacks"
    assert wanted - found == Counter(), f"{name}: numbers of the source table missing from the file"


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_population_citation_and_name(name: str) -> None:
    definition = load_definition(name)
    assert definition.name == name  # the file's name field is its bundled name
    assert (definition.population.min_age_years, definition.population.max_age_years) == POPULATION[name]
    first_author, journal, year, volume, pages = CITATIONS[name]
    citation = definition.citation
    assert citation.authors.startswith(first_author)
    assert (citation.journal, citation.year, citation.volume, citation.pages) == (journal, year, volume, pages)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_known_diabetes_only_where_the_guideline_allows_it(name: str) -> None:
    definition = load_definition(name)
    assert ("known_diabetes" in definition.flags()) is ALLOWS_KNOWN_DIABETES[name]


def test_jbds_grades_no_severity() -> None:
    # JBDS lists markers of severe DKA for higher-level care, not mild/moderate/severe grades;
    # the file grades none (severity: null) and says why in its notes.
    definition = load_definition("jbds-2023")
    assert definition.severity is None
    assert any("not a grade" in note for note in definition.notes)


def test_ada_resolution_is_glucose_and_two_of_three() -> None:
    # Kitabchi 2009 [from memory]: glucose < 200 mg/dL and TWO of bicarbonate >= 15, venous pH > 7.3,
    # anion gap <= 12. The file reads "two of" (not a secondary paraphrase's "any of").
    when = load_definition("ada-2009").resolution.when
    (glucose, two_of) = _children(when)
    assert glucose.analyte == "glucose"
    assert isinstance(two_of, AtLeast) and two_of.at_least == 2 and len(two_of.of) == 3


def test_readings_are_stated_in_the_files() -> None:
    ada = load_definition("ada-2009")
    assert "7.24" in ada.severity.reading and "2006" in ada.severity.reading        # the 7.24-7.25 gap
    assert "two of" in ada.resolution.reading                                       # two of vs any of
    assert any("Anion gap reading" in note for note in ada.notes)                   # anion gap not required
    assert any("Ketone reading" in note for note in ada.notes)                      # "positive" as bhb / ordinal
    for name in EXPECTED:
        definition = load_definition(name)
        assert definition.resolution.reading, name
        if definition.severity is not None:
            assert definition.severity.reading, name


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_bundled_timing_is_the_documented_default(name: str) -> None:
    # The timing values are the toolkit's own choices (cohort.definitions.Timing), the same in
    # every bundled file; a file that changed one would need a reason of its own.
    assert load_definition(name).timing == Timing()


def test_flags_are_only_in_diagnosis() -> None:
    for name in EXPECTED:
        definition = load_definition(name)
        stack = [definition.resolution.when]
        while stack:
            node = stack.pop()
            assert not isinstance(node, Flag), f"{name}: a flag in resolution"
            stack.extend(_children(node) or [])
