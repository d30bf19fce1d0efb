"""``write_report``: one self-contained HTML file from whatever results a folder holds.

The page embeds plotly.js once (from the installed plotly package, never a CDN), our own
stylesheet and nothing else: no web font, no external image, no request to any network address;
a Content-Security-Policy of ``default-src 'none'`` makes the browser refuse any that slipped in.
Every table behind the page is written as CSV into ``<report stem>-tables/`` beside it, after
disclosure control, and the finished page and tables are scanned by :func:`check_disclosure`
before they are moved into place.

Results it reads (each optional; found flat in ``results_dir`` or in its ``episodes/``,
``features/`` and ``stats/`` subfolders, see :data:`KNOWN_FILES`): the episodes stage's
``episodes.parquet``, ``attrition.csv``, ``data_quality.csv``, ``agreement.csv`` and
``manifest.json``; the features stage's ``episode_features.parquet``; the statistics stage's
``stats/`` tables, drawn by :mod:`cohort.report._stats` (cumulative incidence with competing
events, forest plots of the Cox, recurrence and logistic models, incidence rates, age-standardised
rates, the prediction model's discrimination and calibration); any further CSV tables in
``stats/`` are shown as they are after disclosure control of their count columns.
"""

from __future__ import annotations

import datetime as dt
import html
import json
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import jinja2
import numpy as np
import plotly
import polars as pl
from markupsafe import Markup

from cohort._errors import CohortError, DisclosureError, InputError
from cohort._outputs import output_file
from cohort.disclosure import DEFAULT_THRESHOLD, SECONDARY_LABEL, suppress_cells, suppress_counts, suppressed_label
from cohort.report import _charts as charts
from cohort.report._check import COUNT_COLUMN_PATTERN, IDENTIFIER_COLUMNS, Violation, check_disclosure
from cohort.report._control import p_chart
from cohort.report._funnel import curve_denominators, funnel_limits, funnel_position
from cohort.report._runchart import analyse_run_chart
from cohort.report._stats import HANDLED as STATS_HANDLED
from cohort.report._stats import recurrence_blocks, resolution_blocks
from cohort.report._table_one import table_one
from cohort.report._tables import attrition_table, is_small, km_truncate, median_table, share_table, suppress_table

__all__ = ["CAUTIONS", "KNOWN_FILES", "ReportSummary", "write_report"]

#: The cautions of DESIGN.md, and one of the toolkit's own, shown at the top of every report.
CAUTIONS: tuple[str, ...] = (
    "For research, audit and teaching. Not for decisions about an individual patient.",
    "Definitions follow published guidelines; local protocols and licensed clinicians govern care.",
    "Check a cohort against chart review before publishing from it.",
    "Outputs that leave a secure environment must pass the disclosure check.",
    # the toolkit's own caution (README, Cautions): measured on the synthetic extract 2026-12-04
    ("Definitions that accept known diabetes in place of hyperglycaemia (consensus-2024, jbds-2023) "
     "count any diabetes or ketoacidosis code on or before the time point, the episode's own code "
     "included: a ketoacidosis of another cause coded as diabetic ketoacidosis is then found as DKA. "
     "Review episodes with known diabetes and a glucose below 11.1 mmol/L at onset."),
)

#: Onset glucose below which an episode with known diabetes is counted for review (11.1 mmol/L =
#: 200 mg/dL, the hyperglycaemia threshold of Umpierrez et al., Diabetes Care 2024), and its column.
KNOWN_DIABETES_GLUCOSE_MMOL_L = 11.1
KNOWN_DIABETES_COLUMN = "known_diabetes_glucose_below_11_1"

#: File name -> subfolders searched (besides the folder itself).
KNOWN_FILES: dict[str, tuple[str, ...]] = {
    "episodes.parquet": ("episodes",),
    "attrition.csv": ("episodes",),
    "data_quality.csv": ("episodes",),
    "agreement.csv": ("episodes",),
    "manifest.json": ("episodes",),
    "episode_features.parquet": ("features",),
}

#: Order in which a definition is chosen as the primary one for the audit section.
PRIMARY_ORDER = ("consensus-2024", "jbds-2023", "ada-2009", "ispad-2022")

#: Audit standards drawn from episode_features: name -> (column, true value meets it, label, source).
STANDARDS: dict[str, tuple[str, bool, str, str]] = {
    "insulin_within_target": ("is_insulin_within_target", True, "Insulin infusion started within 1 h of arrival",
                              "JBDS-IP 2023 (fixed-rate infusion started promptly) [timing: tool default]"),
    "resolved_within_target": ("is_resolved_within_target", True, "Resolved within 24 h of onset",
                               "JBDS-IP 2023: resolution expected in most people by 24 h"),
    "no_premature_closure": ("is_premature_closure", False, "Infusion not stopped before resolution",
                             "JBDS-IP 2023; ADA 2009: continue insulin until resolution"),
    "basal_overlap_met": ("is_basal_overlap_met", True, "Basal insulin given before the infusion stopped",
                          "ADA 2009 (overlap 1-2 h); JBDS-IP 2023 (30-60 min)"),
    "no_hypoglycaemia": ("has_hypoglycaemia", False, "No glucose below 4.0 mmol/L on the infusion",
                         "JBDS-IP 2023 [threshold from memory, CLINICAL.md]"),
    "no_hypokalaemia": ("has_hypokalaemia", False, "No potassium below 3.5 mmol/L on the infusion",
                        "JBDS-IP 2023; 2024 consensus (hold insulin if K < 3.5)"),
    "glucose_monitoring_met": ("is_glucose_monitoring_met", True, "Glucose measured every hour on the infusion",
                               "JBDS-IP 2023 (hourly capillary glucose)"),
    "ketone_monitoring_met": ("is_ketone_monitoring_met", True, "Ketones measured every hour on the infusion",
                              "JBDS-IP 2023 (hourly capillary ketones)"),
}

KM_TIMES: tuple[float, ...] = (0.0, 6.0, 12.0, 24.0, 48.0, 72.0)


@dataclass(frozen=True)
class ReportSummary:
    """What :func:`write_report` wrote.

    Attributes
    ----------
    out_file
        The HTML report.
    tables_dir
        Folder of the CSV tables behind it.
    sections
        Titles of the sections rendered.
    skipped
        (part, reason) for every part that could not be rendered.
    charts
        Number of charts in the page.
    tables
        CSV files written.
    violations
        Disclosure breaches found in the output (always empty: a breach raises instead).
    seconds
        Time taken.
    """

    out_file: Path
    tables_dir: Path
    sections: tuple[str, ...]
    skipped: tuple[tuple[str, str], ...]
    charts: int
    tables: tuple[Path, ...]
    violations: tuple[Violation, ...] = ()
    seconds: float = 0.0


