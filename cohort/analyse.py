"""The statistics stage: from feature tables to the estimate tables users publish.

:func:`run_analyses` reads the feature tables written by ``dka-cohort features`` (one definition
at a time: the models refuse a mix), runs the survival, competing-risk, recurrence, prediction and
rate analyses of :mod:`cohort.stats`, and writes each result as a CSV under ``out``. An analysis
the data cannot support (too few events, a constant covariate, perfect separation) is not fatal:
it is listed in ``analyses.csv`` with the reason, and the others still run.

Whole curves (one row per event time: Kaplan-Meier of resolution, cumulative incidence of
resolution with death and discharge competing, cumulative incidence of first recurrence with
death competing) go to ``out/curves/``; summary tables to ``out``. The CSVs hold unsuppressed
counts; they are working results for the secure environment. The
report (``dka-cohort report``) applies disclosure control to everything it shows and exports.

The folder is written whole or not at all (a staging folder under the lock ``<out>.lock``,
:mod:`cohort._outputs`), with ``manifest.json`` last: the definition, the features read (with
their content hashes) and the content hash of every result table.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from cohort._errors import CohortError, InputError

__all__ = ["AnalysisSummary", "NOTE_SUFFIX", "is_note", "run_analyses", "with_death_in_follow_up"]

#: Covariates of the resolution and recurrence models (episode features contract names).
RESOLUTION_COVARIATES = ("severity", "age_at_onset", "sex", "diabetes_type", "is_sglt2i_at_onset", "hba1c_mmol_mol")
RECURRENCE_COVARIATES = ("age_at_onset", "sex", "hba1c_mmol_mol", "is_sglt2i_at_onset")
#: Times (hours after onset) at which the cumulative incidence of resolution is tabulated.
CIF_HOURS = (6.0, 12.0, 24.0, 48.0, 72.0)
#: Times (hours) at which numbers at risk are tabulated under the Kaplan-Meier curves.
AT_RISK_HOURS = (0.0, 6.0, 12.0, 24.0, 36.0, 48.0, 72.0)
#: A competing cause with fewer events than this gets no cause-specific model.
MIN_CAUSE_EVENTS = 5


@dataclass
class AnalysisSummary:
    """What :func:`run_analyses` wrote and what it could not run."""

    out: Path
    definition: str
    written: dict[str, Path] = field(default_factory=dict)
    skipped: dict[str, str] = field(default_factory=dict)
    seconds: float = 0.0


def _read(folder: Path, name: str, definition: str) -> pl.DataFrame:
    path = folder / f"{name}.parquet"
    if not path.is_file():
        msg = (
            f"no {name}.parquet under {folder}; expected the folder `dka-cohort features` writes "
            f"(episode_features.parquet, counting_process.parquet, person_time.parquet, ...)"
        )
        raise InputError(msg)
    frame = pl.read_parquet(path)
    if "definition" in frame.columns:
        frame = frame.filter(pl.col("definition") == definition)
    return frame


def _varying(frame: pl.DataFrame, wanted: tuple[str, ...], summary: AnalysisSummary, models: str) -> list[str]:
    """The wanted covariates present in ``frame`` that take more than one value there.

    A covariate constant in the analysed episodes (diabetes type among children, say) has no
    estimable effect; it is left out and the omission is listed with the skipped analyses.
    """
    kept, constant = [], []
    for name in wanted:
        if name not in frame.columns:
            continue
        (kept if frame[name].drop_nulls().n_unique() > 1 else constant).append(name)
    if constant:
        summary.skipped[f"{models}: covariates {NOTE_SUFFIX}"] = (
            f"{', '.join(constant)} take(s) a single value in these episodes, so no effect can be estimated"
        )
    return kept


#: The end of the name of an entry of ``AnalysisSummary.skipped`` that is a note on a model
#: that ran (covariates or levels left out), not an analysis that did not run.
NOTE_SUFFIX = "left out"


def is_note(name: str) -> bool:
    """True for an ``AnalysisSummary.skipped`` entry that notes what a model left out.

    Examples
    --------
    >>> is_note("resolution models: covariates left out"), is_note("cause_specific_cox")
    (True, False)
    """
    return name.endswith(NOTE_SUFFIX)


def _without_eventless_levels(frame: pl.DataFrame, covariates: list[str], event: str,
                              summary: AnalysisSummary, models: str) -> pl.DataFrame:
    """``frame`` less the rows at a level of a text covariate holding no event.

    A level without events has no finite hazard ratio (the partial likelihood keeps rising as
    its coefficient falls; monotone likelihood, the survival analogue of separation), so the
    model would be refused whole. Its rows are left out of the model instead, and listed with
    the skipped analyses (common practice: report, rather than estimate, an empty level).
    """
    kept = frame
    notes = []
    for name in covariates:
        if name not in kept.columns or kept[name].dtype not in (pl.String, pl.Categorical):
            continue
        counts = kept.group_by(name).agg(pl.len().alias("rows"), pl.col(event).cast(pl.Int64).sum().alias("events"))
        empty = counts.filter((pl.col("events") == 0) & pl.col(name).is_not_null()).sort(name)
        for level, rows in zip(empty[name].to_list(), empty["rows"].to_list(), strict=True):
            notes.append(f"{name}={level} ({rows} rows)")
        if empty.height:
            kept = kept.filter(~pl.col(name).is_in(empty[name].implode()) | pl.col(name).is_null())
    if notes:
        summary.skipped[f"{models}: levels {NOTE_SUFFIX}"] = (
            f"{', '.join(notes)} hold no event, so no hazard ratio exists for them; their rows "
            "are left out of the model"
        )
    return kept


def _population_person_time(person_time: pl.DataFrame, definition: str) -> pl.DataFrame:
    """Person-time of people with diabetes (type 1 or 2) in the definition's age range.

    The denominator of an incidence rate must be the population that could have had an episode
    counted: an adult definition counts no child's episode, so children's person-time is left out.
    """
    from cohort.definitions import load_definition

    population = load_definition(definition).population
    keep = pl.col("diabetes_type").is_in(["type1", "type2"])
    if population.min_age_years is not None:
        keep = keep & (pl.col("age_years") >= population.min_age_years)
    if population.max_age_years is not None:
        keep = keep & (pl.col("age_years") < population.max_age_years)
    return person_time.filter(keep)


def _broad_age_groups(person_time: pl.DataFrame) -> tuple[pl.DataFrame, str]:
    """Four broad age groups for rate regression (five-year bands leave empty cells)."""
    adults = person_time["age_years"].min() is not None and person_time["age_years"].min() >= 18
    if adults:
        cuts, labels, reference = [40, 65], ["18-39", "40-64", "65+"], "18-39"
    else:
        cuts, labels, reference = [5, 10, 15], ["0-4", "5-9", "10-14", "15-17"], "10-14"
    expression = pl.lit(labels[-1])
    for cut, label in reversed(list(zip(cuts, labels[:-1], strict=True))):
        expression = pl.when(pl.col("age_years") < cut).then(pl.lit(label)).otherwise(expression)
    return person_time.with_columns(expression.alias("age_group")), reference


def _cif_at(cif: pl.DataFrame, hours: tuple[float, ...]) -> pl.DataFrame:
    """The step function of each cause's cumulative incidence read at fixed times."""
    rows = []
    for (cause,), part in cif.sort("time").group_by(["cause"], maintain_order=True):
        times = part["time"].to_list()
        for at in hours:
            index = max((i for i, value in enumerate(times) if value <= at), default=None)
            if index is None:
                continue
            row = part.row(index, named=True)
            rows.append(
                {"cause": cause, "hours": at, "estimate": row["estimate"], "lower": row.get("lower"), "upper": row.get("upper")}
            )
    return pl.DataFrame(rows)


