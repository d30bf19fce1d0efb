"""Harmonised lab events and the quarantine (sql/20 .. 22, cohort/_labs.py).

Worked examples on tiny CDM extracts (tests/cdmkit.py, invented data). Conversion factors are
checked against published pairs or physical constants named beside each check.
"""

from __future__ import annotations

import math
from pathlib import Path

import polars as pl
import pytest

import cohort._labs as labs_module
from cohort._errors import CohortError
from cohort._labs import QUARANTINE_REASONS, convert, prepare_lab_events
from cohort.source import open_extract
from tests.cdmkit import MiniCdm

EVENT_COLUMNS = "person_id, measurement_id, visit_occurrence_id, event_datetime, analyte, specimen, value"

# IUPAC standard atomic weights, abridged (conventional) values [from memory]: C 12.011,
# H 1.008, N 14.007, O 15.999 (Prohaska T et al. Standard atomic weights of the elements 2021
# (IUPAC Technical Report). Pure Appl Chem 2022;94:573-600).
C, H, N, O = 12.011, 1.008, 14.007, 15.999


def _run(cdm: MiniCdm, tmp_path: Path, fmt: str = "parquet", **write: object):
    name = "x.duckdb" if fmt == "duckdb" else f"x_{fmt}"
    path = cdm.write(tmp_path / name, fmt=fmt, **write)  # type: ignore[arg-type]
    extract = open_extract(path)
    summary = prepare_lab_events(extract)
    return extract, summary


def _events(extract) -> list[tuple]:
    return extract.con.execute(f"select {EVENT_COLUMNS} from dka_lab_events order by measurement_id").fetchall()


def _reasons(extract, table: str = "measurement") -> dict[int, str]:
    rows = extract.con.execute(
        "select source_row_id, reason from dka_quarantine where source_table = ?", [table]).fetchall()
    return {int(row_id): reason for row_id, reason in rows}


def _one_person(cdm: MiniCdm | None = None, **person: object) -> MiniCdm:
    cdm = cdm or MiniCdm()
    cdm.person(1, **{"birth": "1980-05-01", "gender": "F", **person})  # type: ignore[arg-type]
    return cdm


# ----------------------------------------------------------------------------- conversions
def test_glucose_mg_dl_by_molar_mass(tmp_path: Path) -> None:
    """Glucose C6H12O6: 180.16 g/mol, so mg/dL = mmol/L x 18.016.

    Published pairs: 250 mg/dL = 13.9 mmol/L (Kitabchi AE et al. Hyperglycemic crises in adult
    patients with diabetes. Diabetes Care 2009;32:1335-43, Table 1); 200 mg/dL = 11.1 mmol/L
    (Umpierrez GE et al. Hyperglycemic crises in adults with diabetes: a consensus report.
    Diabetes Care 2024;47:1257-75).
    """
    molar_mass = 6 * C + 12 * H + 6 * O
    assert molar_mass == pytest.approx(180.16, abs=0.005)
    cdm = _one_person()
    first = cdm.lab(1, "2345-7", 250.0, unit="mg/dL", at="2024-03-01 09:00")
    second = cdm.lab(1, "2339-0", 200.0, unit="mg/dL", at="2024-03-01 10:00")
    third = cdm.lab(1, "14749-6", 13.9, unit="mmol/L", at="2024-03-01 11:00")
    extract, _ = _run(cdm, tmp_path)
    values = {row[1]: row[6] for row in _events(extract)}
    assert round(values[first], 1) == 13.9
    assert round(values[second], 1) == 11.1
    assert values[third] == 13.9
    assert values[first] == pytest.approx(250.0 / (molar_mass / 10), rel=1e-4)