class _Skip(Exception):
    """A part of the report cannot be rendered; the message says why."""


@dataclass
class _Section:
    id: str
    title: str
    lead: str = ""
    blocks: list[Markup] = field(default_factory=list)


@dataclass
class _Builder:
    """Collects the page's parts and the tables written beside it."""

    threshold: int
    tables_name: str
    tables: dict[str, pl.DataFrame] = field(default_factory=dict)
    skipped: list[tuple[str, str]] = field(default_factory=list)
    chart_count: int = 0

    # ---------------------------------------------------------------- pieces
    def table(self, frame: pl.DataFrame, name: str, caption: str, *, note: str = "") -> Markup:
        """Register ``frame`` as ``<name>.csv`` and render it as an HTML table."""
        file_name = f"{len(self.tables) + 1:02d}_{name}.csv"
        self.tables[file_name] = frame
        head = "".join(f"<th scope=\"col\">{html.escape(str(column))}</th>" for column in frame.columns)
        body = []
        for row in frame.iter_rows():
            cells = []
            for value in row:
                text, numeric = _format(value)
                cells.append(f"<td class=\"num\">{text}</td>" if numeric else f"<td>{text}</td>")
            body.append("<tr>" + "".join(cells) + "</tr>")
        link = f"<a class=\"csv\" href=\"{html.escape(self.tables_name)}/{file_name}\">CSV: {file_name}</a>"
        note_html = f"<p class=\"note\">{html.escape(note)}</p>" if note else ""
        return Markup(
            f"<div class=\"table-wrap\"><table class=\"data\" id=\"t-{html.escape(name)}\">"
            f"<caption>{html.escape(caption)}{link}</caption><thead><tr>{head}</tr></thead>"
            f"<tbody>{''.join(body)}</tbody></table></div>{note_html}"
        )

    def chart(self, figure, name: str, caption: str, frame: pl.DataFrame, table_caption: str) -> Markup:
        """A figure with its caption and, beside it, its data table (folded) and CSV link."""
        self.chart_count += 1
        chart_id = f"chart-{self.chart_count}-{name}"
        data = self.table(frame, name, table_caption)
        return Markup(
            f"<figure class=\"chart\" data-chart=\"{html.escape(name)}\"><div class=\"chart-body\">"
            f"{charts.figure_html(figure, chart_id=chart_id)}</div>"
            f"<figcaption>{html.escape(caption)}</figcaption>"
            f"<details class=\"data\"><summary>Data behind this chart</summary>{data}</details></figure>"
        )

    def skip(self, part: str, reason: str) -> None:
        self.skipped.append((part, reason))


def _format(value: Any) -> tuple[str, bool]:
    if value is None:
        return "&mdash;", False
    if isinstance(value, bool):
        return ("yes" if value else "no"), False
    if isinstance(value, int):
        return f"{value}", True
    if isinstance(value, float):
        if math.isnan(value):
            return "&mdash;", False
        return (f"{value:.3f}" if abs(value) < 10 else f"{value:.1f}"), True
    text = str(value)
    numeric = (text.replace(",", "").replace(".", "", 1).lstrip("-").isdigit()
               or text == SECONDARY_LABEL or (text.startswith("<") and text[1:].isdigit()))
    return html.escape(text), numeric


def _p(text: str) -> Markup:
    return Markup(f"<p class=\"note\">{html.escape(text)}</p>")


def _h3(text: str) -> Markup:
    return Markup(f"<h3>{html.escape(text)}</h3>")


# ------------------------------------------------------------------------- reading results
def _find(results_dir: Path, name: str) -> Path | None:
    for folder in ("", *KNOWN_FILES.get(name, ())):
        candidate = results_dir / folder / name if folder else results_dir / name
        if candidate.is_file():
            return candidate
    return None


def _read(results_dir: Path, name: str) -> pl.DataFrame | None:
    path = _find(results_dir, name)
    if path is None:
        return None
    try:
        return pl.read_parquet(path) if name.endswith(".parquet") else pl.read_csv(path, infer_schema_length=10000)
    except (pl.exceptions.PolarsError, OSError) as error:
        msg = f"report: could not read {path}: {error}. Re-run the stage that writes it."
        raise InputError(msg) from error


def _primary(frame: pl.DataFrame) -> str:
    present = frame["definition"].unique().to_list()
    for name in PRIMARY_ORDER:
        if name in present:
            return name
    return sorted(present)[0]


# ------------------------------------------------------------------------- sections
def _cohort_section(build: _Builder, results_dir: Path) -> _Section | None:
    section = _Section("cohort", "Cohort", "How the cohort was built from the extract, step by step, and which source "
                       "rows were set aside and why.")
    attrition = _read(results_dir, "attrition.csv")
    if attrition is None:
        build.skip("Attrition", "no attrition.csv in the results (written by `dka-cohort episodes`)")
    else:
        shown = attrition_table(attrition, threshold=build.threshold)
        section.blocks.append(_h3("Attrition"))
        section.blocks.append(_flow_diagram(shown))
        section.blocks.append(_p("Each arrow gives the persons and episodes left out since the last count shown; "
                                 "after a withheld count it spans two steps, so that no small exclusion can be "
                                 "recovered by subtraction. Row counts change unit from step to step."))
        section.blocks.append(Markup("<details class=\"data\"><summary>Attrition table</summary>")
                              + build.table(shown, "attrition", "Attrition by definition: counts at each step and "
                                            "excluded since the previous step")
                              + Markup("</details>"))
    quality = _read(results_dir, "data_quality.csv")
    if quality is None:
        build.skip("Data quality", "no data_quality.csv in the results")
    else:
        count_column = "rows" if "rows" in quality.columns else next(
            (c for c in quality.columns if COUNT_COLUMN_PATTERN.fullmatch(c)), None)
        if count_column is None:
            build.skip("Data quality", f"data_quality.csv has no count column; it has {quality.columns}")
        else:
            groups = ["table"] if "table" in quality.columns else None
            shown = suppress_counts(quality, [count_column], threshold=build.threshold, group_by=groups)
            section.blocks.append(_h3("Data quality: source rows set aside"))
            section.blocks.append(build.table(shown, "data_quality", "Quarantined source rows by table and reason"))
    features = _read(results_dir, "episode_features.parquet")
    if features is None:
        build.skip("Table 1", "no episode_features.parquet in the results")
    elif "diabetes_type" not in features.columns:
        build.skip("Table 1", "episode_features has no diabetes_type column")
    else:
        primary = _primary(features)
        first = (features.filter(pl.col("definition") == primary).sort(["person_id", "onset_datetime"])
                 .unique(subset=["person_id"], keep="first", maintain_order=True))
        preferred = [name for name in ("type1", "type2", "other", "unknown") if name in first["diabetes_type"].to_list()]
        rest = sorted(set(first["diabetes_type"].drop_nulls().to_list()) - set(preferred))
        table = table_one(first, threshold=build.threshold, groups=[*preferred, *rest] or None)
        section.blocks.append(_h3("Table 1: characteristics at each person's first episode, by diabetes type"))
        section.blocks.append(build.table(
            table, "table_one", f"Persons with an episode of the {primary} definition, at their first episode",
            note="Counts with percentages of the group, or median (interquartile range). std_difference: "
                 "standardised difference between the first two groups (Austin, Stat Med 2009;28:3083-3107); "
                 "withheld where it would reveal a suppressed count."))
    return section if section.blocks else None