def with_death_in_follow_up(episodes: pl.DataFrame, persons: pl.DataFrame) -> pl.DataFrame:
    """Add ``died_in_follow_up``: the person's death date falls on or before the follow-up end.

    The competing event of time to first recurrence (a person who died can no longer recur).

    Parameters
    ----------
    episodes
        Episode features with ``person_id`` and ``follow_up_end_datetime``.
    persons
        The person summary of the feature stage (``person_id``, ``death_date``).

    Returns
    -------
    polars.DataFrame
        ``episodes`` with ``death_date`` and the boolean ``died_in_follow_up``.

    Examples
    --------
    >>> import datetime as dt
    >>> episodes = pl.DataFrame({"person_id": [1, 2], "follow_up_end_datetime": [
    ...     dt.datetime(2024, 3, 1), dt.datetime(2024, 3, 1)]})
    >>> persons = pl.DataFrame({"person_id": [1, 2], "death_date": [dt.date(2024, 2, 1), None]})
    >>> with_death_in_follow_up(episodes, persons)["died_in_follow_up"].to_list()
    [True, False]
    """
    death = persons.select("person_id", "death_date").unique("person_id")
    return episodes.join(death, on="person_id", how="left").with_columns(
        (
            pl.col("death_date").is_not_null()
            & (pl.col("death_date").cast(pl.Datetime("us")) <= pl.col("follow_up_end_datetime"))
        ).alias("died_in_follow_up")
    )


