"""Worked examples: DKA episodes found from tiny hand-built CDM extracts (tests/cdmkit.py).

Every person below is one scenario; the expected onset, severity, resolution and censoring follow
by hand from the guideline text as the bundled definition files read it:

- ADA 2009: Kitabchi AE, Umpierrez GE, Miles JM, Fisher JN. Hyperglycemic crises in adult
  patients with diabetes. Diabetes Care 2009;32(7):1335-1343, Table 1 (glucose > 250 mg/dL,
  pH <= 7.30 or bicarbonate <= 18, ketones positive; resolution glucose < 200 mg/dL and two of
  bicarbonate >= 15, pH > 7.3, anion gap <= 12).
- 2024 consensus: Umpierrez GE, Davis GM, ElSayed NA, et al. Hyperglycemic crises in adults with
  diabetes: a consensus report. Diabetes Care 2024;47(8):1257-1275 (glucose >= 200 mg/dL or prior
  diabetes; BHB >= 3.0 mmol/L; pH < 7.3 or bicarbonate < 18; severe pH < 7.00 or bicarbonate < 10
  or BHB > 6, moderate pH 7.00-7.25 or bicarbonate 10 to < 15; resolution BHB < 0.6 and pH >= 7.3
  or bicarbonate >= 18 [resolution from memory, CLINICAL.md M]).
- JBDS: Joint British Diabetes Societies for Inpatient Care. The management of diabetic
  ketoacidosis in adults, 2023 update (ketones >= 3.0, glucose > 11 or known diabetes,
  bicarbonate < 15 or venous pH < 7.3; resolution ketones < 0.6 and pH > 7.3).
- ISPAD 2022: Glaser N et al. Pediatr Diabetes 2022;23(7):835-856 (glucose > 11 mmol/L, pH < 7.3
  or bicarbonate < 18, BHB >= 3; children and adolescents under 18).
Glucose mg/dL -> mmol/L divides by 18.016 (molar mass 180.16 g/mol; CLINICAL.md); BHB
1 mmol/L = 10.41 mg/dL (104.1 g/mol). Timing defaults (diagnosis look-back 6 h, resolution
look-back 4 h, gap 72 h, rebound 24 h) are the toolkit's own (cohort.definitions.Timing).
The people and values are invented; the expected results are the guideline's rules applied by hand.
"""

from __future__ import annotations

import datetime as dt
import json

import polars as pl
import pytest

from cohort._errors import CohortError
from cohort.episodes import CODE_FINDER, EPISODE_COLUMNS, find_episodes
from tests.cdmkit import MiniCdm

DEFINITIONS = ["consensus-2024", "ada-2009", "jbds-2023", "ispad-2022"]
GLUCOSE_MMOL, GLUCOSE_MG = "14749-6", "2345-7"
PH_VENOUS, BICARBONATE, BHB = "2746-6", "1963-8", "53060-9"
SODIUM, CHLORIDE, URINE_KETONES = "2951-2", "2075-0", "2514-8"
EMPAGLIFLOZIN = "1545653"


def ts(text: str) -> dt.datetime:
    return dt.datetime.strptime(text, "%Y-%m-%d %H:%M")


def panel(cdm, person, at, visit=None, *, glucose=None, glucose_mg=None, ph=None, hco3=None, bhb=None,
          bhb_mg=None, na=None, cl=None):
    """Add the results given, all at one time."""
    for code, value, unit in ((GLUCOSE_MMOL, glucose, "mmol/L"), (GLUCOSE_MG, glucose_mg, "mg/dL"),
                              (PH_VENOUS, ph, "[pH]"), (BICARBONATE, hco3, "mmol/L"), (BHB, bhb, "mmol/L"),
                              (BHB, bhb_mg, "mg/dL"), (SODIUM, na, "mmol/L"), (CHLORIDE, cl, "mmol/L")):
        if value is not None:
            cdm.lab(person, code, value, unit=unit, at=at, visit=visit)


def adult(cdm, person, *, diabetes="E10.9", birth="1980-05-01"):
    cdm.person(person, birth=birth)
    if diabetes:
        cdm.condition(person, diabetes, date="2010-01-01")


