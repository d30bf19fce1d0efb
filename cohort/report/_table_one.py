"""Table 1: characteristics at the first episode of each person, by diabetes type, with standardised differences.

Counts and percentages for categories, median and interquartile range for measurements, and the
standardised difference between the two largest groups (type 1 and type 2 when both are there):

- measurement: ``d = (mean_a - mean_b) / sqrt((var_a + var_b) / 2)``;
- category share: ``d = (p_a - p_b) / sqrt((p_a (1 - p_a) + p_b (1 - p_b)) / 2)``

(Austin PC. Balance diagnostics for comparing the distribution of baseline covariates between
treatment groups in propensity-score matched samples. Stat Med 2009;28:3083-3107, equations for
continuous and dichotomous variables; sample variances with n - 1). A difference above 0.1 is
commonly read as a meaningful imbalance (same paper; common practice).

Disclosure control: counts from 1 to threshold - 1 are ``"<10"``; within a variable and group,
a single small count draws the smallest other count (``"withheld"``); a share or median of a
suppressed count is left out, and so is a standardised difference computed from one (it would
give the hidden share back).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import polars as pl

from cohort._errors import InputError
from cohort.disclosure import SECONDARY_LABEL, suppressed_label
from cohort.report._tables import is_small

__all__ = ["standardised_difference", "standardised_difference_share", "table_one"]

#: (column, label, kind): kind is "measure", "category" or "flag".
VARIABLES: tuple[tuple[str, str, str], ...] = (
    ("age_at_onset", "Age at onset (years)", "measure"),
    ("sex", "Sex", "category"),
    ("severity", "Severity at onset", "category"),
    ("hba1c_mmol_mol", "HbA1c in the year before (mmol/mol)", "measure"),
    ("years_since_first_diabetes_record", "Years since the first diabetes record", "measure"),
    ("is_sglt2i_at_onset", "SGLT2 inhibitor at onset", "flag"),
    ("has_icu_stay", "ICU stay", "flag"),
    ("died_in_hospital", "Died in hospital", "flag"),
)


def standardised_difference(mean_a: float, var_a: float, mean_b: float, var_b: float) -> float:
    """Standardised difference of a measurement between two groups (Austin 2009).

    Returns NaN when both variances are 0.

    Examples
    --------
    >>> standardised_difference(10.0, 4.0, 9.0, 4.0)
    0.5
    """
    if var_a < 0 or var_b < 0:
        msg = f"standardised_difference: variances must be 0 or more, got {var_a} and {var_b}"
        raise InputError(msg)
    pooled = math.sqrt((var_a + var_b) / 2.0)
    return (mean_a - mean_b) / pooled if pooled > 0 else math.nan


def standardised_difference_share(share_a: float, share_b: float) -> float:
    """Standardised difference of a share between two groups (Austin 2009).

    Examples
    --------
    >>> round(standardised_difference_share(0.5, 0.3), 4)
    0.417
    """
    for share in (share_a, share_b):
        if not 0.0 <= share <= 1.0:
            msg = f"standardised_difference_share: shares must lie in [0, 1], got {share_a} and {share_b}"
            raise InputError(msg)
    return standardised_difference(share_a, share_a * (1 - share_a), share_b, share_b * (1 - share_b))


def _round(value: float | None) -> float | None:
    return None if value is None or math.isnan(value) else round(value, 3)


def _hide(counts: list[int], threshold: int) -> list[str | None]:
    """Per count: None (shown), "<t" or "withheld", with one secondary cell per lone small count."""
    marks: list[str | None] = [suppressed_label(threshold) if is_small(c, threshold) else None for c in counts]
    if sum(mark is not None for mark in marks) == 1:
        others = [i for i, c in enumerate(counts) if marks[i] is None and c > 0]
        if others:
            marks[min(others, key=lambda i: (counts[i], i))] = SECONDARY_LABEL
    return marks


def table_one(
    features: pl.DataFrame, *, group: str = "diabetes_type", threshold: int, groups: Sequence[str] | None = None,
) -> pl.DataFrame:
    """Table 1 by ``group``, one row per characteristic (and level), after disclosure control.

    Parameters
    ----------
    features
        One row per person (e.g. each person's first episode) with the :data:`VARIABLES` columns
        that exist (the others are left out).
    group
        Column of the groups (columns of the table).
    threshold
        Disclosure threshold.
    groups
        Groups in column order; default every value, largest first.

    Returns
    -------
    polars.DataFrame
        ``characteristic``, ``level``, then ``<group>_n`` and ``<group>_summary`` per group
        (text), and ``std_difference`` (float, between the first two groups; null when withheld).
    """
    if group not in features.columns:
        msg = f"table_one: the features have no column `{group}`; they have {features.columns}"
        raise InputError(msg)
    frame = features.with_columns(pl.col(group).fill_null("unknown").cast(pl.String))
    order = list(groups) if groups is not None else (
        frame.group_by(group).len().sort(["len", group], descending=[True, False])[group].to_list())
    parts = {name: frame.filter(pl.col(group) == name) for name in order}
    first_two = order[:2] if len(order) >= 2 else []
    rows: list[dict[str, object]] = []

    sizes = [parts[name].height for name in order]
    row: dict[str, object] = {"characteristic": "Persons", "level": ""}
    for name, size, mark in zip(order, sizes, _hide(sizes, threshold), strict=True):
        row[f"{name}_n"], row[f"{name}_summary"] = (mark or str(size)), ""
    row["std_difference"] = None
    rows.append(row)

    for column, label, kind in VARIABLES:
        if column not in frame.columns:
            continue
        if kind == "measure":
            row = {"characteristic": label, "level": "median (IQR)"}
            stats: dict[str, tuple[float, float, int]] = {}
            for name in order:
                values = parts[name][column].drop_nulls().cast(pl.Float64)
                n = values.len()
                shown = not is_small(n, threshold)
                row[f"{name}_n"] = str(n) if shown else suppressed_label(threshold)
                if shown and n:
                    q1, median, q3 = (values.quantile(q, interpolation="linear") for q in (0.25, 0.5, 0.75))
                    row[f"{name}_summary"] = f"{median:.1f} ({q1:.1f}-{q3:.1f})"
                    stats[name] = (float(values.mean()), float(values.var() or 0.0) if n > 1 else 0.0, n)
                else:
                    row[f"{name}_summary"] = ""
            row["std_difference"] = _round(
                standardised_difference(stats[first_two[0]][0], stats[first_two[0]][1],
                                        stats[first_two[1]][0], stats[first_two[1]][1])
                if first_two and all(name in stats for name in first_two) else None)
            rows.append(row)
            continue
        if kind == "flag":
            levels = [True]
            values_of = {name: parts[name][column] for name in order}
        else:
            levels = sorted(frame[column].drop_nulls().unique().to_list())
            values_of = {name: parts[name][column] for name in order}
        level_rows = [{"characteristic": label, "level": "yes" if level is True else str(level)} for level in levels]
        hidden_any = dict.fromkeys(range(len(levels)), False)
        for name in order:
            values = values_of[name]
            total = parts[name].height
            counts = [int((values == level).sum()) for level in levels]
            if kind == "flag":
                # the complement (no or missing) is the group size less the count: one cell more
                marks = _hide([counts[0], total - counts[0]], threshold)[:1]
                if marks[0] is None and is_small(total - counts[0], threshold):
                    marks = [SECONDARY_LABEL]
            else:
                marks = _hide([*counts, total - sum(counts)], threshold)[: len(levels)]
            for index, (count, mark) in enumerate(zip(counts, marks, strict=True)):
                level_rows[index][f"{name}_n"] = mark or str(count)
                level_rows[index][f"{name}_summary"] = "" if mark or not total else f"{100 * count / total:.1f}%"
                if mark and name in first_two:
                    hidden_any[index] = True
        for index, level in enumerate(levels):
            difference = None
            if len(first_two) == 2 and not hidden_any[index]:
                a, b = (parts[name] for name in first_two)
                if a.height and b.height:
                    difference = standardised_difference_share(
                        int((a[column] == level).sum()) / a.height, int((b[column] == level).sum()) / b.height)
            level_rows[index]["std_difference"] = (None if difference is None or math.isnan(difference)
                                                   else round(difference, 3))
        rows.extend(level_rows)
    schema: dict[str, pl.DataType] = {"characteristic": pl.String(), "level": pl.String()}
    for name in order:
        schema[f"{name}_n"] = pl.String()
        schema[f"{name}_summary"] = pl.String()
    schema["std_difference"] = pl.Float64()
    return pl.DataFrame(rows, schema=schema, orient="row")
