"""Harmonised lab events and the quarantine: run recipes 10 .. 24 and account for every row.

:func:`prepare_lab_events` loads the code lists, resolves them through the extract's vocabulary
(``sql/10`` .. ``sql/19``), checks every measurement row of a DKA analyte (``sql/20``), gathers
them by time point (``sql/21``), finds repeated rows (``sql/22``), and leaves ``dka_lab_events``
(usable results in canonical units), ``dka_quarantine`` (every excluded row with one reason) and
``dka_lab_points`` (the results gathered by person and time point, which every definition's lab
state reads) in the session, together with the ``dka_concept_*`` tables later recipes use.

``dka_quarantine`` also lists intravenous regular-insulin ``drug_exposure`` rows that cannot be
placed in time (no start datetime, end before start, unknown person); ``data_quality`` counts
every (table, reason) of :data:`DATA_QUALITY_REASONS`, zeros included.

The reconciliation identity is checked on every run, from counts taken independently::

    rows read (measurement row count) = rows used (dka_lab_points, sum of results, less the
                                                   copies quarantined as duplicates)
                                      + rows quarantined (dka_quarantine, measurement rows)
                                      + rows of other analytes (concept not in dka_concept_lab)

``dka_measurement_checked`` (tens of millions of rows at a million persons) and ``dka_lab_events``
(its usable rows) are temporary views, read by ``sql/21`` (every row, by time point) and
``sql/24`` (the quarantine: only the rows at time points holding an excluded row or a repeated
concept, see :data:`_QUARANTINE_SCOPE`); ``dka_lab_points`` is
kept compressed in a scratch database file behind a temporary view (:func:`_work_catalog`,
:func:`_store`). On other engines every recipe is a table. ``on_step`` reports each recipe's time
(``benchmarks/bench_labs.py``). ``rows_other`` is counted per concept from the one column
``measurement_concept_id``, not by joining every measurement row.

``prepare_lab_events(persons=...)`` limits a run to some persons' measurement rows (the features
need only the persons with an episode): every recipe, :func:`checked_in_scope` and the
reconciliation then see their rows only (the run's scope is kept in ``dka_lab_run``).

The unit conversions the recipes apply come from ``units.csv``; :func:`convert` applies one rule in
Python (the worked-example tests check both against published factors).
"""

from __future__ import annotations

import datetime as dt
import shutil
import tempfile
import time
import weakref
from collections.abc import Callable, Iterable, Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from cohort._codelists import CodeLists, read_codelists, register_codelists
from cohort._errors import CohortError, InputError
from cohort._sql import Fragment, Identifier, render_recipe, run_recipe
from cohort.source import Extract

__all__ = [
    "LAB_RECIPES",
    "QUARANTINE_REASONS",
    "INFUSION_REASONS",
    "DATA_QUALITY_REASONS",
    "LabSummary",
    "prepare_lab_events",
    "lab_slots",
    "data_quality_frame",
    "default_as_of",
    "convert",
    "checked_in_scope",
    "LAB_COUNTS_SQL",
]

#: Recipe file -> the session table it makes, in run order.
LAB_RECIPES: tuple[tuple[str, str], ...] = (
    ("10_concept_lab.sql", "dka_concept_lab"),
    ("11_concept_unit.sql", "dka_concept_unit"),
    ("12_concept_condition.sql", "dka_concept_condition"),
    ("13_concept_drug.sql", "dka_concept_drug"),
    ("14_concept_route.sql", "dka_concept_route"),
    ("15_concept_visit.sql", "dka_concept_visit"),
    ("16_concept_ketone.sql", "dka_concept_ketone"),
    ("19_codelist_unresolved.sql", "dka_codelist_unresolved"),
    ("20_measurement_checked.sql", "dka_measurement_checked"),
    ("21_lab_points.sql", "dka_lab_points"),
    ("22_measurement_duplicates.sql", "dka_measurement_duplicates"),
    ("23_lab_events.sql", "dka_lab_events"),
    ("24_quarantine.sql", "dka_quarantine"),
)

