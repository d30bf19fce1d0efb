"""load_feature_inputs on a tiny CDM extract (tests/cdmkit.MiniCdm), then build_features.

The extract is invented (one person of the fictional Harrowmere Valley network and a bystander);
the expected values follow by hand from the rows written below and the conversions and thresholds
named beside them (glucose mg/dL -> mmol/L by 18.016, from glucose's molar mass 180.16 g/mol:
CLINICAL.md "Formulas and conversions"; hypoglycaemia < 4.0 mmol/L, JBDS [from memory]).
"""

from __future__ import annotations

import datetime as dt

import polars as pl
import pytest

from cohort.features import build_features, load_feature_inputs, run_features
from cohort.source import open_extract
from tests.cdmkit import MiniCdm


def t(text: str) -> dt.datetime:
    return dt.datetime.strptime(text, "%Y-%m-%d %H:%M")


@pytest.fixture(scope="module")
def extract_path(tmp_path_factory):
    cdm = MiniCdm()
    cdm.person(1, birth="1990-03-02", gender="F", care_site_id=9)
    cdm.person(2, birth="1960-01-01", gender="M", care_site_id=9)  # no episode
    cdm.visit(100, person_id=1, start="2024-03-01 08:00", end="2024-03-01 12:00", kind="ER", care_site_id=7)
    cdm.visit(101, person_id=1, start="2024-03-01 12:30", end="2024-03-05 10:00", kind="IP", care_site_id=7)
    cdm.visit_detail(1000, visit_occurrence_id=101, person_id=1, start="2024-03-01 13:00",
                     end="2024-03-02 13:00", kind="ICU")
    # labs: ketones, glucose partly in mg/dL (3.5 mmol/L x 18.016 = 63.056 mg/dL), potassium
    cdm.lab(1, "53060-9", 5.0, unit="mmol/L", at="2024-03-01 09:00", visit=100)
    cdm.lab(1, "53060-9", 2.0, unit="mmol/L", at="2024-03-01 15:00", visit=101)
    cdm.lab(1, "14743-9", 25.0, unit="mmol/L", at="2024-03-01 09:00", visit=100)
    cdm.lab(1, "41653-7", 63.056, unit="mg/dL", at="2024-03-01 20:00", visit=101)
    cdm.lab(1, "2823-3", 3.2, unit="mmol/L", at="2024-03-01 14:00", visit=101)
    cdm.lab(1, "4548-4", 75.0, unit="mmol/mol", at="2023-12-01 09:00")
    # drugs: IV regular insulin (two rows, 3 h apart: a restart), SC glargine, an SGLT2 inhibitor
    # by date only, and a subcutaneous regular insulin that is no infusion
    cdm.drug(1, "253182", start="2024-03-01 10:00", end="2024-03-01 23:00", route="intravenous", visit=100)
    cdm.drug(1, "253182", start="2024-03-02 02:00", end="2024-03-02 11:00", route="intravenous", visit=101)
    cdm.drug(1, "253182", start="2024-03-02 12:00", end="2024-03-02 12:05", route="subcutaneous", visit=101)
    cdm.drug(1, "274783", start="2024-03-02 08:00", end="2024-03-02 08:05", route="subcutaneous", visit=101)
    cdm.drug(1, "1545653", start=None, start_date="2024-01-01", end_date="2024-02-28")
    cdm.condition(1, "E10.10", at="2024-03-01 11:00", visit=100)
    cdm.condition(1, "E10.9", at="2020-05-05 10:00")
    cdm.condition(1, "E11.9", at="2021-05-05 10:00")
    cdm.death(1, date="2024-09-01")
    return cdm.write(tmp_path_factory.mktemp("features_loader") / "extract", fmt="parquet")


EPISODES = pl.DataFrame(
    {
        "episode_id": ["jbds-2023:1:20240301090000"],
        "person_id": [1],
        "definition": ["jbds-2023"],
        "visit_occurrence_id": [100],
        "onset_datetime": [t("2024-03-01 09:00")],
        "resolution_datetime": [t("2024-03-02 09:00")],
        "end_datetime": [t("2024-03-02 09:00")],
        "end_reason": ["resolved"],
        "hours_to_resolution": [24.0],
        "severity": ["moderate"],
    }
)


def test_loader_reads_the_extract(extract_path):
    with open_extract(extract_path) as extract:
        inputs = load_feature_inputs(extract, EPISODES)
    # only the two intravenous regular-insulin rows are infusions
    assert inputs.infusions.sort("start_datetime")["start_datetime"].to_list() == [
        t("2024-03-01 10:00"), t("2024-03-02 02:00")]
    assert inputs.basal_doses["start_datetime"].to_list() == [t("2024-03-02 08:00")]
    assert sorted(inputs.persons["sex"].to_list()) == ["female", "male"]
    kinds = dict(zip(inputs.visits["visit_occurrence_id"].to_list(), inputs.visits["visit_kind"].to_list()))
    assert kinds == {100: "emergency", 101: "inpatient"}
    assert inputs.visit_details["visit_kind"].to_list() == ["icu"]
    glucose = inputs.labs.filter(pl.col("analyte") == "glucose").sort("event_datetime")["value"].to_list()
    assert glucose == pytest.approx([25.0, 63.056 / 18.016])
    assert inputs.hba1c["value_mmol_mol"].to_list() == [75.0]
    # SGLT2 inhibitor by date only: start midnight 2024-01-01, end the midnight after 2024-02-28
    assert inputs.sglt2_exposures.row(0)[1:3] == (dt.datetime(2024, 1, 1), dt.datetime(2024, 2, 29))
    types = set(inputs.diabetes_records["diabetes_type"].to_list())
    assert {"type1", "type2"} <= types
    assert inputs.deaths["death_date"].to_list() == [dt.date(2024, 9, 1)]