def classic(cdm, person, day, *, visit_id, end, resolve=True, kind="ERIP"):
    """Classic DKA at 09:30/09:40 of `day`; resolved at 21:40 when `resolve`."""
    cdm.visit(visit_id, person_id=person, start=f"{day} 09:00", end=end, kind=kind)
    panel(cdm, person, f"{day} 09:30", visit_id, glucose_mg=540, ph=7.12, hco3=9, na=135, cl=100)
    panel(cdm, person, f"{day} 09:40", visit_id, bhb=5.2)
    if resolve:
        panel(cdm, person, f"{day} 21:40", visit_id, glucose=9.0, ph=7.35, hco3=19, bhb=0.4, na=138, cl=106)


def threshold_case(cdm, person, *, glucose=20.0, bhb=4.0, ph=7.2, hco3=20.0):
    """A person with no diabetes record: every criterion must come from the labs."""
    cdm.person(person, birth="1970-01-01")
    visit = 1000 + person
    cdm.visit(visit, person_id=person, start="2023-06-01 10:00", end="2023-06-02 10:00", kind="ER")
    panel(cdm, person, "2023-06-01 10:30", visit, glucose=glucose, ph=ph, hco3=hco3, bhb=bhb)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    cdm = MiniCdm()
    # 1 classic DKA, type 1 diabetes, coded E10.10 on its visit
    adult(cdm, 1)
    classic(cdm, 1, "2024-03-01", visit_id=10, end="2024-03-04 12:00")
    cdm.condition(1, "E10.10", at="2024-03-01 11:00", visit=10)
    # 2 euglycaemic DKA in an SGLT2-inhibitor user with type 2 diabetes (glucose 9.5 mmol/L)
    adult(cdm, 2, diabetes="E11.9")
    cdm.drug(2, EMPAGLIFLOZIN, start="2023-01-01 08:00", end="2024-12-31 08:00")
    cdm.visit(20, person_id=2, start="2024-05-10 08:00", end="2024-05-12 10:00", kind="ERIP")
    panel(cdm, 2, "2024-05-10 08:30", 20, glucose=9.5, ph=7.21, hco3=12, bhb=4.8)
    panel(cdm, 2, "2024-05-10 20:30", 20, glucose=8.0, ph=7.36, hco3=20, bhb=0.3)
    # 3 alcoholic ketoacidosis without diabetes; 4 starvation ketosis; 5 lactic acidosis in type 2
    # diabetes (no ketosis); 6 hyperosmolar hyperglycaemic state (no acidosis, little ketosis)
    adult(cdm, 3, diabetes=None)
    cdm.visit(30, person_id=3, start="2024-02-01 22:00", end="2024-02-03 10:00", kind="ERIP")
    panel(cdm, 3, "2024-02-01 22:30", 30, glucose=6.0, ph=7.25, hco3=14, bhb=5.5)
    adult(cdm, 4, diabetes=None)
    cdm.visit(40, person_id=4, start="2024-02-01 10:00", end="2024-02-01 18:00", kind="ER")
    panel(cdm, 4, "2024-02-01 10:30", 40, glucose=4.5, ph=7.36, hco3=20, bhb=3.2)
    adult(cdm, 5, diabetes="E11.9")
    cdm.visit(50, person_id=5, start="2024-02-01 10:00", end="2024-02-03 18:00", kind="ERIP")
    panel(cdm, 5, "2024-02-01 10:30", 50, glucose=12.0, ph=7.15, hco3=11, bhb=0.3)
    adult(cdm, 6, diabetes="E11.9")
    cdm.visit(60, person_id=6, start="2024-02-01 10:00", end="2024-02-05 18:00", kind="ERIP")
    panel(cdm, 6, "2024-02-01 10:30", 60, glucose=50.0, ph=7.34, hco3=22, bhb=0.8)
    # 7 mixed units: glucose in mg/dL then mmol/L, BHB in mg/dL (52 mg/dL = 5.0 mmol/L)
    adult(cdm, 7)
    cdm.visit(70, person_id=7, start="2024-04-01 09:00", end="2024-04-03 12:00", kind="ERIP")
    panel(cdm, 7, "2024-04-01 09:30", 70, glucose_mg=450, ph=7.18, hco3=11, bhb_mg=52.0)
    panel(cdm, 7, "2024-04-01 19:30", 70, glucose=8.2, ph=7.33, hco3=18.5, bhb_mg=5.0)
    # 8 rebound: resolved at 21:40, meets the diagnosis again at 05:40 the next day (8 h later,
    # inside the 24 h rebound window and the 72 h gap), resolves again at 15:40
    adult(cdm, 8)
    classic(cdm, 8, "2024-06-01", visit_id=80, end="2024-06-04 12:00")
    panel(cdm, 8, "2024-06-02 05:40", 80, glucose=16.0, ph=7.22, hco3=13, bhb=3.6)
    panel(cdm, 8, "2024-06-02 15:40", 80, glucose=8.0, ph=7.36, hco3=20, bhb=0.3)
    # 9 two episodes five months apart (further than the 72 h gap)
    adult(cdm, 9)
    classic(cdm, 9, "2024-01-10", visit_id=90, end="2024-01-12 12:00")
    classic(cdm, 9, "2024-06-10", visit_id=91, end="2024-06-12 12:00")
    # 10 death before resolution: died 6 h after onset, inside the stay
    adult(cdm, 10)
    classic(cdm, 10, "2024-03-05", visit_id=100, end="2024-03-05 15:40", resolve=False)
    cdm.death(10, at="2024-03-05 15:40")
    # 11 discharged before resolution (the stay ends at 19:00, no resolving result before)
    adult(cdm, 11)
    classic(cdm, 11, "2024-03-06", visit_id=110, end="2024-03-06 19:00", resolve=False)
    panel(cdm, 11, "2024-03-06 22:00", None, glucose=8.0, ph=7.38, hco3=22, bhb=0.2)  # after discharge
    # 12 a child of 12 (ISPAD only); 13 aged exactly 18 at onset (adults only)
    adult(cdm, 12, birth="2012-01-15")
    classic(cdm, 12, "2024-07-01", visit_id=120, end="2024-07-03 12:00")
    adult(cdm, 13, birth="2006-07-01")
    classic(cdm, 13, "2024-07-01", visit_id=130, end="2024-07-03 12:00")
    # 14 onset in the emergency visit, resolution in the admission that followed it
    adult(cdm, 14)
    cdm.visit(140, person_id=14, start="2024-08-01 09:00", end="2024-08-01 13:00", kind="ER")
    cdm.visit(141, person_id=14, start="2024-08-01 13:00", end="2024-08-03 10:00", kind="IP", preceding=140)
    panel(cdm, 14, "2024-08-01 09:30", 140, glucose=25.0, ph=7.05, hco3=7, bhb=6.5)
    panel(cdm, 14, "2024-08-01 23:30", 141, glucose=9.0, ph=7.34, hco3=18, bhb=0.5)
    cdm.condition(14, "E10.11", at="2024-08-01 14:00", visit=141)
    # 15 a DKA code on a visit with no DKA in the labs (found by the code finder only)
    adult(cdm, 15)
    cdm.visit(150, person_id=15, start="2024-09-01 09:00", end="2024-09-02 09:00", kind="ERIP")
    panel(cdm, 15, "2024-09-01 09:30", 150, glucose=18.0, ph=7.38, hco3=24, bhb=0.4)
    cdm.condition(15, "E10.10", at="2024-09-01 12:00", visit=150)
    # 20.. values just either side of each 2024-consensus threshold, no diabetes record
    threshold_case(cdm, 20, glucose=11.1)              # >= 11.1: found
    threshold_case(cdm, 21, glucose=11.0)              # < 11.1: not
    threshold_case(cdm, 22, bhb=3.0)                   # >= 3.0: found
    threshold_case(cdm, 23, bhb=2.9)                   # < 3.0: not
    threshold_case(cdm, 24, ph=7.29)                   # < 7.3: found
    threshold_case(cdm, 25, ph=7.30)                   # not < 7.3 (ADA: <= 7.30 is mild DKA)
    threshold_case(cdm, 26, ph=7.35, hco3=17.9)        # bicarbonate < 18: found
    threshold_case(cdm, 27, ph=7.35, hco3=18.0)        # not
    threshold_case(cdm, 28, glucose=14.0, ph=7.25)     # ADA > 13.9: found; consensus moderate (7.25)
    threshold_case(cdm, 29, glucose=13.9, ph=7.26)     # ADA: not > 13.9; consensus mild (> 7.25)
    path = cdm.write(tmp_path_factory.mktemp("episodes") / "extract", fmt="parquet")
    out = path.parent / "out"
    result = find_episodes(path, DEFINITIONS, out=out)
    return result