def _flow_diagram(shown: pl.DataFrame) -> Markup:
    parts = ["<div class=\"flows\">"]
    count_columns = [c for c in ("persons", "episodes", "rows") if c in shown.columns]
    for (definition,), part in shown.group_by(["definition"], maintain_order=True):
        parts.append(f"<div class=\"flow\"><h4>{html.escape(str(definition))}</h4><ol>")
        for index, row in enumerate(part.iter_rows(named=True)):
            if index:
                dropped = [f"{row[c + '_excluded']} {c}" for c in count_columns
                           if row.get(c + "_excluded") not in (None, "", "0")]
                parts.append(f"<li class=\"arrow\">excluded: {html.escape(', '.join(dropped) or 'none')}</li>")
            counts = ", ".join(f"{row[c]} {c}" for c in count_columns if row[c] not in (None, ""))
            parts.append(f"<li class=\"box\"><b>{html.escape(str(row['name']))}</b>{html.escape(str(row['description']))}"
                         f"<br>{html.escape(counts)}</li>")
        parts.append("</ol></div>")
    parts.append("</div>")
    return Markup("".join(parts))


#: Canonical unit of each analyte (DEVELOPERS.md), shown beside the numbers of a criterion.
_UNITS = {
    "glucose": "mmol/L", "bhb": "mmol/L", "bicarbonate": "mmol/L", "sodium": "mmol/L", "chloride": "mmol/L",
    "potassium": "mmol/L", "anion_gap": "mmol/L", "anion_gap_with_k": "mmol/L", "ph": "", "hba1c": "mmol/mol",
    "creatinine": "umol/L", "urine_ketones": "(strip, ordinal 0-4)",
}


def _criterion_html(node: Any) -> str:
    if not isinstance(node, dict):
        return html.escape(str(node))
    if "all_of" in node:
        return "all of:<ul>" + "".join(f"<li>{_criterion_html(c)}</li>" for c in node["all_of"]) + "</ul>"
    if "any_of" in node:
        return "any of:<ul>" + "".join(f"<li>{_criterion_html(c)}</li>" for c in node["any_of"]) + "</ul>"
    if "at_least" in node:
        return (f"at least {html.escape(str(node['at_least']))} of:<ul>"
                + "".join(f"<li>{_criterion_html(c)}</li>" for c in node.get("of", [])) + "</ul>")
    if "flag" in node:
        return html.escape(str(node["flag"]).replace("_", " "))
    if "analyte" in node:
        unit = _UNITS.get(str(node["analyte"]), "")
        value = node["value"]
        number = f"{value:g}" if isinstance(value, (int, float)) else str(value)
        return (f"<code>{html.escape(str(node['analyte']))}</code> {html.escape(str(node['op']))} "
                f"{html.escape(number)}{(' ' + html.escape(unit)) if unit else ''}")
    return html.escape(json.dumps(node, default=str))


def _definitions_section(build: _Builder, results_dir: Path) -> _Section | None:
    section = _Section("definitions", "Definitions side by side",
                       "Episodes found by each guideline's definition, how far the definitions agree, and what each "
                       "one requires.")
    episodes = _read(results_dir, "episodes.parquet")
    if episodes is None:
        build.skip("Definitions side by side", "no episodes.parquet in the results")
        return None
    aggregates = [pl.len().cast(pl.Int64).alias("episodes"),
                  pl.col("person_id").n_unique().cast(pl.Int64).alias("persons")]
    if {"known_diabetes", "glucose_mmol_l"} <= set(episodes.columns):
        # the episodes the known-diabetes caution asks to review: diagnosed with no onset glucose
        # of 11.1 mmol/L (200 mg/dL) or more, so on the known-diabetes criterion alone where a
        # definition offers it (consensus-2024, jbds-2023); a part of `episodes` whose complement
        # is not shown, so primary suppression suffices
        low = pl.col("glucose_mmol_l").is_null() | (pl.col("glucose_mmol_l") < KNOWN_DIABETES_GLUCOSE_MMOL_L)
        aggregates.append((pl.col("known_diabetes").fill_null(False) & low).sum().cast(pl.Int64)
                          .alias(KNOWN_DIABETES_COLUMN))
    counts = episodes.group_by("definition").agg(aggregates).sort("definition")
    count_columns = [name for name in ("episodes", "persons", KNOWN_DIABETES_COLUMN) if name in counts.columns]
    shown = suppress_counts(counts, count_columns, threshold=build.threshold, group_by=[])
    values = [int(v) if v.isdigit() else None for v in shown["episodes"].to_list()]
    figure = charts.bar_figure(shown["definition"].to_list(), values, title="Episodes found by each definition",
                               x_title="Definition", y_title="Episodes (count)")
    section.blocks.append(build.chart(figure, "episodes_per_definition",
                                      "Episodes per definition (a person may have several episodes).", shown,
                                      "Episodes and persons per definition, and the episodes with known "
                                      "diabetes and no onset glucose of 11.1 mmol/L or more (review them: "
                                      "see the cautions)"))
    agreement = _read(results_dir, "agreement.csv")
    if agreement is None:
        build.skip("Agreement between definitions", "no agreement.csv in the results")
    else:
        shown = _suppress_agreement(agreement, build.threshold)
        section.blocks.append(_h3("Agreement"))
        section.blocks.append(build.table(shown, "agreement", "Agreement between each pair of finders (episodes "
                                          "overlapping in time; visits; Cohen's kappa at visit level)"))
    section.blocks.append(_h3("What each definition requires"))
    section.blocks.append(_criteria_cards(build, sorted(episodes["definition"].unique().to_list())))
    return section


