"""The report's tables: each built from the results, put through disclosure control, ready to show.

Every function returns a polars DataFrame whose count columns are already text (``"<10"``,
``"withheld"`` or the count) as :func:`cohort.disclosure.suppress_counts` makes them, and whose
figures describing a suppressed count (shares, medians) are null. Charts are drawn only from
these tables, so a chart never shows what its table withholds.

Rules added here on top of :mod:`cohort.disclosure`, all common practice of small-cell control:

- **share of a standard**: the episodes meeting it and those not meeting it are the two cells of
  one group whose total (the denominator) is published; when either is from 1 to threshold - 1
  the numerator and the share are withheld (the denominator stays when it is not small itself).
- **attrition**: the count excluded at a step is a published difference; when it is small it is
  shown as ``"<10"`` and the step's own count as ``"withheld"`` so that it cannot be recovered.
- **medians and quartiles** of a group of fewer than threshold episodes are withheld.
- **numbers at risk** under a Kaplan-Meier plot are suppressed like any count, and the curve is
  cut at the first time fewer than threshold remain at risk.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import polars as pl

from cohort.disclosure import SECONDARY_LABEL, suppress_counts, suppressed_label

__all__ = [
    "attrition_table",
    "is_small",
    "km_truncate",
    "median_table",
    "share_table",
    "show_count",
]


def is_small(count: int | None, threshold: int) -> bool:
    """True when ``count`` is from 1 to ``threshold - 1`` (a count to suppress).

    Examples
    --------
    >>> is_small(3, 10), is_small(0, 10), is_small(10, 10)
    (True, False, False)
    """
    return count is not None and 1 <= int(count) < threshold


def show_count(count: int | None, threshold: int) -> str:
    """The count as shown: ``"<10"`` when small, ``""`` when missing, else the number.

    Examples
    --------
    >>> show_count(4, 10), show_count(1200, 10)
    ('<10', '1200')
    """
    if count is None or (isinstance(count, float) and math.isnan(count)):
        return ""
    return suppressed_label(threshold) if is_small(count, threshold) else str(int(count))


def attrition_table(attrition: pl.DataFrame, *, threshold: int) -> pl.DataFrame:
    """Attrition per definition with the excluded count per step, after disclosure control.

    Parameters
    ----------
    attrition
        ``attrition.csv``: definition (optional), step, name, description, persons, episodes, rows.

    Returns
    -------
    polars.DataFrame
        definition, step, name, description, and for each of persons/episodes/rows present the
        count and ``<column>_excluded`` (the drop since the last count shown of that column, so
        after a withheld step it spans two steps; never for ``rows``, whose unit changes from step
        to step), all as text. Two counts shown never differ by 1 to threshold - 1.
    """
    frame = attrition if "definition" in attrition.columns else attrition.with_columns(pl.lit("").alias("definition"))
    frame = frame.sort(["definition", "step"])
    columns = [name for name in ("persons", "episodes", "rows") if name in frame.columns]
    out_rows: list[dict[str, object]] = []
    label = suppressed_label(threshold)
    for (definition,), part in frame.group_by(["definition"], maintain_order=True):
        # the last count shown of each column: every drop is taken from it, so that two counts
        # shown never differ by a small number (which would give a small exclusion back)
        last_shown: dict[str, int | None] = dict.fromkeys(columns)
        for row in part.iter_rows(named=True):
            shown: dict[str, object] = {
                "definition": definition, "step": row["step"], "name": row.get("name", ""),
                "description": row.get("description", ""),
            }
            for column in columns:
                value = row[column]
                text = show_count(value, threshold)
                excluded_text = ""
                before = last_shown[column]
                # rows change unit from step to step (person rows, lab rows, time points): no drop
                if column != "rows" and value is not None and before is not None and before >= value:
                    excluded = before - value
                    excluded_text = show_count(excluded, threshold)
                    if excluded_text == label and text != label:
                        text = SECONDARY_LABEL
                if value is not None and text not in (label, SECONDARY_LABEL):
                    last_shown[column] = value
                shown[column] = text
                shown[f"{column}_excluded"] = excluded_text
            out_rows.append(shown)
    schema = {"definition": pl.String, "step": pl.Int64, "name": pl.String, "description": pl.String}
    for column in columns:
        schema[column] = pl.String
        schema[f"{column}_excluded"] = pl.String
    return pl.DataFrame(out_rows, schema=schema, orient="row")


def share_table(
    frame: pl.DataFrame, *, numerator: str = "numerator", denominator: str = "denominator",
    threshold: int, group_by: Sequence[str] | None = None,
) -> pl.DataFrame:
    """Add ``share`` and suppress numerator/denominator (and the complement) of each row.

    Parameters
    ----------
    frame
        One row per unit (hospital, period): whole-number numerator and denominator.
    threshold
        Counts from 1 to ``threshold - 1`` are suppressed.
    group_by
        Columns marking groups of rows whose numerators and denominators add up to a published
        total (the hospitals of one standard, with an all-hospitals row published apart; the
        periods of a p-chart, whose pooled share is printed). Within a group where exactly one
        row is withheld, the row with the smallest other count is withheld too, and likewise for
        small denominators. ``None``: no secondary suppression; ``[]``: the whole table is one group.

    Returns
    -------
    polars.DataFrame
        The frame with ``numerator`` and ``denominator`` as text and ``share`` (float, null when
        withheld or the denominator is 0).

    Examples
    --------
    >>> t = pl.DataFrame({"unit": ["a", "b", "c"], "numerator": [40, 3, 48], "denominator": [50, 50, 50]})
    >>> share_table(t, threshold=10).select("numerator", "share").rows()
    [('40', 0.8), ('<10', None), ('withheld', None)]
    >>> share_table(t.head(2), threshold=10, group_by=[]).select("numerator", "share").rows()
    [('withheld', None), ('<10', None)]
    """
    nums = [int(value or 0) for value in frame[numerator].to_list()]
    dens = [int(value or 0) for value in frame[denominator].to_list()]
    hide = [is_small(n, threshold) or is_small(d - n, threshold) or is_small(d, threshold)
            for n, d in zip(nums, dens, strict=True)]
    hide_den = [False] * len(dens)
    if group_by is not None:
        keys = frame.select(list(group_by)).rows() if group_by else [()] * frame.height
        members: dict[tuple, list[int]] = {}
        for index, key in enumerate(keys):
            members.setdefault(tuple(key), []).append(index)
        for rows in members.values():
            hidden = [i for i in rows if hide[i]]
            others = [i for i in rows if not hide[i] and dens[i] > 0]
            if len(hidden) == 1 and others:
                pick = min(others, key=lambda i: (min(nums[i], dens[i] - nums[i]), i))
                hide[pick] = True
            small = [i for i in rows if is_small(dens[i], threshold)]
            bigger = [i for i in rows if dens[i] >= threshold]
            if len(small) == 1 and bigger:
                hide_den[min(bigger, key=lambda i: (dens[i], i))] = True
    label = suppressed_label(threshold)
    shown_num, shown_den, shares = [], [], []
    for index, (n, d) in enumerate(zip(nums, dens, strict=True)):
        if hide[index]:
            shown_num.append(label if is_small(n, threshold) else SECONDARY_LABEL)
            shares.append(None)
        else:
            shown_num.append(str(n))
            shares.append(n / d if d else None)
        shown_den.append(SECONDARY_LABEL if hide_den[index] else show_count(d, threshold))
    return frame.with_columns(
        pl.Series(numerator, shown_num, dtype=pl.String),
        pl.Series(denominator, shown_den, dtype=pl.String),
        pl.Series("share", shares, dtype=pl.Float64),
    )


def median_table(
    frame: pl.DataFrame, value: str, by: Sequence[str], *, threshold: int,
) -> pl.DataFrame:
    """n, median, first and third quartile of ``value`` by groups; figures of small groups withheld.

    Quartiles by linear interpolation between order statistics (numpy's default, R type 7).
    """
    grouped = (
        frame.filter(pl.col(value).is_not_null())
        .group_by(list(by))
        .agg(
            pl.len().cast(pl.Int64).alias("n"),
            pl.col(value).median().round(2).alias("median"),
            pl.col(value).quantile(0.25, interpolation="linear").round(2).alias("q1"),
            pl.col(value).quantile(0.75, interpolation="linear").round(2).alias("q3"),
        )
        .sort(list(by))
    )
    # the n of all groups add up to a count published elsewhere (episodes with a value): one group
    return suppress_counts(grouped, ["n"], threshold=threshold, group_by=None,
                           dependent_columns={"median": "n", "q1": "n", "q3": "n"})


def km_truncate(curve: pl.DataFrame, *, threshold: int, group: str = "group") -> pl.DataFrame:
    """Cut each Kaplan-Meier curve at the first time fewer than ``threshold`` are at risk."""
    if curve.is_empty():
        return curve
    return (
        curve.sort([group, "time"])
        .with_columns((pl.col("at_risk") < threshold).cum_max().over(group).alias("_cut"))
        .filter(~pl.col("_cut"))
        .drop("_cut")
    )