#: Session objects made as temporary views rather than tables (same columns, same name): every
#: measurement row of a DKA analyte (about 57 million rows at a million persons) is checked by a
#: scan with hash joins to small tables, read twice (the quarantine, the time points); writing the
#: checked rows once cost more than both readings (20 s of 44 s at a million persons).
_VIEWS = frozenset({"dka_measurement_checked", "dka_lab_events"})

#: Session tables stored compressed in a scratch database file (see :func:`_work_catalog`): the
#: time points (about 11 million rows at a million persons, mostly null columns, which compress to
#: little in a database file and take some 2 GB as an uncompressed temporary table).
_STORED = frozenset({"dka_lab_points"})

#: The rows the quarantine reading of ``sql/20`` checks in DuckDB: rows with no person or no time
#: (never usable, in no time point) and rows at the time points ``sql/21`` found holding an
#: excluded row or a repeated concept. Every row with a reason, and every repeated copy, is one of
#: them, so ``sql/24`` gives the same rows as from every row; at a million persons the points with
#: an excluded row held 4.0 of 57 million rows (measured before the repeated-concept points were
#: added). A condition written here (a :class:`Fragment`), never from user text.
_QUARANTINE_SCOPE = Fragment(
    "(measurement.person_id is null or measurement.measurement_datetime is null or exists ("
    "select 1 from dka_lab_points where (dka_lab_points.excluded > 0 "
    "or dka_lab_points.concept_bits <> dka_lab_points.concept_bit_union) "
    "and dka_lab_points.person_id = measurement.person_id "
    "and dka_lab_points.point_datetime = measurement.measurement_datetime))")

#: The rows of a run limited to some persons (``prepare_lab_events(persons=...)``), whose ids
#: :func:`_register_persons` keeps in ``dka_lab_persons``. A condition written here.
_PERSONS_SCOPE = Fragment(
    "measurement.person_id in (select dka_lab_persons.person_id from dka_lab_persons)")


def _register_persons(con: Any, persons: Iterable[int] | pl.Series) -> int:
    """Keep the distinct person ids of ``persons`` in the temporary table ``dka_lab_persons``;
    return how many there are."""
    series = persons if isinstance(persons, pl.Series) else pl.Series(list(persons))
    if series.dtype == pl.Null or series.is_empty():
        series = pl.Series([], dtype=pl.Int64)
    if not series.dtype.is_integer():
        msg = (f"persons must be integer person_id values, got a {series.dtype} series; pass e.g. "
               "episodes['person_id']")
        raise InputError(msg)
    frame = pl.DataFrame({"person_id": series.cast(pl.Int64).drop_nulls().unique()})
    con.register("dka_lab_persons_given", frame.to_arrow())
    try:
        con.execute("create or replace temp table dka_lab_persons as "
                    "select person_id from dka_lab_persons_given")
    finally:
        con.unregister("dka_lab_persons_given")
    return frame.height


#: Persons with a usable result, and usable rows: the time points' counts less the repeated copies
#: the quarantine lists (``results`` counts copies; see ``sql/21``). Run on every engine.
LAB_COUNTS_SQL = (
    "select count(distinct case when results > 0 then person_id end), coalesce(sum(results), 0) "
    "- (select count(*) from dka_quarantine where source_table = 'measurement' and reason = 'duplicate') "
    "from dka_lab_points")

#: Name of the attached scratch database holding the :data:`_STORED` tables.
_WORK = "dka_work"


