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
  cut at the first time fewer than threshold remain at risk (cumulative incidence curves alike).
- **model tables** (hazard, odds and rate ratios): n, events and n - events (``n_without_event``)
  of a model are one group (suppressed with secondary suppression, as one row of a table with a
  total); the model's estimates, CIs and p-values are withheld when its n or its events are below
  the threshold. An estimate is not a count; output checking commonly releases model estimates
  that rest on enough events (common practice of output checking).
- **cells adding up both ways** (events by type and year; n and events per calibration bin, whose
  columns add up to the model's totals): :func:`suppress_cells` repeats secondary suppression over
  every group until no group has exactly one hidden cell.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence

import polars as pl

from cohort.disclosure import SECONDARY_LABEL, is_small, suppress_cells, suppress_counts, suppressed_label

__all__ = [
    "attrition_table",
    "calibration_table",
    "is_small",
    "mask_small_numbers",
    "model_table",
    "rate_table",
    "suppress_cells",
    "km_truncate",
    "median_table",
    "share_table",
    "show_count",
    "suppress_table",
]


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


_NUMBER = re.compile(r"(?<![\w.])(\d+)(?![\w.])")


def mask_small_numbers(text: str | None, *, threshold: int) -> str | None:
    """Replace whole numbers from 1 to ``threshold - 1`` inside free text with ``"<threshold"``.

    Examples
    --------
    >>> mask_small_numbers("left out: 4 row(s) null; 120 kept", threshold=10)
    'left out: <10 row(s) null; 120 kept'
    >>> mask_small_numbers("fewer than 5 events of cause died", threshold=10)
    'fewer than 5 events of cause died'
    """
    if text is None:
        return None
    text = str(text)

    def replace(match: re.Match[str]) -> str:
        # a rule's own limit ("fewer than 5 events") is not a count of anyone
        if text[:match.start()].rstrip().lower().endswith(("fewer than", "at least", "more than")):
            return match.group(1)
        return suppressed_label(threshold) if is_small(int(match.group(1)), threshold) else match.group(1)

    return _NUMBER.sub(replace, text)


def _hidden(text: str, threshold: int) -> bool:
    return text in (suppressed_label(threshold), SECONDARY_LABEL)


def model_table(frame: pl.DataFrame, *, threshold: int, figures: Sequence[str] = (
        "coef", "se", "estimate", "lower", "upper", "z", "p", "ph_statistic", "ph_p")) -> pl.DataFrame:
    """A regression table (one row per term) after disclosure control.

    ``n``, ``events`` and ``n_without_event`` (n - events, added) of each row are one group with
    secondary suppression; ``n_clusters`` (persons) is suppressed on its own. The ``figures`` of a
    row whose n or events is below the threshold are withheld (null); free text (``left_out``,
    ``warning``) has its small numbers masked.

    Examples
    --------
    >>> t = pl.DataFrame({"term": ["a", "b"], "estimate": [1.5, 0.8], "n": [305, 40], "events": [301, 6]})
    >>> model_table(t, threshold=10).select("term", "n", "events", "n_without_event", "estimate").rows()
    [('a', '305', 'withheld', '<10', 1.5), ('b', '40', '<10', 'withheld', None)]
    """
    work = frame
    if "n" in work.columns and "events" in work.columns:
        work = work.with_columns((pl.col("n").cast(pl.Int64) - pl.col("events").cast(pl.Int64)).alias("n_without_event"))
    counts = [c for c in ("n", "events", "n_without_event") if c in work.columns]
    values: list[int | None] = []
    groups: list[list[int]] = []
    for row in work.select(counts).iter_rows():
        groups.append(list(range(len(values), len(values) + len(counts))))
        values.extend(None if v is None else int(v) for v in row)
    shown = suppress_cells(values, groups, threshold=threshold)
    columns = {c: shown[i::len(counts)] for i, c in enumerate(counts)} if counts else {}
    small_rows = [any(is_small(work[c][r], threshold) for c in ("n", "events") if c in work.columns)
                  for r in range(work.height)]
    out = work.with_columns(*[pl.Series(c, v, dtype=pl.String) for c, v in columns.items()])
    if "n_clusters" in out.columns:
        out = out.with_columns(pl.Series("n_clusters", [show_count(v, threshold) for v in work["n_clusters"].to_list()],
                                         dtype=pl.String))
    keep = pl.Series("_small", small_rows, dtype=pl.Boolean)
    out = out.with_columns(keep)
    out = out.with_columns(*[pl.when(pl.col("_small")).then(None).otherwise(pl.col(c)).alias(c)
                             for c in figures if c in out.columns]).drop("_small")
    for text in ("left_out", "warning"):
        if text in out.columns:
            out = out.with_columns(pl.Series(text, [mask_small_numbers(v, threshold=threshold)
                                                    for v in out[text].cast(pl.String).to_list()], dtype=pl.String))
    return out


def rate_table(frame: pl.DataFrame, *, threshold: int, groups_by: Sequence[Sequence[str]] = ((),),
               count: str = "events") -> pl.DataFrame:
    """Incidence rates after disclosure control: events suppressed, figures of hidden rows withheld.

    Parameters
    ----------
    groups_by
        Each a list of columns whose distinct values mark rows adding up to a published total
        (``()``: the whole table); for events by type and year give ``(["diabetes_type"],
        ["calendar_year"])`` so both ways are protected.

    Examples
    --------
    >>> t = pl.DataFrame({"type": ["a", "b", "c"], "events": [120, 4, 35], "estimate": [10.0, 1.0, 3.0]})
    >>> rate_table(t, threshold=10).select("events", "estimate").rows()
    [('120', 10.0), ('<10', None), ('withheld', None)]
    """
    values = [None if v is None else int(v) for v in frame[count].to_list()]
    groups: list[list[int]] = []
    for keys in groups_by:
        members: dict[tuple, list[int]] = {}
        rows = frame.select(list(keys)).rows() if keys else [()] * frame.height
        for index, key in enumerate(rows):
            members.setdefault(tuple(key), []).append(index)
        groups.extend(members.values())
    shown = suppress_cells(values, groups, threshold=threshold)
    out = frame.with_columns(pl.Series(count, shown, dtype=pl.String))
    hidden = pl.col(count).is_in([suppressed_label(threshold), SECONDARY_LABEL])
    figures = [c for c, dtype in out.schema.items() if c != count and dtype.is_numeric() and c not in ("per", "bands",
               "calendar_year", "year")]
    out = out.with_columns(*[pl.when(hidden).then(None).otherwise(pl.col(c)).alias(c) for c in figures])
    if "left_out" in out.columns:
        out = out.with_columns(pl.Series("left_out", [mask_small_numbers(v, threshold=threshold)
                                                      for v in out["left_out"].cast(pl.String).to_list()]))
    return out


def calibration_table(frame: pl.DataFrame, *, threshold: int) -> pl.DataFrame:
    """Calibration bins after disclosure control.

    n, events and n - events of each bin form a row group; the bins' n, events and non-events
    each add up to the model's totals (published with the metrics), so each column is a group too.
    A bin with any hidden count loses its observed share, CI and mean predicted risk.

    Examples
    --------
    >>> t = pl.DataFrame({"bin": [1, 2, 3], "mean_predicted": [0.1, 0.3, 0.6], "observed": [0.1, 0.3, 0.62],
    ...                   "n": [30, 30, 50], "events": [3, 9, 31]})
    >>> calibration_table(t, threshold=10).select("n", "events", "n_without_event", "observed").rows()
    [('30', '<10', 'withheld', None), ('30', '<10', 'withheld', None), ('50', '31', '19', 0.62)]
    """
    work = frame.with_columns((pl.col("n").cast(pl.Int64) - pl.col("events").cast(pl.Int64)).alias("n_without_event"))
    counts = ("n", "events", "n_without_event")
    values: list[int | None] = []
    for row in work.select(counts).iter_rows():
        values.extend(None if v is None else int(v) for v in row)
    width = len(counts)
    groups = [list(range(r * width, r * width + width)) for r in range(work.height)]
    groups += [list(range(c, len(values), width)) for c in range(width)]
    shown = suppress_cells(values, groups, threshold=threshold)
    out = work.with_columns(*[pl.Series(c, shown[i::width], dtype=pl.String) for i, c in enumerate(counts)])
    hidden = pl.any_horizontal([pl.col(c).is_in([suppressed_label(threshold), SECONDARY_LABEL]) for c in counts])
    figures = [c for c in ("mean_predicted", "observed", "lower", "upper") if c in out.columns]
    return out.with_columns(*[pl.when(hidden).then(None).otherwise(pl.col(c)).alias(c) for c in figures])


def suppress_table(frame: pl.DataFrame, counts: Sequence[str], *, threshold: int) -> pl.DataFrame:
    """A results table of any shape after disclosure control of its ``counts`` columns.

    Each count column is one group (its cells may add up to a total shown elsewhere). Where both
    ``n`` and ``events`` are counts, ``n_without_event`` (n - events) is added and each row's n,
    events and n - events are a group too, so that a small number without the event (censored,
    non-events) cannot be recovered by subtraction (a count column already equal to n - events in
    every row, such as ``censored``, takes that place). Every other numeric figure of a row with a
    hidden count is withheld; small numbers inside free text (``left_out``, ``warning``, ``note``)
    are masked.

    Examples
    --------
    >>> t = pl.DataFrame({"group": ["a", "b", "c"], "estimate": [13.9, 12.0, 14.1], "n": [139, 60, 80],
    ...                   "events": [138, 50, 70]})
    >>> suppress_table(t, ["n", "events"], threshold=10).rows()
    [('a', None, '139', 'withheld', '<10'), ('b', None, '60', 'withheld', 'withheld'), ('c', 14.1, '80', '70', '10')]
    """
    work = frame
    columns = list(counts)
    paired = "n" in columns and "events" in columns and bool(
        (work["n"].fill_null(0).cast(pl.Int64) >= work["events"].fill_null(0).cast(pl.Int64)).all())
    complement = "n_without_event"
    if paired:
        difference = work["n"].cast(pl.Int64) - work["events"].cast(pl.Int64)
        # a column already holding n - events in every row (e.g. `censored` of a Kaplan-Meier
        # median table) is the third member of the group; otherwise n - events is added
        for column in columns:
            if column not in ("n", "events") and work[column].null_count() == 0 and bool(
                    (work[column].cast(pl.Int64) == difference).all()):
                complement = column
                break
        else:
            work = work.with_columns(difference.alias(complement))
            columns.append(complement)
    if not columns:
        return work
    width = len(columns)
    values: list[int | None] = []
    for row in work.select(columns).iter_rows():
        values.extend(None if v is None else int(v) for v in row)
    groups = [list(range(c, len(values), width)) for c in range(width)]
    if paired:
        trio = [columns.index("n"), columns.index("events"), columns.index(complement)]
        groups += [[r * width + i for i in trio] for r in range(work.height)]
    shown = suppress_cells(values, groups, threshold=threshold)
    out = work.with_columns(*[pl.Series(c, shown[i::width], dtype=pl.String) for i, c in enumerate(columns)])
    hidden = pl.any_horizontal([pl.col(c).is_in([suppressed_label(threshold), SECONDARY_LABEL]) for c in columns])
    figures = [c for c, dtype in out.schema.items() if c not in columns and dtype.is_numeric()]
    out = out.with_columns(*[pl.when(hidden).then(None).otherwise(pl.col(c)).alias(c) for c in figures])
    for text in ("left_out", "warning", "note"):
        if text in out.columns and out.schema[text] == pl.String:
            out = out.with_columns(pl.Series(text, [mask_small_numbers(v, threshold=threshold)
                                                    for v in out[text].to_list()], dtype=pl.String))
    return out