def _suppress_rows(frame: pl.DataFrame, count_columns: Sequence[str], threshold: int) -> pl.DataFrame:
    """Suppress counts where each row is one group (its cells partition the row's totals)."""
    if not count_columns:
        return frame
    indexed = frame.with_row_index("_row")
    long = indexed.unpivot(on=list(count_columns), index="_row", variable_name="_column", value_name="_count")
    long = long.with_columns(pl.col("_count").cast(pl.Int64))
    hidden = suppress_counts(long, ["_count"], threshold=threshold, group_by=["_row"])
    wide = hidden.pivot(on="_column", index="_row", values="_count")
    rest = indexed.drop(list(count_columns))
    return rest.join(wide, on="_row", how="left").sort("_row").select(frame.columns)


#: The sums inside one row of agreement.csv (``cohort._agreement``): each total is published
#: beside its parts, so a hidden part must not be the total less the parts shown.
AGREEMENT_SUMS: tuple[tuple[str, ...], ...] = (
    ("episodes_a", "both", "only_a"),
    ("episodes_b", "both_b", "only_b"),
    ("visits", "visits_both", "visits_only_a", "visits_only_b", "visits_neither"),
)

#: Statistics computed from the visit cells: withheld when any of those cells is hidden, since
#: with the total a statistic is one more equation for the hidden cells.
AGREEMENT_DERIVED: tuple[str, ...] = ("kappa",)


def _suppress_agreement(frame: pl.DataFrame, threshold: int) -> pl.DataFrame:
    """Suppress agreement.csv counts so that no hidden cell follows from a row's published sums.

    Each row's cells are protected per additive group of :data:`AGREEMENT_SUMS` (a total and its
    parts), with secondary suppression inside each group (:func:`cohort.disclosure.suppress_cells`);
    Cohen's kappa is withheld in a row whose visit cells are hidden. Counts in columns outside the
    groups are suppressed one by one. Columns a table does not have are skipped.

    Examples
    --------
    >>> row = pl.DataFrame({"definition_a": ["a"], "definition_b": ["b"], "episodes_a": [167],
    ...                     "episodes_b": [200], "both": [163], "both_b": [163], "only_a": [4],
    ...                     "only_b": [37]})
    >>> shown = _suppress_agreement(row, 10)
    >>> shown.select("episodes_a", "both", "only_a").row(0)
    ('167', 'withheld', '<10')
    """
    count_columns = [c for c in frame.columns if COUNT_COLUMN_PATTERN.fullmatch(c)]
    if not count_columns or frame.height == 0:
        return frame
    groups_by_name = [[c for c in group if c in count_columns] for group in AGREEMENT_SUMS]
    groups_by_name = [group for group in groups_by_name if group]
    position = {column: index for index, column in enumerate(count_columns)}
    groups = [[position[c] for c in group] for group in groups_by_name]
    grouped = {c for group in groups_by_name for c in group}
    groups += [[position[c]] for c in count_columns if c not in grouped]
    hidden_labels = (suppressed_label(threshold), SECONDARY_LABEL)
    visit_cells = [c for c in AGREEMENT_SUMS[2] if c in count_columns]
    rows: list[dict[str, object]] = []
    for record in frame.iter_rows(named=True):
        values = [None if record[c] is None else int(record[c]) for c in count_columns]
        shown = suppress_cells(values, groups, threshold=threshold)
        out = dict(record)
        for column, cell in zip(count_columns, shown):
            out[column] = None if cell == "" else cell
        if any(out[c] in hidden_labels for c in visit_cells):
            for derived in AGREEMENT_DERIVED:
                if derived in out:
                    out[derived] = None
        rows.append(out)
    schema = {c: (pl.String if c in count_columns else frame.schema[c]) for c in frame.columns}
    return pl.DataFrame(rows, schema=schema, orient="row").select(frame.columns)


def _criteria_cards(build: _Builder, names: Sequence[str]) -> Markup:
    from cohort.definitions import load_definition

    cards = ["<div class=\"criteria\">"]
    for name in names:
        try:
            spec = load_definition(name).to_dict()
        except CohortError as error:
            build.skip(f"Criteria of {name}", f"its definition file could not be loaded: {error}")
            continue
        citation = spec.get("citation") or {}
        cite = ". ".join(str(citation[k]).rstrip(".") for k in ("authors", "title", "journal", "publisher", "year",
                                                                "volume", "pages") if citation.get(k))
        cards.append(f"<article><h4>{html.escape(name)}</h4><p class=\"cite\">{html.escape(cite)}</p>")
        population = spec.get("population") or {}
        low, high = population.get("min_age_years"), population.get("max_age_years")
        ages = ("age at onset " + (f"{low:g} years and over" if low else "any")
                + (f", under {high:g} years" if high else ""))
        cards.append(f"<p class=\"cite\">Population: {html.escape(ages)}</p>")
        cards.append(f"<b>Diagnosis</b> {_criterion_html(spec.get('diagnosis'))}")
        severity = spec.get("severity")
        if severity:
            grades = "".join(f"<li>{html.escape(str(g['grade']))}: {_criterion_html(g['when'])}</li>"
                             for g in severity.get("grades", []))
            cards.append(f"<b>Severity</b> (worst first)<ul>{grades}</ul>")
        else:
            cards.append("<p class=\"cite\">Severity: not graded by this definition.</p>")
        resolution = (spec.get("resolution") or {}).get("when")
        cards.append(f"<b>Resolution</b> {_criterion_html(resolution)}</article>")
    cards.append("</div>")
    return Markup("".join(cards))