def test_bhb_mg_dl_by_molar_mass(tmp_path: Path) -> None:
    """Beta-hydroxybutyrate C4H8O3: 104.1 g/mol, 1 mmol/L = 10.41 mg/dL (CLINICAL.md formulas [S])."""
    molar_mass = 4 * C + 8 * H + 3 * O
    assert molar_mass == pytest.approx(104.1, abs=0.01)
    cdm = _one_person()
    row = cdm.lab(1, "53060-9", 31.23, unit="mg/dL", at="2024-03-01 09:00")
    extract, _ = _run(cdm, tmp_path)
    assert dict((r[1], r[6]) for r in _events(extract))[row] == pytest.approx(3.0, abs=1e-3)


def test_hba1c_percent_by_master_equation(tmp_path: Path) -> None:
    """IFCC mmol/mol = (NGSP % - 2.15) x 10.929 (IFCC-NGSP master equation) [from memory].

    Published pairs [from memory]: 6.5 % = 48 mmol/mol (American Diabetes Association. Standards
    of Care in Diabetes, section 2, diagnostic criteria); 7 % = 53, 8 % = 64, 9 % = 75,
    10 % = 86 mmol/mol (IFCC/NGSP conversion tables).
    """
    pairs = {6.5: 48, 7.0: 53, 8.0: 64, 9.0: 75, 10.0: 86}
    cdm = _one_person()
    ids = {}
    for hour, percent in enumerate(pairs):
        ids[cdm.lab(1, "4548-4", percent, unit="%", at=f"2024-03-01 {9 + hour:02d}:00")] = percent
    extract, _ = _run(cdm, tmp_path)
    for _, measurement_id, *_, value in _events(extract):
        assert round(value) == pairs[ids[measurement_id]]
        assert value == pytest.approx((ids[measurement_id] - 2.15) * 10.929, abs=1e-9)


def test_creatinine_mg_dl(tmp_path: Path) -> None:
    """umol/L = mg/dL x 88.42 [from memory]; from the molar mass of creatinine C4H7N3O
    (113.12 g/mol) 1 mg/dL = 10000 / 113.12 = 88.40 umol/L, within 0.05 % of the factor used."""
    molar_mass = 4 * C + 7 * H + 3 * N + O
    assert molar_mass == pytest.approx(113.12, abs=0.01)
    cdm = _one_person()
    row = cdm.lab(1, "2160-0", 1.0, unit="mg/dL", at="2024-03-01 09:00")
    extract, _ = _run(cdm, tmp_path)
    value = dict((r[1], r[6]) for r in _events(extract))[row]
    assert value == pytest.approx(88.42, abs=1e-9)
    assert value == pytest.approx(10000 / molar_mass, rel=5e-4)


def test_monovalent_ions_meq_equal_mmol(tmp_path: Path) -> None:
    """1 mEq/L = 1 mmol/L for a monovalent ion (charge 1): bicarbonate, sodium, potassium, chloride."""
    cdm = _one_person()
    for hour, (code, value) in enumerate((("1963-8", 12.0), ("2951-2", 138.0), ("2823-3", 4.1),
                                          ("2075-0", 101.0))):
        cdm.lab(1, code, value, unit="meq/L", at=f"2024-03-01 {9 + hour:02d}:00")
    extract, _ = _run(cdm, tmp_path)
    assert [row[6] for row in _events(extract)] == [12.0, 138.0, 4.1, 101.0]


def test_ph_with_and_without_unit(tmp_path: Path) -> None:
    """pH is dimensionless: [pH] or no unit concept are both accepted (units.csv `none` line)."""
    cdm = _one_person()
    cdm.lab(1, "2746-6", 7.12, unit="[pH]", at="2024-03-01 09:00")
    cdm.lab(1, "2744-1", 7.08, unit=None, at="2024-03-01 09:05")
    extract, _ = _run(cdm, tmp_path)
    assert [(row[5], row[6]) for row in _events(extract)] == [("venous", 7.12), ("arterial", 7.08)]


def test_convert_is_the_units_csv_rule() -> None:
    # worked example: 180.16 mg/dL glucose is 10 mmol/L (molar mass 180.16 g/mol)
    assert convert(180.16, multiply=1 / 18.016) == pytest.approx(10.0, abs=1e-12)
    # HbA1c 7.0 % -> (7.0 - 2.15) x 10.929 = 53.00565 mmol/mol (published rounded: 53)
    assert convert(7.0, multiply=10.929, add=-23.49735) == pytest.approx(53.00565, abs=1e-9)


