"""The statistics stage end to end on a synthetic extract, and the demo command (issues 2 and 5).

The estimates themselves are checked against published references in tests/test_stats_*.py; here
the stage must run every analysis the data support, list the others with a reason, and respect
each definition's population in the rate denominators.
"""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from cohort._errors import InputError
from cohort.analyse import run_analyses
from cohort.cli import main


@pytest.fixture(scope="module")
def results(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("analyse")
    assert main(["demo", "--persons", "3000", "--seed", "11", "--out", str(out), "--force", "--quiet"]) == 0
    return out


def test_demo_writes_every_stage_and_the_report(results: Path) -> None:
    for path in [
        "extract/measurement.parquet",
        "truth/episodes.parquet",
        "episodes/episodes.parquet",
        "episodes/attrition.csv",
        "features/episode_features.parquet",
        "stats/resolution_cox.csv",
        "report.html",
    ]:
        assert (results / path).is_file(), path


def test_adult_definition_rates_leave_out_childrens_person_time(results: Path, tmp_path: Path) -> None:
    summary = run_analyses(results / "features", tmp_path, definition="consensus-2024")
    assert "incidence_rates_by_age_band" in summary.written
    bands = pl.read_csv(summary.written["incidence_rates_by_age_band"])["age_band"].to_list()
    # consensus-2024 applies to adults (Umpierrez et al., Diabetes Care 2024): no band below 18
    assert not any(band.startswith(("0-", "5-", "10-")) for band in bands), bands
    person_time = pl.read_parquet(results / "features" / "person_time.parquet").filter(
        (pl.col("definition") == "consensus-2024")
        & (pl.col("age_years") >= 18)
        & pl.col("diabetes_type").is_in(["type1", "type2"])
    )
    rates = pl.read_csv(summary.written["incidence_rates_by_diabetes_type"])
    assert rates["events"].sum() == person_time["episodes"].sum()
    assert rates["person_years"].sum() == pytest.approx(person_time["person_years"].sum())


def test_models_run_or_say_why_not(results: Path, tmp_path: Path) -> None:
    summary = run_analyses(results / "features", tmp_path, definition="ispad-2022")
    recorded = json.loads((tmp_path / "analyses.json").read_text())
    assert recorded["written"] == sorted(summary.written)
    assert recorded["skipped"] == summary.skipped
    # among children (ISPAD 2022 population) everyone has type 1 diabetes in the synthetic
    # extract, so diabetes type is left out of the models and the omission is said
    assert "diabetes_type" in summary.skipped["resolution models: covariates left out"]
    assert "resolution_cox" in summary.written
    cox = pl.read_csv(summary.written["resolution_cox"])
    assert not cox["term"].str.starts_with("diabetes_type").any()


def test_unknown_definition_is_named(results: Path, tmp_path: Path) -> None:
    with pytest.raises(InputError, match="has no episodes of definition `ada-2099`; it holds ada-2009"):
        run_analyses(results / "features", tmp_path, definition="ada-2099")


def test_missing_features_folder_says_what_is_expected(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no episode_features.parquet under"):
        run_analyses(tmp_path, tmp_path / "out")


def test_covariate_level_without_events_is_left_out_of_the_cox_model_and_said() -> None:
    # A level with no event has no finite hazard ratio (monotone likelihood; Heinze G, Schemper
    # M. A solution to the problem of monotone likelihood in Cox regression. Biometrics
    # 2001;57:114-119; citation from memory): its rows are left out and the omission listed, rather than the model
    # refused (or, as before, a hazard ratio near 0 published). Invented rows.
    from cohort.analyse import AnalysisSummary, _without_eventless_levels

    frame = pl.DataFrame({
        "diabetes_type": ["type1"] * 4 + ["type2"] * 3 + ["other"] * 2 + [None],
        "sex": ["F", "M"] * 5,
        "is_resolved": [True, False, True, True, True, False, True, False, False, True],
    })
    summary = AnalysisSummary(out=Path("."), definition="x")
    kept = _without_eventless_levels(frame, ["diabetes_type", "sex"], "is_resolved", summary, "models")
    assert kept.height == 8 and "other" not in kept["diabetes_type"].to_list()
    assert kept["diabetes_type"].null_count() == 1  # missing values are not a level
    assert summary.skipped == {"models: levels left out": (
        "diabetes_type=other (2 rows) hold no event, so no hazard ratio exists for them; their "
        "rows are left out of the model")}
    untouched = AnalysisSummary(out=Path("."), definition="x")
    assert _without_eventless_levels(kept, ["diabetes_type"], "is_resolved", untouched, "models").equals(kept)
    assert untouched.skipped == {}
