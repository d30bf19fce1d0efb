"""The report's statistics parts: forest plots, cumulative incidence, rates and the prediction model.

Each ``*_blocks`` function reads the tables the statistics stage (:mod:`cohort.analyse`) wrote
under ``RESULTS/stats/``, puts them through the disclosure rules of :mod:`cohort.report._tables`
and returns the HTML blocks (charts with their tables) for one part of the report. A file that is
missing is named in "Parts not shown" through ``build.skip``; the files handled here are listed
in :data:`HANDLED` so that the report does not also show them as generic tables.
"""

from __future__ import annotations

import html
import json
import math
import re
from pathlib import Path
from typing import Any

import polars as pl
from markupsafe import Markup

from cohort.report import _charts as charts
from cohort.report._tables import (
    calibration_table,
    km_truncate,
    mask_small_numbers,
    model_table,
    rate_table,
)
from cohort.disclosure import suppress_counts

__all__ = ["HANDLED", "MODEL_FILES", "STANDARD_POPULATIONS", "recurrence_blocks", "resolution_blocks"]

#: Regression tables drawn as forest plots: file stem -> (title, ratio name, part of the report).
MODEL_FILES: dict[str, tuple[str, str, str]] = {
    "resolution_cox": ("Cox model of time to resolution", "Hazard ratio", "resolution"),
    "resolution_cause_specific_cox": ("Cause-specific Cox models (death and discharge before resolution competing)",
                                      "Cause-specific hazard ratio", "resolution"),
    "recurrence_andersen_gill": ("Recurrent episodes: Andersen-Gill model", "Hazard ratio", "recurrence"),
    "recurrence_gap_time": ("Recurrent episodes: gap-time model", "Hazard ratio", "recurrence"),
    "recurrence_365d_logistic": ("Recurrence within 365 days: logistic regression", "Odds ratio", "recurrence"),
}

#: Standard populations named by the statistics stage's ``standard`` column.
STANDARD_POPULATIONS: dict[str, str] = {
    "esp2013": "the 2013 European Standard Population (Eurostat, Revision of the European Standard Population, 2013)",
    "who2000": "the WHO World Standard Population 2000-2025 (Ahmad OB et al., WHO GPE Discussion Paper 31, 2001)",
}

#: stats/ files (and curves/ files) this module shows; the rest are shown as generic tables.
HANDLED: frozenset[str] = frozenset({
    *MODEL_FILES, "resolution_cumulative_incidence", "resolution_at_risk", "recurrence_first_at_risk",
    "incidence_rates_by_diabetes_type", "incidence_rates_by_year", "age_standardised_rates",
    "recurrence_prediction_metrics", "recurrence_prediction_calibration",
})

_TABLE_DROP = ("definition", "se_type", "ph_transform", "z")


def _read_stats(results_dir: Path, name: str) -> pl.DataFrame | None:
    path = results_dir / "stats" / name
    if not path.is_file():
        return None
    return pl.read_csv(path, infer_schema_length=10000)


def _h3(text: str) -> Markup:
    return Markup(f"<h3>{html.escape(text)}</h3>")


def _p(text: str) -> Markup:
    return Markup(f"<p class=\"note\">{html.escape(text)}</p>")


def _definition(frame: pl.DataFrame) -> str:
    if "definition" in frame.columns and frame.height:
        return f" ({frame['definition'][0]})"
    return ""


def _term_label(row: dict[str, Any]) -> str:
    term, covariate, reference = str(row.get("term") or ""), row.get("covariate"), row.get("reference")
    if covariate and "=" in term and reference not in (None, ""):
        level = term.split("=", 1)[1]
        return f"{covariate}: {level} vs {reference}"
    return term.replace("_", " ")


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")


def _fmt_p(value: float | None) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "PH p: n/a"
    return "PH p <0.001" if value < 0.001 else f"PH p {value:.3f}"