def _km_curves(build: _Builder, episodes: pl.DataFrame, group: str, name: str, title: str) -> list[Markup]:
    from cohort.stats import kaplan_meier, resolution_time_table

    table = resolution_time_table(episodes).filter(pl.col(group).is_not_null())
    if table.is_empty():
        raise _Skip(f"no episode has a {group}")
    result = kaplan_meier(table, group_cols=[group], at_risk_times=list(KM_TIMES))
    curve = km_truncate(result.curve, threshold=build.threshold, group=group)
    curves = {}
    for (label,), part in curve.group_by([group], maintain_order=True):
        part = part.sort("time")
        curves[str(label)] = (part["time"].to_list(), part["estimate"].to_list())
    figure = charts.km_figure(curves, title=title, x_title="Hours from onset",
                              y_title="Share not yet resolved (Kaplan-Meier)")
    # numbers at risk only: events and censorings so far are left out, as with them each row would
    # be a group adding up to n and a small one could be recovered
    at_risk = result.at_risk.select(group, pl.col("time").cast(pl.Int64).alias("hours"), "at_risk")
    shown = suppress_counts(at_risk, ["at_risk"], threshold=build.threshold, group_by=[])
    at_risk_wide = shown.pivot(on="hours", index=group, values="at_risk")
    at_risk_wide = at_risk_wide.rename({c: f"at risk at {c} h" for c in at_risk_wide.columns if c != group})
    medians = result.medians.select(
        group, "n", "events", (pl.col("n") - pl.col("events")).alias("censored"),
        pl.col("estimate").round(2).alias("median_hours"), pl.col("lower").round(2).alias("median_lower"),
        pl.col("upper").round(2).alias("median_upper"))
    # n = events + censored: one group per row
    medians = _suppress_rows(medians, ["n", "events", "censored"], build.threshold)
    medians = medians.with_columns(
        *[pl.when(pl.col("n").is_in([suppressed_label(build.threshold), SECONDARY_LABEL])).then(None)
          .otherwise(pl.col(c)).alias(c) for c in ("median_hours", "median_lower", "median_upper")])
    blocks = [build.chart(figure, name, "Curves stop where fewer than "
                          f"{build.threshold} episodes remain at risk. Unresolved episodes are censored at their end "
                          "(discharge, death or end of data).", curve_table(curve, group), "Curve: estimate and "
                          "95% band at each time an episode resolved, up to where the curve stops")]
    blocks.append(build.table(at_risk_wide, f"{name}_at_risk", "Numbers at risk (shown under the plot)"))
    blocks.append(build.table(medians, f"{name}_medians", "Median hours to resolution with 95% confidence interval"))
    return blocks


def curve_table(curve: pl.DataFrame, group: str) -> pl.DataFrame:
    """The plotted curve as a table: group, hours, estimate and band (no counts: they are in the at-risk table)."""
    return curve.select(group, pl.col("time").alias("hours"), pl.col("estimate").round(4),
                        pl.col("lower").round(4), pl.col("upper").round(4))


def _resolution_section(build: _Builder, results_dir: Path) -> _Section | None:
    section = _Section("resolution", "Time to resolution",
                       "Kaplan-Meier estimates of the share of episodes not yet resolved, by hours from onset.")
    episodes = _read(results_dir, "episodes.parquet")
    if episodes is None:
        build.skip("Time to resolution", "no episodes.parquet in the results")
        section.blocks.extend(resolution_blocks(build, results_dir))
        return section if section.blocks else None
    for group, name, title, part in (
        ("definition", "km_definition", "Time to resolution by definition", "by definition"),
        ("severity", "km_severity", f"Time to resolution by severity at onset ({_primary(episodes)})", "by severity"),
    ):
        frame = episodes if group == "definition" else episodes.filter(pl.col("definition") == _primary(episodes))
        try:
            section.blocks.append(_h3(part[:1].upper() + part[1:]))
            section.blocks.extend(_km_curves(build, frame, group, name, title))
        except (_Skip, CohortError) as error:
            section.blocks.pop()
            build.skip(f"Time to resolution {part}", str(error))
    section.blocks.extend(resolution_blocks(build, results_dir))
    return section if section.blocks else None


def _period_column(frame: pl.DataFrame, threshold: int) -> tuple[pl.DataFrame, str]:
    """Add ``period``: the finest of month, quarter and year where at least 80% of the periods hold
    ``threshold`` episodes or more (so that most points can be shown); year otherwise."""
    onset = pl.col("onset_datetime")
    year = onset.dt.year().cast(pl.String)
    candidates = (
        ("month", onset.dt.strftime("%Y-%m")),
        ("quarter", year + "-Q" + onset.dt.quarter().cast(pl.String)),
        ("year", year),
    )
    for unit, expression in candidates:
        labelled = frame.with_columns(expression.alias("period"))
        sizes = labelled.group_by("period").len()["len"]
        if unit == "year" or (sizes.len() and (sizes >= threshold).mean() >= 0.8):
            return labelled, unit
    raise AssertionError("unreachable: the year is always returned")


