"""write_report (cohort.report._html) and its disclosure-controlled tables (cohort.report._tables).

Behaviour tests on small hand-built results; the numbers are invented inputs, never reference
values. The disclosure rule checked is that of cohort.disclosure (small-cell suppression with
complementary suppression; Hundepool A et al. Statistical Disclosure Control. Wiley 2012, ch. 4).
"""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from cohort._errors import DisclosureError, InputError
from cohort.report import check_disclosure, write_report
from cohort.report._tables import attrition_table, km_truncate, share_table


def _results(root: Path, *, episodes_per_site: int = 40) -> Path:
    rng = np.random.default_rng(6)
    results = root / "results"
    (results / "episodes").mkdir(parents=True)
    (results / "features").mkdir(parents=True)
    pl.DataFrame({
        "definition": ["consensus-2024"] * 4, "step": [1, 2, 3, 4],
        "name": ["extract", "lab_results", "episodes", "population"],
        "description": ["persons", "with labs", "with an episode", "adults"],
        "persons": [500, 496, 150, 120], "episodes": [None, None, 230, 200],
    }).write_csv(results / "episodes" / "attrition.csv")
    pl.DataFrame({"table": ["measurement"] * 4, "reason": ["no_time", "duplicate", "implausible", "unit_unknown"],
                  "rows": [310, 44, 3, 0]}).write_csv(results / "episodes" / "data_quality.csv")
    rows = []
    start = dt.datetime(2024, 1, 1)
    for site in (1, 2, 3):
        for index in range(episodes_per_site):
            onset = start + dt.timedelta(days=int(rng.integers(0, 360)), hours=int(rng.integers(0, 24)))
            hours = float(rng.gamma(4, 4))
            resolved = bool(rng.random() < 0.9)
            rows.append({
                "episode_id": f"ep-{site}-{index}", "person_id": 1000 * site + index, "definition": "consensus-2024",
                "onset_datetime": onset, "end_datetime": onset + dt.timedelta(hours=hours),
                "end_reason": "resolved" if resolved else "discharged_unresolved",
                "hours_to_resolution": hours if resolved else None,
                "severity": ["mild", "moderate", "severe"][index % 3], "care_site_id": site,
                "hours_on_infusion": hours + 1.0,
                "is_insulin_within_target": bool(rng.random() < 0.6),
                "is_resolved_within_target": resolved and hours < 24,
                "is_premature_closure": bool(rng.random() < 0.3),
                "is_basal_overlap_met": bool(rng.random() < 0.5),
                "recurs_within_30d": bool(rng.random() < 0.2), "recurs_within_90d": bool(rng.random() < 0.4),
            })
    frame = pl.DataFrame(rows)
    frame.select("episode_id", "person_id", "definition", "onset_datetime", "end_datetime", "end_reason",
                 "hours_to_resolution", "severity").write_parquet(results / "episodes" / "episodes.parquet")
    frame.write_parquet(results / "features" / "episode_features.parquet")
    (results / "episodes" / "manifest.json").write_text(json.dumps({
        "definitions": [{"name": "consensus-2024", "sha256": "ab" * 32}],
        "source": {"format": "parquet", "digest": "cd" * 32}, "packages": {"polars": pl.__version__},
    }))
    return results


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    results = _results(root)
    summary = write_report(results, root / "out" / "report.html")
    return summary, summary.out_file.read_text(encoding="utf-8")


def _outside_scripts(page: str) -> str:
    return re.sub(r"<script>.*?</script>", "", page, flags=re.DOTALL)


def test_report_is_one_file_with_plotly_embedded_once(report):
    summary, page = report
    assert summary.charts >= 5
    assert page.count("<script>") == 1 + summary.charts       # the bundle, then one per chart
    assert page.count("Plotly.newPlot(") == summary.charts
    assert len(re.findall(r"\*\s*plotly\.js v\d", page)) == 1   # the bundle's banner, once
    html_only = _outside_scripts(page)
    assert not re.search(r"(src|href)\s*=\s*[\"']?(https?:)?//", html_only)
    assert "@import" not in html_only and "url(" not in html_only
    assert "default-src 'none'" in page


def test_cautions_sections_and_methods(report):
    summary, page = report
    assert page.index("Not for decisions about an individual patient") < page.index('id="cohort"')
    assert summary.sections == ("Cohort", "Definitions side by side", "Time to resolution", "Insulin-infusion audit",
                                "Recurrence and rates")
    assert "sha256 " + "ab" * 32 in page and "cd" * 32 in page
    assert "Umpierrez" in page                                  # criteria rendered with their citation
    assert any(part.startswith("Rates") for part, _ in summary.skipped)