def _work_catalog(extract: Extract) -> str:
    """Attach (once per session) a scratch DuckDB database file and return its catalog name.

    A table created in a database file is written as compressed row groups as it is built, so the
    buffer manager can drop its pages and read them back instead of spilling uncompressed rows;
    a temporary table of the in-memory session is not compressed. The file lives in a new folder
    under the session's ``temp_directory`` (else the system temporary folder) and is removed when
    the extract handle is garbage-collected or the interpreter exits. The recipes are unchanged:
    this is only where DuckDB keeps one result.
    """
    con = extract.con
    attached = con.execute(
        "select count(*) from duckdb_databases() where database_name = ?", [_WORK]).fetchall()[0][0]
    if attached:
        return _WORK
    configured = str(con.execute("select current_setting('temp_directory')").fetchall()[0][0] or "")
    parent = Path(configured) if configured and Path(configured).is_dir() else None
    folder = Path(tempfile.mkdtemp(prefix="dka-cohort-work-", dir=parent))
    weakref.finalize(extract, shutil.rmtree, folder, True)
    database = str(folder / "work.duckdb").replace("'", "''")
    con.execute(f"attach '{database}' as {_WORK}")
    return _WORK

#: Measurement quarantine reasons in priority order (the first that applies is given).
QUARANTINE_REASONS: tuple[str, ...] = (
    "person_unknown",
    "no_time",
    "before_birth",
    "after_death",
    "outside_observation",
    "implausible_time",
    "no_value",
    "unit_unknown",
    "implausible",
    "duplicate",
)


#: Intravenous regular-insulin drug_exposure reasons in priority order (sql/24).
INFUSION_REASONS: tuple[str, ...] = ("person_unknown", "no_time", "end_before_start")

#: Every (table, reason) data_quality.csv lists, zeros included, in this order.
DATA_QUALITY_REASONS: dict[str, tuple[str, ...]] = {
    "measurement": QUARANTINE_REASONS,
    "drug_exposure": INFUSION_REASONS,
}


@dataclass(frozen=True)
class LabSummary:
    """What :func:`prepare_lab_events` did.

    Attributes
    ----------
    rows_read
        Measurement rows in the extract.
    rows_used
        Rows in ``dka_lab_events``.
    rows_quarantined
        Measurement rows in ``dka_quarantine``.
    rows_other
        Measurement rows of analytes outside the DKA code list (left alone).
    data_quality
        polars DataFrame (table, reason, rows): every reason of :data:`DATA_QUALITY_REASONS`
        (measurement rows, intravenous regular-insulin drug_exposure rows), zeros included.
    unresolved_codes
        polars DataFrame (codelist, line, vocabulary_id, concept_code, description): code-list
        lines the extract's vocabulary does not hold.
    seconds
        Wall time of the run.
    as_of
        The as-of date the quarantine used (results after it are ``implausible_time``).
    persons
        The number of persons the run was limited to (``prepare_lab_events(persons=...)``);
        None when every row was read. The row counts are then of those persons' rows.
    """

    rows_read: int
    rows_used: int
    rows_quarantined: int
    rows_other: int
    data_quality: pl.DataFrame
    unresolved_codes: pl.DataFrame
    seconds: float = field(default=0.0)
    as_of: dt.date | None = field(default=None)
    persons: int | None = field(default=None)

    @property
    def reconciles(self) -> bool:
        """True when rows_read = rows_used + rows_quarantined + rows_other."""
        return self.rows_read == self.rows_used + self.rows_quarantined + self.rows_other


def convert(value: float, *, multiply: float, add: float = 0.0) -> float:
    """Convert a result to the canonical unit: ``value * multiply + add`` (a units.csv rule).

    Examples
    --------
    >>> round(convert(180.16, multiply=1 / 18.016), 6)   # glucose 180.16 mg/dL -> mmol/L
    10.0
    >>> round(convert(7.0, multiply=10.929, add=-2.15 * 10.929), 2)  # HbA1c 7.0 % -> mmol/mol
    53.01
    """
    return value * multiply + add


def _store(con: object, work: str, target: str, sql: str) -> None:
    """Create ``work.main.target`` from the select ``sql`` and a temporary view ``target`` over it.

    Text columns stay ``varchar``: storing analyte, specimen and reason as ``ENUM`` columns was
    tried (100,000 persons, ``benchmarks/bench_labs.py`` session 2); it saved 0-12 % of the write
    CPU in three runs and cost about half again as much CPU on a read that filters them (as
    recipe 31 does), so it was not kept.
    """
    Identifier(target)
    con.execute(f"create or replace table {work}.main.{target} as\n{sql}")  # type: ignore[attr-defined]
    con.execute(  # type: ignore[attr-defined]
        f"create or replace temp view {target} as select * from {work}.main.{target}")


