"""Agreement between episode finders: matched episodes and Cohen's kappa at visit level.

Two finders (two definitions, or a definition and the code-based finder) are compared two ways:

- **episodes**: an episode of A is matched when B has an episode of the same person whose time
  overlaps it (``onset_a <= end_b`` and ``onset_b <= end_a``, ends inclusive). ``both`` counts the
  episodes of A that are matched (``both_b`` those of B), ``only_a`` and ``only_b`` the rest, so
  ``only_a + both = episodes_a`` and ``only_b + both_b = episodes_b``. One long episode of A may
  overlap two of B: then ``both`` is 1 and ``both_b`` 2.
- **visits**: every hospital stay of the universe (the extract's hospital visits, ERIP, inpatient
  and emergency, an emergency visit and the admission it led to counted as one stay, plus any
  other visit an episode of either finder is linked to) is positive for a finder when one of its
  episodes is linked to a visit of that stay. The 2x2 table of visits gives Cohen's
  kappa (Cohen J. A coefficient of agreement for nominal scales. Educ Psychol Meas
  1960;20(1):37-46): ``kappa = (p_o - p_e) / (1 - p_e)`` with ``p_o`` the observed share of
  agreeing visits and ``p_e`` the share expected from the margins. Episodes linked to no visit
  take no part in the visit-level table.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Mapping

import polars as pl

from cohort._errors import InputError

__all__ = ["AGREEMENT_COLUMNS", "cohens_kappa", "match_episodes", "visit_table", "agreement_table"]

#: Columns of ``agreement.csv``, in order.
AGREEMENT_COLUMNS: tuple[str, ...] = (
    "definition_a",
    "definition_b",
    "episodes_a",
    "episodes_b",
    "both",
    "both_b",
    "only_a",
    "only_b",
    "visits",
    "visits_both",
    "visits_only_a",
    "visits_only_b",
    "visits_neither",
    "kappa",
)

_NEEDED = ("person_id", "onset_datetime", "end_datetime", "visit_occurrence_id")


def cohens_kappa(both: int, only_a: int, only_b: int, neither: int) -> float:
    """Cohen's kappa of a 2x2 agreement table.

    Parameters
    ----------
    both, only_a, only_b, neither
        Counts of items positive for both raters, for A only, for B only, and for neither.

    Returns
    -------
    float
        ``(p_o - p_e) / (1 - p_e)`` (Cohen 1960); NaN when ``p_e`` is 1 (both raters put every
        item in the same single class, so chance agreement is certain and kappa is undefined).

    Raises
    ------
    InputError
        A count is negative or all counts are zero.

    Examples
    --------
    >>> round(cohens_kappa(20, 5, 10, 15), 4)   # p_o = 0.7, p_e = 0.5
    0.4
    """
    cells = (both, only_a, only_b, neither)
    if any(int(cell) != cell or cell < 0 for cell in cells):
        msg = f"cohens_kappa needs four counts of 0 or more, got {cells}"
        raise InputError(msg)
    total = sum(cells)
    if total == 0:
        msg = "cohens_kappa needs at least one item; all four counts are 0"
        raise InputError(msg)
    observed = (both + neither) / total
    share_a = (both + only_a) / total
    share_b = (both + only_b) / total
    expected = share_a * share_b + (1.0 - share_a) * (1.0 - share_b)
    if math.isclose(expected, 1.0):
        return math.nan
    return (observed - expected) / (1.0 - expected)


def _check_frame(frame: pl.DataFrame, name: str) -> pl.DataFrame:
    missing = [column for column in _NEEDED if column not in frame.columns]
    if missing:
        msg = (f"episodes of `{name}` need columns {', '.join(_NEEDED)}; missing "
               f"{', '.join(missing)} (found {', '.join(frame.columns)})")
        raise InputError(msg)
    return frame.select(_NEEDED).with_row_index("_row")


def match_episodes(a: pl.DataFrame, b: pl.DataFrame) -> dict[str, int]:
    """Count episodes of A and B matched by person and overlapping time.

    Parameters
    ----------
    a, b
        Episodes with person_id, onset_datetime, end_datetime (and visit_occurrence_id).

    Returns
    -------
    dict
        ``episodes_a``, ``episodes_b``, ``both`` (episodes of A overlapping one of B),
        ``both_b`` (episodes of B overlapping one of A), ``only_a``, ``only_b``.

    Examples
    --------
    >>> import datetime as dt
    >>> day = lambda d, h: dt.datetime(2024, 3, d, h)
    >>> a = pl.DataFrame({"person_id": [1, 2], "onset_datetime": [day(1, 9), day(1, 9)],
    ...                   "end_datetime": [day(1, 20), day(1, 20)], "visit_occurrence_id": [10, 20]})
    >>> b = pl.DataFrame({"person_id": [1], "onset_datetime": [day(1, 18)],
    ...                   "end_datetime": [day(2, 9)], "visit_occurrence_id": [10]})
    >>> match_episodes(a, b)
    {'episodes_a': 2, 'episodes_b': 1, 'both': 1, 'both_b': 1, 'only_a': 1, 'only_b': 0}
    """
    left = _check_frame(a, "a")
    right = _check_frame(b, "b")
    pairs = (
        left.join(right, on="person_id", how="inner", suffix="_b")
        .filter(
            (pl.col("onset_datetime") <= pl.col("end_datetime_b"))
            & (pl.col("onset_datetime_b") <= pl.col("end_datetime"))
        )
    )
    both = pairs.get_column("_row").n_unique() if pairs.height else 0
    both_b = pairs.get_column("_row_b").n_unique() if pairs.height else 0
    return {
        "episodes_a": left.height,
        "episodes_b": right.height,
        "both": int(both),
        "both_b": int(both_b),
        "only_a": int(left.height - both),
        "only_b": int(right.height - both_b),
    }


def visit_table(a_visits: Iterable[int], b_visits: Iterable[int], universe: Iterable[int]) -> dict[str, int]:
    """Return the 2x2 visit table: both, only_a, only_b, neither (and the universe size).

    The universe is widened by every visit of A or B, so no positive visit falls outside it.

    Examples
    --------
    >>> visit_table([1, 2], [2, 3], range(1, 11))
    {'visits': 10, 'visits_both': 1, 'visits_only_a': 1, 'visits_only_b': 1, 'visits_neither': 7}
    """
    set_a = {int(v) for v in a_visits if v is not None}
    set_b = {int(v) for v in b_visits if v is not None}
    every = {int(v) for v in universe if v is not None} | set_a | set_b
    both = len(set_a & set_b)
    only_a = len(set_a - set_b)
    only_b = len(set_b - set_a)
    return {
        "visits": len(every),
        "visits_both": both,
        "visits_only_a": only_a,
        "visits_only_b": only_b,
        "visits_neither": len(every) - both - only_a - only_b,
    }


def agreement_table(
    finders: Mapping[str, pl.DataFrame],
    universe: Iterable[int],
    *,
    stays: Mapping[int, int] | None = None,
) -> pl.DataFrame:
    """Compare every pair of finders (in the order given): episode matches and visit-level kappa.

    Parameters
    ----------
    finders
        Name -> episodes (person_id, onset_datetime, end_datetime, visit_occurrence_id).
    universe
        visit_occurrence_id of every hospital visit in the extract (the kappa's negatives).
    stays
        visit_occurrence_id -> the id naming its hospital stay (``sql/51_hospital_stays.sql``:
        an emergency visit and the admission it led to are one stay). Visits are counted as stays
        when given; a visit not in the mapping is its own stay.

    Returns
    -------
    polars.DataFrame
        One row per pair with :data:`AGREEMENT_COLUMNS`.
    """
    mapping = {int(k): int(v) for k, v in (stays or {}).items()}

    def as_stays(ids: Iterable[int]) -> list[int]:
        return [mapping.get(int(v), int(v)) for v in ids if v is not None]

    universe_ids = as_stays(universe)
    rows = []
    for (name_a, frame_a), (name_b, frame_b) in itertools.combinations(finders.items(), 2):
        counts = match_episodes(frame_a, frame_b)
        visits = visit_table(
            as_stays(frame_a.get_column("visit_occurrence_id").drop_nulls().to_list()),
            as_stays(frame_b.get_column("visit_occurrence_id").drop_nulls().to_list()),
            universe_ids,
        )
        kappa = (
            cohens_kappa(visits["visits_both"], visits["visits_only_a"], visits["visits_only_b"],
                         visits["visits_neither"])
            if visits["visits"] else math.nan
        )
        rows.append({"definition_a": name_a, "definition_b": name_b, **counts, **visits, "kappa": kappa})
    schema = {column: (pl.String if column.startswith("definition") else pl.Float64 if column == "kappa" else pl.Int64)
              for column in AGREEMENT_COLUMNS}
    return pl.DataFrame(rows, schema=schema) if rows else pl.DataFrame(schema=schema)