# ----------------------------------------------------------------------------- forest plots
def _forest_blocks(build: Any, results_dir: Path, stem: str) -> list[Markup]:
    title, ratio, _ = MODEL_FILES[stem]
    frame = _read_stats(results_dir, f"{stem}.csv")
    if frame is None:
        build.skip(title, f"no stats/{stem}.csv in the results (written by `dka-cohort analyse`)")
        return []
    if "term" not in frame.columns or "estimate" not in frame.columns:
        build.skip(title, f"stats/{stem}.csv has no term or estimate column; it has {frame.columns}")
        return []
    shown = model_table(frame, threshold=build.threshold)
    shown = shown.filter(pl.col("term") != "intercept")
    if "model" not in shown.columns:
        shown = shown.with_columns(pl.lit(title).alias("model"))
    blocks = [_h3(f"{title}{_definition(frame)}")]
    by = "cause" if "cause" in shown.columns else "model"
    for (label,), part in shown.group_by([by], maintain_order=True):
        rows = part.to_dicts()
        plotted = [r for r in rows if r.get("estimate") is not None and r.get("lower") is not None
                   and r.get("upper") is not None and r["estimate"] > 0 and r["lower"] > 0]
        table = part.with_columns(pl.Series("term_label", [_term_label(r) for r in rows], dtype=pl.String))
        keep = ["term_label", "reference", "estimate", "lower", "upper", "p", "ph_p", "n", "events",
                "n_without_event", "n_clusters", "warning", "left_out"]
        table = table.select([c for c in keep if c in table.columns]).rename({"term_label": "term"})
        table = table.with_columns(*[pl.col(c).round(4) for c in ("estimate", "lower", "upper", "p", "ph_p")
                                     if c in table.columns])
        name = f"forest_{stem}" + (f"_{_slug(str(label))}" if by == "cause" else "")
        heading = f"{title}: {label}" if by == "cause" else title
        if not plotted:
            build.skip(f"Forest plot: {heading}", "every estimate is withheld by disclosure control (a model on "
                       f"fewer than {build.threshold} episodes or events) or missing")
            blocks.append(build.table(table, name, f"{heading}: {ratio.lower()}s with 95% CI (estimates withheld)"))
            continue
        is_cox = "ph_p" in part.columns and ratio != "Odds ratio"
        side = [_fmt_p(r.get("ph_p")) for r in plotted] if is_cox else None
        figure = charts.forest_figure(
            [_term_label(r) for r in plotted], [r["estimate"] for r in plotted], [r["lower"] for r in plotted],
            [r["upper"] for r in plotted], title=f"{heading}{_definition(frame)}",
            x_title=f"{ratio} with 95% CI (log scale)", side_text=side,
            side_title="Schoenfeld test" if is_cox else "")
        first = rows[0]
        counts = f"n {first.get('n')}, events {first.get('events')}"
        caption = (f"{ratio}s with 95% confidence intervals on a log axis; the dashed line marks 1 (no difference). "
                   f"Levels are compared with the reference level named. {counts}.")
        if is_cox:
            caption += (" Beside each term: the p-value of the test of proportional hazards (scaled Schoenfeld "
                        "residuals; Grambsch and Therneau, Biometrika 1994;81:515-526).")
        if len(plotted) < len(rows):
            caption += f" {len(rows) - len(plotted)} term(s) withheld or not estimated are not plotted."
        blocks.append(build.chart(figure, name, caption, table, f"{heading}: {ratio.lower()}s, 95% CI, p and counts"))
    return blocks