def _audit_section(build: _Builder, results_dir: Path) -> _Section | None:
    features = _read(results_dir, "episode_features.parquet")
    if features is None:
        build.skip("Insulin-infusion audit", "no episode_features.parquet in the results (written by `dka-cohort features`)")
        return None
    primary = _primary(features)
    section = _Section("audit", "Insulin-infusion audit",
                       f"Care against guideline standards, for episodes of the {primary} definition. Hospitals are "
                       "the care sites of the onset visits.")
    frame = features.filter(pl.col("definition") == primary)
    # standards table by hospital
    rows = []
    for key, (column, meets, label, source) in STANDARDS.items():
        if column not in frame.columns:
            build.skip(f"Standard {key}", f"episode_features has no column {column}")
            continue
        met = pl.col(column) if meets else ~pl.col(column)
        for scope, part in [("all hospitals", frame), *[
                (f"hospital {site}" if site is not None else "hospital unknown", sub)
                for (site,), sub in frame.group_by(["care_site_id"], maintain_order=True)]]:
            values = part.select(met.alias("m"))["m"]
            rows.append({"standard": label, "source": source, "hospital": scope,
                         "numerator": int(values.sum() or 0), "denominator": int(values.count())})
    if rows:
        standards = pl.DataFrame(rows)
        overall = share_table(standards.filter(pl.col("hospital") == "all hospitals"), threshold=build.threshold)
        by_site = share_table(standards.filter(pl.col("hospital") != "all hospitals"), threshold=build.threshold,
                              group_by=["standard"])
        shown = pl.concat([overall, by_site]).sort(["standard", "hospital"])
        section.blocks.append(_h3("Standards"))
        section.blocks.append(build.table(shown, "standards",
                                          "Each standard: episodes meeting it (numerator) of those where it can be judged "
                                          "(denominator)"))
    with_period, unit = _period_column(frame, build.threshold)
    # run charts
    for column, title, label in (
        ("hours_to_resolution", "Median hours to resolution", "Median hours from onset to resolution (h)"),
        ("hours_on_infusion", "Median time to closure of the insulin infusion", "Median hours on the infusion (h)"),
    ):
        if column not in frame.columns:
            build.skip(f"Run chart of {column}", f"episode_features has no column {column}")
            continue
        table = median_table(with_period, column, ["period"], threshold=build.threshold)
        if table.is_empty():
            build.skip(f"Run chart of {column}", "no episode has a value")
            continue
        values = table["median"].to_list()
        analysis = analyse_run_chart(values)
        periods = table["period"].to_list()
        figure = charts.run_chart_figure(periods, values, analysis, title=f"{title} by {unit}", y_title=label,
                                         x_title=f"{unit.capitalize()} of onset")
        fired = "; ".join(f"{s.rule.replace('_', ' ')}: {s.detail}" for s in analysis.signals) or "no rule fired"
        limits = f"{analysis.runs_limits[0]}-{analysis.runs_limits[1]}" if analysis.runs_limits else "not applied (fewer than 10)"
        section.blocks.append(_h3(f"Run chart: {title.lower()}"))
        section.blocks.append(build.chart(
            figure, f"run_{column}",
            f"{analysis.runs} runs in {analysis.useful_observations} useful observations (expected {limits}). "
            f"Rules (Perla, Provost and Murray 2011): {fired}. {unit.capitalize()}s with fewer than "
            f"{build.threshold} episodes are withheld.",
            table, f"{title} by {unit}: n, median and quartiles"))
    # p-chart and funnel plot of one standard
    key = _chartable_standard(with_period, build.threshold)
    if key is None:
        build.skip("p-chart and funnel plot", "episode_features has none of the standards' columns")
    else:
        column, meets, label, _ = STANDARDS[key]
        section.blocks.append(_p(f"The p-chart and the funnel plot show the standard \"{label}\": of the standards, the "
                                 "one with the most periods and hospitals whose share can be shown under disclosure control."))
        section.blocks.extend(_p_chart_blocks(build, with_period, unit, column, meets, label))
        section.blocks.extend(_funnel_blocks(build, frame, column, meets, label))
    return section if section.blocks else None


def _chartable_standard(frame: pl.DataFrame, threshold: int) -> str | None:
    """The standard with the most periods plus hospitals whose share survives disclosure control."""
    best, best_score = None, -1
    for key, (column, meets, _, _) in STANDARDS.items():
        if column not in frame.columns:
            continue
        score = 0
        for by in ("period", "care_site_id"):
            counts = _counts_by(frame, by, column, meets)
            shown = share_table(counts, threshold=threshold, group_by=[]) if not counts.is_empty() else counts
            score += 0 if counts.is_empty() else int(shown["share"].is_not_null().sum())
        if score > best_score:
            best, best_score = key, score
    return best


def _counts_by(frame: pl.DataFrame, by: str, column: str, meets: bool) -> pl.DataFrame:
    met = pl.col(column) if meets else ~pl.col(column)
    return (frame.select(by, met.alias("m")).group_by(by)
            .agg(pl.col("m").sum().cast(pl.Int64).alias("numerator"), pl.col("m").count().cast(pl.Int64).alias("denominator"))
            .filter(pl.col(by).is_not_null()).sort(by))


def _p_chart_blocks(build: _Builder, frame: pl.DataFrame, unit: str, column: str, meets: bool, label: str) -> list[Markup]:
    counts = _counts_by(frame, "period", column, meets).filter(pl.col("denominator") > 0)
    if counts.is_empty():
        build.skip("p-chart", f"no episode where `{label}` can be judged")
        return []
    chart = p_chart(counts["numerator"].to_list(), counts["denominator"].to_list())
    shown = share_table(counts, threshold=build.threshold, group_by=[])
    withheld = np.array([value is None for value in shown["share"].to_list()])
    small_den = np.array([is_small(value, build.threshold) for value in counts["denominator"].to_list()])
    chart = type(chart)(chart.centre, np.where(withheld, np.nan, chart.share),
                        np.where(small_den, np.nan, chart.lower), np.where(small_den, np.nan, chart.upper),
                        tuple(i for i in chart.outside if not withheld[i]), chart.sigma)
    shown = shown.with_columns(pl.Series("lower_limit", chart.lower).fill_nan(None),
                               pl.Series("upper_limit", chart.upper).fill_nan(None))
    figure = charts.p_chart_figure(counts["period"].to_list(), chart, title=f"p-chart: {label}, by {unit}",
                                   y_title="Share of episodes meeting the standard", x_title=f"{unit.capitalize()} of onset")
    return [_h3(f"Control chart (p-chart): {label.lower()}"), build.chart(
        figure, "p_chart", f"Centre line p-bar {chart.centre:.3f}; 3-sigma limits per {unit} (Montgomery, Introduction "
        f"to Statistical Quality Control, control charts for attributes). {len(chart.outside)} {unit}(s) outside the "
        f"limits. Shares of {unit}s with a small count are withheld.", shown, f"{label}: numerator, denominator, share and limits")]


