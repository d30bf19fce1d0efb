"""Code lists: validation, coverage of the published codes, resolution through the vocabulary."""

from __future__ import annotations

import shutil
from pathlib import Path

import polars as pl
import pytest

from cohort._codelists import CODELIST_FILES, SPECIMENS, read_codelists
from cohort._compile import ANALYTES
from cohort._errors import InputError
from cohort._labs import prepare_lab_events
from cohort._paths import codelists_dir
from cohort.source import open_extract
from tests.cdmkit import MiniCdm

# Codes the project's clinical notes list, with their published meaning (LOINC table; ICD-10-CM
# tabular list, chapter 4, E08-E13 ".1x with ketoacidosis"; SNOMED CT 420422005 "diabetic
# ketoacidosis"). Codes tagged [M] there are from memory.
LOINC_EXPECTED = {
    "2345-7": ("glucose", "plasma"), "14749-6": ("glucose", "plasma"), "2339-0": ("glucose", "blood"),
    "15074-8": ("glucose", "blood"), "41653-7": ("glucose", "capillary"),
    "14743-9": ("glucose", "capillary"),
    "2744-1": ("ph", "arterial"), "2746-6": ("ph", "venous"), "2745-8": ("ph", "capillary"),
    "11558-4": ("ph", "unspecified"),
    "1963-8": ("bicarbonate", "serum"), "1959-6": ("bicarbonate", "blood"),
    "1960-4": ("bicarbonate", "arterial"), "14627-4": ("bicarbonate", "venous"),
    "2028-9": ("bicarbonate", "total_co2"), "20565-8": ("bicarbonate", "total_co2"),
    "53060-9": ("bhb", "serum"), "6873-4": ("bhb", "serum"), "29512-1": ("bhb", "serum"),
    "66441-7": ("bhb", "blood_strip"),
    "2514-8": ("urine_ketones", "urine"), "5797-6": ("urine_ketones", "urine"),
    "33903-6": ("urine_ketones", "urine"),
    "2951-2": ("sodium", "serum"), "2075-0": ("chloride", "serum"), "2823-3": ("potassium", "serum"),
    "2947-0": ("sodium", "blood"), "2069-3": ("chloride", "blood"), "6298-4": ("potassium", "blood"),
    "33037-3": ("anion_gap", "serum"), "10466-1": ("anion_gap", "serum"),
    "1863-0": ("anion_gap_with_k", "serum"),
    "4548-4": ("hba1c", "blood"), "17856-6": ("hba1c", "blood"), "59261-8": ("hba1c", "blood"),
    "2160-0": ("creatinine", "serum"), "38483-4": ("creatinine", "blood"),
    "14682-9": ("creatinine", "serum"),
}
ICD10CM_DKA = {f"E{group}.1{coma}" for group in ("08", "09", "10", "11", "13") for coma in "01"}
RXNORM_EXPECTED = {
    "253182": "insulin_regular", "5856": "insulin_regular", "274783": "insulin_basal",
    "139825": "insulin_basal", "1670007": "insulin_basal", "1373458": "sglt2_inhibitor",
    "1488564": "sglt2_inhibitor", "1545653": "sglt2_inhibitor", "1992672": "sglt2_inhibitor",
    "2638675": "sglt2_inhibitor",
}


def _copy_lists(tmp_path: Path) -> Path:
    folder = tmp_path / "lists"
    shutil.copytree(codelists_dir(), folder)
    return folder


def _append(folder: Path, name: str, line: str) -> int:
    file = folder / name
    text = file.read_text()
    if not text.endswith("\n"):
        text += "\n"
    file.write_text(text + line + "\n")
    return len((text + line).splitlines())