# ----------------------------------------------------------------------------- cumulative incidence
def _cif_blocks(build: Any, results_dir: Path, *, file: str, title: str, unit: str, at_risk_file: str,
                name: str, summary_file: str | None = None) -> list[Markup]:
    curve = _read_stats(results_dir, f"curves/{file}")
    if curve is None:
        build.skip(title, f"no stats/curves/{file} in the results (written by `dka-cohort analyse`)")
        return []
    curve = curve.with_columns(pl.concat_str([pl.col("group").cast(pl.String), pl.col("cause").cast(pl.String)],
                                             separator="|").alias("_key"))
    cut = km_truncate(curve, threshold=build.threshold, group="_key")
    curves: dict[str, tuple[list[float], list[float], list[float], list[float]]] = {}
    # the event of interest first (solid line), then the competing ones
    order = {"resolved": 0, "recurrence": 0}
    cut = cut.with_columns(pl.col("cause").cast(pl.String).replace_strict(order, default=1, return_dtype=pl.Int64)
                           .alias("_first")).sort(["group", "_first", "cause", "time"]).drop("_first")
    for (group, cause), part in cut.group_by(["group", "cause"], maintain_order=True):
        part = part.sort("time")
        label = str(cause).replace("_", " ") if group == "all" else f"{group}: {str(cause).replace('_', ' ')}"
        curves[label] = (part["time"].to_list(), part["estimate"].to_list(), part["lower"].to_list(),
                         part["upper"].to_list())
    blocks = [_h3(f"{title}{_definition(curve)}")]
    if not curves:
        build.skip(title, f"fewer than {build.threshold} episodes at risk from the start: no curve can be shown")
        return blocks[:0]
    figure = charts.cif_figure(curves, title=f"{title}{_definition(curve)}", x_title="Hours from onset" if unit == "hours"
                               else "Days from the person's first episode",
                               y_title="Cumulative incidence (proportion)")
    data = cut.select(pl.col("group"), pl.col("cause"), pl.col("time").round(3).alias(unit), pl.col("estimate").round(4),
                      pl.col("lower").round(4), pl.col("upper").round(4))
    stop = cut.group_by("cause").agg(pl.col("time").max()).sort("cause")
    stops = ", ".join(f"{c.replace('_', ' ')} at {t:.1f}" for c, t in stop.rows())
    blocks.append(build.chart(
        figure, name, f"Aalen-Johansen cumulative incidence, one line per cause with its 95% band; a competing event "
        f"ends follow-up for the others. Curves stop where fewer than {build.threshold} episodes remain at risk "
        f"({stops} {unit}).", data, "Curve: estimate and 95% band at each event time, up to where it stops"))
    at_risk = _read_stats(results_dir, at_risk_file)
    if at_risk is None:
        build.skip(f"Numbers at risk: {title.lower()}", f"no stats/{at_risk_file} in the results")
    else:
        if "group" in at_risk.columns:
            at_risk = at_risk.filter(pl.col("group") == "all")
        # numbers at risk only, suppressed like any count (events and censorings so far left out)
        times = at_risk["time"]
        whole = bool(((times - times.round(0)).abs() < 1e-9).all())
        rows = at_risk.select((pl.col("time").round(0).cast(pl.Int64) if whole else pl.col("time")).alias(unit),
                              pl.col("at_risk").cast(pl.Int64))
        shown = suppress_counts(rows, ["at_risk"], threshold=build.threshold, group_by=[])
        blocks.append(build.table(shown, f"{name}_at_risk", f"Numbers at risk ({unit} from the start)"))
    if summary_file is not None:
        summary = _read_stats(results_dir, summary_file)
        if summary is not None:
            # estimates at fixed times: no counts; kept only up to where the curve stops
            limits = dict(stop.rows())
            summary = summary.filter(pl.col("hours") <= pl.col("cause").replace_strict(limits, default=-1.0))
            summary = summary.select("cause", "hours", *[pl.col(c).round(4) for c in ("estimate", "lower", "upper")])
            blocks.append(build.table(summary, f"{name}_at_times", "Cumulative incidence at fixed hours with 95% CI "
                                      "(times after the curve stops left out)"))
    return blocks