# ----------------------------------------------------------------------------- urine ketones
def test_urine_ketone_ordinals_from_code_text_or_number(tmp_path: Path) -> None:
    """Nitroprusside strip scale negative/trace/1+..4+ (ketone_ordinals.csv; common practice)."""
    cdm = _one_person()
    coded = cdm.lab(1, "2514-8", None, at="2024-03-01 09:00", value_as="260349009")  # 3+ qualifier
    text = cdm.lab(1, "2514-8", None, at="2024-03-01 09:01", value_as=" Moderate ")
    plus = cdm.lab(1, "33903-6", None, at="2024-03-01 09:02", value_as="+ +")
    number = cdm.lab(1, "2514-8", 4.0, at="2024-03-01 09:03")
    negative = cdm.lab(1, "2514-8", None, at="2024-03-01 09:04", value_as="NEG")
    unmapped = cdm.lab(1, "2514-8", None, at="2024-03-01 09:05", value_as="positive")
    half = cdm.lab(1, "2514-8", 1.5, at="2024-03-01 09:06")
    too_high = cdm.lab(1, "2514-8", 7.0, at="2024-03-01 09:07")
    mass = cdm.lab(1, "5797-6", 80.0, unit="mg/dL", at="2024-03-01 09:08")
    answer_wins = cdm.lab(1, "2514-8", 9.0, at="2024-03-01 09:09", value_as="1+")
    extract, _ = _run(cdm, tmp_path)
    values = {row[1]: row[6] for row in _events(extract)}
    assert values == {coded: 3.0, text: 2.0, plus: 2.0, number: 4.0, negative: 0.0, answer_wins: 1.0}
    assert _reasons(extract) == {unmapped: "no_value", half: "implausible",
                                 too_high: "implausible", mass: "unit_unknown"}