def test_every_chart_has_title_axis_titles_and_a_table(report):
    _, page = report
    specs = re.findall(r"Plotly\.newPlot\(\s*\"[^\"]+\",\s*(\[.*?\]),\s*(\{.*?\}),\s*\{\"displaylogo\"", page, re.DOTALL)
    assert specs
    for _, layout_text in specs:
        layout = json.loads(layout_text)
        assert layout["title"]["text"]
        assert layout["xaxis"]["title"]["text"] and layout["yaxis"]["title"]["text"]
    assert page.count("<figure class=\"chart\"") == page.count("Data behind this chart")


def test_output_passes_the_disclosure_check_and_holds_no_identifiers(report):
    summary, page = report
    assert check_disclosure(summary.out_file) == []
    assert check_disclosure(summary.tables_dir) == []
    assert "ep-1-0" not in page and "person_id" not in _outside_scripts(page)
    attrition = pl.read_csv(next(summary.tables_dir.glob("*_attrition.csv")), infer_schema_length=0)
    # 500 -> 496 persons drops 4: the drop is "<10" and the 496 it could be recovered from is withheld
    assert attrition.filter(pl.col("step") == "2")["persons_excluded"].item() == "<10"
    assert attrition.filter(pl.col("step") == "2")["persons"].item() == "withheld"
    quality = pl.read_csv(next(summary.tables_dir.glob("*_data_quality.csv")), infer_schema_length=0)
    assert quality["rows"].to_list() == ["310", "withheld", "<10", "0"]


def test_no_single_withheld_hospital_within_a_standard(report):
    # complementary suppression across the hospitals of one standard, whose all-hospitals row is
    # published: a single withheld hospital could be recovered by subtraction
    summary, _ = report
    standards = pl.read_csv(next(summary.tables_dir.glob("*_standards.csv")), infer_schema_length=0)
    by_site = standards.filter(pl.col("hospital") != "all hospitals")
    withheld = by_site.group_by("standard").agg(pl.col("share").is_null().sum().alias("hidden"))
    assert (withheld["hidden"] != 1).all()


def test_curves_stop_before_fewer_than_threshold_remain():
    curve = km_truncate(pl.DataFrame({"group": ["a"] * 4, "time": [0.0, 1, 2, 3], "at_risk": [30, 12, 9, 12]}),
                        threshold=10)
    assert curve["time"].to_list() == [0.0, 1.0]


def test_missing_results_are_named_and_bad_arguments_rejected(tmp_path):
    (tmp_path / "empty").mkdir()
    summary = write_report(tmp_path / "empty", tmp_path / "r.html")
    reasons = dict(summary.skipped)
    assert "no attrition.csv" in reasons["Attrition"]
    assert "no episode_features.parquet" in reasons["Insulin-infusion audit"]
    assert summary.sections == ()
    with pytest.raises(InputError, match="not a folder"):
        write_report(tmp_path / "nope", tmp_path / "r.html")
    with pytest.raises(InputError, match=".html"):
        write_report(tmp_path / "empty", tmp_path / "r.txt")
    with pytest.raises(InputError, match="threshold"):
        write_report(tmp_path / "empty", tmp_path / "r.html", threshold=0)


def test_tables_of_the_statistics_stage_are_shown_after_disclosure_control(tmp_path):
    results = _results(tmp_path)
    (results / "stats").mkdir()
    pl.DataFrame({"group": ["type1", "type2", "other"], "person_id": [1, 2, 3], "events": [120.0, 14.0, 3.0],
                  "person_years": [1000.5, 300.2, 20.1], "rate": [0.12, 0.047, 0.15]}).write_csv(
        results / "stats" / "incidence_rates.csv")
    summary = write_report(results, tmp_path / "with_stats.html")
    shown = pl.read_csv(next(summary.tables_dir.glob("*_incidence_rates.csv")), infer_schema_length=0)
    assert "person_id" not in shown.columns
    assert shown["events"].to_list() == ["120", "withheld", "<10"]
    assert shown["rate"].to_list() == ["0.12", None, None]          # rate x person-years would give events back
    # a table of another name is shown as it is; the rate charts say which file they lack
    reasons = dict(summary.skipped)
    assert "incidence_rates_by_diabetes_type.csv" in reasons["Rates by diabetes type"]


def test_a_breach_found_by_the_scan_stops_the_report(tmp_path):
    # the report scans its own output: a stats table carrying an exact date in a text column is
    # caught, DisclosureError is raised and nothing is left behind
    results = _results(tmp_path)
    (results / "stats").mkdir()
    pl.DataFrame({"group": ["a"], "note": ["first seen 2024-03-05"]}).write_csv(results / "stats" / "notes.csv")
    with pytest.raises(DisclosureError, match="exact_date"):
        write_report(results, tmp_path / "leak" / "report.html")
    assert not (tmp_path / "leak" / "report.html").exists()
    assert list((tmp_path / "leak").iterdir()) == []              # no table folder, no staging folder