def run_analyses(
    features: Path | str,
    out: Path | str,
    *,
    definition: str = "consensus-2024",
) -> AnalysisSummary:
    """Run the statistics stage on one definition's feature tables and write CSV results.

    Parameters
    ----------
    features
        The folder ``dka-cohort features`` wrote.
    out
        Folder for the result CSVs: new, empty, or an earlier run's (replaced whole, only once
        the new results are complete).
    definition
        Which definition's episodes to analyse.

    Returns
    -------
    AnalysisSummary
        The files written and the analyses skipped, each with its reason.

    Examples
    --------
    >>> summary = run_analyses("demo-output/features", "demo-output/stats")  # doctest: +SKIP
    >>> sorted(summary.written)[:2]  # doctest: +SKIP
    ['age_standardised_rates', 'andersen_gill']
    """
    from cohort import stats

    from cohort._manifest import utc_now

    started = time.perf_counter()
    started_at = utc_now()
    from cohort._outputs import check_output_folder

    folder = Path(features)
    target = Path(out)
    check_output_folder(target, markers=_ANALYSE_MARKERS)  # before any heavy work
    episodes = _read(folder, "episode_features", definition)
    if episodes.height == 0:
        found = pl.read_parquet(folder / "episode_features.parquet", columns=["definition"])["definition"].unique()
        msg = (
            f"episode_features has no episodes of definition `{definition}`; it holds "
            f"{', '.join(sorted(found.to_list())) or 'none'}"
        )
        raise InputError(msg)
    counting = _read(folder, "counting_process", definition)
    person_time = _population_person_time(_read(folder, "person_time", definition), definition)
    persons = _read(folder, "person_summary", definition)
    summary = AnalysisSummary(out=target, definition=definition)
    # results are kept until every analysis has run, then written whole (see _write_results)
    results: dict[str, tuple[str, pl.DataFrame]] = {}

    def save(name: str, frame: pl.DataFrame) -> None:
        # whole curves (one row per event time) go to curves/, summary tables beside it
        relative = f"curves/{name.removeprefix('curve_')}.csv" if name.startswith("curve_") else f"{name}.csv"
        results[name] = (relative, frame.with_columns(pl.lit(definition).alias("definition")))
        summary.written[name] = target / relative

    def attempt(name: str, work: Callable[[], dict[str, pl.DataFrame]]) -> None:
        try:
            for table_name, frame in work().items():
                save(table_name, frame)
        except CohortError as error:
            summary.skipped[name] = str(error)

    resolution = stats.resolution_time_table(episodes)
    covariates = _varying(resolution, RESOLUTION_COVARIATES, summary, "resolution models")

    def km() -> dict[str, pl.DataFrame]:
        overall = stats.kaplan_meier(resolution, at_risk_times=AT_RISK_HOURS)
        by_severity = stats.kaplan_meier(
            resolution.filter(pl.col("severity").is_not_null()), group_cols="severity", at_risk_times=AT_RISK_HOURS
        )
        return {
            "curve_resolution_kaplan_meier": pl.concat([overall.curve, by_severity.curve], how="diagonal_relaxed"),
            "resolution_median_hours": pl.concat([overall.medians, by_severity.medians], how="diagonal_relaxed"),
            "resolution_at_risk": pl.concat([overall.at_risk, by_severity.at_risk], how="diagonal_relaxed"),
            "resolution_logrank_by_severity": stats.logrank_test(
                resolution.filter(pl.col("severity").is_not_null()), group_col="severity"
            ),
        }

    def by_hospital() -> dict[str, pl.DataFrame]:
        fit = stats.kaplan_meier(resolution, group_cols="care_site_id", at_risk_times=AT_RISK_HOURS)
        return {
            "resolution_median_hours_by_hospital": fit.medians,
            "resolution_logrank_by_hospital": stats.logrank_test(resolution, group_col="care_site_id"),
        }

    def competing() -> dict[str, pl.DataFrame]:
        cif = stats.cumulative_incidence(resolution)
        return {"curve_resolution_cumulative_incidence": cif, "resolution_cumulative_incidence": _cif_at(cif, CIF_HOURS)}

    def cause_specific() -> dict[str, pl.DataFrame]:
        data = resolution.filter(pl.all_horizontal([pl.col(name).is_not_null() for name in covariates]))
        # a cause with fewer than MIN_CAUSE_EVENTS events supports no model: it is listed, not fitted
        counts = data.filter(pl.col("event_type") != "data_end").group_by("event_type").len()
        causes = sorted(counts.filter(pl.col("len") >= MIN_CAUSE_EVENTS)["event_type"].to_list())
        too_few = sorted(set(counts["event_type"].to_list()) - set(causes))
        if too_few:
            summary.skipped["cause_specific_cox:" + ",".join(too_few)] = (
                f"fewer than {MIN_CAUSE_EVENTS} events of cause(s) {', '.join(too_few)}; no model fitted for them"
            )
        if not causes:  # as before: cause_specific_cox says what is missing
            return {"resolution_cause_specific_cox": stats.cause_specific_cox(
                data, covariates=covariates, causes=causes, reference={"severity": "mild"})}
        fits = []
        for cause in causes:
            # each cause its own model: leave out the levels with no event of this cause
            flagged = data.with_columns((pl.col("event_type") == cause).alias("_is_cause"))
            kept = _without_eventless_levels(flagged, covariates, "_is_cause", summary,
                                             f"cause-specific Cox model ({cause})").drop("_is_cause")
            fits.append(stats.cause_specific_cox(
                kept, covariates=covariates, causes=[cause], reference={"severity": "mild"}))
        return {"resolution_cause_specific_cox": pl.concat(fits, how="diagonal_relaxed")}

    def cox() -> dict[str, pl.DataFrame]:
        data = resolution.filter(pl.all_horizontal([pl.col(name).is_not_null() for name in covariates]))
        data = _without_eventless_levels(data, covariates, "is_resolved", summary, "resolution Cox model")
        return {"resolution_cox": stats.cox_model(data, covariates=covariates, reference={"severity": "mild"})}

    with_death = with_death_in_follow_up(episodes, persons)

    def first_recurrence() -> dict[str, pl.DataFrame]:
        result = stats.time_to_first_recurrence(with_death, death_col="died_in_follow_up")
        return {
            "curve_recurrence_cumulative_incidence": result.cumulative_incidence,
            "recurrence_first_at_risk": result.kaplan_meier.at_risk,
            "recurrence_first_median_days": result.kaplan_meier.medians,
        }

    recurrence_covariates = _varying(counting, RECURRENCE_COVARIATES, summary, "recurrence models")

    def recurrent_events() -> dict[str, pl.DataFrame]:
        data = counting.filter(pl.all_horizontal([pl.col(name).is_not_null() for name in recurrence_covariates]))
        return {
            "recurrence_andersen_gill": stats.andersen_gill(data, covariates=recurrence_covariates),
            "recurrence_gap_time": stats.gap_time_model(data, covariates=recurrence_covariates),
        }

    def logistic() -> dict[str, pl.DataFrame]:
        data = episodes.filter(pl.all_horizontal([pl.col(name).is_not_null() for name in recurrence_covariates]))
        return {"recurrence_365d_logistic": stats.recurrence_logistic(data, covariates=recurrence_covariates)}

    def prediction() -> dict[str, pl.DataFrame]:
        result = stats.recurrence_prediction(
            episodes,
            numeric_covariates=["age_at_onset", "hba1c_mmol_mol", "prior_episode_count"],
            categorical_covariates=["sex", "diabetes_type", "is_sglt2i_at_onset"],
        )
        return {
            "recurrence_prediction_metrics": result.metrics,
            "recurrence_prediction_calibration": result.calibration_curve,
        }

    def rates() -> dict[str, pl.DataFrame]:
        return {
            "incidence_rates_by_diabetes_type": stats.incidence_rates(person_time, by="diabetes_type"),
            "incidence_rates_by_sex": stats.incidence_rates(person_time, by=["diabetes_type", "sex"]),
            "incidence_rates_by_year": stats.incidence_rates(person_time, by=["diabetes_type", "calendar_year"]),
            "incidence_rates_by_age_band": stats.incidence_rates(person_time, by=["diabetes_type", "age_band"]),
            "age_standardised_rates": stats.age_standardised_rates(person_time, by="diabetes_type"),
        }

    def rate_ratios() -> dict[str, pl.DataFrame]:
        # five-year bands leave empty cells in small cohorts; the regression uses four broad groups
        data, reference = _broad_age_groups(person_time)
        terms = _varying(data, ("diabetes_type", "sex", "age_group"), summary, "rate regression")
        return {
            "rate_ratios_poisson": stats.rate_regression(data, covariates=terms, reference={"age_group": reference}),
            "rate_ratios_negative_binomial": stats.rate_regression(
                data, covariates=terms, family="negative_binomial", reference={"age_group": reference}
            ),
        }

    for name, work in [
        ("kaplan_meier", km),
        ("kaplan_meier_by_hospital", by_hospital),
        ("competing_risks", competing),
        ("cause_specific_cox", cause_specific),
        ("cox_resolution", cox),
        ("first_recurrence", first_recurrence),
        ("recurrent_events", recurrent_events),
        ("logistic_365d", logistic),
        ("prediction_365d", prediction),
        ("rates", rates),
        ("rate_ratios", rate_ratios),
    ]:
        attempt(name, work)

    summary.seconds = time.perf_counter() - started
    _write_results(target, folder, definition, results, summary, started_at)
    return summary


