"""DKA episodes from lab results: run the recipes, write the episodes output contract.

:func:`find_episodes` opens an extract (or takes an opened one), harmonises its lab results
(:mod:`cohort._labs`), then for every definition asked for builds the lab state over time
(``sql/30``, ``sql/31``), finds the episodes (``sql/40`` .. ``sql/46``), runs the code-based finder
(``sql/50``) and compares every pair of finders (:mod:`cohort._agreement`). With ``out`` it writes
the files of the output contract (shared DESIGN.md) into a temporary folder beside ``out`` and
renames it into place when every file is complete.

How an episode is found (each rule is written, with its reason, in the recipe's header):

1. Lab state: at every lab time point of a person, the latest value of each analyte within the
   diagnosis look-back and within the resolution look-back; a derived anion gap; known diabetes.
2. Onset: the first time point meeting every diagnostic criterion, strictly after the end of the
   previous episode plus ``episode_gap_hours``. Severity and the onset values are read there.
3. Resolution: the first later time point meeting the resolution criterion with values measured
   after the onset only, no later than the censor time.
4. Censoring when unresolved: death (``died``), the end of the hospital stay
   (``discharged_unresolved``) or the end of the data (``data_end``).
5. Rebound: a time point meeting the diagnosis within ``rebound_hours`` after the end.
6. Population: age at onset in ``[min_age_years, max_age_years)``, an attrition step.

Persons who can never meet a diagnosis are screened out before the lab state is built: each
comparison of the diagnostic criteria is relaxed to the person's extreme value (``x >= v`` to
``max(x) >= v``, ``x < v`` to ``min(x) < v``), the anion gap to true (a derived gap is not known
before the state) and known diabetes to "has a diabetes record". The grammar has no negation, so
whoever meets the criteria at some time point passes the screen; the screen removes no episode.

Work skipped because it cannot change an episode (each argument is in the recipe or function):
the lab state carries only the analytes some criterion or the onset contract reads
(:func:`carried_analytes`; the rows stay the same); visits and censoring are found only for
candidates that can be onsets (``sql/42``); and between steps the episode loop narrows the
tables ``sql/44`` reads to the persons still followed and their later rows
(:func:`_narrow_pending`), restoring the full tables at the end.
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import InitVar, dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from cohort._agreement import agreement_table
from cohort._compile import (
    AllOf,
    AnyOf,
    AtLeast,
    Compare,
    Flag,
    Severity,
    compile_criterion,
    compile_severity,
)
from cohort._errors import CohortError, DefinitionError, InputError
from cohort._labs import LAB_COUNTS_SQL, prepare_lab_events
from cohort._manifest import build_manifest, utc_now, write_manifest
from cohort._outputs import check_output_folder, output_folder
from cohort._sql import Fragment, run_recipe
from cohort.definitions import Definition, load_definition, parse_definition
from cohort.source import Extract, open_extract

__all__ = [
    "CODE_FINDER",
    "EPISODE_COLUMNS",
    "STATE_ANALYTES",
    "ONSET_ANALYTES",
    "carried_analytes",
    "EpisodeResult",
    "find_episodes",
    "attrition_head",
    "with_episode_ids",
    "attrition_tail",
    "screen_fragment",
    "build_lab_state",
    "episodes_in_session",
    "code_episodes_in_session",
]

#: Name of the code-based finder in agreement.csv and code_episodes.parquet.
CODE_FINDER = "dka-codes"

#: Analytes carried in the lab state (every analyte a criterion may name).
STATE_ANALYTES: tuple[str, ...] = (
    "glucose", "ph", "bicarbonate", "bhb", "urine_ketones", "sodium", "chloride", "potassium",
    "anion_gap", "anion_gap_with_k", "hba1c", "creatinine",
)

#: Analytes whose value at onset the episodes contract reports (read from ``dx_<analyte>`` by sql/40).
ONSET_ANALYTES: tuple[str, ...] = (
    "glucose", "ph", "bicarbonate", "bhb", "urine_ketones", "potassium", "anion_gap",
)

#: Columns of episodes.parquet, in order: the DESIGN.md contract first, then the extras.
EPISODE_COLUMNS: tuple[str, ...] = (
    "episode_id", "person_id", "definition", "visit_occurrence_id", "onset_datetime",
    "resolution_datetime", "end_datetime", "end_reason", "hours_to_resolution", "severity",
    "glucose_mmol_l", "ph", "bicarbonate_mmol_l", "bhb_mmol_l", "anion_gap_mmol_l",
    # extras (added, never renamed)
    "episode_number", "is_rebound", "rebound_datetime", "age_years_at_onset",
    "urine_ketones_ordinal", "potassium_mmol_l", "known_diabetes", "visit_kind", "visit_link",
    "discharge_datetime",
)

_EPISODE_SCHEMA: dict[str, Any] = {
    "episode_id": pl.String, "person_id": pl.Int64, "definition": pl.String,
    "visit_occurrence_id": pl.Int64, "onset_datetime": pl.Datetime("us"),
    "resolution_datetime": pl.Datetime("us"), "end_datetime": pl.Datetime("us"),
    "end_reason": pl.String, "hours_to_resolution": pl.Float64, "severity": pl.String,
    "glucose_mmol_l": pl.Float64, "ph": pl.Float64, "bicarbonate_mmol_l": pl.Float64,
    "bhb_mmol_l": pl.Float64, "anion_gap_mmol_l": pl.Float64, "episode_number": pl.Int32,
    "is_rebound": pl.Boolean, "rebound_datetime": pl.Datetime("us"), "age_years_at_onset": pl.Int32,
    "urine_ketones_ordinal": pl.Float64, "potassium_mmol_l": pl.Float64, "known_diabetes": pl.Boolean,
    "visit_kind": pl.String, "visit_link": pl.String, "discharge_datetime": pl.Datetime("us"),
}

_ATTRITION_SCHEMA: dict[str, Any] = {
    "definition": pl.String, "step": pl.Int32, "name": pl.String, "description": pl.String,
    "persons": pl.Int64, "episodes": pl.Int64, "rows": pl.Int64,
}

_CODE_SCHEMA: dict[str, Any] = {
    "episode_id": pl.String, "person_id": pl.Int64, "definition": pl.String,
    "visit_occurrence_id": pl.Int64, "visit_kind": pl.String, "onset_datetime": pl.Datetime("us"),
    "end_datetime": pl.Datetime("us"), "condition_rows": pl.Int64,
}

# Age bounds passed for an open end of the population (no one is younger than 0 or 200 and over).
_OPEN_MIN_AGE = 0.0
_OPEN_MAX_AGE = 200.0
# Guard on the episode loop: one step per episode number.
_MAX_EPISODE_STEPS = 100_000


@dataclass(frozen=True)
class EpisodeResult:
    """What :func:`find_episodes` found and wrote.

    Attributes
    ----------
    episodes
        One row per episode and definition (:data:`EPISODE_COLUMNS`).
    attrition
        definition, step, name, description, persons, episodes, rows; in order per definition.
    quarantine
        Every excluded source row: source_table, source_row_id, person_id, reason, detail. When
        the run wrote a folder, read from its ``quarantine.parquet`` on first use (millions of rows
        with their detail text at a million persons, not held beside the run's DuckDB buffers);
        pass ``quarantine=None`` with ``out`` to the constructor for that.
    data_quality
        Counts per table and reason (zeros included).
    agreement
        One row per pair of finders (:data:`cohort._agreement.AGREEMENT_COLUMNS`).
    manifest
        The manifest (as written to manifest.json).
    code_episodes
        The code-based finder's episodes (one per visit with a DKA condition code).
    out
        The folder written, or None.
    """

    episodes: pl.DataFrame
    attrition: pl.DataFrame
    quarantine: InitVar[pl.DataFrame | None]
    data_quality: pl.DataFrame
    agreement: pl.DataFrame
    manifest: dict[str, Any]
    code_episodes: pl.DataFrame = field(default_factory=lambda: pl.DataFrame(schema=_CODE_SCHEMA))
    out: Path | None = None

    def __post_init__(self, quarantine: pl.DataFrame | None) -> None:
        if quarantine is None and self.out is None:
            msg = "EpisodeResult needs the quarantine frame, or out (a folder holding quarantine.parquet)"
            raise CohortError(msg)
        object.__setattr__(self, "_quarantine", quarantine)


def _quarantine_of(result: EpisodeResult) -> pl.DataFrame:
    held = result.__dict__.get("_quarantine")
    if held is None:
        held = pl.read_parquet(Path(result.out) / "quarantine.parquet")  # type: ignore[arg-type]
        object.__setattr__(result, "_quarantine", held)
    return held  # type: ignore[no-any-return]


# a property beside the dataclass's InitVar of the same name (set after the class is made, so that
# the dataclass does not take it for the field's default)
EpisodeResult.quarantine = property(  # type: ignore[assignment,method-assign]
    _quarantine_of, doc="Every excluded source row (read from out/quarantine.parquet when not held).")


# --------------------------------------------------------------------------- compiling
def _number(value: float) -> str:
    return repr(float(value))


def _screen_sql(node: Any) -> str:
    if isinstance(node, Compare):
        if node.analyte in ("anion_gap", "anion_gap_with_k"):
            return "true"
        side = "max" if node.op in (">", ">=") else "min"
        return f"(person_extremes.{side}_{node.analyte} {node.op} {_number(node.value)})"
    if isinstance(node, Flag):
        if node.flag == "known_diabetes":
            return "(person_diabetes.person_id is not null)"
        msg = f"the person screen knows no flag {node.flag!r}"
        raise DefinitionError(msg)
    if isinstance(node, AllOf):
        return "(" + " and ".join(_screen_sql(child) for child in node.all_of) + ")"
    if isinstance(node, AnyOf):
        return "(" + " or ".join(_screen_sql(child) for child in node.any_of) + ")"
    if isinstance(node, AtLeast):
        counts = " + ".join(f"case when {_screen_sql(child)} then 1 else 0 end" for child in node.of)
        return f"(({counts}) >= {int(node.at_least)})"
    msg = f"not a criterion node: {type(node).__name__}"
    raise DefinitionError(msg)


def screen_fragment(criteria: Sequence[Any]) -> Fragment:
    """Relax diagnostic criteria to a person-level screen over ``person_extremes``.

    Parameters
    ----------
    criteria
        Diagnosis criterion trees (``definition.diagnosis``); a person passes when any holds.

    Returns
    -------
    Fragment
        A boolean over ``person_extremes.min_<analyte>`` / ``max_<analyte>`` and
        ``person_diabetes.person_id`` (the slot ``person_screen`` of ``sql/31_lab_state.sql``).

    Examples
    --------
    >>> from cohort._compile import parse_criterion
    >>> screen_fragment([parse_criterion({"analyte": "ph", "op": "<", "value": 7.3})]).sql
    'coalesce(((person_extremes.min_ph < 7.3)), false)'
    """
    if not criteria:
        return Fragment("true")
    return Fragment("coalesce((" + " or ".join(_screen_sql(node) for node in criteria) + "), false)")


def _dx_column(analyte: str) -> str:
    return f"lab_state.dx_{analyte}"


def _resolution_after_onset(analyte: str) -> str:
    return (f"(case when resolution_points.rs_{analyte}_datetime > onsets.onset_datetime "
            f"then resolution_points.rs_{analyte} end)")


def _state_key(definition: Definition) -> tuple[Any, ...]:
    timing = definition.timing
    return (timing.diagnosis_lookback_hours, timing.resolution_lookback_hours,
            timing.anion_gap_pairing_minutes, tuple(timing.ph_specimens), tuple(timing.bicarbonate_specimens))


def _named_analytes(node: Any) -> set[str]:
    """Every analyte a criterion tree (or a severity, a list of grades) compares."""
    if isinstance(node, Compare):
        return {node.analyte}
    if isinstance(node, AllOf):
        children: Sequence[Any] = node.all_of
    elif isinstance(node, AnyOf):
        children = node.any_of
    elif isinstance(node, AtLeast):
        children = node.of
    elif isinstance(node, Severity):
        children = [grade.when for grade in node.grades]
    else:  # a flag, or no severity
        return set()
    named: set[str] = set()
    for child in children:
        named |= _named_analytes(child)
    return named


def carried_analytes(definitions: Definition | Sequence[Definition]) -> tuple[str, ...]:
    """The analytes the lab state carries for these definitions, in :data:`STATE_ANALYTES` order.

    Always those the episode contract reports at onset (:data:`ONSET_ANALYTES`: glucose, pH,
    bicarbonate, beta-hydroxybutyrate, anion gap, urine ketones, potassium) with the sodium and
    chloride the derived anion gap is formed from; then every analyte a diagnosis, severity or
    resolution criterion names (``anion_gap_with_k`` brings potassium, sodium, chloride and
    bicarbonate). The other columns of ``dka_lab_state`` stay null: no recipe reads them. For the
    bundled definitions (none names HbA1c, creatinine or the gap with potassium) this skips 3 of
    the 12 running counts and joins and one of the two derived gaps.

    Examples
    --------
    >>> from cohort.definitions import load_definition
    >>> carried_analytes(load_definition("consensus-2024"))
    ('glucose', 'ph', 'bicarbonate', 'bhb', 'urine_ketones', 'sodium', 'chloride', 'potassium', 'anion_gap')
    """
    items = [definitions] if isinstance(definitions, Definition) else list(definitions)
    wanted = set(ONSET_ANALYTES) | {"sodium", "chloride"}
    for definition in items:
        wanted |= _named_analytes(definition.diagnosis)
        wanted |= _named_analytes(definition.severity)
        wanted |= _named_analytes(definition.resolution.when)
    if "anion_gap_with_k" in wanted:
        wanted |= {"sodium", "chloride", "potassium", "bicarbonate"}
    return tuple(analyte for analyte in STATE_ANALYTES if analyte in wanted)


def _state_slots(definitions: Definition | Sequence[Definition]) -> dict[str, Any]:
    """Slots of ``sql/31``: the timing of the first definition, the analytes of all of them."""
    first = definitions if isinstance(definitions, Definition) else definitions[0]
    timing = first.timing
    return {
        "diagnosis_lookback_hours": float(timing.diagnosis_lookback_hours),
        "resolution_lookback_hours": float(timing.resolution_lookback_hours),
        "anion_gap_pairing_minutes": float(timing.anion_gap_pairing_minutes),
        "ph_specimens": tuple(timing.ph_specimens),
        "bicarbonate_specimens": tuple(timing.bicarbonate_specimens),
        "state_analytes": carried_analytes(definitions),
    }


# --------------------------------------------------------------------------- session steps
def _count(con: Any, sql: str) -> int:
    return int(con.execute(sql).fetchall()[0][0])


def build_lab_state(con: Any, definitions: Sequence[Definition], *, screen: bool = True) -> int:
    """Build ``dka_lab_state`` for definitions sharing one set of look-backs and specimens.

    Needs ``dka_lab_points`` and ``dka_person_diabetes`` in the session (``sql/21``, ``sql/30``).

    Parameters
    ----------
    con
        The DuckDB session.
    definitions
        Definitions whose timing agrees on the look-backs, pairing and specimens.
    screen
        Drop persons who cannot meet any of the diagnoses (see the module docstring).

    Returns
    -------
    int
        Rows of ``dka_lab_state``.
    """
    if not definitions:
        msg = "build_lab_state needs at least one definition"
        raise InputError(msg)
    keys = {_state_key(definition) for definition in definitions}
    if len(keys) != 1:
        msg = ("build_lab_state: the definitions differ in look-backs, anion gap pairing or specimens; "
               "build one lab state per group (find_episodes does this)")
        raise InputError(msg)
    slots: dict[str, Any] = _state_slots(list(definitions))
    slots["person_screen"] = screen_fragment([d.diagnosis for d in definitions]) if screen else Fragment("true")
    run_recipe(con, "31_lab_state.sql", "dka_lab_state", slots)
    return _count(con, "select count(*) from dka_lab_state")


#: The tables sql/44 reads that the episode loop narrows between steps, with their time column.
_PENDING: tuple[tuple[str, str], ...] = (
    ("dka_onset_context", "onset_datetime"),
    ("dka_resolution_candidates", "state_datetime"),
)


def _narrow_pending(con: Any, *, first: bool) -> None:
    """Keep, in the tables ``sql/44`` reads, only rows later than a followed person's cutoff.

    Exact: a step picks an onset strictly after the person's cutoff and a resolution strictly
    after that onset, and only for persons in ``dka_episode_cutoff``; every row dropped here is
    a row no later step could pick. Before the first narrowing the recipe's full tables are
    renamed to ``<table>_full`` (:func:`_restore_pending` puts them back), so the session ends
    with the same tables the recipes made. Each step then reads the persons still followed and
    their later rows only, instead of every candidate of every person: most persons have one
    episode, and at 1,000,000 persons the loop runs 13 steps.
    """
    for table, column in _PENDING:
        if first:
            con.execute(f"alter table {table} rename to {table}_full")
        source = f"{table}_full" if first else table
        con.execute(
            f"create or replace temp table {table}_narrowed as select {source}.* from {source} "
            f"inner join dka_episode_cutoff on dka_episode_cutoff.person_id = {source}.person_id "
            f"where {source}.{column} > dka_episode_cutoff.cutoff_datetime"
        )
        if not first:
            con.execute(f"drop table {table}")
        con.execute(f"alter table {table}_narrowed rename to {table}")


def _restore_pending(con: Any) -> None:
    """Put back the full tables :func:`_narrow_pending` set aside (also after it failed midway)."""
    for table, _ in _PENDING:
        con.execute(f"drop table if exists {table}_narrowed")
        if _count(con, f"select count(*) from duckdb_tables() where table_name = '{table}_full'"):
            con.execute(f"drop table if exists {table}")
            con.execute(f"alter table {table}_full rename to {table}")


def episodes_in_session(
    con: Any, definition: Definition, *, seconds: dict[str, float] | None = None
) -> tuple[pl.DataFrame, list[dict[str, Any]]]:
    """Find one definition's episodes from the ``dka_lab_state`` in the session.

    Runs ``sql/40`` .. ``sql/46``; needs the CDM views (person, visit_occurrence, death,
    observation_period) and ``dka_concept_visit``.

    Parameters
    ----------
    con
        The DuckDB session holding ``dka_lab_state`` built with this definition's timing.
    definition
        The loaded definition.
    seconds
        When given, filled with the wall time of each recipe (and ``44_steps``, the number of
        episode steps run).

    Returns
    -------
    (polars.DataFrame, list of dict)
        The episodes (:data:`EPISODE_COLUMNS`) and the attrition rows from the diagnosis on.
    """
    name = definition.name
    timing = definition.timing
    diagnosis = compile_criterion(definition.diagnosis, column_for=_dx_column,
                                  flag_for=lambda flag: f"lab_state.{flag}")
    severity = compile_severity(definition.severity, column_for=_dx_column,
                                flag_for=lambda flag: f"lab_state.{flag}")
    resolution_screen = compile_criterion(definition.resolution.when,
                                          column_for=lambda analyte: f"lab_state.rs_{analyte}",
                                          flag_for=lambda flag: f"lab_state.{flag}")
    resolution = compile_criterion(definition.resolution.when, column_for=_resolution_after_onset,
                                   flag_for=lambda flag: f"resolution_points.{flag}")
    population = definition.population
    slots: dict[str, Any] = {
        "diagnosis": diagnosis,
        "severity": severity,
        "resolution_screen": resolution_screen,
        "resolution": resolution,
        "episode_gap_hours": float(timing.episode_gap_hours),
        "rebound_hours": float(timing.rebound_hours),
        "min_age_years": float(population.min_age_years) if population.min_age_years is not None else _OPEN_MIN_AGE,
        "max_age_years": float(population.max_age_years) if population.max_age_years is not None else _OPEN_MAX_AGE,
    }
    timings = seconds if seconds is not None else {}

    def run(recipe: str, target: str) -> None:
        started = time.perf_counter()
        run_recipe(con, recipe, target, slots)
        key = recipe.split("_", 1)[0] + "_" + target.removeprefix("dka_")
        timings[key] = timings.get(key, 0.0) + time.perf_counter() - started

    run("40_onset_candidates.sql", "dka_onset_candidates")
    run("41_resolution_candidates.sql", "dka_resolution_candidates")
    run("42_onset_visit.sql", "dka_onset_visit")
    run("43_onset_censoring.sql", "dka_onset_context")

    con.execute(
        "create or replace temp table dka_episode_cutoff as "
        "select distinct person_id, 1 as episode_number, cast(null as timestamp) as cutoff_datetime "
        "from dka_onset_context"
    )
    steps = 0
    narrowed = False
    followed_at_narrowing: int | None = None
    try:
        while True:
            run("44_episode_step.sql", "dka_episode_next")
            if steps == 0:
                con.execute("create or replace temp table dka_episode_chain as select * from dka_episode_next")
            found = _count(con, "select count(*) from dka_episode_next")
            if found == 0:
                break
            if steps > 0:
                con.execute("insert into dka_episode_chain select * from dka_episode_next")
            con.execute(
                "create or replace temp table dka_episode_cutoff as select person_id, "
                "episode_number + 1 as episode_number, next_cutoff_datetime as cutoff_datetime "
                "from dka_episode_next"
            )
            if followed_at_narrowing is None or 2 * found <= followed_at_narrowing:
                # narrowing costs a pass over the pending rows; it pays once half the persons are settled
                started = time.perf_counter()
                first, narrowed = not narrowed, True
                _narrow_pending(con, first=first)
                followed_at_narrowing = found
                timings["44_narrow"] = timings.get("44_narrow", 0.0) + time.perf_counter() - started
            steps += 1
            if steps > _MAX_EPISODE_STEPS:  # pragma: no cover - a person with 100,000 episodes
                msg = f"definition `{name}`: more than {_MAX_EPISODE_STEPS} episodes for one person; check the gap"
                raise CohortError(msg)
    finally:
        if narrowed:
            _restore_pending(con)
    timings["44_steps"] = float(steps + 1)
    run("45_episode_rebound.sql", "dka_episode_rebound")
    run("46_episodes.sql", "dka_episodes")

    frame = con.sql("select * from dka_episodes order by person_id, onset_datetime").pl()
    frame = with_episode_ids(frame, name)
    frame = _conform(frame, _EPISODE_SCHEMA)

    candidates = con.execute(
        "select count(distinct person_id), count(*) from dka_onset_candidates").fetchall()[0]
    chain = con.execute(
        "select count(distinct person_id), count(*) from dka_episode_chain").fetchall()[0]
    attrition = attrition_tail(definition, candidates, chain, frame)
    return frame, attrition


def with_episode_ids(frame: pl.DataFrame, definition: str) -> pl.DataFrame:
    """Add ``definition`` and ``episode_id`` (``<definition>:<person_id>:<onset YYYYMMDDhhmmss>``).

    Examples
    --------
    >>> import datetime as dt
    >>> frame = pl.DataFrame({"person_id": [7], "onset_datetime": [dt.datetime(2024, 3, 1, 9, 30)]})
    >>> with_episode_ids(frame, "consensus-2024")["episode_id"].to_list()
    ['consensus-2024:7:20240301093000']
    """
    return frame.with_columns(
        pl.lit(definition).alias("definition"),
        pl.concat_str([
            pl.lit(f"{definition}:"), pl.col("person_id").cast(pl.String), pl.lit(":"),
            pl.col("onset_datetime").dt.strftime("%Y%m%d%H%M%S"),
        ]).alias("episode_id"),
    )


def attrition_head(persons: int, lab: tuple[int, int], state: tuple[int, int]) -> list[dict[str, Any]]:
    """The first three attrition steps of every definition (extract, lab results, lab state).

    ``lab`` and ``state`` are (persons, rows). Every engine words its attrition.csv with this
    function and :func:`attrition_tail`, so the files agree across engines.

    Examples
    --------
    >>> [row["name"] for row in attrition_head(10, (8, 120), (3, 40))]
    ['extract', 'lab_results', 'lab_state']
    """
    return [
        {"name": "extract", "persons": persons, "episodes": None, "rows": persons,
         "description": "persons in the extract (person rows)"},
        {"name": "lab_results", "persons": lab[0], "episodes": None, "rows": lab[1],
         "description": "usable DKA lab results (rows) after the quarantine, and their persons"},
        {"name": "lab_state", "persons": state[0], "episodes": None, "rows": state[1],
         "description": ("lab time points of the persons who pass the screen (whose extreme "
                         "values could meet a diagnosis asked for)")},
    ]


def attrition_tail(definition: Definition, candidates: Sequence[int], chain: Sequence[int],
                   frame: pl.DataFrame) -> list[dict[str, Any]]:
    """The last three attrition steps of a definition (diagnosis, episodes, population).

    ``candidates`` and ``chain`` are (persons, rows) of the qualifying time points and of the
    episode chain; ``frame`` is the definition's episodes after the population's ages.
    """
    timing = definition.timing
    lower = definition.population.min_age_years
    upper = definition.population.max_age_years
    bounds = (f"{'' if lower is None else f'{lower:g} <= '}age"
              f"{'' if upper is None else f' < {upper:g}'}") if (lower is not None or upper is not None) else "any age"
    return [
        {"name": "meets_diagnosis", "persons": candidates[0], "episodes": None, "rows": candidates[1],
         "description": "lab time points meeting every diagnostic criterion (rows), and their persons"},
        {"name": "episodes", "persons": chain[0], "episodes": chain[1], "rows": None,
         "description": (f"episodes: first qualifying time point after the previous episode's end plus "
                         f"{timing.episode_gap_hours:g} h")},
        {"name": "population", "persons": frame.get_column("person_id").n_unique(), "episodes": frame.height,
         "rows": None, "description": f"episodes with age at onset in the population ({bounds})"},
    ]


def code_episodes_in_session(con: Any) -> pl.DataFrame:
    """Run the code-based finder (``sql/50``) and return its episodes, one per visit."""
    run_recipe(con, "50_code_episodes.sql", "dka_code_episodes", {})
    frame = con.sql("select * from dka_code_episodes order by person_id, onset_datetime").pl()
    frame = with_episode_ids(frame, CODE_FINDER)
    return _conform(frame, _CODE_SCHEMA)


def _conform(frame: pl.DataFrame, schema: Mapping[str, Any]) -> pl.DataFrame:
    """Select the schema's columns in order, cast to its types (an empty frame keeps the types)."""
    columns = []
    for column, dtype in schema.items():
        if column in frame.columns:
            columns.append(pl.col(column).cast(dtype))
        else:
            columns.append(pl.lit(None, dtype=dtype).alias(column))
    return frame.select(columns)


# --------------------------------------------------------------------------- progress
class _Steps:
    """Wall time per step, shown with rich when asked."""

    def __init__(self, total: int, show: bool) -> None:
        self.seconds: dict[str, float] = {}
        self._progress = None
        self._task = None
        if show:
            from rich.console import Console
            from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

            self._progress = Progress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(),
                                      console=Console(stderr=True), transient=False)
            self._progress.start()
            self._task = self._progress.add_task("episodes", total=total)

    @contextmanager
    def step(self, key: str, description: str) -> Iterator[None]:
        if self._progress is not None:
            self._progress.update(self._task, description=description)
        started = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[key] = self.seconds.get(key, 0.0) + time.perf_counter() - started
            if self._progress is not None:
                self._progress.advance(self._task)

    def close(self) -> None:
        if self._progress is not None:
            self._progress.update(self._task, description="episodes: done")
            self._progress.stop()