def test_bundled_lists_cover_the_published_codes() -> None:
    lists = read_codelists()
    labs = {row["concept_code"]: (row["analyte"], row["specimen"])
            for row in lists["lab"].iter_rows(named=True)}
    assert labs == LOINC_EXPECTED
    conditions = lists["condition"]
    dka = set(conditions.filter(pl.col("concept_group") == "dka")["concept_code"])
    assert ICD10CM_DKA | {"420422005"} == dka
    drugs = {row["concept_code"]: row["drug_class"] for row in lists["drug"].iter_rows(named=True)}
    assert drugs == RXNORM_EXPECTED
    assert set(lists["lab"]["analyte"]) == set(ANALYTES)
    # every analyte has at least one unit rule and every lab specimen is a known one
    assert set(lists["unit"]["analyte"]) == set(ANALYTES)
    for analyte, specimen in labs.values():
        assert specimen in SPECIMENS[analyte]


def test_unknown_analyte_is_refused_with_file_and_line(tmp_path: Path) -> None:
    folder = _copy_lists(tmp_path)
    line = _append(folder, "labs.csv", "LOINC,9999-9,glucoze,plasma,a typo,test")
    with pytest.raises(InputError) as caught:
        read_codelists(folder)
    message = str(caught.value)
    assert f"labs.csv line {line}: `analyte` must be one of glucose, ph" in message
    assert "got 'glucoze'; did you mean `glucose`?" in message


@pytest.mark.parametrize(
    ("file", "line", "expected"),
    [
        ("labs.csv", "LOINC,9999-9,ph,venus,x,y", "`specimen (for ph)` must be one of arterial, venous, capillary, unspecified; got 'venus'; did you mean `venous`?"),
        ("drugs.csv", "RxNorm,1,insulin_rapid,x,y", "`drug_class` must be one of insulin_regular, insulin_basal, sglt2_inhibitor; got 'insulin_rapid'"),
        ("conditions.csv", "ICD10CM,E10,startswith,diabetes_type1,x,y", "`match` must be one of exact, prefix; got 'startswith'"),
        ("conditions.csv", "ICD10CM,E99,exact,diabetes,x,y", "`concept_group` must be one of dka, diabetes_type1"),
        ("routes.csv", "SNOMED,1,oral,x,y", "`route` must be one of intravenous, subcutaneous; got 'oral'"),
        ("visits.csv", "Visit,X,ward,x,y", "`visit_kind` must be one of inpatient, emergency"),
        ("units.csv", "glucose,UCUM,g/L,5.55,0,0.5,150,", "`source` is empty"),
        ("units.csv", "glucose,UCUM,g/L,five,0,0.5,150,x", "`multiply` must be a finite number; got 'five'"),
        ("units.csv", "glucose,UCUM,g/L,5.55,0,150,0.5,x", "`low` must be below `high`"),
        ("units.csv", "glucose,LOINC,g/L,5.55,0,0.5,150,x", "`vocabulary_id` must be one of UCUM, none"),
        ("units.csv", "glucose,UCUM,mg/dL,0.0555,0,0.5,150,x", "is listed already on line 3"),
        ("ketone_ordinals.csv", ",,huge,5,x", "`ordinal` must be a whole number 0..4; got '5'"),
        ("ketone_ordinals.csv", ",,Mod erate,2,x", "text, moderate is listed already on line 10"),
        ("ketone_ordinals.csv", "SNOMED,999,moderate,3,x", "answer text 'moderate' has ordinal 3, but line 10 gives it 2"),
    ],
)
def test_bad_lines_are_refused(tmp_path: Path, file: str, line: str, expected: str) -> None:
    folder = _copy_lists(tmp_path)
    number = _append(folder, file, line)
    with pytest.raises(InputError) as caught:
        read_codelists(folder)
    assert f"{file} line {number}: " in str(caught.value)
    assert expected in str(caught.value)


def test_missing_file_and_column_are_named(tmp_path: Path) -> None:
    folder = _copy_lists(tmp_path)
    (folder / "routes.csv").unlink()
    with pytest.raises(InputError, match="has no routes.csv; it needs all of: labs.csv"):
        read_codelists(folder)
    folder = _copy_lists(tmp_path / "b")
    (folder / "visits.csv").write_text("vocabulary_id,code,visit_kind,description,source\n")
    with pytest.raises(InputError, match="missing column\\(s\\) concept_code"):
        read_codelists(folder)