def _funnel_blocks(build: _Builder, frame: pl.DataFrame, column: str, meets: bool, label: str) -> list[Markup]:
    counts = _counts_by(frame, "care_site_id", column, meets).filter(pl.col("denominator") > 0)
    if counts.is_empty():
        build.skip("Funnel plot", "no hospital has an episode where the standard can be judged")
        return []
    target = counts["numerator"].sum() / counts["denominator"].sum()
    if not 0 < target < 1:
        build.skip("Funnel plot", f"the pooled share is {target:.3f}; funnel limits need a share strictly between 0 and 1")
        return []
    shown = share_table(counts.with_columns(pl.format("H{}", "care_site_id").alias("hospital")).drop("care_site_id")
                        .select("hospital", "numerator", "denominator"), threshold=build.threshold, group_by=[])
    positions = []
    for row, raw in zip(shown.iter_rows(named=True), counts.iter_rows(named=True), strict=True):
        positions.append(None if row["share"] is None else funnel_position(raw["numerator"], raw["denominator"], target))
    shown = shown.with_columns(pl.Series("position", positions, dtype=pl.String))
    # a hospital is plotted only when its share and its denominator are both shown (a denominator
    # can be withheld by secondary suppression while the share is not)
    plotted = shown.filter(pl.col("share").is_not_null()
                           & pl.col("denominator").cast(pl.String).str.contains(r"^[0-9]+$"))
    if plotted.is_empty():
        build.skip("Funnel plot", "every hospital's share is withheld by disclosure control")
        return []
    denominators = [int(v) for v in plotted["denominator"].to_list()]
    limits = funnel_limits(target, [n for n in curve_denominators(max(denominators)) if n >= build.threshold])
    figure = charts.funnel_figure(plotted["hospital"].to_list(), denominators, plotted["share"].to_list(), limits, target,
                                  title=f"Funnel plot: {label}, by hospital", y_title="Share of episodes meeting the standard")
    return [_h3(f"Funnel plot: {label.lower()}"), build.chart(
        figure, "funnel", f"Target: the pooled share {target:.3f}. Exact binomial 95% and 99.8% limits with the "
        "interpolation of Spiegelhalter (Stat Med 2005;24:1185-1202). Hospitals whose share is withheld are not plotted.",
        shown, f"{label} by hospital, with the position on the funnel")]


def _recurrence_section(build: _Builder, results_dir: Path) -> _Section | None:
    section = _Section("recurrence", "Recurrence and rates",
                       "Share of episodes followed by another episode of the same person within 30, 90 and 365 days, "
                       "among episodes followed for the whole window.")
    features = _read(results_dir, "episode_features.parquet")
    if features is None:
        build.skip("Recurrence", "no episode_features.parquet in the results")
    else:
        rows = []
        for days in (30, 90, 365):
            column = f"recurs_within_{days}d"
            if column not in features.columns:
                continue
            for (definition,), part in features.group_by(["definition"], maintain_order=True):
                values = part[column]
                rows.append({"definition": definition, "window_days": days,
                             "numerator": int(values.sum() or 0), "denominator": int(values.count())})
        if rows:
            table = share_table(pl.DataFrame(rows).sort(["definition", "window_days"]), threshold=build.threshold)
            section.blocks.append(build.table(table, "recurrence", "Episodes followed by a recurrence within the window "
                                              "(numerator) of episodes with complete follow-up (denominator)"))
        else:
            build.skip("Recurrence", "episode_features has no recurs_within_* columns")
    section.blocks.extend(recurrence_blocks(build, results_dir))
    stats_dir = results_dir / "stats"
    found = sorted(p for p in stats_dir.glob("*.csv") if p.stem not in STATS_HANDLED) if stats_dir.is_dir() else []
    if found:
        section.blocks.append(_h3("Further tables of the statistics stage"))
    for path in found:
        try:
            frame = pl.read_csv(path, infer_schema_length=10000)
        except (pl.exceptions.PolarsError, OSError) as error:
            build.skip(f"stats/{path.name}", f"could not be read: {error}")
            continue
        drop = [c for c in frame.columns if c.lower() in IDENTIFIER_COLUMNS or c.lower().endswith(("_datetime", "_date"))]
        frame = frame.drop(drop)
        counts = [c for c in frame.columns if COUNT_COLUMN_PATTERN.fullmatch(c.lower()) and _whole_numbers(frame[c])]
        frame = frame.with_columns(*[pl.col(c).cast(pl.Int64) for c in counts])
        # each count column is one group (its cells may add up to a total shown elsewhere), n and
        # events of a row another (with n - events); every other figure of a row with a hidden count
        # (a rate, a share, a person-time) could give it back: all are withheld in that row
        shown = suppress_table(frame, counts, threshold=build.threshold)
        section.blocks.append(Markup("<h4>") + path.stem.replace("_", " ") + Markup("</h4>"))
        section.blocks.append(build.table(shown, path.stem, f"{path.name} from the statistics stage"))
    return section if section.blocks else None


def _whole_numbers(column: pl.Series) -> bool:
    if column.dtype.is_integer():
        return True
    if not column.dtype.is_float():
        return False
    values = column.drop_nulls().drop_nans()
    return values.len() > 0 and bool(((values - values.round(0)).abs() < 1e-9).all()) and bool((values >= 0).all())


