"""Shared checks and design-matrix building for the statistics stage.

Every public function in :mod:`cohort.stats` takes a polars (or pandas) DataFrame and explicit
column names; the helpers here turn that into clean numeric arrays, and raise
:class:`~cohort._errors.InputError` with the table, the column and the row count at fault when
the input cannot support the model asked for.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
from scipy import stats as sps

from cohort._errors import InputError

__all__ = [
    "Design",
    "FrameLike",
    "as_list",
    "build_design",
    "drop_incomplete",
    "require_columns",
    "to_pandas",
    "z_value",
]

FrameLike = pl.DataFrame | pd.DataFrame

#: Events per estimated parameter below which a model result carries a warning. Peduzzi P,
#: Concato J, Feinstein AR, Holford TR. Importance of events per independent variable in
#: proportional hazards regression analysis II. J Clin Epidemiol 1995;48(12):1503-1510 (and the
#: logistic counterpart, J Clin Epidemiol 1996;49(12):1373-1379): fewer than about 10 events per
#: variable gives biased coefficients and poor interval coverage.
EVENTS_PER_PARAMETER_WARNING = 10


def z_value(alpha: float) -> float:
    """Two-sided standard normal quantile for a ``1 - alpha`` interval (1.959964 for 0.05)."""
    if not 0.0 < alpha < 1.0:
        raise InputError(f"`alpha` must be a number in (0, 1), got {alpha!r}.")
    return float(sps.norm.ppf(1.0 - alpha / 2.0))


def as_list(value: str | Sequence[str] | None) -> list[str]:
    """Turn ``None``, one column name or a sequence of names into a list of names."""
    if value is None:
        return []
    if isinstance(value, str):
        return [value]
    return list(value)


def to_pandas(data: FrameLike, *, table: str) -> pd.DataFrame:
    """Return a pandas copy of a polars or pandas DataFrame.

    Raises
    ------
    InputError
        When ``data`` is neither a polars nor a pandas DataFrame, or has no rows.
    """
    if isinstance(data, pl.DataFrame):
        frame = data.to_pandas()
    elif isinstance(data, pd.DataFrame):
        frame = data.copy()
    else:
        raise InputError(
            f"table `{table}` must be a polars or pandas DataFrame, got {type(data).__name__}."
        )
    if len(frame) == 0:
        raise InputError(f"table `{table}` has no rows; there is nothing to analyse.")
    return frame.reset_index(drop=True)


def require_columns(frame: pd.DataFrame, columns: Sequence[str], *, table: str) -> None:
    """Raise :class:`InputError` naming every column of ``columns`` missing from ``frame``."""
    missing = [col for col in columns if col not in frame.columns]
    if missing:
        have = ", ".join(map(str, frame.columns[:30]))
        raise InputError(
            f"table `{table}` has no column(s) {', '.join(f'`{m}`' for m in missing)}; "
            f"it has: {have}. Pass the right names through the function's *_col arguments."
        )


def drop_incomplete(
    frame: pd.DataFrame, columns: Sequence[str], *, table: str
) -> tuple[pd.DataFrame, dict[str, int]]:
    """Drop rows with a null in any of ``columns``; return the rest and the counts per column.

    The counts say which column removed how many rows (a row null in two columns is counted
    under the first), so a result can say what it left out and why.
    """
    require_columns(frame, columns, table=table)
    dropped: dict[str, int] = {}
    keep = pd.Series(True, index=frame.index)
    for col in columns:
        null = frame[col].isna() & keep
        if null.any():
            dropped[col] = int(null.sum())
        keep &= ~frame[col].isna()
    out = frame.loc[keep].reset_index(drop=True)
    if len(out) == 0:
        raise InputError(
            f"table `{table}`: every one of its {len(frame)} rows has a null in "
            f"{', '.join(f'`{c}`' for c in columns)}; nothing is left to analyse."
        )
    return out, dropped


def describe_dropped(dropped: dict[str, int]) -> str | None:
    """One-line note of rows left out for nulls, or ``None`` when none were."""
    if not dropped:
        return None
    parts = [f"{n} row(s) null in `{col}`" for col, n in dropped.items()]
    return "left out: " + "; ".join(parts)


@dataclass(frozen=True)
class Design:
    """A numeric design matrix and how its columns map back to the covariates."""

    matrix: pd.DataFrame
    terms: list[str]
    covariate_of: dict[str, str]
    reference_of: dict[str, str | None] = field(default_factory=dict)


def _is_numeric(series: pd.Series) -> bool:
    return pd.api.types.is_bool_dtype(series) or pd.api.types.is_numeric_dtype(series)


def build_design(
    frame: pd.DataFrame,
    covariates: Sequence[str],
    *,
    table: str,
    reference: dict[str, Any] | None = None,
) -> Design:
    """Numeric design matrix: numbers and booleans as they are, text as indicator columns.

    A text or categorical covariate becomes one 0/1 column per level except its reference
    level, named ``covariate=level``; the reference is ``reference[covariate]`` when given,
    else the most frequent level (ties broken by sort order), which keeps estimates stable.

    Raises
    ------
    InputError
        When a covariate is constant (a model cannot estimate its effect), or a requested
        reference level does not occur.
    """
    reference = reference or {}
    require_columns(frame, covariates, table=table)
    columns: dict[str, np.ndarray] = {}
    covariate_of: dict[str, str] = {}
    reference_of: dict[str, str | None] = {}
    n_rows = len(frame)
    for cov in covariates:
        series = frame[cov]
        if series.dtype == object and series.map(lambda v: isinstance(v, bool | np.bool_)).all():
            series = series.astype(bool)  # a nullable boolean column arrives as objects
        if _is_numeric(series):
            values = series.astype(float).to_numpy()
            if np.nanmin(values) == np.nanmax(values):
                raise InputError(
                    f"table `{table}`: covariate `{cov}` is constant (all {n_rows} rows used "
                    f"have the value {values[0]:g}), so its effect cannot be estimated; "
                    "leave it out of `covariates` or analyse a subset where it varies."
                )
            columns[cov] = values
            covariate_of[cov] = cov
            reference_of[cov] = None
            continue
        text = series.astype(str)
        counts = text.value_counts()
        if len(counts) < 2:
            raise InputError(
                f"table `{table}`: covariate `{cov}` is constant (all {n_rows} rows used have "
                f"the level {counts.index[0]!r}), so its effect cannot be estimated; leave it "
                "out of `covariates` or analyse a subset where it varies."
            )
        if cov in reference:
            ref = str(reference[cov])
            if ref not in counts.index:
                raise InputError(
                    f"table `{table}`: reference level {ref!r} for covariate `{cov}` does not "
                    f"occur; its levels are {sorted(counts.index.tolist())}."
                )
        else:
            top = counts.max()
            ref = sorted(counts.index[counts == top].tolist())[0]
        for level in sorted(counts.index.tolist()):
            if level == ref:
                continue
            name = f"{cov}={level}"
            columns[name] = (text == level).astype(float).to_numpy()
            covariate_of[name] = cov
            reference_of[name] = ref
    matrix = pd.DataFrame(columns, index=frame.index)
    return Design(
        matrix=matrix,
        terms=list(columns),
        covariate_of=covariate_of,
        reference_of=reference_of,
    )


def check_min_events(events: int, *, min_events: int, what: str, table: str) -> None:
    """Raise :class:`InputError` when a model has fewer than ``min_events`` events."""
    if events < min_events:
        raise InputError(
            f"{what} on table `{table}` needs at least {min_events} events; found {events}. "
            "Pool groups, widen the cohort or lower `min_events` if you accept a fragile "
            "estimate."
        )


def events_per_parameter_warning(events: int, n_parameters: int) -> str | None:
    """A warning text when events per estimated parameter fall below 10 (Peduzzi 1995/1996)."""
    if n_parameters == 0:
        return None
    epp = events / n_parameters
    if epp < EVENTS_PER_PARAMETER_WARNING:
        return (
            f"{epp:.1f} events per parameter (< {EVENTS_PER_PARAMETER_WARNING}; Peduzzi et al. "
            "1995): estimates may be biased and intervals too narrow"
        )
    return None


def join_notes(*notes: str | None) -> str | None:
    """Join the non-empty notes with '; ', or ``None`` when there are none."""
    kept = [n for n in notes if n]
    return "; ".join(kept) if kept else None


def finite_or_none(value: float) -> float | None:
    """Return ``value`` as a float, or ``None`` when it is NaN or infinite."""
    value = float(value)
    return value if math.isfinite(value) else None


def group_label(keys: Sequence[str], values: Sequence[Any]) -> str:
    """Readable label of a group, e.g. ``definition=jbds-2023, severity=severe`` (or ``all``)."""
    if not keys:
        return "all"
    return ", ".join(f"{k}={v}" for k, v in zip(keys, values, strict=True))


def iter_groups(frame: pd.DataFrame, group_cols: Sequence[str]):
    """Yield ``(values tuple, sub-frame)`` per group in sorted order (one group when none)."""
    if not group_cols:
        yield (), frame
        return
    for values, sub in frame.groupby(list(group_cols), sort=True, dropna=True):
        if not isinstance(values, tuple):
            values = (values,)
        yield values, sub.reset_index(drop=True)


def event_indicator(
    frame: pd.DataFrame, event_col: str, *, table: str, event_value: Any = None
) -> np.ndarray:
    """0/1 event indicator from a boolean/0-1 column, or ``column == event_value``."""
    series = frame[event_col]
    if event_value is not None:
        return (series == event_value).to_numpy().astype(int)
    if pd.api.types.is_bool_dtype(series):
        return series.to_numpy().astype(int)
    if pd.api.types.is_numeric_dtype(series):
        values = series.to_numpy()
        bad = ~np.isin(values, [0, 1])
        if bad.any():
            raise InputError(
                f"table `{table}`: event column `{event_col}` must hold 0/1 or true/false; "
                f"{int(bad.sum())} row(s) hold other values (e.g. {values[bad][0]!r}). For a "
                "text column pass `event_value=` (e.g. 'resolved')."
            )
        return values.astype(int)
    raise InputError(
        f"table `{table}`: event column `{event_col}` is text; pass `event_value=` naming the "
        "value that counts as the event (e.g. 'resolved')."
    )


def check_one_definition(
    frame: pd.DataFrame, *, table: str, column: str = "definition", used: Sequence[str] = ()
) -> None:
    """Raise when a table mixes definitions that a model would count as separate episodes.

    The same physical episode appears once per definition in the features tables; fitting
    one model across definitions counts it twice. A table without ``column``, with one
    definition, or where the definition is itself a covariate or stratum (``used``) passes.
    """
    if column not in frame.columns or column in used:
        return
    names = sorted(map(str, frame[column].dropna().unique()))
    if len(names) > 1:
        raise InputError(
            f"table `{table}` holds {len(names)} definitions ({', '.join(names)}); the same "
            "episode would be counted once per definition. Fit one definition at a time, e.g. "
            f"data.filter(pl.col('{column}') == '{names[0]}')."
        )


def check_durations(
    durations: np.ndarray, *, column: str, table: str, allow_zero: bool = True
) -> None:
    """Raise :class:`InputError` when follow-up times are negative (or zero when not allowed)."""
    bad = durations < 0 if allow_zero else durations <= 0
    if bad.any():
        word = "negative" if allow_zero else "zero or negative"
        raise InputError(
            f"table `{table}`: {int(bad.sum())} row(s) have a {word} time in `{column}` "
            f"(e.g. {durations[bad][0]!r}); follow-up must run forward from its origin."
        )
