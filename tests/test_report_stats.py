"""The report's statistics parts (cohort.report._stats): forest plots, cumulative incidence, rates, prediction.

The hazard ratios drawn are checked against lifelines fitted on the Rossi recidivism data that
lifelines ships (Rossi PH, Berk RA, Lenihan KJ. Money, Work and Crime. Academic Press 1980), whose
Cox model is the worked example of Fox J, Weisberg S. Cox Proportional-Hazards Regression for
Survival Data in R (appendix to An R Companion to Applied Regression, 2nd ed., 2011): fin coef
-0.379, exp(coef) 0.684 [from memory]. The other inputs are invented tables in the statistics
stage's format, never reference values. The disclosure rule is that of cohort.disclosure
(small-cell suppression with complementary suppression; Hundepool A et al. Statistical Disclosure
Control. Wiley 2012, ch. 4).
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import polars as pl
import pytest

from cohort.report import check_disclosure, write_report
from cohort.disclosure import suppress_cells
from cohort.report._tables import calibration_table, model_table, rate_table

COX_COLUMNS = ("model", "term", "covariate", "reference", "coef", "se", "estimate", "lower", "upper", "p", "n",
               "events", "n_clusters", "ph_p", "left_out")


def _figures(page: str) -> dict[str, tuple[list, dict]]:
    """chart id -> (traces, layout) of every Plotly figure in the page."""
    found = re.findall(r"Plotly\.newPlot\(\s*\"([^\"]+)\",\s*(\[.*?\]),\s*(\{.*?\}),\s*\{\"displaylogo\"", page,
                       re.DOTALL)
    return {ident: (json.loads(data), json.loads(layout)) for ident, data, layout in found}


def _figure(page: str, name: str) -> tuple[list, dict]:
    matches = [value for ident, value in _figures(page).items() if re.fullmatch(rf"chart-\d+-{name}", ident)]
    assert len(matches) == 1, f"expected one chart {name}; found {sorted(_figures(page))}"
    return matches[0]


def _table(summary, name: str) -> pl.DataFrame:
    return pl.read_csv(next(summary.tables_dir.glob(f"*_{name}.csv")), infer_schema_length=0)


@pytest.fixture(scope="module")
def rossi_cox() -> pl.DataFrame:
    lifelines = pytest.importorskip("lifelines")
    from lifelines.datasets import load_rossi
    from lifelines.statistics import proportional_hazard_test

    rossi = load_rossi()
    fitted = lifelines.CoxPHFitter().fit(rossi, "week", "arrest")
    ph = proportional_hazard_test(fitted, rossi, time_transform="km").summary["p"]
    summary = fitted.summary
    rows = []
    for term, row in summary.iterrows():
        rows.append({"model": "cox", "term": term, "covariate": term, "reference": None, "coef": row["coef"],
                     "se": row["se(coef)"], "estimate": row["exp(coef)"], "lower": row["exp(coef) lower 95%"],
                     "upper": row["exp(coef) upper 95%"], "p": row["p"], "n": len(rossi),
                     "events": int(rossi["arrest"].sum()), "n_clusters": len(rossi), "ph_p": float(ph[term]),
                     "left_out": None})
    return pl.DataFrame(rows, schema_overrides={"reference": pl.String, "left_out": pl.String})


def _stats_results(root: Path, rossi_cox: pl.DataFrame) -> Path:
    results = root / "results"
    stats = results / "stats"
    (stats / "curves").mkdir(parents=True)
    rossi_cox.write_csv(stats / "resolution_cox.csv")
    # a cause-specific model on 6 events: its counts and estimates must not be shown
    small = pl.DataFrame({
        "model": ["cause-specific: resolved"] * 2 + ["cause-specific: died"] * 2,
        "term": ["severity=severe", "age_at_onset"] * 2, "covariate": ["severity", "age_at_onset"] * 2,
        "reference": ["mild", None] * 2, "coef": [0.4, 0.01, 1.2, 0.05], "se": [0.1, 0.01, 0.6, 0.03],
        "estimate": [math.exp(0.4), math.exp(0.01), math.exp(1.2), math.exp(0.05)],
        "lower": [1.2, 0.99, 1.02, 0.99], "upper": [1.8, 1.03, 10.8, 1.11], "p": [0.001, 0.3, 0.04, 0.1],
        "n": [400, 400, 400, 400], "events": [330, 330, 6, 6], "n_clusters": [200] * 4, "ph_p": [0.5, 0.6, 0.7, 0.8],
        "cause": ["resolved", "resolved", "died", "died"], "left_out": ["left out: 3 row(s) null"] * 4,
    })
    small.write_csv(stats / "resolution_cause_specific_cox.csv")
    # cumulative incidence: 40 at risk falling to 12, 9, 4: the curves stop before the 9
    times = [0.0, 5.0, 10.0, 20.0, 30.0, 40.0]
    at_risk = [40, 30, 20, 12, 9, 4]
    curve = []
    for cause, scale in (("resolved", 0.9), ("died", 0.05)):
        for index, (time, risk) in enumerate(zip(times, at_risk, strict=True)):
            estimate = scale * index / len(times)
            curve.append({"group": "all", "cause": cause, "time": time, "estimate": estimate,
                          "lower": max(estimate - 0.05, 0), "upper": estimate + 0.05, "se": 0.02, "at_risk": risk,
                          "events": 1, "n": 40})
    pl.DataFrame(curve).write_csv(stats / "curves" / "resolution_cumulative_incidence.csv")
    pl.DataFrame({"group": ["all"] * 4, "time": [0.0, 12.0, 24.0, 36.0], "at_risk": [40, 20, 12, 4],
                  "events_so_far": [0, 18, 26, 33], "censored_so_far": [0, 2, 2, 3]}).write_csv(
        stats / "resolution_at_risk.csv")
    # rates: type2 in 2021 has 4 events; another type2 year must be withheld with it
    pl.DataFrame({"diabetes_type": ["type1"] * 3 + ["type2"] * 3, "calendar_year": [2020, 2021, 2022] * 2,
                  "events": [40, 52, 61, 15, 4, 22], "person_years": [400.0, 410, 420, 900, 910, 920],
                  "estimate": [100.0, 126.8, 145.2, 16.7, 4.4, 23.9], "lower": [71.4, 94.7, 111.1, 9.3, 1.2, 15.0],
                  "upper": [136.2, 166.3, 186.5, 27.5, 11.3, 36.2], "per": [1000.0] * 6,
                  "method": ["exact Poisson (Garwood 1936)"] * 6}).write_csv(stats / "incidence_rates_by_year.csv")
    pl.DataFrame({"diabetes_type": ["type1", "type2"], "events": [153, 41], "person_years": [1230.0, 2730.0],
                  "estimate": [124.4, 15.0], "lower": [105.4, 10.8], "upper": [145.8, 20.4], "per": [1000.0] * 2,
                  "method": ["exact Poisson (Garwood 1936)"] * 2}).write_csv(
        stats / "incidence_rates_by_diabetes_type.csv")
    pl.DataFrame({"diabetes_type": ["type1", "type2"], "events": [153, 41], "person_years": [1230.0, 2730.0],
                  "crude": [124.4, 15.0], "estimate": [120.1, 11.2], "lower": [101.0, 7.9], "upper": [142.3, 15.8],
                  "se": [10.1, 2.0], "per": [1000.0] * 2, "standard": ["esp2013"] * 2, "bands": [14, 13],
                  "method": ["direct standardisation"] * 2}).write_csv(stats / "age_standardised_rates.csv")
    # prediction: bin 1 has 3 events; bin 4 has 2 without the event
    pl.DataFrame({"metric": ["auroc", "calibration_intercept", "calibration_slope"], "estimate": [0.74, 0.05, 0.91],
                  "lower": [0.69, -0.2, 0.7], "upper": [0.79, 0.3, 1.12],
                  "method": ["DeLong (1988) variance, Wald CI", "offset logistic", "logistic slope"],
                  "n": [200] * 3, "events": [83] * 3}).write_csv(stats / "recurrence_prediction_metrics.csv")
    pl.DataFrame({"bin": [1, 2, 3, 4], "mean_predicted": [0.1, 0.3, 0.5, 0.9], "observed": [0.06, 0.32, 0.5, 0.96],
                  "lower": [0.01, 0.2, 0.37, 0.86], "upper": [0.17, 0.47, 0.63, 0.99], "n": [50, 50, 50, 50],
                  "events": [3, 16, 25, 48]}).write_csv(stats / "recurrence_prediction_calibration.csv")
    return results


@pytest.fixture(scope="module")
def stats_report(tmp_path_factory, rossi_cox):
    root = tmp_path_factory.mktemp("stats_report")
    results = _stats_results(root, rossi_cox)
    summary = write_report(results, root / "out" / "report.html")
    return summary, summary.out_file.read_text(encoding="utf-8")


def test_forest_plot_draws_the_hazard_ratios_lifelines_fitted(stats_report, rossi_cox):
    _, page = stats_report
    traces, layout = _figure(page, "forest_resolution_cox")
    assert layout["xaxis"]["type"] == "log"
    points = dict(zip(traces[0]["y"], traces[0]["x"], strict=True))
    for row in rossi_cox.iter_rows(named=True):
        assert points[row["term"].replace("_", " ")] == pytest.approx(row["estimate"], rel=1e-12)
    # Fox and Weisberg (2011), Rossi data: fin exp(coef) 0.684 [from memory]
    assert points["fin"] == pytest.approx(0.684, abs=0.001)
    fin = traces[0]["y"].index("fin")
    row = rossi_cox.filter(pl.col("term") == "fin").row(0, named=True)
    assert traces[0]["x"][fin] + traces[0]["error_x"]["array"][fin] == pytest.approx(row["upper"])
    assert traces[0]["x"][fin] - traces[0]["error_x"]["arrayminus"][fin] == pytest.approx(row["lower"])
    # the proportional-hazards test p beside each Cox term
    side = [a["text"] for a in layout["annotations"] if a["text"].startswith("PH p")]
    assert len(side) == rossi_cox.height
    assert f"PH p {row['ph_p']:.3f}" in side or (row["ph_p"] < 0.001 and "PH p <0.001" in side)


def test_forest_table_suppresses_a_model_on_few_events(stats_report):
    summary, page = stats_report
    table = _table(summary, "forest_resolution_cause_specific_cox_died")
    assert table["events"].to_list() == ["<10", "<10"]
    assert table["n_without_event"].to_list() == ["withheld", "withheld"]  # 400 - 6 would give the 6 back
    assert table["estimate"].to_list() == [None, None] and table["p"].to_list() == [None, None]
    assert table["left_out"].to_list() == ["left out: <10 row(s) null"] * 2
    assert "chart-" not in " ".join(i for i in _figures(page) if i.endswith("_died"))
    assert any("cause_specific_cox: died" in part or "died" in part for part, _ in summary.skipped)
    resolved = _table(summary, "forest_resolution_cause_specific_cox_resolved")
    assert resolved["term"].to_list() == ["severity: severe vs mild", "age at onset"]    # reference level named
    assert resolved["events"].to_list() == ["330", "330"]
    assert _figure(page, "forest_resolution_cause_specific_cox_resolved")[0][0]["x"][0] == pytest.approx(math.exp(0.4))


def test_cumulative_incidence_stops_before_fewer_than_threshold_remain(stats_report):
    summary, page = stats_report
    traces, layout = _figure(page, "cif_resolution")
    lines = [t for t in traces if t.get("showlegend") is not False]
    assert [t["name"] for t in lines] == ["resolved", "died"]           # the event of interest first
    for trace in traces:
        assert max(trace["x"]) == 20.0                                   # at risk 12 at 20 h, 9 at 30 h
    assert layout["yaxis"]["title"]["text"] and layout["xaxis"]["title"]["text"] == "Hours from onset"
    at_risk = _table(summary, "cif_resolution_at_risk")
    assert at_risk["at_risk"].to_list() == ["40", "20", "12", "<10"]
    assert "events_so_far" not in at_risk.columns
    curve = _table(summary, "cif_resolution")
    assert curve["hours"].cast(pl.Float64).max() == 20.0 and "at_risk" not in curve.columns


def test_rates_by_year_withhold_a_second_year_of_the_same_type(stats_report):
    summary, page = stats_report
    table = _table(summary, "rates_by_year")
    type2 = table.filter(pl.col("diabetes_type") == "type2")
    assert type2["events"].to_list() == ["withheld", "<10", "22"]   # 15 + 4 + 22 = 41, the published type2 total
    assert type2["estimate"].to_list() == [None, None, "23.9"]
    traces, _ = _figure(page, "rates_by_year")
    by_name = {t["name"]: t for t in traces}
    assert by_name["type2"]["x"] == ["2022"]
    assert by_name["type1"]["error_y"]["array"][0] == pytest.approx(136.2 - 100.0)
    assert "European Standard Population" in page
    standardised = _table(summary, "age_standardised_rates")
    assert standardised["events"].to_list() == ["153", "41"]


def test_calibration_plot_and_discrimination(stats_report):
    summary, page = stats_report
    traces, layout = _figure(page, "prediction_calibration")
    diagonal = next(t for t in traces if t["name"] == "perfect calibration")
    assert diagonal["x"] == [0, 1] and diagonal["y"] == [0, 1]
    points = next(t for t in traces if t["name"].startswith("bin"))
    # bin 1 (3 events) and bin 4 (2 without the event) are withheld; so is a second cell of each column
    table = _table(summary, "prediction_calibration")
    assert table["events"].to_list()[0] == "<10" and table["n_without_event"].to_list()[3] == "<10"
    assert check_disclosure(summary.tables_dir) == []
    shown = table.filter(pl.col("observed").is_not_null())
    assert points["x"] == [float(v) for v in shown["mean_predicted"].to_list()]
    assert "AUROC 0.740 (95% CI 0.690 to 0.790); method: DeLong (1988) variance, Wald CI." in page
    assert "Calibration intercept 0.050" in page and "Slope 0.910" in page


def test_parts_not_shown_name_only_what_is_missing(stats_report, tmp_path):
    summary, page = stats_report
    named = [part for part, _ in summary.skipped]
    assert not any(part.startswith(("Rates by", "Calibration", "Age-standardised", "Prediction model",
                                    "Cumulative incidence of resolution", "Cox model of")) for part in named), named
    # files not given in this folder are named with the file the statistics stage writes
    reasons = dict(summary.skipped)
    assert "recurrence_cumulative_incidence.csv" in reasons["Cumulative incidence of first recurrence, death competing"]
    assert "recurrence_andersen_gill.csv" in reasons["Recurrent episodes: Andersen-Gill model"]
    assert check_disclosure(summary.out_file) == [] and check_disclosure(summary.tables_dir) == []
    (tmp_path / "empty").mkdir()
    empty = write_report(tmp_path / "empty", tmp_path / "r.html")
    assert any("no stats/ folder" in reason for _, reason in empty.skipped)


def test_suppress_cells_protects_both_ways():
    # a 2 x 2 table with its row and column totals published: one small cell takes three with it
    assert suppress_cells([40, 3, 48, 12], [[0, 1], [2, 3], [0, 2], [1, 3]], threshold=10) == [
        "withheld", "<10", "withheld", "withheld"]
    assert suppress_cells([0, 3, 5], [[0, 1, 2]], threshold=10) == ["0", "<10", "<10"]


def test_table_helpers_withhold_figures_of_hidden_rows():
    models = model_table(pl.DataFrame({"term": ["a"], "estimate": [2.0], "n": [300], "events": [296]}), threshold=10)
    # 4 without the event: events withheld, but the model rests on enough of both to show its estimate
    assert models.row(0) == ("a", 2.0, "300", "withheld", "<10")
    rates = rate_table(pl.DataFrame({"g": ["a", "b"], "events": [0, 30], "estimate": [0.0, 3.0]}), threshold=10)
    assert rates.rows() == [("a", "0", 0.0), ("b", "30", 3.0)]                  # 0 is shown as 0
    bins = calibration_table(pl.DataFrame({"bin": [1, 2], "mean_predicted": [0.2, 0.8], "observed": [0.2, 0.8],
                                           "n": [50, 50], "events": [10, 40]}), threshold=10)
    assert bins["observed"].to_list() == [0.2, 0.8]


def test_other_stats_tables_protect_the_count_without_the_event(tmp_path):
    # n 139 with 138 events leaves 1 censored: showing both would give the 1 back by subtraction;
    # the severity rows add up to the "all" row, so each column is one group as well
    stats = tmp_path / "results" / "stats"
    stats.mkdir(parents=True)
    pl.DataFrame({"group": ["all", "mild", "moderate", "severe"], "estimate": [13.9, 13.9, 14.0, 12.9],
                  "n": [139, 44, 71, 24], "events": [138, 44, 71, 23],
                  "left_out": [None, None, None, "left out: 2 row(s)"]}).write_csv(stats / "resolution_median_hours.csv")
    summary = write_report(tmp_path / "results", tmp_path / "r.html")
    table = _table(summary, "resolution_median_hours")
    assert table["n_without_event"].to_list() == ["<10", "0", "0", "<10"]
    assert table["events"].to_list()[0] == "withheld" and table["events"].to_list()[3] == "withheld"
    assert table.filter(pl.col("events") == "withheld")["estimate"].null_count() == 2
    assert table["left_out"].to_list()[3] == "left out: <10 row(s)"
    assert check_disclosure(summary.tables_dir) == []