def episodes_of(run, person, definition="consensus-2024"):
    return run.episodes.filter((pl.col("person_id") == person) & (pl.col("definition") == definition)).to_dicts()


def test_classic_dka_found_by_every_adult_definition(run):
    for definition in ("consensus-2024", "ada-2009", "jbds-2023"):
        [episode] = episodes_of(run, 1, definition)
        # onset: the first time point with every criterion met; the BHB arrives at 09:40
        assert episode["onset_datetime"] == ts("2024-03-01 09:40")
        assert episode["resolution_datetime"] == ts("2024-03-01 21:40")
        assert episode["end_reason"] == "resolved"
        assert episode["hours_to_resolution"] == pytest.approx(12.0)
        assert episode["visit_occurrence_id"] == 10
        assert episode["episode_id"] == f"{definition}:1:20240301094000"
        assert episode["glucose_mmol_l"] == pytest.approx(540 / 18.016, rel=1e-4)
        assert episode["ph"] == pytest.approx(7.12)
        assert episode["bicarbonate_mmol_l"] == 9.0
        assert episode["bhb_mmol_l"] == 5.2
        # anion gap Na - (Cl + HCO3) = 135 - (100 + 9) = 26
        assert episode["anion_gap_mmol_l"] == pytest.approx(26.0)
    # bicarbonate 9 < 10: severe in ADA 2009 Table 1 and in the 2024 consensus; JBDS grades none
    assert episodes_of(run, 1, "consensus-2024")[0]["severity"] == "severe"
    assert episodes_of(run, 1, "ada-2009")[0]["severity"] == "severe"
    assert episodes_of(run, 1, "jbds-2023")[0]["severity"] is None
    assert episodes_of(run, 1, "ispad-2022") == []      # an adult