# ----------------------------------------------------------------------------- quarantine
def test_every_quarantine_reason(tmp_path: Path) -> None:
    """One worked row per reason; the priority order decides rows with several faults."""
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01")
    cdm.person(2, birth="2010-02-03", observation=("2010-02-03", "2025-12-31"))
    cdm.person(3, birth="1990-01-01", observation=("2020-01-01", "2020-12-31"))
    cdm.observation_period(3, start="2022-01-01", end="2022-06-30")
    cdm.death(1, at="2024-03-03 04:00")
    expected: dict[int, str] = {}
    kept: list[int] = []
    kept.append(cdm.lab(1, "2746-6", 7.10, unit="[pH]", at="2024-03-01 09:00"))
    expected[cdm.lab(99, "2746-6", 7.10, unit="[pH]", at="2024-03-01 09:00")] = "person_unknown"
    expected[cdm.lab(99, "2746-6", 7.10, unit="[pH]", at=None, date="2024-03-01")] = "person_unknown"
    expected[cdm.lab(1, "14749-6", 25.0, unit="mmol/L", at=None, date="2024-03-01")] = "no_time"
    expected[cdm.lab(2, "14749-6", 25.0, unit="mmol/L", at="2010-02-02 23:00")] = "before_birth"
    kept.append(cdm.lab(2, "14749-6", 25.0, unit="mmol/L", at="2010-02-03 08:00"))
    # the death day is kept whole (death 04:00, result 10:00 the same day), the next day is not
    kept.append(cdm.lab(1, "14749-6", 20.0, unit="mmol/L", at="2024-03-03 10:00"))
    expected[cdm.lab(1, "14749-6", 20.0, unit="mmol/L", at="2024-03-04 00:30")] = "after_death"
    expected[cdm.lab(3, "14749-6", 20.0, unit="mmol/L", at="2021-06-01 10:00")] = "outside_observation"
    kept.append(cdm.lab(3, "14749-6", 20.0, unit="mmol/L", at="2022-06-30 23:59"))
    kept.append(cdm.lab(3, "14749-6", 20.0, unit="mmol/L", at="2020-01-01 00:00"))
    # an observation period reaching from the 1880s into the next century: results before 1900
    # and after the run's as-of date (today) are clock or placeholder errors (common practice)
    cdm.person(4, birth="1880-01-01", observation=("1880-01-01", "2199-12-31"))
    expected[cdm.lab(4, "14749-6", 20.0, unit="mmol/L", at="1899-12-31 23:59")] = "implausible_time"
    kept.append(cdm.lab(4, "14749-6", 20.0, unit="mmol/L", at="1900-01-01 00:00"))
    expected[cdm.lab(4, "14749-6", 20.0, unit="mmol/L", at="2199-01-01 00:00")] = "implausible_time"
    expected[cdm.lab(1, "14749-6", None, unit="mmol/L", at="2024-03-01 09:10")] = "no_value"
    expected[cdm.lab(1, "1963-8", None, unit=None, at="2024-03-01 09:10", value_as="<5")] = "no_value"
    expected[cdm.lab(1, "14749-6", 25.0, unit=None, at="2024-03-01 09:20")] = "unit_unknown"
    expected[cdm.lab(1, "14749-6", 2.5, unit="g/L", at="2024-03-01 09:21")] = "unit_unknown"
    expected[cdm.lab(1, "2746-6", 72.0, unit="[pH]", at="2024-03-01 09:30")] = "implausible"
    expected[cdm.lab(1, "14749-6", 0.1, unit="mmol/L", at="2024-03-01 09:31")] = "implausible"
    kept.append(cdm.lab(1, "1963-8", 8.0, unit="mmol/L", at="2024-03-01 09:40"))
    expected[cdm.lab(1, "1963-8", 8.0, unit="mmol/L", at="2024-03-01 09:40")] = "duplicate"
    kept.append(cdm.lab(1, "1963-8", 8.5, unit="mmol/L", at="2024-03-01 09:40"))  # other value
    # other analytes are left alone, not quarantined
    cdm.lab(1, "718-7", 13.5, unit="g/dL", at="2024-03-01 09:00")
    cdm.lab(99, "718-7", None, unit=None, at=None, date="2024-03-01")
    extract, summary = _run(cdm, tmp_path)
    assert _reasons(extract) == expected
    assert [row[1] for row in _events(extract)] == kept
    assert set(expected.values()) == set(QUARANTINE_REASONS)
    assert (summary.rows_read, summary.rows_used, summary.rows_quarantined, summary.rows_other) == (
        len(expected) + len(kept) + 2, len(kept), len(expected), 2)
    quality = summary.data_quality.filter(pl.col("table") == "measurement")
    counts = dict(quality.select("reason", "rows").iter_rows())
    assert counts == {reason: list(expected.values()).count(reason) for reason in QUARANTINE_REASONS}
    assert quality["reason"].to_list() == list(QUARANTINE_REASONS)  # priority order, zeros kept
    details = dict(extract.con.execute("select reason, min(detail) from dka_quarantine group by reason").fetchall())
    assert details["person_unknown"] == "person_id 99 is not in person"
    unit_details = {row[0] for row in extract.con.execute(
        "select detail from dka_quarantine where reason = 'unit_unknown'").fetchall()}
    assert unit_details == {
        f"unit_concept_id {cdm.concept_id('UCUM', 'g/L')} (unit_source_value 'g/L') is not a unit of glucose in units.csv",
        "unit_concept_id 0 (unit_source_value null) is not a unit of glucose in units.csv",
    }
    assert details["implausible"] == "value 0.1 (canonical unit) outside 0.5 .. 150.0"
    assert details["after_death"] == "measured 2024-03-04 00:30:00, after the death date 2024-03-03"