def _scalar(con: object, sql: str) -> int:
    rows = con.execute(sql).fetchall()  # type: ignore[attr-defined]
    return int(rows[0][0])


def default_as_of() -> dt.date:
    """Today's date in UTC: the default as-of date of a run (results after it are implausible)."""
    return dt.datetime.now(dt.timezone.utc).date()


def lab_slots(as_of: dt.date | None = None) -> dict[str, object]:
    """Slot values of the lab recipes (``sql/10`` .. ``sql/24``) for a run as of ``as_of``.

    ``results_before`` is the first moment after the as-of day: a result dated then or later is
    quarantined as ``implausible_time`` (``sql/20``). A rerun with the same as-of date (it is in
    the manifest) gives the same quarantine. ``row_scope`` is ``true`` (every row is checked);
    :func:`prepare_lab_events` narrows it for the quarantine reading in DuckDB.

    Examples
    --------
    >>> lab_slots(dt.date(2026, 12, 2))["results_before"]
    datetime.datetime(2026, 12, 3, 0, 0)
    """
    day = as_of if as_of is not None else default_as_of()
    if not isinstance(day, dt.date) or isinstance(day, dt.datetime):
        msg = f"as_of must be a date (datetime.date), got {day!r}"
        raise InputError(msg)
    return {"results_before": dt.datetime.combine(day + dt.timedelta(days=1), dt.time()),
            "row_scope": Fragment("true")}


def data_quality_frame(counts: Iterable[tuple[object, object, object]]) -> pl.DataFrame:
    """data_quality.csv from (source_table, reason, rows) counts of ``dka_quarantine``.

    Every (table, reason) of :data:`DATA_QUALITY_REASONS` is listed in order, zeros included; a
    pair the list does not hold is an error (the recipes and the list are kept together). Every
    engine builds its data_quality.csv with this function.

    Examples
    --------
    >>> frame = data_quality_frame([("measurement", "duplicate", 3)])
    >>> frame.filter(pl.col("rows") > 0).rows()
    [('measurement', 'duplicate', 3)]
    """
    counted = {(str(table), str(reason)): int(rows) for table, reason, rows in counts}  # type: ignore[call-overload]
    listed = [(table, reason) for table, reasons in DATA_QUALITY_REASONS.items() for reason in reasons]
    unknown = sorted(set(counted) - set(listed))
    if unknown:
        msg = f"dka_quarantine holds (table, reason) pairs cohort._labs does not list: {unknown}"
        raise CohortError(msg)
    return pl.DataFrame(
        {
            "table": [table for table, _ in listed],
            "reason": [reason for _, reason in listed],
            "rows": [counted.get(pair, 0) for pair in listed],
        },
        schema={"table": pl.String, "reason": pl.String, "rows": pl.Int64},
    )


@contextmanager
def checked_in_scope(con: Any, scope: Fragment) -> Iterator[None]:
    """Within the block, ``dka_measurement_checked`` (and so ``dka_lab_events``) checks only the
    measurement rows meeting ``scope``; the view over every row comes back after.

    For a reader that keeps only some rows anyway (the quarantine, the features' persons): the
    check then runs on those rows rather than on every row of a DKA analyte. ``scope`` is a
    condition on ``measurement`` written by the toolkit. Needs a session prepared by
    :func:`prepare_lab_events` (its as-of slots are kept in ``dka_lab_run``); in any other session
    the block runs on the view as it is.

    Examples
    --------
    >>> with checked_in_scope(con, Fragment("measurement.person_id = 1")):  # doctest: +SKIP
    ...     con.sql("select count(*) from dka_lab_events").fetchall()
    """
    try:
        row = con.execute("select results_before, row_scope from dka_lab_run").fetchall()
    except duckdb.CatalogException:
        yield
        return
    # the run's own scope (every row, or the persons it was limited to), written by the toolkit
    run_scope = Fragment(str(row[0][1]))

    def checked_view(row_scope: Fragment) -> None:
        slots = {"results_before": row[0][0], "row_scope": row_scope}
        con.execute("create or replace temp view dka_measurement_checked as\n"
                    + render_recipe("20_measurement_checked.sql", slots))

    checked_view(Fragment(f"({run_scope.sql}) and ({scope.sql})"))
    try:
        yield
    finally:
        checked_view(run_scope)


