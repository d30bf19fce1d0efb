"""Run the recipes on another engine in the order and with the slot values DuckDB uses.

An engine session (:class:`EngineSession`) knows how to materialise a select as a table, append
a select to a table, count rows and fetch a table as polars. :func:`run_recipes` drives it through
the same steps as :func:`cohort._labs.prepare_lab_events` and
:func:`cohort.episodes.episodes_in_session` (recipes 10 .. 22, 30, 31, 40 .. 46 with the episode
loop, 50, 51), every statement written for the engine by :func:`cohort.engines._dialect.transpile`;
its steps (:func:`run_lab_steps`, :func:`run_state_step`, :func:`run_definition_steps`,
:func:`run_finder_steps`) are what :func:`cohort.engines.find_episodes_on_engine` runs for several
definitions. :func:`duckdb_reference` runs the project's own DuckDB path on an extract and returns the same
tables, and :func:`compare_tables` says where two runs differ.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Any, Protocol

import polars as pl

from cohort._errors import CohortError
from cohort.engines._dialect import EPISODE_RECIPES, recipe_values, render_for, session_sql

__all__ = [
    "EngineSession",
    "recipe_tables",
    "run_recipes",
    "run_lab_steps",
    "run_state_step",
    "run_definition_steps",
    "run_finder_steps",
    "duckdb_reference",
    "compare_tables",
    "compare_runs",
    "episodes_from_tables",
]

# Guard on the episode loop (as cohort.episodes): one step per episode number.
_MAX_EPISODE_STEPS = 100_000


class EngineSession(Protocol):
    """What :func:`run_recipes` needs from an engine."""

    dialect: str

    def register_codelists(self, lists: Any) -> None:
        """Create ``dka_codelist_<name>`` tables from validated code lists."""

    def materialise(self, target: str, sql: str) -> None:
        """Create (or replace) table ``target`` from the select ``sql``."""

    def append(self, target: str, sql: str) -> None:
        """Insert the rows of select ``sql`` into table ``target``."""

    def count(self, table: str) -> int:
        """Rows of ``table``."""

    def fetch(self, table: str) -> pl.DataFrame:
        """The whole table as polars."""

    def query(self, sql: str, recipe: str = "<query>") -> list[tuple[Any, ...]]:
        """Rows of a select written for the engine (counts; used by find_episodes_on_engine)."""

    def close(self) -> None:
        """Drop what the session made."""


def _lab_recipes() -> tuple[tuple[str, str], ...]:
    from cohort._labs import LAB_RECIPES

    return LAB_RECIPES


def recipe_tables() -> tuple[tuple[str, str], ...]:
    """Every (recipe, table) a run leaves, in the order the tables are made.

    Examples
    --------
    >>> recipe_tables()[-1]
    ('51_hospital_stays.sql', 'dka_hospital_stays')
    """
    return (
        *_lab_recipes(),
        ("30_person_diabetes.sql", "dka_person_diabetes"),
        ("31_lab_state.sql", "dka_lab_state"),
        ("40_onset_candidates.sql", "dka_onset_candidates"),
        ("41_resolution_candidates.sql", "dka_resolution_candidates"),
        ("42_onset_visit.sql", "dka_onset_visit"),
        ("43_onset_censoring.sql", "dka_onset_context"),
        ("44_episode_step.sql", "dka_episode_chain"),
        ("45_episode_rebound.sql", "dka_episode_rebound"),
        ("46_episodes.sql", "dka_episodes"),
        ("50_code_episodes.sql", "dka_code_episodes"),
        ("51_hospital_stays.sql", "dka_hospital_stays"),
    )


def run_recipes(
    session: EngineSession,
    definition: Any,
    *,
    codelists: Any = None,
    until: str | None = None,
) -> list[str]:
    """Run every recipe for one definition on an engine session; return the tables made.

    Parameters
    ----------
    session
        An engine session (:class:`cohort.engines.PostgresSession`, :class:`SparkSession`).
    definition
        A bundled definition name, a path or a loaded definition.
    codelists
        A folder of code-list CSVs or loaded :class:`~cohort._codelists.CodeLists` (default: the
        bundled ones).
    until
        Stop after the recipe of this number prefix (``"22"`` runs the lab recipes only).

    Returns
    -------
    list of str
        The ``dka_*`` tables left in the session, in the order they were made.
    """
    from cohort._codelists import CodeLists, read_codelists
    from cohort.engines._dialect import _definition

    loaded = _definition(definition)
    values = recipe_values(loaded)
    slots: dict[str, Any] = {**values["state"], **values[loaded.name]}
    lists = codelists if isinstance(codelists, CodeLists) else read_codelists(codelists)
    session.register_codelists(lists)
    made: list[str] = []
    made += run_lab_steps(session, until=until)
    if until is not None and until < "31":
        return made
    made += run_state_step(session, slots)
    if until is not None and until < "40":
        return made
    made += run_definition_steps(session, slots, until=until)
    if until is not None and until < "50":
        return made
    made += run_finder_steps(session, until=until)
    return made


def _stop(recipe: str, until: str | None) -> bool:
    return until is not None and recipe[:2] > until


def run_lab_steps(session: EngineSession, *, until: str | None = None, as_of: Any = None) -> list[str]:
    """Recipes 10 .. 22 (lab events, quarantine) and 30 (known diabetes); code lists registered first.

    ``as_of`` is the run's as-of date (default today, UTC; :func:`cohort._labs.lab_slots`).
    """
    from cohort._labs import lab_slots

    slots = lab_slots(as_of)
    made: list[str] = []
    for recipe, target in (*_lab_recipes(), ("30_person_diabetes.sql", "dka_person_diabetes")):
        if _stop(recipe, until):
            break
        session.materialise(target, render_for(session.dialect, recipe, slots))
        made.append(target)
    return made


def run_state_step(session: EngineSession, slots: Mapping[str, Any]) -> list[str]:
    """Recipe 31 (the lab state) with the slots of one group of definitions (:func:`recipe_values`)."""
    session.materialise("dka_lab_state", render_for(session.dialect, "31_lab_state.sql", slots))
    return ["dka_lab_state"]


def run_definition_steps(session: EngineSession, slots: Mapping[str, Any], *,
                         until: str | None = None) -> list[str]:
    """Recipes 40 .. 46 for one definition, with the episode loop of :mod:`cohort.episodes`."""
    dialect = session.dialect
    made: list[str] = []
    for recipe, target in zip(EPISODE_RECIPES[:4], ("dka_onset_candidates", "dka_resolution_candidates",
                                                    "dka_onset_visit", "dka_onset_context")):
        if _stop(recipe, until):
            return made
        session.materialise(target, render_for(dialect, recipe, slots))
        made.append(target)
    if _stop("44", until):
        return made
    session.materialise("dka_episode_cutoff", session_sql("first_cutoff", dialect))
    step_sql = render_for(dialect, "44_episode_step.sql", slots)
    next_cutoff = session_sql("next_cutoff", dialect)
    steps = 0
    while True:
        session.materialise("dka_episode_next", step_sql)
        found = session.count("dka_episode_next")
        if steps == 0:
            session.materialise("dka_episode_chain", "select * from dka_episode_next")
        elif found:
            session.append("dka_episode_chain", "select * from dka_episode_next")
        if found == 0:
            break
        session.materialise("dka_episode_cutoff", next_cutoff)
        steps += 1
        if steps > _MAX_EPISODE_STEPS:  # pragma: no cover
            msg = f"more than {_MAX_EPISODE_STEPS} episodes for one person; check the gap"
            raise CohortError(msg)
    made.append("dka_episode_chain")
    for recipe, target in (("45_episode_rebound.sql", "dka_episode_rebound"),
                           ("46_episodes.sql", "dka_episodes")):
        if _stop(recipe, until):
            return made
        session.materialise(target, render_for(dialect, recipe, slots))
        made.append(target)
    return made


def run_finder_steps(session: EngineSession, *, until: str | None = None) -> list[str]:
    """Recipes 50 (the code-based finder) and 51 (hospital stays)."""
    made: list[str] = []
    for recipe, target in (("50_code_episodes.sql", "dka_code_episodes"),
                           ("51_hospital_stays.sql", "dka_hospital_stays")):
        if _stop(recipe, until):
            break
        session.materialise(target, render_for(session.dialect, recipe, {}))
        made.append(target)
    return made


def duckdb_reference(
    extract: Any,
    definition: Any,
    *,
    codelists: Any = None,
    seconds: dict[str, float] | None = None,
) -> dict[str, pl.DataFrame]:
    """Run the project's own DuckDB path for one definition; return every ``dka_*`` table.

    ``seconds``, when given, receives ``run`` (the recipes) and ``fetch`` (the tables to polars).

    Uses :func:`cohort._labs.prepare_lab_events`, :func:`cohort.episodes.build_lab_state`,
    :func:`cohort.episodes.episodes_in_session` and :func:`cohort.episodes.code_episodes_in_session`
    unchanged, on an opened :class:`~cohort.source.Extract`.
    """
    from cohort._labs import prepare_lab_events
    from cohort._sql import run_recipe
    from cohort.engines._dialect import _definition
    from cohort.episodes import build_lab_state, code_episodes_in_session, episodes_in_session

    loaded = _definition(definition)
    con = extract.con
    started = time.perf_counter()
    prepare_lab_events(extract, codelists=codelists)
    run_recipe(con, "30_person_diabetes.sql", "dka_person_diabetes", {})
    build_lab_state(con, [loaded])
    episodes_in_session(con, loaded)
    code_episodes_in_session(con)
    run_recipe(con, "51_hospital_stays.sql", "dka_hospital_stays", {})
    ran = time.perf_counter()
    tables = {table: con.sql(f"select * from {table}").pl() for _, table in recipe_tables()}
    if seconds is not None:
        seconds["run"] = ran - started
        seconds["fetch"] = time.perf_counter() - ran
    return tables


def _normalise(frame: pl.DataFrame) -> pl.DataFrame:
    columns = []
    for name, dtype in frame.schema.items():
        column = pl.col(name)
        if dtype == pl.Decimal or str(dtype).startswith("Decimal"):
            column = column.cast(pl.Float64)
        elif isinstance(dtype, pl.Datetime):
            column = column.dt.replace_time_zone(None).dt.cast_time_unit("us").dt.truncate("1s")
        elif dtype in (pl.Int8, pl.Int16, pl.Int32, pl.Int64, pl.UInt8, pl.UInt16, pl.UInt32):
            column = column.cast(pl.Int64)
        elif dtype == pl.Float32:
            column = column.cast(pl.Float64)
        columns.append(column.alias(name))
    return frame.select(columns)


def _equal(left: Any, right: Any, tolerance: float) -> bool:
    if left is None or right is None:
        return left is None and right is None
    if isinstance(left, float) or isinstance(right, float):
        try:
            a, b = float(left), float(right)
        except (TypeError, ValueError):
            return False
        if math.isnan(a) or math.isnan(b):
            return math.isnan(a) and math.isnan(b)
        return abs(a - b) <= tolerance * max(1.0, abs(a), abs(b))
    if isinstance(left, datetime) and isinstance(right, datetime):
        return left.replace(microsecond=0) == right.replace(microsecond=0)
    return left == right


def compare_tables(
    left: pl.DataFrame,
    right: pl.DataFrame,
    *,
    table: str = "table",
    tolerance: float = 1e-9,
    limit: int = 5,
) -> list[str]:
    """Say how two copies of a table differ (empty list when they agree).

    Rows are compared as multisets: both sides are sorted on every column after normalising
    (decimals and 32-bit numbers widened, times truncated to the second), then compared cell by
    cell; floats agree within ``tolerance`` (relative, absolute below 1).

    Examples
    --------
    >>> compare_tables(pl.DataFrame({"a": [1.0, 2.0]}), pl.DataFrame({"a": [2.0, 1.0 + 1e-12]}))
    []
    """
    faults: list[str] = []
    if left.columns != right.columns:
        return [f"{table}: columns differ: {left.columns} vs {right.columns}"]
    if left.height != right.height:
        faults.append(f"{table}: {left.height} rows vs {right.height} rows")
    a = _normalise(left)
    b = _normalise(right)
    sortable = [name for name, dtype in a.schema.items() if dtype != pl.Float64]
    floats = [name for name, dtype in a.schema.items() if dtype == pl.Float64]
    # sort on the exact columns first, floats rounded last, so tiny float noise does not reorder
    keys = sortable + [f"__round_{name}" for name in floats]

    def ordered(frame: pl.DataFrame) -> pl.DataFrame:
        rounded = frame.with_columns([pl.col(name).round(6).alias(f"__round_{name}") for name in floats])
        return rounded.sort(keys, nulls_last=True).select(frame.columns) if keys else frame

    a, b = ordered(a), ordered(b)
    if a.height != b.height:
        return faults
    for index, (row_a, row_b) in enumerate(zip(a.iter_rows(), b.iter_rows(), strict=True)):
        for name, value_a, value_b in zip(a.columns, row_a, row_b, strict=True):
            if not _equal(value_a, value_b, tolerance):
                faults.append(f"{table}: row {index} column {name}: {value_a!r} vs {value_b!r}")
                if len(faults) >= limit:
                    return faults
    return faults


def compare_runs(
    reference: Mapping[str, pl.DataFrame],
    other: Mapping[str, pl.DataFrame],
    *,
    tables: Sequence[str] | None = None,
    tolerance: float = 1e-9,
) -> dict[str, list[str]]:
    """:func:`compare_tables` for every table of ``reference`` (or ``tables``); faults by table."""
    out: dict[str, list[str]] = {}
    for table in tables or list(reference):
        if table not in other:
            out[table] = [f"{table}: missing from the other run"]
            continue
        faults = compare_tables(reference[table], other[table], table=table, tolerance=tolerance)
        if faults:
            out[table] = faults
    return out


def episodes_from_tables(dka_episodes: pl.DataFrame, definition: Any) -> pl.DataFrame:
    """Turn an engine's ``dka_episodes`` table into the rows of ``episodes.parquet``.

    Adds ``definition`` and ``episode_id`` and conforms the columns exactly as
    :func:`cohort.episodes.episodes_in_session` does, so the result can be compared with
    ``find_episodes(...).episodes`` for the same definition.
    """
    from cohort.engines._dialect import _definition
    from cohort.episodes import _EPISODE_SCHEMA, _conform, with_episode_ids

    name = _definition(definition).name
    frame = dka_episodes.with_columns(
        [pl.col(column).cast(pl.Float64) for column, dtype in dka_episodes.schema.items()
         if str(dtype).startswith("Decimal")]
    ).sort(["person_id", "onset_datetime"])
    frame = with_episode_ids(frame, name)
    return _conform(frame, _EPISODE_SCHEMA)