def test_intravenous_insulin_rows_without_time_are_quarantined(tmp_path: Path) -> None:
    """The infusions the features read need a start datetime and an end not before it."""
    cdm = _one_person()
    good = cdm.drug(1, "253182", start="2024-03-01 10:30", end="2024-03-02 08:00", route="intravenous")
    no_start = cdm.drug(1, "253182", start=None, start_date="2024-03-01", route="intravenous")
    backwards = cdm.drug(1, "5856", start="2024-03-02 10:00", end="2024-03-02 09:00", route="intravenous")
    stranger = cdm.drug(42, "253182", start="2024-03-01 10:30", route="intravenous")
    cdm.drug(1, "253182", start=None, start_date="2024-03-01", route="subcutaneous")  # not an infusion
    cdm.drug(1, "274783", start=None, start_date="2024-03-01", route="intravenous")   # basal: not checked
    extract, summary = _run(cdm, tmp_path)
    assert _reasons(extract, "drug_exposure") == {
        no_start: "no_time", backwards: "end_before_start", stranger: "person_unknown"}
    assert good not in _reasons(extract, "drug_exposure")
    quality = summary.data_quality.filter(pl.col("table") == "drug_exposure")
    assert dict(quality.select("reason", "rows").iter_rows()) == {
        "person_unknown": 1, "no_time": 1, "end_before_start": 1}
    assert summary.rows_quarantined == 0  # measurement rows only


def test_reasons_are_one_per_row_in_priority_order(tmp_path: Path) -> None:
    """A row with several faults gets the first reason of QUARANTINE_REASONS that applies."""
    cdm = _one_person()
    cdm.death(1, date="2024-01-01")
    no_time_and_after_death = cdm.lab(1, "14749-6", None, unit=None, at=None, date="2024-05-01")
    after_death_and_implausible = cdm.lab(1, "2746-6", 72.0, unit="[pH]", at="2024-05-01 10:00")
    extract, summary = _run(cdm, tmp_path)
    assert _reasons(extract) == {no_time_and_after_death: "no_time",
                                 after_death_and_implausible: "after_death"}
    assert summary.reconciles


def test_before_birth_without_birth_datetime_uses_the_earliest_possible_birth(tmp_path: Path) -> None:
    """Without birth_datetime the birth is placed at the first moment of month_of_birth (or of
    year_of_birth): only results surely before birth are quarantined."""
    cdm = MiniCdm()
    cdm.person(1, birth="2010-06-15", birth_precision="month", observation=("2009-01-01", "2025-12-31"))
    cdm.person(2, birth="2010-06-15", birth_precision="year", observation=("2009-01-01", "2025-12-31"))
    before = cdm.lab(1, "2746-6", 7.3, unit="[pH]", at="2010-05-31 23:00")
    kept = cdm.lab(1, "2746-6", 7.3, unit="[pH]", at="2010-06-02 10:00")  # maybe before the 15th
    year_before = cdm.lab(2, "2746-6", 7.3, unit="[pH]", at="2009-12-31 23:00")
    year_kept = cdm.lab(2, "2746-6", 7.3, unit="[pH]", at="2010-01-01 00:00")
    extract, _ = _run(cdm, tmp_path)
    assert _reasons(extract) == {before: "before_birth", year_before: "before_birth"}
    assert [row[1] for row in _events(extract)] == [kept, year_kept]


def test_overlapping_observation_periods_do_not_double_rows(tmp_path: Path) -> None:
    cdm = _one_person(observation=False)
    cdm.observation_period(1, start="2020-01-01", end="2024-06-30")
    cdm.observation_period(1, start="2023-01-01", end="2025-12-31")
    row = cdm.lab(1, "2746-6", 7.2, unit="[pH]", at="2024-03-01 09:00")
    extract, summary = _run(cdm, tmp_path)
    assert [r[1] for r in _events(extract)] == [row]
    assert summary.reconciles