# --------------------------------------------------------------------------- entry point
def _load(definitions: Sequence[str | Path | Definition], overrides: Mapping[str, object] | None) -> list[Definition]:
    if isinstance(definitions, (str, Path, Definition)):
        definitions = [definitions]
    if not definitions:
        msg = "find_episodes needs at least one definition, e.g. definitions=['consensus-2024']"
        raise InputError(msg)
    loaded: list[Definition] = []
    for item in definitions:
        if isinstance(item, Definition):
            loaded.append(parse_definition(item.to_dict(), overrides=overrides, origin=item.origin)
                          if overrides else item)
        else:
            loaded.append(load_definition(item, overrides=overrides))
    names = [definition.name for definition in loaded]
    twice = sorted({name for name in names if names.count(name) > 1})
    if twice:
        msg = f"definition name(s) given twice: {', '.join(twice)}; each definition may be asked for once"
        raise InputError(msg)
    if CODE_FINDER in names:
        msg = f"`{CODE_FINDER}` is the name of the code-based finder; rename the definition"
        raise InputError(msg)
    return loaded


def find_episodes(
    source: str | Path | Extract,
    definitions: Sequence[str | Path | Definition] = ("consensus-2024",),
    *,
    out: Path | None = None,
    overrides: Mapping[str, object] | None = None,
    codelists: Path | None = None,
    threads: int | None = None,
    memory_limit: str | None = None,
    progress: bool = False,
    as_of: dt.date | None = None,
) -> EpisodeResult:
    """Find DKA episodes by one or more lab-based definitions, and compare them with the codes.

    Parameters
    ----------
    source
        An extract folder or DuckDB file (opened read-only), or an opened :class:`Extract`.
    definitions
        Bundled names (``ada-2009``, ``consensus-2024``, ``jbds-2023``, ``ispad-2022``), paths
        of definition files, or loaded definitions.
    out
        Folder to write the output contract into (episodes.parquet, attrition.csv,
        quarantine.parquet, data_quality.csv, agreement.csv, code_episodes.parquet,
        manifest.json). It must be new, empty, or an earlier run's folder (replaced). None
        writes nothing.
    overrides
        Dotted keys applied to every definition, e.g. ``{"timing.episode_gap_hours": 48}``.
    codelists
        A folder of code-list CSVs replacing the bundled ones.
    threads, memory_limit
        DuckDB settings (``threads=2``, ``memory_limit="4GB"``).
    progress
        Show progress on standard error (rich).
    as_of
        The run's as-of date (default today, UTC); lab results dated after it, or before 1900,
        are quarantined as ``implausible_time``. Recorded in the manifest (``parameters.as_of``).

    Returns
    -------
    EpisodeResult
        polars DataFrames of episodes, attrition, quarantine, data quality and agreement, and
        the manifest.

    Raises
    ------
    DefinitionError
        A definition or override is invalid.
    SchemaError
        The extract lacks a table or column the pipeline reads.
    InputError
        ``out`` cannot be written, or another argument is invalid.

    Examples
    --------
    >>> result = find_episodes("demo-output/extract", ["consensus-2024", "ada-2009"],
    ...                        out=Path("demo-output/episodes"))        # doctest: +SKIP
    >>> result.episodes.group_by("definition").len()                     # doctest: +SKIP
    """
    started_at = utc_now()
    started = time.perf_counter()
    loaded = _load(definitions, overrides)
    target = check_output_folder(out) if out is not None else None
    groups: dict[tuple[Any, ...], list[Definition]] = {}
    for definition in loaded:
        groups.setdefault(_state_key(definition), []).append(definition)
    steps = _Steps(total=4 + len(groups) + len(loaded) + (1 if target else 0), show=progress)

    opened = not isinstance(source, Extract)
    try:
        with steps.step("open", "opening the extract"):
            extract = open_extract(source, threads=threads, memory_limit=memory_limit) if opened else source
            con = extract.con
            try:  # progress, when asked, is shown by rich
                con.execute("set enable_progress_bar = false")
            except duckdb.InvalidInputException:  # inside Jupyter without ipywidgets; it is off there
                pass
            if not opened:
                if threads is not None:
                    con.execute(f"set threads = {int(threads)}")
                if memory_limit is not None:
                    con.execute("set memory_limit = ?", [str(memory_limit)])
        try:
            with steps.step("lab_events", "harmonising lab results"):
                summary = prepare_lab_events(extract, codelists=codelists, as_of=as_of)
            with steps.step("person_diabetes", "diabetes records"):
                run_recipe(con, "30_person_diabetes.sql", "dka_person_diabetes", {})
            persons_total = extract.row_count("person")
            lab_persons, lab_rows = con.execute(LAB_COUNTS_SQL).fetchall()[0]

            frames: list[pl.DataFrame] = []
            attrition_rows: list[dict[str, Any]] = []
            state_rows: dict[str, int] = {}
            for key, members in groups.items():
                with steps.step("lab_state", "lab state over time"):
                    rows = build_lab_state(con, members)
                    state_persons = _count(con, "select count(distinct person_id) from dka_lab_state")
                for definition in members:
                    state_rows[definition.name] = rows
                    with steps.step(f"episodes:{definition.name}", f"episodes: {definition.name}"):
                        recipe_seconds: dict[str, float] = {}
                        frame, tail = episodes_in_session(con, definition, seconds=recipe_seconds)
                        for key, value in recipe_seconds.items():
                            steps.seconds[f"{definition.name}:{key}"] = value
                    frames.append(frame)
                    head = attrition_head(persons_total, (lab_persons, lab_rows), (state_persons, rows))
                    for number, row in enumerate(head + tail, start=1):
                        attrition_rows.append({"definition": definition.name, "step": number, **row})

            with steps.step("code_finder", "code-based finder"):
                codes = code_episodes_in_session(con)
            with steps.step("agreement", "agreement between finders"):
                episodes = pl.concat(frames, how="vertical") if frames else pl.DataFrame(schema=_EPISODE_SCHEMA)
                finders = {definition.name: episodes.filter(pl.col("definition") == definition.name)
                           for definition in loaded}
                finders[CODE_FINDER] = codes
                run_recipe(con, "51_hospital_stays.sql", "dka_hospital_stays", {})
                stay_rows = con.execute(
                    "select visit_occurrence_id, stay_visit_occurrence_id from dka_hospital_stays").fetchall()
                agreement = agreement_table(finders, [row[0] for row in stay_rows], stays=dict(stay_rows))
            # with an output folder the quarantine (2.5 million rows with their detail text at a
            # million persons) is read from the folder when first asked for, not fetched here
            # beside DuckDB's buffers
            quarantine = None if target is not None else con.sql(
                "select source_table, source_row_id, person_id, reason, detail from dka_quarantine "
                "order by source_table, source_row_id").pl()
            attrition = pl.DataFrame(attrition_rows, schema=_ATTRITION_SCHEMA)
            fingerprint = extract.fingerprint()
            parameters = {
                "definitions": [definition.name for definition in loaded],
                "overrides": dict(overrides or {}),
                "codelists": str(codelists) if codelists is not None else None,
                "threads": threads,
                "memory_limit": memory_limit,
                "out": str(target) if target else None,
                "as_of": summary.as_of.isoformat() if summary.as_of is not None else None,
            }
            counts = {
                "measurement_rows_read": summary.rows_read,
                "lab_events": summary.rows_used,
                "quarantined": summary.rows_quarantined,
                "other_analytes": summary.rows_other,
                "reconciles": summary.reconciles,
                "lab_state_rows": state_rows,
                "episodes": {name: int(frame.height) for name, frame in finders.items()},
            }
            if target is not None:
                # staged beside target under the lock <target>.lock, moved into place when complete
                with steps.step("write", "writing outputs"), output_folder(target, command="episodes") as staging:
                    episodes.write_parquet(staging / "episodes.parquet")
                    attrition.write_csv(staging / "attrition.csv")
                    con.execute(
                        "copy (select source_table, source_row_id, person_id, reason, detail from dka_quarantine "
                        "order by source_table, source_row_id) to ? (format parquet)",
                        [str(staging / "quarantine.parquet")],
                    )
                    summary.data_quality.write_csv(staging / "data_quality.csv")
                    agreement.write_csv(staging / "agreement.csv")
                    codes.write_parquet(staging / "code_episodes.parquet")
                    if opened:
                        # the session's buffers go back before write_manifest reads every table
                        # for its content hash (at a million persons, hashing the quarantine
                        # beside the open session was the run's peak memory)
                        extract.close()
                    manifest = build_manifest(
                        command="episodes", definitions=loaded, source=fingerprint, parameters=parameters,
                        started=started_at, finished=utc_now(), counts=counts,
                        seconds={**steps.seconds, "total": time.perf_counter() - started},
                    )
                    write_manifest(manifest, staging / "manifest.json")  # last: it marks the folder complete
            else:
                manifest = build_manifest(
                    command="episodes", definitions=loaded, source=fingerprint, parameters=parameters,
                    started=started_at, finished=utc_now(), counts=counts,
                    seconds={**steps.seconds, "total": time.perf_counter() - started},
                )
        finally:
            if opened:
                extract.close()
    finally:
        steps.close()
    return EpisodeResult(
        episodes=episodes,
        attrition=attrition,
        quarantine=quarantine,
        data_quality=summary.data_quality,
        agreement=agreement,
        manifest=manifest,
        code_episodes=codes,
        out=target,
    )