def test_euglycaemic_dka_found_through_known_diabetes_missed_by_ada(run):
    for definition in ("consensus-2024", "jbds-2023"):
        [episode] = episodes_of(run, 2, definition)
        assert episode["onset_datetime"] == ts("2024-05-10 08:30")
        assert episode["known_diabetes"] is True
        assert episode["resolution_datetime"] == ts("2024-05-10 20:30")
    # pH 7.21 is in 7.00-7.25 and bicarbonate 12 in 10 to < 15: moderate (2024 consensus)
    assert episodes_of(run, 2)[0]["severity"] == "moderate"
    assert episodes_of(run, 2, "ada-2009") == []        # ADA 2009 needs glucose > 250 mg/dL


@pytest.mark.parametrize("person, mimic", [(3, "alcoholic ketoacidosis"), (4, "starvation ketosis"),
                                           (5, "lactic acidosis"), (6, "hyperosmolar state")])
def test_mimics_rejected_by_every_definition(run, person, mimic):
    found = run.episodes.filter(pl.col("person_id") == person)
    assert found.height == 0, mimic


def test_mixed_units_give_the_same_episode(run):
    [episode] = episodes_of(run, 7)
    assert episode["glucose_mmol_l"] == pytest.approx(450 / 18.016, rel=1e-4)
    assert episode["bhb_mmol_l"] == pytest.approx(52.0 / 10.41, rel=1e-3)
    # resolution: BHB 5.0 mg/dL = 0.48 mmol/L < 0.6 and pH 7.33 >= 7.3
    assert episode["resolution_datetime"] == ts("2024-04-01 19:30")
    [ada] = episodes_of(run, 7, "ada-2009")
    # ADA resolution: glucose 8.2 < 11.1 and two of bicarbonate 18.5 >= 15, pH 7.33 > 7.3
    assert ada["resolution_datetime"] == ts("2024-04-01 19:30")


@pytest.mark.parametrize("person, found", [(20, True), (21, False), (22, True), (23, False), (24, True),
                                           (25, False), (26, True), (27, False)])
def test_consensus_thresholds_either_side(run, person, found):
    assert len(episodes_of(run, person)) == (1 if found else 0)