def test_lab_events_columns_and_types(tmp_path: Path) -> None:
    """The intermediate-table contract of DEVELOPERS.md."""
    cdm = _one_person()
    cdm.visit(10, person_id=1, start="2024-03-01 08:00", end="2024-03-02 08:00", kind="ERIP")
    cdm.lab(1, "2746-6", 7.2, unit="[pH]", at="2024-03-01 09:00", visit=10)
    extract, _ = _run(cdm, tmp_path)
    described = [(row[0], row[1]) for row in extract.con.execute("describe dka_lab_events").fetchall()]
    assert described == [("person_id", "BIGINT"), ("measurement_id", "BIGINT"),
                         ("visit_occurrence_id", "BIGINT"), ("event_datetime", "TIMESTAMP"),
                         ("analyte", "VARCHAR"), ("specimen", "VARCHAR"), ("value", "DOUBLE")]
    quarantine = [(row[0], row[1]) for row in extract.con.execute("describe dka_quarantine").fetchall()]
    assert quarantine == [("source_table", "VARCHAR"), ("source_row_id", "BIGINT"),
                          ("person_id", "BIGINT"), ("reason", "VARCHAR"), ("detail", "VARCHAR")]
    assert _events(extract)[0][2] == 10


# ----------------------------------------------------------------------------- invariances
def _mixed_extract() -> MiniCdm:
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01")
    cdm.person(2, birth="2009-07-15", gender="M")
    cdm.death(2, at="2024-06-02 03:00")
    for person in (1, 2):
        for hour in range(6):
            at = f"2024-06-01 {8 + hour:02d}:15"
            cdm.lab(person, "14743-9", 30.0 - 3 * hour, unit="mmol/L", at=at)
            cdm.lab(person, "2746-6", 7.05 + 0.04 * hour, unit="[pH]", at=at)
            cdm.lab(person, "66441-7", 6.0 - hour, unit="mmol/L", at=at)
            cdm.lab(person, "1963-8", 8.0 + 2 * hour, unit="meq/L", at=at)
            cdm.lab(person, "2514-8", None, at=at, value_as=("3+", "2+", "1+", "trace", "neg", "neg")[hour])
            cdm.lab(person, "718-7", 12.0, unit="g/dL", at=at)
        cdm.lab(person, "14743-9", 12.0, unit=None, at="2024-06-01 20:00")
        cdm.lab(person, "14743-9", 12.0, unit="mmol/L", at=None, date="2024-06-01")
        cdm.lab(person, "2746-6", 7.3, unit="[pH]", at="2024-06-03 10:00")
    return cdm


@pytest.mark.parametrize("fmt", ("csv", "duckdb"))
def test_formats_give_identical_lab_events(tmp_path: Path, fmt: str) -> None:
    cdm = _mixed_extract()
    reference, reference_summary = _run(cdm, tmp_path / "a", "parquet")
    other, other_summary = _run(cdm, tmp_path / "b", fmt)
    assert _events(other) == _events(reference)
    assert _reasons(other) == _reasons(reference)
    assert other_summary.data_quality.equals(reference_summary.data_quality)


def test_shuffling_rows_changes_nothing(tmp_path: Path) -> None:
    cdm = _mixed_extract()
    reference, _ = _run(cdm, tmp_path / "a")
    for seed in (1, 2):
        shuffled, _ = _run(cdm, tmp_path / f"s{seed}", shuffle_seed=seed)
        assert _events(shuffled) == _events(reference)
        assert _reasons(shuffled) == _reasons(reference)