def test_codes_resolve_through_the_vocabulary(tmp_path: Path) -> None:
    """Prefix matches (E10 -> E10.9, E10.65), exact matches, drug descendants."""
    cdm = MiniCdm()
    cdm.person(1)
    cdm.condition(1, "E10.9", at="2020-01-01 10:00")      # type 1 without complications
    cdm.condition(1, "E11.65", at="2020-01-01 10:00")     # type 2 with hyperglycaemia
    cdm.condition(1, "E100", vocabulary="Local", at="2020-01-01 10:00")
    product = cdm.concept("RxNorm", "1000001", name="invented glargine pen", domain="Drug",
                          ancestors=(("RxNorm", "274783"),))
    path = cdm.write(tmp_path / "x", fmt="parquet")
    with open_extract(path) as extract:
        prepare_lab_events(extract)
        con = extract.con
        groups = dict(con.execute(
            "select concept.concept_code, list(concept_group order by concept_group) "
            "from dka_concept_condition inner join concept on concept.concept_id = "
            "dka_concept_condition.concept_id where concept.vocabulary_id = 'ICD10CM' "
            "group by concept.concept_code").fetchall())
        assert groups["E10.9"] == ["diabetes_type1"]
        assert groups["E10.10"] == ["diabetes_type1", "dka"]
        assert groups["E11.65"] == ["diabetes_type2"]
        assert groups["E13"] == ["diabetes_other"]
        assert "E100" not in groups
        drug_classes = dict(con.execute("select concept_id, drug_class from dka_concept_drug").fetchall())
        assert drug_classes[product] == "insulin_basal"
        assert drug_classes[cdm.concept_id("RxNorm", "274783")] == "insulin_basal"
        assert len(drug_classes) == 11
        routes = dict(con.execute("select route, concept_id from dka_concept_route").fetchall())
        assert routes == {"intravenous": cdm.concept_id("SNOMED", "47625008"),
                          "subcutaneous": cdm.concept_id("SNOMED", "34206005")}
        kinds = {row[0] for row in con.execute("select visit_kind from dka_concept_visit").fetchall()}
        assert kinds == {"inpatient", "emergency", "emergency_inpatient", "outpatient", "icu"}
        units = con.execute("select count(*) from dka_concept_unit where analyte = 'glucose'").fetchall()
        assert units == [(2,)]


def test_no_concept_ancestor_keeps_ingredients_only(tmp_path: Path) -> None:
    cdm = MiniCdm()
    cdm.person(1)
    cdm.concept("RxNorm", "1000001", domain="Drug", ancestors=(("RxNorm", "274783"),))
    path = cdm.write(tmp_path / "x", fmt="parquet", omit_tables=("concept_ancestor",))
    with open_extract(path) as extract:
        prepare_lab_events(extract)
        assert extract.con.execute("select count(*) from dka_concept_drug").fetchall() == [(10,)]


def test_unresolved_codes_are_reported_not_raised(tmp_path: Path) -> None:
    folder = _copy_lists(tmp_path)
    lab_line = _append(folder, "labs.csv", "LOINC,99999-9,glucose,plasma,invented test code,test")
    prefix_line = _append(folder, "conditions.csv", "ICD10CM,Z99Q,prefix,diabetes_other,nothing,test")
    cdm = MiniCdm()  # its vocabulary is made from the bundled lists, without the two new codes
    cdm.person(1)
    path = cdm.write(tmp_path / "x", fmt="parquet")
    with open_extract(path) as extract:
        summary = prepare_lab_events(extract, codelists=folder)
    rows = summary.unresolved_codes.select("codelist", "line", "concept_code").rows()
    assert rows == [("conditions.csv", prefix_line, "Z99Q"), ("labs.csv", lab_line, "99999-9")]


def test_every_file_is_registered_with_its_columns(tmp_path: Path) -> None:
    cdm = MiniCdm()
    cdm.person(1)
    with open_extract(cdm.write(tmp_path / "x", fmt="parquet")) as extract:
        prepare_lab_events(extract)
        for name, (_, columns) in CODELIST_FILES.items():
            described = [row[0] for row in extract.con.execute(f"describe dka_codelist_{name}").fetchall()]
            assert described == ["line", *columns]