@contextmanager
def _kept_in_scope(con: Any, scope: Fragment) -> Iterator[None]:
    """Within the block, ``dka_measurement_checked`` is the checked rows meeting ``scope``, checked
    once and kept in a temporary table (``dka_measurement_scoped``), so that several recipes read
    them without checking them again; the view over every row comes back after.

    The quarantine scope holds about 5 of 57 million rows at a million persons; ``sql/22`` and
    ``sql/24`` both read them. Measured at a million persons, side by side
    (``benchmarks/bench_labs.py --baseline``): the two recipes 9.7 s against 13.8 s for a reading
    each; in the whole episodes step the difference was within the machine's run-to-run spread.
    """
    with checked_in_scope(con, scope):
        con.execute("create or replace temp table dka_measurement_scoped as "
                    "select * from dka_measurement_checked")
        con.execute("create or replace temp view dka_measurement_checked as "
                    "select * from dka_measurement_scoped")
        try:
            yield
        finally:
            # the scoped view goes before the table it reads; checked_in_scope then puts back
            # the view over every row
            con.execute("drop view if exists dka_measurement_checked")
            con.execute("drop table if exists dka_measurement_scoped")


def prepare_lab_events(
    extract: Extract,
    *,
    codelists: str | Path | CodeLists | None = None,
    on_step: Callable[[str, float], None] | None = None,
    as_of: dt.date | None = None,
    persons: Iterable[int] | pl.Series | None = None,
) -> LabSummary:
    """Build ``dka_lab_events`` and ``dka_quarantine`` (and the ``dka_concept_*`` tables).

    Parameters
    ----------
    extract
        An opened extract (:func:`cohort.source.open_extract`).
    codelists
        A folder with the seven code-list CSVs, already read :class:`CodeLists`, or None for the
        bundled ones.
    on_step
        Called as ``on_step(name, seconds)`` after each recipe (``name`` is the recipe file) and
        after the reconciliation counts (``"accounting"``); for benchmarks and progress.
    as_of
        The run's as-of date (default today, UTC): results dated after it are quarantined as
        ``implausible_time``, as are results before 1900.
    persons
        Limit the run to these persons' measurement rows (person_id values): only their rows are
        checked, gathered and quarantined, and the reconciliation is of their rows (rows with no
        person are left out). For a reader that needs a few persons' lab events, such as the
        features of the persons with an episode: at a million persons the whole step reads some
        57 million rows. The ``drug_exposure`` rows of the quarantine are every person's. None
        (the default) reads every row.

    Returns
    -------
    LabSummary
        Row counts, data quality per reason and unresolved codes.

    Raises
    ------
    InputError
        A code list is invalid (file and line named).
    CohortError
        The reconciliation identity fails (rows read != used + quarantined + other).

    Examples
    --------
    >>> with open_extract("demo-output/extract") as extract:  # doctest: +SKIP
    ...     summary = prepare_lab_events(extract)
    ...     summary.reconciles
    True
    """
    if not isinstance(extract, Extract):
        msg = f"prepare_lab_events needs an Extract from open_extract(), got {type(extract).__name__}"
        raise InputError(msg)
    started = time.perf_counter()
    lists = codelists if isinstance(codelists, CodeLists) else read_codelists(codelists)
    con = extract.con
    register_codelists(con, lists)
    as_of = as_of if as_of is not None else default_as_of()
    slots = lab_slots(as_of)
    scoped = persons is not None
    persons_kept = None
    if scoped:
        slots["row_scope"] = _PERSONS_SCOPE
        persons_kept = _register_persons(con, persons)  # type: ignore[arg-type]
    run_scope = slots["row_scope"]
    # the run's slots, for checked_in_scope (a later reader re-renders sql/20 with the same as-of
    # and within the same rows)
    con.execute("create or replace temp table dka_lab_run as select ? as results_before, "
                "? as row_scope", [slots["results_before"], run_scope.sql])  # type: ignore[attr-defined]
    with ExitStack() as scope:
        for recipe, target in LAB_RECIPES:
            step_started = time.perf_counter()
            if target == "dka_measurement_duplicates":
                # the repeats (sql/22) and the quarantine (sql/24) read the checked rows in the
                # scope of the time points holding an excluded row or a repeated concept; those
                # rows are checked once, kept, and read by both; the full view comes back after
                # sql/24 (dka_lab_events and later readers see every row)
                scope.enter_context(_kept_in_scope(con, _QUARANTINE_SCOPE))
            if target in _VIEWS:
                # read by the next recipes only: a view saves writing every checked row
                Identifier(target)
                con.execute(f"create or replace temp view {target} as\n{render_recipe(recipe, slots)}")
            elif target in _STORED:
                _store(con, _work_catalog(extract), target, render_recipe(recipe, slots))
            else:
                run_recipe(con, recipe, target, slots)
            if target == "dka_quarantine":
                scope.close()
            if on_step is not None:
                on_step(recipe, time.perf_counter() - step_started)

    step_started = time.perf_counter()
    in_scope = f" where {_PERSONS_SCOPE.sql}" if scoped else ""
    rows_read = (_scalar(con, f"select count(*) from measurement{in_scope}") if scoped
                 else extract.row_count("measurement"))
    # the usable rows as sql/21 counted them at their time points (no third reading of the rows)
    rows_used = int(con.execute(LAB_COUNTS_SQL).fetchall()[0][1])
    rows_quarantined = _scalar(
        con, "select count(*) from dka_quarantine where source_table = 'measurement'")
    # counted from measurement itself, one group per concept (a single narrow column), independently
    # of the recipes' quarantine assignment
    rows_other = _scalar(
        con,
        "select coalesce(sum(per_concept.rows), 0) from (select measurement_concept_id, "
        f"count(*) as rows from measurement{in_scope} group by measurement_concept_id) as per_concept "
        "left join (select distinct concept_id from dka_concept_lab) as lab_concepts "
        "on lab_concepts.concept_id = per_concept.measurement_concept_id "
        "where lab_concepts.concept_id is null",
    )
    data_quality = data_quality_frame(con.execute(
        "select source_table, reason, count(*) from dka_quarantine "
        "group by source_table, reason").fetchall())
    unresolved = con.sql(
        "select codelist, line, vocabulary_id, concept_code, description "
        "from dka_codelist_unresolved order by codelist, line").pl()
    summary = LabSummary(
        rows_read=rows_read,
        rows_used=rows_used,
        rows_quarantined=rows_quarantined,
        rows_other=rows_other,
        data_quality=data_quality,
        unresolved_codes=unresolved,
        seconds=time.perf_counter() - started,
        as_of=as_of,
        persons=persons_kept,
    )
    if on_step is not None:
        on_step("accounting", time.perf_counter() - step_started)
    if not summary.reconciles:
        whose = f" (of the {summary.persons} persons the run was limited to)" if scoped else ""
        msg = (f"measurement rows{whose} do not reconcile: read {rows_read}, but used {rows_used} + "
               f"quarantined {rows_quarantined} + other analytes {rows_other} = "
               f"{rows_used + rows_quarantined + rows_other}. A concept or unit may resolve twice "
               "(duplicate concept rows in the vocabulary?); check dka_concept_lab and "
               "dka_concept_unit for repeated concept_ids.")
        raise CohortError(msg)
    return summary
