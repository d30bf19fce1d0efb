"""Recurrence of DKA: time to first recurrence, recurrent-event Cox models, 365-day logistic.

- Time to first recurrence from each person's first episode: Kaplan-Meier, and Aalen-Johansen
  cumulative incidence with death competing (a person who dies cannot recur).
- Andersen-Gill model on the counting-process table (total time, (start, stop] intervals),
  cluster-robust standard errors by person (Andersen PK, Gill RD. Ann Stat 1982;10:1100-1120;
  Lin DY, Wei LJ. JASA 1989;84:1074-1078).
- Gap-time model: time since the previous episode, stratified by episode number
  (Prentice RL, Williams BJ, Peterson AV. Biometrika 1981;68:373-379).
- Logistic regression for recurrence within 365 days (odds ratios, cluster-robust by person),
  leaving out episodes whose follow-up is too short to know (flag null).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import statsmodels.api as sm
from statsmodels.tools.sm_exceptions import (
    ConvergenceWarning as SmConvergenceWarning,
)
from statsmodels.tools.sm_exceptions import (
    PerfectSeparationError,
    PerfectSeparationWarning,
)

from cohort._errors import InputError
from cohort.stats._common import (
    FrameLike,
    as_list,
    build_design,
    check_min_events,
    check_one_definition,
    describe_dropped,
    drop_incomplete,
    events_per_parameter_warning,
    join_notes,
    require_columns,
    to_pandas,
    z_value,
)
from cohort.stats._competing import cumulative_incidence
from cohort.stats._cox import cox_model
from cohort.stats._survival import KaplanMeierResult, kaplan_meier

__all__ = [
    "FirstRecurrenceResult",
    "andersen_gill",
    "first_recurrence_table",
    "gap_time_model",
    "recurrence_logistic",
    "time_to_first_recurrence",
]

#: A log odds ratio this large (an odds ratio beyond e^10, about 22,000) on a modest data set
#: is the signature of (quasi-)complete separation; it is reported as an error. Common practice.
SEPARATION_COEF = 10.0


@dataclass(frozen=True)
class FirstRecurrenceResult:
    """Time to first recurrence: the per-person table, Kaplan-Meier and cumulative incidence.

    Attributes
    ----------
    table
        One row per person: ``days``, ``event_type`` (``recurrence``, ``died``,
        ``censored``), ``is_recurrence`` and the group columns.
    kaplan_meier
        Kaplan-Meier of recurrence (death censored).
    cumulative_incidence
        Aalen-Johansen cumulative incidence of ``recurrence`` and ``died``.
    """

    table: pl.DataFrame
    kaplan_meier: KaplanMeierResult
    cumulative_incidence: pl.DataFrame


def first_recurrence_table(
    episodes: FrameLike,
    *,
    person_col: str = "person_id",
    order_col: str = "onset_datetime",
    days_to_next_col: str = "days_to_next_episode",
    days_at_risk_col: str = "days_at_risk",
    death_col: str | None = None,
    keep_cols: Sequence[str] | None = None,
    table: str = "episode_features",
) -> pl.DataFrame:
    """One row per person from their first episode: time to recurrence, death or censoring.

    The person's first episode is the one with the smallest ``order_col`` (per definition
    when the table has a ``definition`` column). Its follow-up ends
    at the next episode (``days_to_next_col`` not null: ``recurrence``), else after
    ``days_at_risk_col`` days, by death when ``death_col`` is true (``died``), otherwise
    censored. Both day columns must count from the same origin (as the features table does).

    Parameters
    ----------
    episodes
        The episode-features table, one definition at a time.
    person_col, order_col, days_to_next_col, days_at_risk_col
        Column names.
    death_col
        Boolean column: follow-up ended by death. ``None`` when unknown: then every
        non-recurrence is censored, and the cumulative incidence equals 1 - Kaplan-Meier.
    keep_cols
        Extra columns of the first episode to keep (covariates, groups).
    table
        Name of the input used in error messages.

    Returns
    -------
    polars.DataFrame
        ``person_id``, ``days``, ``event_type``, ``is_recurrence`` and ``keep_cols``.

    Examples
    --------
    >>> import polars as pl
    >>> eps = pl.DataFrame({"person_id": [1, 1, 2], "onset_datetime": [1, 2, 1],
    ...     "days_to_next_episode": [40.0, None, None], "days_at_risk": [40.0, 300.0, 200.0]})
    >>> first_recurrence_table(eps)["event_type"].to_list()
    ['recurrence', 'censored']
    """
    frame = episodes if isinstance(episodes, pl.DataFrame) else pl.from_pandas(episodes)
    keep = as_list(keep_cols)
    needed = [person_col, order_col, days_to_next_col, days_at_risk_col, *keep]
    if death_col:
        needed.append(death_col)
    require_columns(frame.head(0).to_pandas(), needed, table=table)
    # Recurrence is within a definition: the first episode per person and definition.
    within = [person_col] + (["definition"] if "definition" in frame.columns else [])
    keep = [c for c in keep if c not in within]
    first = frame.sort([*within, order_col]).group_by(within, maintain_order=True).first()
    died = pl.col(death_col).fill_null(False) if death_col else pl.lit(False)
    recurred = pl.col(days_to_next_col).is_not_null()
    out = first.select(
        *[pl.col(c) for c in within],
        pl.when(recurred)
        .then(pl.col(days_to_next_col))
        .otherwise(pl.col(days_at_risk_col))
        .cast(pl.Float64)
        .alias("days"),
        pl.when(recurred)
        .then(pl.lit("recurrence"))
        .when(died)
        .then(pl.lit("died"))
        .otherwise(pl.lit("censored"))
        .alias("event_type"),
        recurred.alias("is_recurrence"),
        *[pl.col(c) for c in keep],
    )
    missing = out.filter(pl.col("days").is_null()).height
    if missing:
        raise InputError(
            f"table `{table}`: {missing} person(s) have neither `{days_to_next_col}` nor "
            f"`{days_at_risk_col}` on their first episode; their follow-up is unknown."
        )
    return out


def time_to_first_recurrence(
    episodes: FrameLike,
    *,
    person_col: str = "person_id",
    order_col: str = "onset_datetime",
    days_to_next_col: str = "days_to_next_episode",
    days_at_risk_col: str = "days_at_risk",
    death_col: str | None = None,
    group_cols: str | Sequence[str] | None = None,
    at_risk_times: Sequence[float] | None = (0, 30, 90, 180, 365),
    alpha: float = 0.05,
    table: str = "episode_features",
) -> FirstRecurrenceResult:
    """Kaplan-Meier and cumulative incidence (death competing) of a first recurrence.

    Parameters are those of :func:`first_recurrence_table`, plus ``group_cols``,
    ``at_risk_times`` (days) and ``alpha`` as in :func:`kaplan_meier`.

    Returns
    -------
    FirstRecurrenceResult

    Examples
    --------
    >>> import polars as pl
    >>> eps = pl.DataFrame({"person_id": [1, 2, 3, 4], "onset_datetime": [1, 1, 1, 1],
    ...     "days_to_next_episode": [10.0, None, 30.0, None], "days_at_risk": [10.0, 50, 30, 60]})
    >>> res = time_to_first_recurrence(eps)
    >>> res.cumulative_incidence.filter(cause="recurrence")["estimate"].to_list()[-1]
    0.5
    """
    groups = as_list(group_cols)
    frame = episodes if isinstance(episodes, pl.DataFrame) else pl.from_pandas(episodes)
    if "definition" in frame.columns and "definition" not in groups:
        if frame["definition"].n_unique() > 1:
            groups = ["definition", *groups]  # one curve per definition, never pooled
    per_person = first_recurrence_table(
        episodes,
        person_col=person_col,
        order_col=order_col,
        days_to_next_col=days_to_next_col,
        days_at_risk_col=days_at_risk_col,
        death_col=death_col,
        keep_cols=groups,
        table=table,
    )
    km = kaplan_meier(
        per_person,
        duration_col="days",
        event_col="is_recurrence",
        group_cols=groups,
        at_risk_times=at_risk_times,
        alpha=alpha,
        table=table,
    )
    causes = ["recurrence", "died"] if death_col else ["recurrence"]
    cif = cumulative_incidence(
        per_person,
        duration_col="days",
        event_col="event_type",
        censor_value="censored",
        causes=causes,
        group_cols=groups,
        alpha=alpha,
        table=table,
    )
    return FirstRecurrenceResult(table=per_person, kaplan_meier=km, cumulative_incidence=cif)


def andersen_gill(
    counting: FrameLike,
    *,
    covariates: Sequence[str],
    person_col: str = "person_id",
    start_col: str = "start_days",
    stop_col: str = "stop_days",
    event_col: str = "event",
    reference: dict[str, Any] | None = None,
    alpha: float = 0.05,
    min_events: int = 5,
    table: str = "counting_process",
) -> pl.DataFrame:
    """Andersen-Gill model for recurrent episodes (total time), robust SE by person.

    Each row is a (start, stop] interval of one person's follow-up in total time (the features
    stage counts days from the end of the person's first episode); ``event`` is 1 when the
    interval ends with an episode. Fit one definition at a time. Every person stays
    at risk after each episode, and the robust sandwich variance by person accounts for the
    dependence between a person's intervals.

    Parameters
    ----------
    counting
        The counting-process table in total time.
    covariates
        Columns entered in the model.
    person_col, start_col, stop_col, event_col
        Column names.
    reference, alpha, min_events, table
        As in :func:`cox_model`.

    Returns
    -------
    polars.DataFrame
        :func:`cox_model` rows with ``model = "andersen-gill"``.

    Examples
    --------
    >>> import numpy as np, polars as pl
    >>> rng = np.random.default_rng(7)
    >>> gap = rng.exponential(100, 300)
    >>> person = np.repeat(np.arange(100), 3)
    >>> start = np.concatenate([[0.0, g1, g1 + g2] for g1, g2 in gap.reshape(100, 3)[:, :2]])
    >>> cp = pl.DataFrame({"person_id": person, "start_days": start, "stop_days": start + gap,
    ...     "gap_start_days": 0.0, "gap_stop_days": gap,
    ...     "event": rng.integers(0, 2, 300), "episode_number": np.tile([1, 2, 3], 100),
    ...     "x": np.repeat(rng.integers(0, 2, 100), 3)})
    >>> andersen_gill(cp, covariates=["x"])["se_type"][0]
    'robust_cluster'
    """
    frame = to_pandas(counting, table=table)
    return cox_model(
        frame,
        covariates=covariates,
        duration_col=stop_col,
        event_col=event_col,
        entry_col=start_col,
        cluster_col=person_col,
        reference=reference,
        alpha=alpha,
        min_events=min_events,
        model="andersen-gill",
        table=table,
    )


def gap_time_model(
    counting: FrameLike,
    *,
    covariates: Sequence[str],
    person_col: str = "person_id",
    start_col: str | None = "gap_start_days",
    stop_col: str = "gap_stop_days",
    event_col: str = "event",
    episode_number_col: str = "episode_number",
    max_stratum: int = 3,
    reference: dict[str, Any] | None = None,
    alpha: float = 0.05,
    min_events: int = 5,
    table: str = "counting_process",
) -> pl.DataFrame:
    """Gap-time Cox model stratified by episode number (PWP gap time), robust SE by person.

    The clock restarts at each episode: the time of a row is ``stop - start`` (or ``stop``
    alone when ``start_col`` is ``None``, for a table already in gap time). Each episode number
    gets its own baseline hazard; numbers above ``max_stratum`` share the last stratum, since
    few people reach them (common practice).

    Parameters
    ----------
    counting
        The counting-process table (total or gap time).
    covariates
        Columns entered in the model.
    person_col, start_col, stop_col, event_col, episode_number_col
        Column names.
    max_stratum
        Episode numbers above this are pooled into one stratum.
    reference, alpha, min_events, table
        As in :func:`cox_model`.

    Returns
    -------
    polars.DataFrame
        :func:`cox_model` rows with ``model = "gap-time (stratified by episode number)"``.

    Examples
    --------
    >>> import numpy as np, polars as pl
    >>> rng = np.random.default_rng(7)
    >>> gap = rng.exponential(100, 300)
    >>> person = np.repeat(np.arange(100), 3)
    >>> start = np.concatenate([[0.0, g1, g1 + g2] for g1, g2 in gap.reshape(100, 3)[:, :2]])
    >>> cp = pl.DataFrame({"person_id": person, "start_days": start, "stop_days": start + gap,
    ...     "gap_start_days": 0.0, "gap_stop_days": gap,
    ...     "event": rng.integers(0, 2, 300), "episode_number": np.tile([1, 2, 3], 100),
    ...     "x": np.repeat(rng.integers(0, 2, 100), 3)})
    >>> gap_time_model(cp, covariates=["x"])["model"][0]
    'gap-time (stratified by episode number)'
    """
    if max_stratum < 1:
        raise InputError(f"`max_stratum` must be a whole number >= 1, got {max_stratum!r}.")
    frame = to_pandas(counting, table=table)
    needed = [stop_col, episode_number_col] + ([start_col] if start_col else [])
    require_columns(frame, needed, table=table)
    if start_col:
        frame["_gap"] = frame[stop_col].astype(float) - frame[start_col].astype(float)
    else:
        frame["_gap"] = frame[stop_col].astype(float)
    frame["_stratum"] = np.minimum(frame[episode_number_col].astype(float), max_stratum)
    return cox_model(
        frame,
        covariates=covariates,
        duration_col="_gap",
        event_col=event_col,
        strata=["_stratum"],
        cluster_col=person_col,
        reference=reference,
        alpha=alpha,
        min_events=min_events,
        model="gap-time (stratified by episode number)",
        table=table,
    )


def _separation_check(y: np.ndarray, design: pd.DataFrame, *, table: str, outcome: str) -> None:
    """Raise when an indicator covariate has an outcome-constant level (quasi-separation)."""
    for col in design.columns:
        values = design[col].to_numpy()
        if not np.isin(values, [0.0, 1.0]).all():
            continue
        for level in (0.0, 1.0):
            mask = values == level
            if mask.sum() and (y[mask].min() == y[mask].max()):
                raise InputError(
                    f"logistic model on table `{table}`: every one of the {int(mask.sum())} "
                    f"rows with `{col}` = {int(level)} has `{outcome}` = {int(y[mask][0])} "
                    "(perfect separation), so no finite odds ratio exists. Drop or pool that "
                    "covariate, or use a penalised (Firth) model."
                )


def recurrence_logistic(
    episodes: FrameLike,
    *,
    covariates: Sequence[str],
    outcome_col: str = "recurs_within_365d",
    cluster_col: str | None = "person_id",
    reference: dict[str, Any] | None = None,
    alpha: float = 0.05,
    min_events: int = 5,
    table: str = "episode_features",
) -> pl.DataFrame:
    """Logistic regression for recurrence within a window: odds ratios, cluster-robust by person.

    Episodes whose flag is null (follow-up ended, by death or end of observation, before the
    window did) are left out and counted in ``left_out``; treating them as "no recurrence"
    would bias the odds downwards.

    Parameters
    ----------
    episodes
        The episode-features table.
    covariates
        Columns entered in the model.
    outcome_col
        Boolean or 0/1 outcome (``recurs_within_365d``; null = unknown).
    cluster_col
        Person identifier for cluster-robust standard errors (``None``: model-based).
    reference, alpha, min_events, table
        As in :func:`cox_model`; ``min_events`` applies to the rarer outcome.

    Returns
    -------
    polars.DataFrame
        One row per term (intercept first): ``model``, ``term``, ``covariate``,
        ``reference``, ``coef``, ``se``, ``estimate`` (odds ratio; the intercept row holds
        the baseline odds), ``lower``, ``upper``, ``z``, ``p``, ``se_type``, ``n``,
        ``events``, ``n_clusters``, ``warning``, ``left_out``.

    Raises
    ------
    InputError
        Too few events or non-events, a constant covariate, or perfect separation.

    Examples
    --------
    >>> import polars as pl
    >>> d = pl.DataFrame({"person_id": list(range(40)), "x": [i % 2 for i in range(40)],
    ...     "recurs_within_365d": [(i % 3 == 0) for i in range(40)]})
    >>> recurrence_logistic(d, covariates=["x"])["term"].to_list()
    ['intercept', 'x']
    """
    covariates = list(covariates)
    frame = to_pandas(episodes, table=table)
    needed = [outcome_col, *covariates] + ([cluster_col] if cluster_col else [])
    frame, dropped = drop_incomplete(frame, list(dict.fromkeys(needed)), table=table)
    check_one_definition(frame, table=table, used=covariates)
    y_series = frame[outcome_col]
    y = y_series.astype(float).to_numpy()
    if not np.isin(y, [0.0, 1.0]).all():
        raise InputError(
            f"table `{table}`: outcome `{outcome_col}` must be true/false or 0/1; found "
            f"other values (e.g. {y_series[~np.isin(y, [0.0, 1.0])].iloc[0]!r})."
        )
    events = int(y.sum())
    check_min_events(min(events, len(y) - events), min_events=min_events,
                     what=f"logistic model of `{outcome_col}` (events and non-events)",
                     table=table)
    design = build_design(frame, covariates, table=table, reference=reference)
    _separation_check(y, design.matrix, table=table, outcome=outcome_col)
    exog = sm.add_constant(design.matrix, has_constant="add").rename(columns={"const": "intercept"})
    robust = False
    n_clusters = None
    fit_kwargs: dict[str, Any] = {}
    if cluster_col:
        groups = pd.factorize(frame[cluster_col])[0]
        n_clusters = int(groups.max() + 1)
        robust = n_clusters < len(frame)
        if robust:
            fit_kwargs = {"cov_type": "cluster", "cov_kwds": {"groups": groups}}
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        try:
            result = sm.GLM(y, exog, family=sm.families.Binomial()).fit(**fit_kwargs)
        except (PerfectSeparationError, np.linalg.LinAlgError) as exc:
            raise InputError(
                f"logistic model on table `{table}` failed: {exc}. A covariate separates "
                "the outcome perfectly or duplicates another; drop or pool it."
            ) from None
    for record in records:
        if issubclass(record.category, PerfectSeparationWarning):
            raise InputError(
                f"logistic model on table `{table}`: perfect separation ({record.message}); "
                "no finite odds ratio exists. Drop or pool the covariate that predicts the "
                "outcome exactly, or use a penalised (Firth) model."
            )
        if issubclass(record.category, SmConvergenceWarning | RuntimeWarning):
            caught.append(str(record.message).splitlines()[0])
    params = result.params
    huge = params[np.abs(params) > SEPARATION_COEF]
    if len(huge):
        raise InputError(
            f"logistic model on table `{table}`: `{huge.index[0]}` has log odds ratio "
            f"{float(huge.iloc[0]):.1f}, the signature of (quasi-)complete separation; no "
            "finite odds ratio exists. Drop or pool that covariate."
        )
    z = z_value(alpha)
    warning = join_notes(
        events_per_parameter_warning(min(events, len(y) - events), len(design.terms)),
        "; ".join(caught) if caught else None,
    )
    rows = []
    for term in ["intercept", *design.terms]:
        coef = float(params[term])
        s = float(result.bse[term])
        rows.append(
            {
                "model": f"logistic: {outcome_col}",
                "term": term,
                "covariate": design.covariate_of.get(term),
                "reference": design.reference_of.get(term),
                "coef": coef,
                "se": s,
                "estimate": float(np.exp(coef)),
                "lower": float(np.exp(coef - z * s)),
                "upper": float(np.exp(coef + z * s)),
                "z": float(result.tvalues[term]),
                "p": float(result.pvalues[term]),
                "se_type": "robust_cluster" if robust else "model",
                "n": len(y),
                "events": events,
                "n_clusters": n_clusters,
                "warning": warning,
                "left_out": describe_dropped(dropped),
            }
        )
    return pl.DataFrame(rows, schema_overrides={"covariate": pl.String, "reference": pl.String,
                                               "n_clusters": pl.Int64, "warning": pl.String,
                                               "left_out": pl.String})