def test_ada_thresholds_and_consensus_severity_bands(run):
    assert len(episodes_of(run, 25, "ada-2009")) == 1    # pH 7.30 <= 7.30: mild DKA in ADA 2009
    assert episodes_of(run, 25, "ada-2009")[0]["severity"] == "mild"
    assert len(episodes_of(run, 28, "ada-2009")) == 1    # glucose 14.0 > 13.9
    assert len(episodes_of(run, 29, "ada-2009")) == 0    # glucose 13.9 is not > 13.9
    assert episodes_of(run, 28)[0]["severity"] == "moderate"   # pH 7.25 is moderate (7.00-7.25)
    assert episodes_of(run, 29)[0]["severity"] == "mild"       # pH 7.26: > 7.25 to < 7.30


def test_rebound_inside_the_gap_marks_the_episode(run):
    [episode] = episodes_of(run, 8)
    assert episode["is_rebound"] is True
    assert episode["rebound_datetime"] == ts("2024-06-02 05:40")
    assert episode["resolution_datetime"] == ts("2024-06-01 21:40")
    assert episodes_of(run, 1)[0]["is_rebound"] is False


def test_two_episodes_further_apart_than_the_gap(run):
    found = episodes_of(run, 9)
    assert [e["onset_datetime"] for e in found] == [ts("2024-01-10 09:40"), ts("2024-06-10 09:40")]
    assert [e["episode_number"] for e in found] == [1, 2]
    assert [e["visit_occurrence_id"] for e in found] == [90, 91]


def test_death_before_resolution(run):
    [episode] = episodes_of(run, 10)
    assert episode["end_reason"] == "died"
    assert episode["end_datetime"] == ts("2024-03-05 15:40")
    assert episode["resolution_datetime"] is None
    assert episode["hours_to_resolution"] is None


def test_discharge_before_resolution(run):
    [episode] = episodes_of(run, 11)
    assert episode["end_reason"] == "discharged_unresolved"
    assert episode["end_datetime"] == ts("2024-03-06 19:00")
    assert episode["resolution_datetime"] is None


def test_population_filter_child_and_adult(run):
    assert len(episodes_of(run, 12, "ispad-2022")) == 1
    assert episodes_of(run, 12, "ispad-2022")[0]["age_years_at_onset"] == 12
    assert episodes_of(run, 12) == []
    assert episodes_of(run, 13)[0]["age_years_at_onset"] == 18     # 18th birthday: an adult
    assert episodes_of(run, 13, "ispad-2022") == []


def test_emergency_visit_then_admission_is_one_stay(run):
    [episode] = episodes_of(run, 14)
    assert episode["visit_occurrence_id"] == 140
    assert episode["discharge_datetime"] == ts("2024-08-03 10:00")
    assert episode["resolution_datetime"] == ts("2024-08-01 23:30")
    assert episode["severity"] == "severe"          # pH 7.05 ... bicarbonate 7 < 10, BHB 6.5 > 6


def test_code_finder_and_agreement(run):
    codes = run.code_episodes
    assert sorted(codes.get_column("person_id").to_list()) == [1, 14, 15]
    row = run.agreement.filter((pl.col("definition_a") == "consensus-2024") & (pl.col("definition_b") == CODE_FINDER))
    [row] = row.to_dicts()
    # codes: persons 1, 14, 15; consensus episodes overlapping them: 1 and 14
    assert row["both_b"] == 2 and row["only_b"] == 1
    assert row["only_a"] == row["episodes_a"] - row["both"]


def test_attrition_in_order(run):
    steps = run.attrition.filter(pl.col("definition") == "consensus-2024")
    assert steps.get_column("step").to_list() == list(range(1, steps.height + 1))
    assert steps.get_column("name").to_list()[-1] == "population"
    persons = steps.get_column("persons").to_list()
    assert persons == sorted(persons, reverse=True)
    assert steps.row(-1, named=True)["episodes"] == run.episodes.filter(pl.col("definition") == "consensus-2024").height