# ----------------------------------------------------------------------------- rates
def _rate_blocks(build: Any, results_dir: Path) -> list[Markup]:
    blocks: list[Markup] = []
    by_type = _read_stats(results_dir, "incidence_rates_by_diabetes_type.csv")
    by_year = _read_stats(results_dir, "incidence_rates_by_year.csv")
    if by_type is None:
        build.skip("Rates by diabetes type", "no stats/incidence_rates_by_diabetes_type.csv in the results")
    if by_year is None:
        build.skip("Rates by year", "no stats/incidence_rates_by_year.csv in the results")
    per = None
    for frame, groups, name, heading in (
        (by_type, ((),), "rates_by_diabetes_type", "Incidence rate of DKA by diabetes type"),
        # the years of one type add up to the type's total, published in the table by type; totals of
        # a year over types are not published, so the years are not a group
        (by_year, (("diabetes_type",),), "rates_by_year", "Incidence rate of DKA by calendar year"),
    ):
        if frame is None:
            continue
        needed = {"events", "estimate", "lower", "upper", "diabetes_type"} | (
            {"calendar_year"} if name == "rates_by_year" else set())
        if needed - set(frame.columns):
            build.skip(heading, f"the rates table lacks column(s) {sorted(needed - set(frame.columns))}; "
                       f"it has {frame.columns}. Re-run `dka-cohort analyse`.")
            continue
        groups = tuple(g for g in groups if all(c in frame.columns for c in g))
        shown = rate_table(frame, threshold=build.threshold, groups_by=groups or ((),))
        per = int(frame["per"][0]) if "per" in frame.columns and frame.height else 1000
        method = str(frame["method"][0]) if "method" in frame.columns and frame.height else "not stated"
        series: dict[str, tuple[list, list[float], list[float], list[float]]] = {}
        plotted = shown.filter(pl.col("estimate").is_not_null())
        if name == "rates_by_year":
            for (kind,), part in plotted.group_by(["diabetes_type"], maintain_order=True):
                part = part.sort("calendar_year")
                series[str(kind)] = ([str(v) for v in part["calendar_year"].to_list()], part["estimate"].to_list(),
                                     part["lower"].to_list(), part["upper"].to_list())
            x_title = "Calendar year"
        else:
            series["rate"] = (plotted["diabetes_type"].to_list(), plotted["estimate"].to_list(),
                              plotted["lower"].to_list(), plotted["upper"].to_list())
            x_title = "Diabetes type"
        table = shown.drop([c for c in ("definition", "method", "per") if c in shown.columns]).with_columns(
            *[pl.col(c).round(3) for c in ("person_years", "estimate", "lower", "upper") if c in shown.columns])
        blocks.append(_h3(heading + _definition(frame)))
        if not series or not any(s[0] for s in series.values()):
            build.skip(heading, "every rate is withheld by disclosure control")
            blocks.append(build.table(table, name, f"{heading} per {per} person-years (rates withheld)"))
            continue
        figure = charts.error_bar_figure(series, title=heading + _definition(frame), x_title=x_title,
                                         y_title=f"Episodes per {per} person-years", lines=name == "rates_by_year")
        withheld = shown.height - plotted.height
        blocks.append(build.chart(
            figure, name, f"Episodes per {per} person-years with 95% CI ({method}). "
            + (f"{withheld} row(s) with fewer than {build.threshold} events, or withheld so that they cannot be "
               "recovered, are not plotted." if withheld else ""), table,
            f"{heading}: events, person-years, rate per {per} and 95% CI"))
    standardised = _read_stats(results_dir, "age_standardised_rates.csv")
    if standardised is None:
        build.skip("Age-standardised rates", "no stats/age_standardised_rates.csv in the results")
    else:
        shown = rate_table(standardised, threshold=build.threshold)
        codes = sorted(set(str(v) for v in standardised["standard"].drop_nulls().to_list())) \
            if "standard" in standardised.columns else []
        named = "; ".join(STANDARD_POPULATIONS.get(code, f"the standard population `{code}`") for code in codes) \
            or "a standard population not named by the statistics stage"
        method = str(standardised["method"][0]) if "method" in standardised.columns and standardised.height else ""
        table = shown.drop([c for c in ("definition", "method", "note") if c in shown.columns]).with_columns(
            *[pl.col(c).round(3) for c in ("person_years", "crude", "estimate", "lower", "upper", "se")
              if c in shown.columns])
        blocks.append(_h3("Age-standardised incidence rates" + _definition(standardised)))
        blocks.append(build.table(table, "age_standardised_rates",
                                  f"Age-standardised rates per {per or 1000} person-years, standardised to {named}",
                                  note=f"Standard population: {named}. Method: {method}."))
    return blocks


# ----------------------------------------------------------------------------- prediction
def _prediction_blocks(build: Any, results_dir: Path) -> list[Markup]:
    metrics = _read_stats(results_dir, "recurrence_prediction_metrics.csv")
    calibration = _read_stats(results_dir, "recurrence_prediction_calibration.csv")
    blocks: list[Markup] = []
    if metrics is None:
        build.skip("Prediction model discrimination", "no stats/recurrence_prediction_metrics.csv in the results")
    else:
        shown = model_table(metrics, threshold=build.threshold, figures=("estimate", "lower", "upper"))
        table = shown.drop([c for c in ("definition",) if c in shown.columns]).with_columns(
            *[pl.col(c).round(4) for c in ("estimate", "lower", "upper")])
        blocks.append(_h3("Prediction of recurrence within 365 days" + _definition(metrics)))
        auroc = shown.filter(pl.col("metric") == "auroc")
        if auroc.height and auroc["estimate"][0] is not None:
            row = auroc.row(0, named=True)
            ci = (f" (95% CI {row['lower']:.3f} to {row['upper']:.3f})" if row.get("lower") is not None
                  and row.get("upper") is not None else "")
            blocks.append(Markup(f"<p class=\"lead\">Discrimination: AUROC {row['estimate']:.3f}{html.escape(ci)}; "
                                 f"method: {html.escape(str(row.get('method') or 'not stated'))}.</p>"))
        else:
            build.skip("AUROC", "not in the metrics table, or withheld by disclosure control")
        blocks.append(build.table(table, "prediction_metrics", "Discrimination and calibration of the prediction model"))
    if calibration is None:
        build.skip("Calibration plot", "no stats/recurrence_prediction_calibration.csv in the results")
        return blocks
    shown = calibration_table(calibration, threshold=build.threshold)
    plotted = shown.filter(pl.col("observed").is_not_null() & pl.col("mean_predicted").is_not_null())
    table = shown.drop([c for c in ("definition",) if c in shown.columns]).with_columns(
        *[pl.col(c).round(4) for c in ("mean_predicted", "observed", "lower", "upper")])
    if plotted.is_empty():
        build.skip("Calibration plot", "every bin is withheld by disclosure control")
        blocks.append(build.table(table, "prediction_calibration", "Calibration by bin (withheld)"))
        return blocks
    caption = "Observed share with 95% CI against mean predicted risk per bin of predicted risk; dashed: the diagonal."
    if metrics is not None:
        found = {r["metric"]: r for r in model_table(metrics, threshold=build.threshold,
                                                     figures=("estimate", "lower", "upper")).to_dicts()}
        for key, label in (("calibration_intercept", "calibration intercept"), ("calibration_slope", "slope")):
            row = found.get(key)
            if row and row.get("estimate") is not None:
                caption += (f" {label.capitalize()} {row['estimate']:.3f}"
                            + (f" (95% CI {row['lower']:.3f} to {row['upper']:.3f})" if row.get("lower") is not None
                               else "") + ".")
    if plotted.height < shown.height:
        caption += (f" {shown.height - plotted.height} bin(s) with a count below {build.threshold}, or withheld so that "
                    "one cannot be recovered, are not plotted.")
    figure = charts.calibration_figure(plotted["mean_predicted"].to_list(), plotted["observed"].to_list(),
                                       plotted["lower"].to_list(), plotted["upper"].to_list(),
                                       title="Calibration of predicted risk of recurrence within 365 days"
                                       + _definition(calibration))
    blocks.append(build.chart(figure, "prediction_calibration", caption, table,
                              "Calibration by bin: mean predicted, observed share, 95% CI, counts"))
    return blocks