def test_converting_units_before_loading_changes_nothing(tmp_path: Path) -> None:
    """The same results in mg/dL (glucose x 18.016, bhb x 10.41, creatinine / 88.42, HbA1c as
    NGSP %) give the same canonical values as in mmol/L, umol/L and mmol/mol."""
    molar, mass = MiniCdm(), MiniCdm()
    for cdm in (molar, mass):
        cdm.person(1, birth="1980-05-01")
    rows = (
        # (molar code, molar unit, value), (mass code, mass unit, value in that unit)
        (("14749-6", "mmol/L", 22.4), ("2345-7", "mg/dL", 22.4 * 18.016)),
        (("53060-9", "mmol/L", 4.2), ("53060-9", "mg/dL", 4.2 * 10.41)),
        (("14682-9", "umol/L", 150.0), ("2160-0", "mg/dL", 150.0 / 88.42)),
        (("4548-4", "mmol/mol", 86.0), ("4548-4", "%", 86.0 / 10.929 + 2.15)),
    )
    for hour, (left, right) in enumerate(rows):
        at = f"2024-03-01 {9 + hour:02d}:00"
        molar.lab(1, left[0], left[2], unit=left[1], at=at)
        mass.lab(1, right[0], right[2], unit=right[1], at=at)
    first, _ = _run(molar, tmp_path / "molar")
    second, _ = _run(mass, tmp_path / "mass")
    left_values = [(row[4], row[6]) for row in _events(first)]
    right_values = [(row[4], row[6]) for row in _events(second)]
    assert [name for name, _ in left_values] == [name for name, _ in right_values]
    for (_, a), (_, b) in zip(left_values, right_values, strict=True):
        assert math.isclose(a, b, rel_tol=1e-4), (a, b)  # factors carry 4-5 significant figures


# ----------------------------------------------------------------------------- accounting
def test_reconciliation_failure_is_an_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A recipe that doubled rows would break rows read = used + quarantined + other."""
    cdm = _one_person()
    cdm.lab(1, "2746-6", 7.2, unit="[pH]", at="2024-03-01 09:00")
    cdm.lab(1, "2746-6", 72.0, unit="[pH]", at="2024-03-01 10:00")
    path = cdm.write(tmp_path / "x", fmt="parquet")
    real = labs_module.run_recipe

    def doubling(con, recipe, target, values):  # type: ignore[no-untyped-def]
        real(con, recipe, target, values)
        if target == "dka_quarantine":
            con.execute("insert into dka_quarantine select * from dka_quarantine")

    monkeypatch.setattr(labs_module, "run_recipe", doubling)
    with open_extract(path) as extract, pytest.raises(
            CohortError, match=r"do not reconcile: read 2, but used 1 \+ quarantined 2 \+ other analytes 0 = 3"):
        prepare_lab_events(extract)


def test_summary_fields(tmp_path: Path) -> None:
    extract, summary = _run(_mixed_extract(), tmp_path)
    assert summary.reconciles
    assert summary.rows_read == extract.con.execute("select count(*) from measurement").fetchall()[0][0]
    assert summary.rows_other == 12  # haemoglobin rows
    assert isinstance(summary.data_quality, pl.DataFrame)
    assert summary.data_quality.columns == ["table", "reason", "rows"]
    assert summary.unresolved_codes.height == 0  # MiniCdm's vocabulary holds every listed code
    assert summary.seconds > 0


def test_running_twice_gives_the_same_tables(tmp_path: Path) -> None:
    extract, first = _run(_mixed_extract(), tmp_path)
    events = _events(extract)
    second = prepare_lab_events(extract)
    assert _events(extract) == events
    assert second.data_quality.equals(first.data_quality)
    assert (second.rows_used, second.rows_quarantined) == (first.rows_used, first.rows_quarantined)


def test_as_of_date_bounds_results_in_time(tmp_path: Path) -> None:
    """The as-of day is kept whole; the next day's first second is implausible_time."""
    import datetime as dt

    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01", observation=("2000-01-01", "2099-12-31"))
    last = cdm.lab(1, "14749-6", 20.0, unit="mmol/L", at="2026-06-30 23:59")
    after = cdm.lab(1, "14749-6", 20.0, unit="mmol/L", at="2026-07-01 00:00")
    path = cdm.write(tmp_path / "x", fmt="parquet")
    with open_extract(path) as extract:
        summary = prepare_lab_events(extract, as_of=dt.date(2026, 6, 30))
        assert _reasons(extract) == {after: "implausible_time"}
        assert [row[1] for row in _events(extract)] == [last]
        detail = extract.con.execute("select detail from dka_quarantine").fetchall()[0][0]
    assert detail == "measured 2026-07-01 00:00:00, before 1900-01-01 or after the as-of date"
    assert summary.as_of == dt.date(2026, 6, 30)