def test_outputs_written_in_contract(run):
    out = run.out
    names = {path.name for path in out.iterdir()}
    assert {"episodes.parquet", "attrition.csv", "quarantine.parquet", "data_quality.csv", "manifest.json",
            "agreement.csv"} <= names
    episodes = pl.read_parquet(out / "episodes.parquet")
    assert tuple(episodes.columns) == EPISODE_COLUMNS
    assert episodes.schema["person_id"] == pl.Int64
    assert episodes.schema["visit_occurrence_id"] == pl.Int64
    assert set(episodes.get_column("definition")) <= set(DEFINITIONS)
    assert set(episodes.get_column("end_reason")) <= {"resolved", "discharged_unresolved", "died", "data_end"}
    assert episodes.get_column("episode_id").n_unique() == episodes.height
    manifest = json.loads((out / "manifest.json").read_text())
    assert [d["name"] for d in manifest["definitions"]] == DEFINITIONS
    assert all(len(d["sha256"]) == 64 for d in manifest["definitions"])
    assert manifest["source"]["digest"]
    assert manifest["packages"]["duckdb"]
    assert not [p for p in out.parent.iterdir() if p.name.startswith(".out.")]   # no staging left


def test_quarantine_of_a_written_run_is_the_folders_and_the_same_without_a_folder(run):
    """With out, result.quarantine is read from out/quarantine.parquet on first use (not held
    beside the run's DuckDB session); the rows are those of a run without a folder."""
    from cohort.episodes import EpisodeResult

    written = run.quarantine
    assert written.equals(pl.read_parquet(run.out / "quarantine.parquet"))
    assert tuple(written.columns) == ("source_table", "source_row_id", "person_id", "reason", "detail")
    held = find_episodes(run.out.parent / "extract", DEFINITIONS)
    assert held.out is None and held.quarantine.equals(written)
    with pytest.raises(CohortError, match="needs the quarantine frame, or out"):
        EpisodeResult(episodes=held.episodes, attrition=held.attrition, quarantine=None,
                      data_quality=held.data_quality, agreement=held.agreement, manifest={})


def test_refuses_a_folder_with_other_files(tmp_path):
    from cohort._errors import InputError

    (tmp_path / "notes.txt").write_text("mine")
    with pytest.raises(InputError, match=r"other file\(s\) \(notes.txt\)"):
        find_episodes(tmp_path / "missing-extract", ["consensus-2024"], out=tmp_path)


def test_refuses_a_definition_asked_twice(tmp_path):
    from cohort._errors import InputError

    with pytest.raises(InputError, match="given twice"):
        find_episodes(tmp_path, ["ada-2009", "ada-2009"])


def test_unknown_definition_says_did_you_mean(tmp_path):
    from cohort._errors import DefinitionError

    with pytest.raises(DefinitionError, match="jbds-2023"):
        find_episodes(tmp_path, ["jbds-2032"])