def _manifest_block(results_dir: Path, threshold: int) -> list[Markup]:
    items: list[tuple[str, str]] = [
        ("report generated", dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")),
        ("disclosure threshold", str(threshold)),
        ("plotly.js", f"embedded from plotly {plotly.__version__}"),
    ]
    path = _find(results_dir, "manifest.json")
    if path is not None:
        try:
            manifest = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as error:
            manifest = {"error": f"manifest.json could not be read: {error}"}
        for definition in manifest.get("definitions", []) or []:
            items.append((f"definition {definition.get('name')}", f"sha256 {definition.get('sha256')}"))
            for key, value in (definition.get("overrides") or {}).items():
                items.append((f"  override {key}", json.dumps(value, default=str)))
        source = manifest.get("source") or {}
        if source:
            items.append(("source format", str(source.get("format"))))
            items.append(("source fingerprint", str(source.get("digest"))))
        for name, version in sorted((manifest.get("packages") or {}).items()):
            items.append((f"package {name}", str(version)))
        for key in ("seed", "command", "started", "finished"):
            if key in manifest:
                items.append((key, str(manifest[key])))
        for key, value in sorted((manifest.get("parameters") or {}).items()):
            items.append((f"parameter {key}", json.dumps(value, default=str)))
    body = "".join(f"<dt>{html.escape(k)}</dt><dd>{html.escape(v)}</dd>" for k, v in items)
    blocks = [_h3("Manifest"), Markup(f"<dl class=\"manifest\">{body}</dl>")]
    if path is None:
        blocks.append(_p("No manifest.json was found in the results: the definitions' hashes and the source "
                         "fingerprint cannot be shown."))
    blocks.append(_h3("Methods"))
    blocks.append(Markup(
        "<ul class=\"note\">"
        "<li>Run charts: median line; shift = 6 or more consecutive points on one side of the median (points on it "
        "skipped); trend = 5 or more points going one way (equal neighbours counted once); too few or too many runs "
        "by Table 1 of Perla RJ, Provost LP, Murray SK, BMJ Qual Saf 2011;20:46-51 (10 to 60 useful observations); "
        "astronomical point = beyond 3 interquartile ranges outside the quartiles (Tukey's outer fence), a candidate "
        "for judgement. Months are used when at least 80% of them hold enough episodes to show, else "
        "quarters on the same rule, else years.</li>"
        "<li>p-chart: p-bar and 3-sigma limits from the binomial standard error of each period (Montgomery DC, "
        "Introduction to Statistical Quality Control, control charts for attributes).</li>"
        "<li>Funnel plot: exact binomial 95% and 99.8% limits around the pooled share, interpolated between the "
        "binomial steps (Spiegelhalter DJ, Stat Med 2005;24:1185-1202).</li>"
        "<li>Kaplan-Meier: product-limit estimate with lifelines; numbers at risk counted at the times shown.</li>"
        "<li>Cumulative incidence with competing events: Aalen-Johansen estimator (Aalen O, Johansen S, Scand J Stat "
        "1978;5:141-150); curves stop where fewer than the threshold remain at risk.</li>"
        "<li>Forest plots: hazard (or odds) ratios exp(coef) with 95% Wald CIs from the statistics stage, on a log "
        "axis; beside each Cox term the proportional-hazards test on scaled Schoenfeld residuals (Grambsch PM, "
        "Therneau TM, Biometrika 1994;81:515-526). Model estimates are withheld when the model rests on fewer than "
        "the threshold of episodes or events.</li>"
        "<li>Incidence rates: events per person-years with exact Poisson CIs as the statistics stage states; "
        "age-standardised rates by direct standardisation to the standard population named.</li>"
        "<li>Prediction: AUROC with the CI method named, calibration intercept and slope, and observed against "
        "predicted risk by bin (Steyerberg EW, Clinical Prediction Models, 2nd ed., 2019, ch. 15).</li>"
        "<li>Colours: Okabe M, Ito K, Color Universal Design, 2008.</li>"
        "</ul>"))
    return blocks


# ------------------------------------------------------------------------- entry point
def _check_args(results_dir: Path | str, out_file: Path | str, threshold: int) -> tuple[Path, Path]:
    if isinstance(threshold, bool) or not isinstance(threshold, int) or threshold < 1:
        msg = f"write_report: threshold must be a whole number of 1 or more, got {threshold!r}"
        raise InputError(msg)
    results = Path(results_dir)
    if not results.is_dir():
        msg = f"--results {results} is not a folder; give the folder the episodes/features stages wrote into"
        raise InputError(msg)
    out = Path(out_file)
    if out.suffix.lower() not in (".html", ".htm"):
        msg = f"--out {out} must name an .html file, e.g. report.html"
        raise InputError(msg)
    if out.is_dir():
        msg = f"--out {out} is a folder; give a file name such as {out / 'report.html'}"
        raise InputError(msg)
    return results, out


def write_report(results_dir: Path | str, out_file: Path | str, *, threshold: int = DEFAULT_THRESHOLD) -> ReportSummary:
    """Write the self-contained HTML report and the CSV tables behind it.

    Parameters
    ----------
    results_dir
        Folder holding the results (``episodes/``, ``features/``, ``stats/`` subfolders, or flat).
    out_file
        The HTML file to write. The tables go to ``<stem>-tables/`` beside it. Both are staged
        beside it under the lock ``<out>.lock`` and replace earlier ones only when complete.
    threshold
        Disclosure threshold: counts from 1 to ``threshold - 1`` are suppressed.

    Returns
    -------
    ReportSummary
        Files written, sections rendered and parts skipped with the reason.

    Raises
    ------
    InputError
        ``results_dir`` is not a folder, ``out_file`` is not an .html path, or a result cannot be read.
    DisclosureError
        The finished output still breaks the disclosure rule (nothing is written then).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> summary = write_report(folder, folder / "report.html")
    >>> summary.out_file.name, len(summary.skipped) > 0
    ('report.html', True)
    """
    started = time.perf_counter()
    results, out = _check_args(results_dir, out_file, threshold)
    tables_name = f"{out.stem}-tables"
    build = _Builder(threshold=threshold, tables_name=tables_name)
    sections: list[_Section] = []
    builders: list[Callable[[_Builder, Path], _Section | None]] = [
        _cohort_section, _definitions_section, _resolution_section, _audit_section, _recurrence_section,
    ]
    for make in builders:
        section = make(build, results)
        if section is not None:
            sections.append(section)
    methods = _manifest_block(results, threshold)
    environment = jinja2.Environment(
        loader=jinja2.PackageLoader("cohort.report", "templates"), autoescape=True,
        undefined=jinja2.StrictUndefined,
    )
    stylesheet = resources.files("cohort.report").joinpath("templates/report.css").read_text("utf-8")
    page = environment.get_template("report.html.j2").render(
        title="DKA cohort and audit report",
        subtitle="Diabetic ketoacidosis episodes found from lab results, their care and their course.",
        sections=sections, skipped=build.skipped, cautions=CAUTIONS, threshold=threshold,
        stylesheet=Markup(stylesheet), plotly_js=Markup(_plotly_js()), methods=methods,
        footer=f"Made by dka-cohort. Tables behind this report: {tables_name}/ (CSV).",
    )
    tables_dir = out.parent / tables_name
    # staged beside the file under the lock <out>.lock; the tables folder, then the page, replace
    # the earlier ones only when both are written and pass the disclosure check (cohort._outputs)
    with output_file(out, command="report", beside=(tables_name,)) as staging:
        staged_html = staging / out.name
        staged_html.write_text(page, encoding="utf-8")
        staged_tables = staging / tables_name
        staged_tables.mkdir()
        for file_name, frame in build.tables.items():
            frame.write_csv(staged_tables / file_name)
        violations = check_disclosure(staging, threshold=threshold)
        if violations:
            listed = "; ".join(str(v) for v in violations[:5])
            msg = (f"the report would break the disclosure rule in {len(violations)} place(s), nothing was written: "
                   f"{listed}. Raise the level of aggregation or report this as a bug.")
            raise DisclosureError(msg)
    return ReportSummary(
        out_file=out, tables_dir=tables_dir, sections=tuple(s.title for s in sections),
        skipped=tuple(build.skipped), charts=build.chart_count,
        tables=tuple(tables_dir / name for name in build.tables), violations=(),
        seconds=time.perf_counter() - started,
    )


def _plotly_js() -> str:
    from plotly.offline import get_plotlyjs

    # a literal "</script>" inside the bundle would end the element early
    return get_plotlyjs().replace("</script>", "<\\/script>")