def _write_results(
    target: Path,
    features: Path,
    definition: str,
    results: dict[str, tuple[str, pl.DataFrame]],
    summary: AnalysisSummary,
    started_at: str,
) -> None:
    """Write the result CSVs, analyses.json and manifest.json into ``target`` whole, under its lock.

    The files go to a staging folder beside ``target`` that replaces it only when every file is
    written (:func:`cohort._outputs.output_folder`); manifest.json, written last, records the
    definition, the features folder and the content hash of each feature table read (so
    :func:`cohort.verify.verify_results` can rerun and check the inputs), and the content hash of
    every result table.
    """
    from cohort._manifest import package_versions, utc_now, write_manifest
    from cohort._outputs import output_folder

    inputs = {
        name: table_hashes_of(features / f"{name}.parquet")
        for name in ("episode_features", "counting_process", "person_time", "person_summary")
    }
    with output_folder(target, command="analyse", markers=_ANALYSE_MARKERS) as staging:
        for relative, frame in results.values():
            path = staging / relative
            path.parent.mkdir(parents=True, exist_ok=True)
            frame.write_csv(path)
        (staging / "analyses.json").write_text(
            json.dumps(
                {
                    "definition": definition,
                    "written": sorted(summary.written),
                    "skipped": summary.skipped,
                    "seconds": round(summary.seconds, 3),
                },
                indent=2,
            ),
            encoding="utf-8",
        )
        manifest = {
            "tool": "dka-cohort",
            "command": "analyse",
            "started": started_at,
            "finished": utc_now(),
            "definition": definition,
            "features": str(features.resolve()),
            "features_tables": inputs,
            "packages": package_versions((*_ANALYSE_PACKAGES,)),
            "parameters": {"definition": definition},
            "skipped": dict(summary.skipped),
        }
        write_manifest(manifest, staging / "manifest.json")


def table_hashes_of(path: Path) -> dict[str, object] | None:
    """Content hash of one input table (:func:`cohort._manifest.table_hash`), None if it is absent."""
    from cohort._manifest import table_hash

    return table_hash(path) if path.is_file() else None


#: Files that mark a complete statistics folder (an earlier run's folder is replaced whole).
_ANALYSE_MARKERS = ("manifest.json", "analyses.json")
#: Packages whose versions shape the statistics (recorded in the manifest).
_ANALYSE_PACKAGES = ("dka-cohort", "polars", "numpy", "scipy", "pandas", "lifelines", "statsmodels", "scikit-learn")