def test_episode_loop_narrowing_keeps_the_chain_and_restores_the_tables(tmp_path):
    # The episode rules of the 2024 consensus definition (cohort/definitions/consensus-2024.yaml,
    # Umpierrez et al., Diabetes Care 2024;47:1257-1275) with the toolkit's 72 h episode gap:
    # person 1 has DKA on 10 January, again on 12 January (inside the gap after the 21:40
    # resolution, so no new episode), then on 10 February and 10 March (each further than the gap):
    # three episodes, worked by hand. Person 2 has one. After the first loop step only person 1 is
    # followed, so the loop narrows its tables (cohort.episodes._narrow_pending) and must still find
    # episodes 2 and 3, then leave the session with the full tables of sql/41 and sql/43.
    from cohort._compile import compile_criterion
    from cohort._labs import prepare_lab_events
    from cohort._sql import run_recipe
    from cohort.definitions import load_definition
    from cohort.episodes import build_lab_state, episodes_in_session
    from cohort.source import open_extract

    cdm = MiniCdm()
    adult(cdm, 1)
    for visit_id, day in ((10, "2024-01-10"), (11, "2024-01-12"), (12, "2024-02-10"), (13, "2024-03-10")):
        classic(cdm, 1, day, visit_id=visit_id, end=f"{day} 23:00")
    adult(cdm, 2)
    classic(cdm, 2, "2024-01-10", visit_id=20, end="2024-01-10 23:00")
    path = cdm.write(tmp_path / "extract", fmt="parquet")
    definition = load_definition("consensus-2024")
    with open_extract(path) as extract:
        con = extract.con
        prepare_lab_events(extract)
        run_recipe(con, "30_person_diabetes.sql", "dka_person_diabetes", {})
        build_lab_state(con, [definition])
        seconds: dict[str, float] = {}
        frame, _ = episodes_in_session(con, definition, seconds=seconds)
        assert "44_narrow" in seconds  # the narrowing ran
        onsets = frame.filter(pl.col("person_id") == 1).sort("onset_datetime")
        assert onsets.get_column("onset_datetime").to_list() == [
            ts("2024-01-10 09:40"), ts("2024-02-10 09:40"), ts("2024-03-10 09:40")]
        assert onsets.get_column("episode_number").to_list() == [1, 2, 3]
        assert frame.filter(pl.col("person_id") == 2).height == 1
        # sql/42 keeps only candidates that can be onsets: the first, and those more than the gap
        # after it; 12 January 09:40 is 48 h after the first, so it is a candidate but no onset.
        def times(table: str) -> list[dt.datetime]:
            return [row[0] for row in con.execute(
                f"select onset_datetime from {table} where person_id = 1 order by 1").fetchall()]
        assert ts("2024-01-12 09:40") in times("dka_onset_candidates")
        assert times("dka_onset_context") == [
            ts("2024-01-10 09:40"), ts("2024-02-10 09:40"), ts("2024-03-10 09:40")]
        left = {name for (name,) in con.execute("select table_name from duckdb_tables()").fetchall()}
        assert not {name for name in left if name.endswith(("_full", "_narrowed"))}
        for recipe, table in (("41_resolution_candidates.sql", "dka_resolution_candidates"),
                              ("43_onset_censoring.sql", "dka_onset_context")):
            kept = con.sql(f"select * from {table}").pl()
            slots = {"resolution_screen": compile_criterion(
                definition.resolution.when, column_for=lambda analyte: f"lab_state.rs_{analyte}",
                flag_for=lambda flag: f"lab_state.{flag}"), "episode_gap_hours": 72.0}
            run_recipe(con, recipe, f"{table}_again", slots)
            again = con.sql(f"select * from {table}_again").pl()
            assert kept.sort(kept.columns).equals(again.sort(again.columns)), table


def test_definitions_accepting_other_specimens_in_one_run_give_their_own_episodes(tmp_path):
    # The 2024 consensus definition (Umpierrez et al., Diabetes Care 2024;47:1257-1275) accepts pH
    # of any specimen; a copy of it restricted to venous pH (timing.ph_specimens, a toolkit
    # option) must not see an arterial-only acidosis. In one run the two share the lab step's
    # time points and get one lab state each, which must be the one each alone would give.
    # Person 1: classic DKA on venous pH, found by both. Person 2: glucose 20 mmol/L, BHB 5.0,
    # bicarbonate 20 (not < 18), arterial pH 7.10 only: acidosis by pH alone, from an arterial
    # sample, so found by the full definition only.
    from cohort.definitions import load_definition, parse_definition

    cdm = MiniCdm()
    adult(cdm, 1)
    classic(cdm, 1, "2024-03-01", visit_id=10, end="2024-03-04 12:00")
    adult(cdm, 2)
    cdm.visit(20, person_id=2, start="2024-04-01 09:00", end="2024-04-03 12:00", kind="ERIP")
    panel(cdm, 2, "2024-04-01 09:30", 20, glucose=20.0, hco3=20, bhb=5.0)
    cdm.lab(2, "2744-1", 7.10, unit="[pH]", at="2024-04-01 09:30", visit=20)  # pH of arterial blood
    panel(cdm, 2, "2024-04-01 21:30", 20, glucose=8.0, ph=7.36, hco3=22, bhb=0.3)
    path = cdm.write(tmp_path / "extract", fmt="parquet")
    full = load_definition("consensus-2024")
    venous = parse_definition({**full.to_dict(), "name": "consensus-venous"},
                              overrides={"timing.ph_specimens": ["venous"]})
    together = find_episodes(path, [full, venous]).episodes
    alone = pl.concat([find_episodes(path, [item]).episodes for item in (full, venous)])
    assert together.sort("definition", "person_id").equals(alone.sort("definition", "person_id"))
    found = {(row["definition"], row["person_id"]) for row in together.to_dicts()}
    assert found == {("consensus-2024", 1), ("consensus-2024", 2), ("consensus-venous", 1)}
