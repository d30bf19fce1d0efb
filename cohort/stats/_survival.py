"""Kaplan-Meier curves, medians and log-rank tests (lifelines), by group.

Time to resolution of an episode runs from onset to resolution; an episode that ends unresolved
(discharge, death, end of data) is censored at its end for Kaplan-Meier, and treated as a
competing event by :func:`cohort.stats.cumulative_incidence`.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
from lifelines import KaplanMeierFitter
from lifelines.statistics import multivariate_logrank_test
from lifelines.utils import median_survival_times

from cohort._errors import InputError
from cohort.stats._common import (
    FrameLike,
    as_list,
    check_durations,
    describe_dropped,
    drop_incomplete,
    event_indicator,
    finite_or_none,
    group_label,
    iter_groups,
    require_columns,
    to_pandas,
)

__all__ = ["KaplanMeierResult", "kaplan_meier", "logrank_test", "resolution_time_table"]

END_REASONS = ("resolved", "discharged_unresolved", "died", "data_end")


@dataclass(frozen=True)
class KaplanMeierResult:
    """Tidy Kaplan-Meier output.

    Attributes
    ----------
    curve
        One row per group and distinct time (time 0 included): ``group``, the group columns,
        ``time``, ``estimate`` (survival), ``lower``, ``upper`` (pointwise, exponential
        Greenwood / log(-log) interval), ``at_risk``, ``events``, ``censored``.
    medians
        One row per group: ``estimate`` (median time), ``lower``, ``upper``, ``n``, ``events``,
        ``note``. The median interval is where the pointwise band crosses 0.5 (Brookmeyer and
        Crowley 1982 style); ``null`` where the curve or band never falls to 0.5.
    at_risk
        One row per group and requested time: ``time``, ``at_risk``, ``events_so_far``,
        ``censored_so_far``, ``estimate`` (survival at that time) - the table printed under a
        Kaplan-Meier plot.
    """

    curve: pl.DataFrame
    medians: pl.DataFrame
    at_risk: pl.DataFrame


def resolution_time_table(
    episodes: FrameLike,
    *,
    hours_to_resolution_col: str = "hours_to_resolution",
    end_reason_col: str = "end_reason",
    onset_col: str = "onset_datetime",
    end_col: str = "end_datetime",
    hours_to_end_col: str | None = None,
) -> pl.DataFrame:
    """Add ``hours_to_event``, ``event_type`` and ``is_resolved`` to an episode table.

    Resolved episodes take ``hours_to_resolution``; the others are followed from onset to their
    end (``hours_to_end_col`` when given, else ``end_col - onset_col``) and keep their end
    reason as ``event_type`` (``discharged_unresolved``, ``died``, ``data_end``).

    Parameters
    ----------
    episodes
        One row per episode (the episodes or episode-features table).
    hours_to_resolution_col, end_reason_col, onset_col, end_col, hours_to_end_col
        Column names.

    Returns
    -------
    polars.DataFrame
        The input columns plus ``hours_to_event`` (float), ``event_type`` (str) and
        ``is_resolved`` (bool).

    Examples
    --------
    >>> import datetime as dt, polars as pl
    >>> t0 = dt.datetime(2030, 1, 1)
    >>> eps = pl.DataFrame({"onset_datetime": [t0, t0],
    ...     "end_datetime": [t0 + dt.timedelta(hours=30)] * 2, "hours_to_resolution": [12.0, None], "end_reason": ["resolved", "died"]})
    >>> resolution_time_table(eps)["hours_to_event"].to_list()
    [12.0, 30.0]
    """
    table = "episodes"
    frame = episodes if isinstance(episodes, pl.DataFrame) else pl.from_pandas(episodes)
    needed = [hours_to_resolution_col, end_reason_col]
    needed += [hours_to_end_col] if hours_to_end_col else [onset_col, end_col]
    require_columns(frame.head(0).to_pandas(), needed, table=table)
    unknown = frame.filter(~pl.col(end_reason_col).is_in(list(END_REASONS)))
    if unknown.height:
        raise InputError(
            f"table `{table}`: {unknown.height} row(s) have an `{end_reason_col}` outside "
            f"{list(END_REASONS)} (e.g. {unknown[end_reason_col][0]!r})."
        )
    if hours_to_end_col:
        to_end = pl.col(hours_to_end_col).cast(pl.Float64)
    else:
        to_end = (pl.col(end_col) - pl.col(onset_col)).dt.total_seconds().cast(pl.Float64) / 3600
    resolved = pl.col(end_reason_col) == "resolved"
    out = frame.with_columns(
        pl.when(resolved)
        .then(pl.col(hours_to_resolution_col).cast(pl.Float64))
        .otherwise(to_end)
        .alias("hours_to_event"),
        pl.col(end_reason_col).alias("event_type"),
        resolved.alias("is_resolved"),
    )
    missing = out.filter(resolved & pl.col(hours_to_resolution_col).is_null()).height
    if missing:
        raise InputError(
            f"table `{table}`: {missing} resolved episode(s) have a null "
            f"`{hours_to_resolution_col}`; a resolved episode needs its time to resolution."
        )
    return out


def _prepare(
    data: FrameLike,
    *,
    duration_col: str,
    event_col: str,
    group_cols: Sequence[str],
    event_value: Any,
    table: str,
) -> tuple[pd.DataFrame, str | None]:
    frame = to_pandas(data, table=table)
    frame, dropped = drop_incomplete(frame, [duration_col, event_col, *group_cols], table=table)
    frame["_duration"] = frame[duration_col].astype(float)
    frame["_event"] = event_indicator(frame, event_col, table=table, event_value=event_value)
    check_durations(frame["_duration"].to_numpy(), column=duration_col, table=table)
    return frame, describe_dropped(dropped)


def kaplan_meier(
    data: FrameLike,
    *,
    duration_col: str = "hours_to_event",
    event_col: str = "is_resolved",
    event_value: Any = None,
    group_cols: str | Sequence[str] | None = None,
    at_risk_times: Sequence[float] | None = None,
    alpha: float = 0.05,
    table: str = "episodes",
) -> KaplanMeierResult:
    """Kaplan-Meier estimates with pointwise bands, numbers at risk and medians, by group.

    Parameters
    ----------
    data
        One row per subject (episode), polars or pandas.
    duration_col
        Follow-up time from the origin (e.g. hours from onset) to the event or censoring.
    event_col
        Event indicator (bool or 0/1), or a text column with ``event_value``.
    event_value
        The value of a text ``event_col`` that counts as the event (others are censored).
    group_cols
        Column(s) defining groups (e.g. ``["definition", "severity"]``); ``None`` for one curve.
    at_risk_times
        Times at which to report numbers at risk (default: 0 and quartiles of follow-up).
    alpha
        1 - confidence level.
    table
        Name of the input used in error messages.

    Returns
    -------
    KaplanMeierResult
        ``curve``, ``medians`` and ``at_risk`` polars DataFrames.

    Examples
    --------
    >>> import polars as pl
    >>> d = pl.DataFrame({"t": [1.0, 2, 3, 4], "e": [1, 0, 1, 1]})
    >>> km = kaplan_meier(d, duration_col="t", event_col="e")
    >>> [round(v, 3) for v in km.curve["estimate"]]
    [1.0, 0.75, 0.75, 0.375, 0.0]
    """
    groups = as_list(group_cols)
    frame, note = _prepare(
        data,
        duration_col=duration_col,
        event_col=event_col,
        group_cols=groups,
        event_value=event_value,
        table=table,
    )
    if at_risk_times is None:
        qs = np.quantile(frame["_duration"], [0.25, 0.5, 0.75])
        at_risk_times = [0.0, *[float(np.round(q, 1)) for q in qs]]
    curve_rows: list[dict[str, Any]] = []
    median_rows: list[dict[str, Any]] = []
    risk_rows: list[dict[str, Any]] = []
    for values, sub in iter_groups(frame, groups):
        label = group_label(groups, values)
        keys = dict(zip(groups, values, strict=True))
        kmf = KaplanMeierFitter(alpha=alpha)
        kmf.fit(sub["_duration"], sub["_event"], label="km")
        sf = kmf.survival_function_["km"]
        ci = kmf.confidence_interval_survival_function_
        et = kmf.event_table
        for time in sf.index:
            row = et.loc[time] if time in et.index else None
            curve_rows.append(
                {
                    "group": label,
                    **keys,
                    "time": float(time),
                    "estimate": float(sf.loc[time]),
                    "lower": finite_or_none(ci.iloc[:, 0].loc[time]),
                    "upper": finite_or_none(ci.iloc[:, 1].loc[time]),
                    "at_risk": int(row["at_risk"]) if row is not None else len(sub),
                    "events": int(row["observed"]) if row is not None else 0,
                    "censored": int(row["censored"]) if row is not None else 0,
                }
            )
        events = int(sub["_event"].sum())
        median = kmf.median_survival_time_
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mci = median_survival_times(kmf.confidence_interval_survival_function_)
        lower, upper = (finite_or_none(v) for v in mci.iloc[0].to_numpy())
        median_rows.append(
            {
                "group": label,
                **keys,
                "estimate": finite_or_none(median),
                "lower": lower,
                "upper": upper,
                "n": len(sub),
                "events": events,
                "note": None
                if np.isfinite(median)
                else "curve does not fall to 0.5: median not reached",
            }
        )
        durations = sub["_duration"].to_numpy()
        flags = sub["_event"].to_numpy()
        for time in at_risk_times:
            before = durations < time
            risk_rows.append(
                {
                    "group": label,
                    **keys,
                    "time": float(time),
                    "at_risk": int((durations >= time).sum()),
                    "events_so_far": int((before & (flags == 1)).sum()),
                    "censored_so_far": int((before & (flags == 0)).sum()),
                    "estimate": float(kmf.predict(float(time))),
                }
            )
    medians = pl.DataFrame(
        median_rows, schema_overrides={"lower": pl.Float64, "upper": pl.Float64,
                                       "estimate": pl.Float64, "note": pl.String}
    ).with_columns(
        pl.lit(note, dtype=pl.String).alias("left_out")
    )
    return KaplanMeierResult(
        curve=pl.DataFrame(curve_rows, schema_overrides={"lower": pl.Float64,
                                                         "upper": pl.Float64}),
        medians=medians,
        at_risk=pl.DataFrame(risk_rows),
    )


def logrank_test(
    data: FrameLike,
    *,
    group_col: str,
    duration_col: str = "hours_to_event",
    event_col: str = "is_resolved",
    event_value: Any = None,
    table: str = "episodes",
) -> pl.DataFrame:
    """Log-rank test of equal survival across the levels of ``group_col`` (lifelines).

    Parameters
    ----------
    data
        One row per subject.
    group_col
        Column whose levels are compared (two or more).
    duration_col, event_col, event_value
        As in :func:`kaplan_meier`.
    table
        Name of the input used in error messages.

    Returns
    -------
    polars.DataFrame
        One row: ``test`` ("log-rank"), ``group_col``, ``statistic`` (chi-square), ``df``,
        ``p``, ``n``, ``events``, ``groups``.

    Examples
    --------
    >>> import polars as pl
    >>> d = pl.DataFrame({"t": [1.0, 2, 3, 4, 5, 6], "e": [1] * 6, "g": list("aaabbb")})
    >>> logrank_test(d, group_col="g", duration_col="t", event_col="e")["df"][0]
    1
    """
    frame, note = _prepare(
        data,
        duration_col=duration_col,
        event_col=event_col,
        group_cols=[group_col],
        event_value=event_value,
        table=table,
    )
    levels = frame[group_col].nunique()
    if levels < 2:
        raise InputError(
            f"table `{table}`: a log-rank test needs two or more levels of `{group_col}`; "
            f"found {levels}."
        )
    events = int(frame["_event"].sum())
    if events == 0:
        raise InputError(f"table `{table}`: a log-rank test needs events; found none.")
    result = multivariate_logrank_test(frame["_duration"], frame[group_col], frame["_event"])
    return pl.DataFrame(
        {
            "test": ["log-rank"],
            "group_col": [group_col],
            "statistic": [float(result.test_statistic)],
            "df": [int(result.degrees_of_freedom)],
            "p": [float(result.p_value)],
            "n": [len(frame)],
            "events": [events],
            "groups": [int(levels)],
            "left_out": pl.Series([note], dtype=pl.String),
        }
    )