# ----------------------------------------------------------------------------- parts
def _skipped_analyses(build: Any, results_dir: Path) -> None:
    """Name the analyses the statistics stage could not run (its ``analyses.json``), small numbers masked."""
    from cohort.analyse import is_note

    path = results_dir / "stats" / "analyses.json"
    if not path.is_file():
        return
    try:
        skipped = json.loads(path.read_text(encoding="utf-8")).get("skipped") or {}
    except (OSError, json.JSONDecodeError, AttributeError) as error:
        build.skip("stats/analyses.json", f"could not be read: {error}")
        return
    for name, reason in sorted(skipped.items()):
        build.skip(f"Analysis {name.replace('_', ' ').replace(':', ': ').replace(',', ', ')}",
                   ("left out by the statistics stage: " if is_note(name)
                    else "not run by the statistics stage: ")
                   + str(mask_small_numbers(str(reason), threshold=build.threshold)))


def resolution_blocks(build: Any, results_dir: Path) -> list[Markup]:
    """Cumulative incidence of resolution with competing events, and the resolution forest plots."""
    if not (results_dir / "stats").is_dir():
        build.skip("Cumulative incidence of resolution and hazard ratios",
                   "no stats/ folder in the results (written by `dka-cohort analyse`)")
        return []
    _skipped_analyses(build, results_dir)
    blocks = _cif_blocks(build, results_dir, file="resolution_cumulative_incidence.csv",
                         title="Cumulative incidence of resolution, death and discharge before resolution",
                         unit="hours", at_risk_file="resolution_at_risk.csv", name="cif_resolution",
                         summary_file="resolution_cumulative_incidence.csv")
    for stem, (_, _, part) in MODEL_FILES.items():
        if part == "resolution":
            blocks.extend(_forest_blocks(build, results_dir, stem))
    return blocks


def recurrence_blocks(build: Any, results_dir: Path) -> list[Markup]:
    """Cumulative incidence of first recurrence, recurrence models, rates and the prediction model."""
    if not (results_dir / "stats").is_dir():
        build.skip("Rates, cumulative incidence of recurrence, regression and prediction",
                   "no stats/ folder in the results (written by `dka-cohort analyse`)")
        return []
    blocks = _cif_blocks(build, results_dir, file="recurrence_cumulative_incidence.csv",
                         title="Cumulative incidence of first recurrence, death competing", unit="days",
                         at_risk_file="recurrence_first_at_risk.csv", name="cif_recurrence")
    blocks.extend(_rate_blocks(build, results_dir))
    for stem, (_, _, part) in MODEL_FILES.items():
        if part == "recurrence":
            blocks.extend(_forest_blocks(build, results_dir, stem))
    blocks.extend(_prediction_blocks(build, results_dir))
    return blocks