def test_features_from_the_extract(extract_path):
    with open_extract(extract_path) as extract:
        inputs = load_feature_inputs(extract, EPISODES)
    tables = build_features(EPISODES, inputs)
    r = tables.episode_features.row(0, named=True)
    # arrival 08:00 (ER visit chained to the ward), insulin 10:00: 2 h; restart at 02:00 after
    # a stop at 23:00 (3 h > 1 h), before resolution 09:00; closed 11:00, after resolution
    assert r["arrival_datetime"] == t("2024-03-01 08:00")
    assert r["hours_arrival_to_insulin"] == pytest.approx(2.0)
    assert r["infusion_count"] == 2
    assert r["has_restart_after_early_stop"] is True
    assert r["is_premature_closure"] is False
    assert r["hours_basal_before_closure"] == pytest.approx(3.0)  # 08:00 glargine, 11:00 closure
    # 3.5 mmol/L at 20:00 (sent as 63.056 mg/dL) is below 4.0
    assert r["has_hypoglycaemia"] is True
    assert r["has_hypokalaemia"] is True  # 3.2 < 3.5 at 14:00
    assert r["has_icu_stay"] is True
    assert r["care_site_id"] == 7
    assert r["age_at_onset"] == 33
    assert r["sex"] == "female"
    # E10.10 (2024, a type 1 code and a DKA code on one day), E10.9 (2020): type 1 on 2 days,
    # type 2 (E11.9) on 1 day
    assert r["diabetes_type"] == "type1"
    assert r["hba1c_mmol_mol"] == pytest.approx(75.0)
    # the SGLT2 inhibitor ended 2024-02-29 00:00, 1 day 9 h before onset: within the 3-day grace
    assert r["is_sglt2i_at_onset"] is True
    # death 2024-09-01 (date only): follow-up to 09-02 00:00; from 03-02 09:00 that is 183 days
    # and 15 h: 30 and 90 days known (false), 365 days null
    assert r["days_of_follow_up"] == pytest.approx(183 + 15 / 24)
    assert (r["recurs_within_30d"], r["recurs_within_90d"], r["recurs_within_365d"]) == (False, False, None)
    assert tables.person_summary.height == 2  # both persons, one with no episode
    assert tables.unlinked_infusions.height == 0


def test_run_features_writes_tables_and_manifest(extract_path, tmp_path):
    import json

    episodes_dir = tmp_path / "episodes"
    episodes_dir.mkdir()
    EPISODES.write_parquet(episodes_dir / "episodes.parquet")
    tables = run_features(episodes_dir, extract_path, tmp_path / "features", threads=1)
    manifest = json.loads((tmp_path / "features" / "features_manifest.json").read_text())
    assert manifest["rows"]["episode_features"] == tables.episode_features.height == 1
    assert manifest["options"]["restart_gap_hours"] == 1.0
    assert (tmp_path / "features" / "episode_features.parquet").is_file()
    from cohort._errors import InputError

    with pytest.raises(InputError, match="no episodes file"):
        run_features(tmp_path / "nowhere", extract_path)


def test_loader_sql_parses_for_postgres_and_spark():
    # the loader's queries keep to portable SQL (rules: a later issue runs them on PostgreSQL 15
    # and Spark 4); sqlglot (a general SQL parser) must read them as DuckDB and write both dialects
    import sqlglot

    from cohort._sql import render
    from cohort.features import _loader

    names = [name for name in dir(_loader) if name.startswith("SQL_")]
    assert len(names) == 9
    for name in names:
        text = getattr(_loader, name)
        if "{{" in text:
            text = render(text, {"drug_classes": ("insulin_basal",)})
        tree = sqlglot.parse_one(text, read="duckdb")
        assert tree.find(sqlglot.exp.Star) is None, name
        for dialect in ("postgres", "spark"):
            assert sqlglot.transpile(text, read="duckdb", write=dialect), (name, dialect)


def test_features_take_the_as_of_date_of_the_episodes_run(tmp_path) -> None:
    # the lab quarantine of the feature stage must match the episodes run's (implausible_time is
    # relative to the run's as-of date), so run_features reads it from the episodes manifest
    import datetime as dt
    import json

    from cohort.features._build import _episodes_as_of

    folder = tmp_path / "episodes"
    folder.mkdir()
    (folder / "manifest.json").write_text(json.dumps({"parameters": {"as_of": "2026-06-30"}}))
    assert _episodes_as_of(folder / "episodes.parquet") == dt.date(2026, 6, 30)
    (folder / "manifest.json").write_text(json.dumps({"parameters": {}}))
    assert _episodes_as_of(folder / "episodes.parquet") is None
    assert _episodes_as_of(None) is None