def test_share_withheld_when_the_complement_is_small():
    # complementary suppression: met + not met = the published denominator
    table = share_table(pl.DataFrame({"numerator": [45, 5, 30], "denominator": [50, 50, 60]}), threshold=10)
    assert table.rows() == [("withheld", "50", None), ("<10", "50", None), ("30", "60", 0.5)]
    # grouped: one withheld row among hospitals draws a second (the smallest other cell: 12 of 40)
    grouped = share_table(pl.DataFrame({"numerator": [5, 30, 12], "denominator": [50, 60, 40]}), threshold=10,
                          group_by=[])
    assert grouped["numerator"].to_list() == ["<10", "30", "withheld"]
    # a single small denominator draws the smallest other denominator
    dens = share_table(pl.DataFrame({"numerator": [0, 30, 12], "denominator": [4, 60, 40]}), threshold=10,
                       group_by=[])
    assert dens["denominator"].to_list() == ["<10", "60", "withheld"]


def test_attrition_small_drop_cannot_be_recovered_through_a_later_step():
    # 288 -> 286 (drop 2) -> 286 (drop 0): showing 286 at step 3 with "excluded: none" would give the
    # withheld 286 of step 2 back, and 288 - 286 = 2 with it. Drops are taken from the last count shown.
    shown = attrition_table(pl.DataFrame({"step": [1, 2, 3, 4], "name": list("abcd"), "description": [""] * 4,
                                          "persons": [288, 286, 286, 240]}), threshold=10)
    assert shown["persons"].to_list() == ["288", "withheld", "withheld", "240"]
    assert shown["persons_excluded"].to_list() == ["", "<10", "<10", "48"]


def test_attrition_excluded_counts():
    shown = attrition_table(pl.DataFrame({"step": [1, 2, 3], "name": ["a", "b", "c"], "description": ["", "", ""],
                                          "persons": [100, 80, 75]}), threshold=10)
    assert shown["persons"].to_list() == ["100", "80", "withheld"]
    assert shown["persons_excluded"].to_list() == ["", "20", "<10"]


def test_threshold_one_turns_suppression_off(tmp_path):
    results = _results(tmp_path)
    summary = write_report(results, tmp_path / "open.html", threshold=1)
    quality = pl.read_csv(next(summary.tables_dir.glob("*_data_quality.csv")), infer_schema_length=0)
    assert quality["rows"].to_list() == ["310", "44", "3", "0"]


def test_episodes_resting_on_known_diabetes_are_counted_for_review(tmp_path):
    # the README's known-diabetes caution: episodes with known diabetes and no onset glucose of
    # 11.1 mmol/L (200 mg/dL, Umpierrez et al., Diabetes Care 2024) or more are counted per
    # definition, small counts suppressed like every other count
    results = _results(tmp_path)
    episodes = pl.read_parquet(results / "episodes" / "episodes.parquet")
    n = episodes.height
    known = [index % 8 == 0 for index in range(n)]  # 15 of 120
    glucose = [None if index % 16 == 0 else (9.0 if index % 8 == 0 else 25.0) for index in range(n)]
    glucose[1] = 11.1  # at the threshold: hyperglycaemic, not counted (and not known diabetes)
    glucose[8] = 11.1  # known diabetes, glucose at the threshold: not counted
    episodes.with_columns(known_diabetes=pl.Series(known), glucose_mmol_l=pl.Series(glucose)).write_parquet(
        results / "episodes" / "episodes.parquet")
    summary = write_report(results, tmp_path / "out" / "report.html")
    shown = pl.read_csv(next(summary.tables_dir.glob("*episodes_per_definition*.csv")), infer_schema_length=0)
    assert shown["known_diabetes_glucose_below_11_1"].to_list() == ["14"]
    assert check_disclosure(summary.tables_dir) == []

    # four such episodes: shown as "<10"
    few = [index in (0, 8, 16, 24) for index in range(n)]
    episodes.with_columns(known_diabetes=pl.Series(few), glucose_mmol_l=pl.lit(8.0)).write_parquet(
        results / "episodes" / "episodes.parquet")
    summary = write_report(results, tmp_path / "out2" / "report.html")
    shown = pl.read_csv(next(summary.tables_dir.glob("*episodes_per_definition*.csv")), infer_schema_length=0)
    assert shown["known_diabetes_glucose_below_11_1"].to_list() == ["<10"]
