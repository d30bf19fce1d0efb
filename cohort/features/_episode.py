"""The episode feature table: one row per episode and definition, assembled from the builders.

:data:`EPISODE_COLUMNS` is the one source of the table's columns (name, type, unit, definition);
:func:`episode_features` selects and casts its output through it.
"""

from __future__ import annotations

import polars as pl

from cohort.features._columns import Column, conform
from cohort.features._course import COURSE_ANALYTES, course_features, infusion_lab_features
from cohort.features._covariates import person_covariates, stay_features
from cohort.features._infusions import basal_features, infusion_features, link_infusions
from cohort.features._inputs import FeatureInputs
from cohort.features._options import FeatureOptions
from cohort.features._recurrence import recurrence_features
from cohort.features._time import KEY, hours_between

__all__ = ["EPISODE_COLUMNS", "episode_features"]

DT = pl.Datetime("us")
F = pl.Float64()
B = pl.Boolean()
S = pl.String()
INT = pl.Int64()
H = "hours"
T = "local time"
ML = "mmol/L"

_TARGET = "met | not_met | not_measurable"

EPISODE_COLUMNS: tuple[Column, ...] = (
    # identity and the episodes contract, passed through
    Column("episode_id", S, "", "Episode identifier (from episodes.parquet)"),
    Column("person_id", INT, "", "Person (OMOP person_id)"),
    Column("definition", S, "", "Definition that found the episode (ada-2009, consensus-2024, jbds-2023, ispad-2022, ...)"),
    Column("visit_occurrence_id", INT, "", "Visit holding the onset (null if none)"),
    Column("onset_datetime", DT, T, "Onset: first lab time point meeting every diagnostic criterion"),
    Column("resolution_datetime", DT, T, "First later time point meeting the resolution criterion (null if not resolved)"),
    Column("end_datetime", DT, T, "Resolution, or censoring time of an unresolved episode"),
    Column("end_reason", S, "", "resolved | discharged_unresolved | died | data_end"),
    Column("severity", S, "", "mild | moderate | severe at onset (null where the definition grades none)"),
    Column("glucose_mmol_l", F, ML, "Glucose at onset"),
    Column("ph", F, "", "pH at onset"),
    Column("bicarbonate_mmol_l", F, ML, "Bicarbonate at onset"),
    Column("bhb_mmol_l", F, ML, "Beta-hydroxybutyrate at onset"),
    Column("anion_gap_mmol_l", F, ML, "Anion gap at onset"),
    Column("is_rebound", B, "", "Criteria met again within the definition's rebound hours after the episode ended"),
    # timing
    Column("arrival_datetime", DT, T, "Start of the hospital stay holding the onset visit (ER and inpatient visits chained)"),
    Column("discharge_datetime", DT, T, "End of that hospital stay (null if a visit end is missing)"),
    Column("hours_arrival_to_onset", F, H, "Onset minus arrival"),
    Column("has_infusion", B, "", "At least one intravenous regular insulin infusion is linked to the episode"),
    Column("insulin_start_datetime", DT, T, "Start of the first linked infusion"),
    Column("insulin_end_datetime", DT, T, "End of the last linked infusion (closure; null if any linked row has no end)"),
    Column("first_closure_datetime", DT, T, "End of the first infusion run (before any restart)"),
    Column("hours_arrival_to_insulin", F, H, "Insulin start minus arrival"),
    Column("hours_onset_to_insulin", F, H, "Insulin start minus onset (negative when the infusion started before the diagnostic draw)"),
    Column("hours_to_resolution", F, H, "Resolution minus onset (null if not resolved)"),
    Column("hours_on_infusion", F, H, "Time to closure: last infusion end minus first infusion start"),
    Column("hours_infusion_running", F, H, "Sum of the lengths of the infusion runs (gaps between runs left out)"),
    Column("hours_resolution_to_closure", F, H, "Last infusion end minus resolution (negative: closed before resolution)"),
    Column("is_premature_closure", B, "", "The infusion was closed (last end) before resolution; null if not resolved, no infusion or no end"),
    Column("has_restart_after_early_stop", B, "", "The first infusion run ended before resolution and a later run restarted it; null if not resolved or no infusion"),
    Column("infusion_count", INT, "", "Infusion runs linked to the episode (1 + restarts; 0 if none)"),
    Column("infusion_row_count", INT, "", "drug_exposure rows linked to the episode"),
    Column("has_infusion_restart", B, "", "More than one infusion run (a restart after a closure); null if no infusion"),
    Column("basal_datetime", DT, T, "Start of the subcutaneous basal insulin dose nearest closure (latest before it, else first after)"),
    Column("hours_basal_before_closure", F, H, "Closure minus that basal dose (positive: basal came first; negative: after; null if none near closure)"),
    Column("has_basal_before_closure", B, "", "A basal dose strictly before closure within the window; null if no closure time"),
    Column("is_basal_overlap_met", B, "", "Basal dose at least basal_overlap_hours before closure; null if no closure time"),
    # course on treatment
    Column("ketone_fall_mmol_l_per_h", F, "mmol/L/h", "Fall of beta-hydroxybutyrate per hour from baseline over the first course_hours on the infusion"),
    Column("ketone_fall_target", S, "", f"Ketone fall >= 0.5 mmol/L/h (JBDS): {_TARGET}"),
    Column("bicarbonate_rise_mmol_l_per_h", F, "mmol/L/h", "Rise of bicarbonate per hour over the first course_hours on the infusion"),
    Column("bicarbonate_rise_target", S, "", f"Bicarbonate rise >= 3.0 mmol/L/h (JBDS): {_TARGET}"),
    Column("glucose_fall_mmol_l_per_h", F, "mmol/L/h", "Fall of glucose per hour over the first course_hours on the infusion"),
    Column("glucose_fall_target", S, "", f"Glucose fall >= 3.0 mmol/L/h (JBDS): {_TARGET}"),
    Column("has_hypoglycaemia", B, "", "A glucose reading below 4.0 mmol/L on the infusion; null if no infusion or no reading on it"),
    Column("hypoglycaemia_count", INT, "", "Hypoglycaemia events on the infusion (runs of consecutive low readings)"),
    Column("first_hypoglycaemia_datetime", DT, T, "First glucose reading below the threshold on the infusion"),
    Column("lowest_glucose_on_infusion_mmol_l", F, ML, "Lowest glucose on the infusion"),
    Column("has_hypokalaemia", B, "", "A potassium reading below 3.5 mmol/L on the infusion; null if no infusion or no reading on it"),
    Column("hypokalaemia_count", INT, "", "Hypokalaemia events on the infusion (runs of consecutive low readings)"),
    Column("first_hypokalaemia_datetime", DT, T, "First potassium reading below the threshold on the infusion"),
    Column("lowest_potassium_on_infusion_mmol_l", F, ML, "Lowest potassium on the infusion"),
    Column("monitoring_intervals", INT, "", "Complete monitoring intervals (1 h by default) from infusion start to closure"),
    Column("glucose_monitoring_share", F, "share", "Share of those intervals with at least one glucose reading"),
    Column("ketone_monitoring_share", F, "share", "Share of those intervals with at least one beta-hydroxybutyrate reading"),
    Column("is_glucose_monitoring_met", B, "", "glucose_monitoring_share >= monitoring_share_target (JBDS: hourly)"),
    Column("is_ketone_monitoring_met", B, "", "ketone_monitoring_share >= monitoring_share_target (JBDS: hourly)"),
    Column("is_insulin_within_target", B, "", "Infusion started within insulin_target_hours (1 h) of arrival; null if no infusion or arrival"),
    Column("is_resolved_within_target", B, "", "Resolved within resolution_target_hours (24 h, JBDS) of onset; null if censored earlier unresolved"),
    # covariates at onset
    Column("age_at_onset", INT, "years", "Age in completed years at onset (age at last birthday)"),
    Column("sex", S, "", "female | male | unknown"),
    Column("diabetes_type", S, "", "type1 | type2 | other | unknown: most distinct coded days up to the episode's end; type 1 wins a type 1/type 2 tie"),
    Column("has_diabetes_type_conflict", B, "", "Codes of more than one diabetes type up to the episode's end"),
    Column("years_since_first_diabetes_record", F, "years", "Onset minus the first diabetes condition record on or before it (days / 365.25)"),
    Column("hba1c_mmol_mol", F, "mmol/mol", "Latest HbA1c in the 365 days up to onset"),
    Column("hba1c_datetime", DT, T, "When that HbA1c was measured"),
    Column("is_sglt2i_at_onset", B, "", "An SGLT2 inhibitor exposure covers onset or ended within sglt2_grace_days before it"),
    Column("prior_episode_count", INT, "", "Earlier episodes of the same person and definition"),
    Column("care_site_id", INT, "", "Hospital: care site of the onset visit, else the person's care site"),
    # outcomes
    Column("died_in_hospital", B, "", "Death dated within the hospital stay, or the episode ended by death; null without a visit"),
    Column("has_icu_stay", B, "", "An ICU visit_detail (or ICU visit) within the hospital stay; null without a visit"),
    Column("length_of_stay_days", F, "days", "Discharge minus arrival"),
    # recurrence (same person, same definition)
    Column("next_episode_id", S, "", "The person's next episode of the same definition"),
    Column("days_to_next_episode", F, "days", "Next onset minus this episode's end (null if no later episode)"),
    Column("follow_up_end_datetime", DT, T, "End of follow-up: earlier of death and end of the observation period holding onset"),
    Column("days_of_follow_up", F, "days", "End of follow-up minus this episode's end (0 when negative)"),
    Column("days_at_risk", F, "days", "Time at risk of recurrence: to the next onset, else to the end of follow-up"),
    Column("has_next_episode", B, "", "A later episode of the same person and definition exists"),
    Column("recurs_within_30d", B, "", "Next episode within 30 days of the end; null when follow-up ends earlier without one"),
    Column("recurs_within_90d", B, "", "Next episode within 90 days of the end; null when follow-up ends earlier without one"),
    Column("recurs_within_365d", B, "", "Next episode within 365 days of the end; null when follow-up ends earlier without one"),
)


def episode_features(
    episodes: pl.DataFrame,
    inputs: FeatureInputs,
    options: FeatureOptions,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Build the episode feature table and the unlinked-infusion table.

    ``episodes`` must already be checked (``check_episodes``).

    Returns
    -------
    tuple of polars.DataFrame
        ``(episode_features, unlinked_infusions)``, both conformed to their dictionaries
        except that ``unlinked_infusions`` is conformed by the caller.
    """
    linked, unlinked = link_infusions(episodes, inputs.infusions, options)
    infusions = infusion_features(linked, options)
    frame = episodes.join(infusions, on=KEY, how="left")

    spans = frame.select(*KEY, "person_id", "insulin_start_datetime", "insulin_end_datetime", "end_datetime")
    closures = frame.select(*KEY, "person_id", "insulin_end_datetime")
    basal = basal_features(closures, inputs.basal_doses, options)
    # the analytes the course and on-infusion features read, in time order once for every pass
    labs = inputs.labs.filter(
        pl.col("analyte").is_in(["glucose", "bhb", "bicarbonate", "potassium"])
    ).sort(["event_datetime", "value"])
    course = course_features(spans, labs, options, presorted=True)
    on_infusion = infusion_lab_features(spans, labs, options, presorted=True)
    stay = stay_features(
        episodes, inputs.visits, inputs.visit_details, inputs.deaths, inputs.persons, options
    )
    covariates = person_covariates(
        episodes, inputs.persons, inputs.diabetes_records, inputs.hba1c, inputs.sglt2_exposures, options
    )
    recurrence = recurrence_features(episodes, inputs.deaths, inputs.observation_periods, options)

    for part in (basal, course, on_infusion, stay, covariates, recurrence):
        frame = frame.join(part, on=KEY, how="left")

    has_infusion = pl.col("insulin_start_datetime").is_not_null()
    has_closure = pl.col("insulin_end_datetime").is_not_null()
    hours_to_resolution = pl.coalesce(
        "hours_to_resolution", hours_between(pl.col("resolution_datetime"), pl.col("onset_datetime"))
    )
    frame = frame.with_columns(
        has_infusion.alias("has_infusion"),
        hours_to_resolution.alias("hours_to_resolution"),
        hours_between(pl.col("onset_datetime"), pl.col("arrival_datetime")).alias("hours_arrival_to_onset"),
        hours_between(pl.col("insulin_start_datetime"), pl.col("arrival_datetime")).alias("hours_arrival_to_insulin"),
        hours_between(pl.col("insulin_start_datetime"), pl.col("onset_datetime")).alias("hours_onset_to_insulin"),
        hours_between(pl.col("insulin_end_datetime"), pl.col("insulin_start_datetime")).alias("hours_on_infusion"),
        hours_between(pl.col("insulin_end_datetime"), pl.col("resolution_datetime")).alias("hours_resolution_to_closure"),
        (pl.col("insulin_end_datetime") < pl.col("resolution_datetime")).alias("is_premature_closure"),
        (
            (pl.col("first_closure_datetime") < pl.col("resolution_datetime")) & (pl.col("infusion_count") > 1)
        ).alias("has_restart_after_early_stop"),
        pl.col("infusion_count").fill_null(0),
        pl.col("infusion_row_count").fill_null(0),
        pl.when(has_infusion).then(pl.col("infusion_count") > 1).alias("has_infusion_restart"),
        pl.when(has_closure)
        .then((pl.col("hours_basal_before_closure") > 0).fill_null(False))
        .alias("has_basal_before_closure"),
        pl.when(has_closure)
        .then((pl.col("hours_basal_before_closure") >= options.basal_overlap_hours).fill_null(False))
        .alias("is_basal_overlap_met"),
        pl.when(pl.col("hypoglycaemia_readings") > 0).then(pl.col("hypoglycaemia_count") > 0).alias("has_hypoglycaemia"),
        pl.when(pl.col("hypokalaemia_readings") > 0).then(pl.col("hypokalaemia_count") > 0).alias("has_hypokalaemia"),
        (pl.col("glucose_monitoring_share") >= options.monitoring_share_target).alias("is_glucose_monitoring_met"),
        (pl.col("ketone_monitoring_share") >= options.monitoring_share_target).alias("is_ketone_monitoring_met"),
        hours_between(pl.col("end_datetime"), pl.col("onset_datetime")).alias("_hours_observed"),
    )
    target = options.resolution_target_hours
    frame = frame.with_columns(
        (pl.col("hours_arrival_to_insulin") <= options.insulin_target_hours).alias("is_insulin_within_target"),
        pl.when(pl.col("hours_to_resolution").is_not_null())
        .then(pl.col("hours_to_resolution") <= target)
        .when(pl.col("_hours_observed") >= target)
        .then(pl.lit(False))
        .otherwise(pl.lit(None, dtype=pl.Boolean))
        .alias("is_resolved_within_target"),
        *[
            pl.col(f"{stem}_target").fill_null("not_measurable")
            for stem, _sign, _option in COURSE_ANALYTES.values()
        ],
    )
    frame = frame.sort(["definition", "person_id", "onset_datetime", "episode_id"])
    return conform(frame, EPISODE_COLUMNS, table="episode_features"), unlinked
