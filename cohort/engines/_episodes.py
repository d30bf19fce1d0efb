"""``dka-cohort episodes --engine postgres|spark``: the episodes output folder from another engine.

:func:`find_episodes_on_engine` runs the recipes inside PostgreSQL (on CDM tables already in a
schema there) or through Spark (on a Parquet folder Spark reads, or on tables of its catalog),
fetches the tables the output contract is made of, and writes the same folder as
:func:`cohort.episodes.find_episodes`: ``episodes.parquet``, ``attrition.csv``,
``quarantine.parquet``, ``data_quality.csv``, ``agreement.csv``, ``code_episodes.parquet`` and
``manifest.json`` (with the engine recorded, written last), into a staging folder beside ``out``
renamed into place when every file is complete (:func:`cohort._outputs.output_folder`: the lock,
the staging folder and the rename every results folder of the project goes through).

The steps are DuckDB's (:func:`cohort.engines.run_recipes`' pieces): the lab recipes once, the
lab state once per group of definitions sharing look-backs and specimens (as ``find_episodes``
groups them), recipes 40 .. 46 with the episode loop per definition, then the code-based finder
and the hospital stays. Intermediate tables live in the engine session only (PostgreSQL
temporary tables of the connection, Spark views over Parquet in a staging folder) and are dropped
at the end; the CDM schema is only read. The agreement table and the manifest are made by the
project's own functions (:func:`cohort._agreement.agreement_table`,
:func:`cohort._manifest.build_manifest`).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import polars as pl

from cohort._errors import CohortError, InputError

__all__ = ["ENGINES", "find_episodes_on_engine", "episodes_command", "add_engine_arguments"]

#: Engines ``dka-cohort episodes --engine`` runs on.
ENGINES: tuple[str, ...] = ("duckdb", "postgres", "spark")


# --------------------------------------------------------------------------- sessions
def _open_session(engine: str, *, dsn: str | None, schema: str | None, spark: Any, spark_master: str | None,
                  source: str | Path | None, staging: str | Path | None) -> tuple[Any, Any]:
    """The engine session, and the Spark session to stop at the end (None when not ours)."""
    if engine == "postgres":
        from cohort.engines._postgres import PostgresSession

        if not dsn:
            msg = ("--engine postgres needs --dsn, a libpq connection string such as "
                   "'postgresql://user@host:5432/database' (the CDM tables in --schema, default cdm)")
            raise InputError(msg)
        if source is not None:
            msg = ("--engine postgres reads the CDM tables in the database (--dsn, --schema); --source "
                   "is for --engine duckdb or spark. Load an extract with cohort.engines.load_extract_postgres")
            raise InputError(msg)
        return PostgresSession(dsn, schema=schema or "cdm"), None
    from cohort.engines._spark import SparkSession, connect_spark

    if (source is None) == (schema is None):
        msg = ("--engine spark needs the CDM tables from one place: --source, a folder of Parquet "
               "tables Spark can read, or --schema, a database of the Spark catalog holding them")
        raise InputError(msg)
    ours = None
    if spark is None:
        spark = ours = connect_spark(spark_master)
    try:
        session = SparkSession(spark, None if source is None else str(source), database=schema,
                               reader="spark", staging=staging)
    except BaseException:
        if ours is not None:
            ours.stop()
        raise
    return session, ours


def _query(session: Any, sql: str, what: str) -> list[tuple[Any, ...]]:
    from cohort.engines._dialect import transpile

    return session.query(transpile(sql, session.dialect, recipe=what, pretty=False), what)


def _scalar(session: Any, sql: str, what: str) -> int:
    return int(_query(session, sql, what)[0][0] or 0)


def _pair(session: Any, sql: str, what: str) -> tuple[int, int]:
    row = _query(session, sql, what)[0]
    return int(row[0] or 0), int(row[1] or 0)


def _engine_fingerprint(session: Any, engine: str, *, dsn: str | None, schema: str | None,
                        source: str | Path | None) -> tuple[dict[str, Any], dict[str, Any]]:
    """The source description for the manifest (tables and rows as the engine sees them), and the engine's."""
    from cohort._cdm import CDM_TABLES

    tables = {table: {"rows": _scalar(session, f"select count(*) from {table}", f"rows of {table}")}
              for table in CDM_TABLES}
    if engine == "postgres":
        from cohort.engines._postgres import _safe_dsn

        body: dict[str, Any] = {"engine": "postgres", "dsn": _safe_dsn(dsn or ""), "schema": schema,
                                "tables": tables}
        described = {"name": "postgres", "version": session.server_version}
    else:
        body = {"engine": "spark", "path": None if source is None else str(source),
                "database": None if source is not None else schema, "tables": tables}
        described = {"name": "spark", "version": str(session.spark.version)}
        try:
            described["master"] = str(session.spark.sparkContext.master)
        except Exception:  # noqa: BLE001 - Spark Connect has no SparkContext
            described["master"] = None
    digest = hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()
    return {**body, "digest": digest}, described


# --------------------------------------------------------------------------- tables to the contract
def _data_quality(session: Any) -> pl.DataFrame:
    from cohort._labs import data_quality_frame

    return data_quality_frame(_query(
        session, "select source_table, reason, count(*) as rows from dka_quarantine "
        "group by source_table, reason", "data quality counts"))


def _code_episodes(frame: pl.DataFrame) -> pl.DataFrame:
    from cohort.episodes import _CODE_SCHEMA, CODE_FINDER, _conform, with_episode_ids

    return _conform(with_episode_ids(frame.sort(["person_id", "onset_datetime"]), CODE_FINDER), _CODE_SCHEMA)


def _quarantine(session: Any) -> pl.DataFrame:
    frame = session.fetch("dka_quarantine", order_by="source_table, source_row_id")
    schema = {"source_table": pl.String, "source_row_id": pl.Int64, "person_id": pl.Int64,
              "reason": pl.String, "detail": pl.String}
    return frame.select([pl.col(name).cast(dtype) for name, dtype in schema.items()])


# --------------------------------------------------------------------------- entry point
def find_episodes_on_engine(
    engine: str,
    definitions: Sequence[Any] = ("consensus-2024",),
    *,
    out: str | Path | None = None,
    dsn: str | None = None,
    schema: str | None = None,
    spark: Any = None,
    spark_master: str | None = None,
    source: str | Path | None = None,
    staging: str | Path | None = None,
    codelists: str | Path | None = None,
    overrides: Mapping[str, object] | None = None,
    threads: int | None = None,
    memory_limit: str | None = None,
    quiet: bool = True,
) -> Any:
    """Find DKA episodes with the recipes running on DuckDB, PostgreSQL or Spark.

    Parameters
    ----------
    engine
        ``"duckdb"`` (:func:`cohort.episodes.find_episodes` on ``source``), ``"postgres"`` or
        ``"spark"``.
    definitions
        Bundled names, definition files or loaded definitions (as ``find_episodes``).
    out
        The output folder (new, empty or an earlier run's); None writes nothing.
    dsn
        PostgreSQL: a libpq connection string (``postgresql://user@host:5432/db``).
    schema
        PostgreSQL: the schema holding the CDM tables (default ``cdm``). Spark: a database of the
        session's catalog holding them (instead of ``source``).
    spark
        Spark: a session to use (else one is started by :func:`cohort.engines.connect_spark` on
        ``spark_master`` and stopped at the end).
    spark_master
        Spark: a master URL (``local[2]``, ``spark://host:7077``) or ``sc://host:15002``.
    source
        DuckDB: the extract. Spark: a folder of CDM Parquet tables (``<table>.parquet`` or
        ``<table>/``) Spark reads itself.
    staging
        Spark: the folder for the recipes' tables (default a temporary folder, removed at the end).
    codelists, overrides
        As ``find_episodes``.
    threads, memory_limit
        DuckDB only.
    quiet
        Show no progress.

    Returns
    -------
    cohort.episodes.EpisodeResult
        The same tables as ``find_episodes`` returns; ``manifest["engine"]`` names the engine and
        its version, ``manifest["parameters"]["engine"]`` the engine asked for.

    Raises
    ------
    InputError
        A missing option (``--dsn``), a schema or folder lacking a CDM table or column, or an
        output folder that cannot be written.
    CohortError
        psycopg or pyspark/Java missing, the server or master unreachable, or a recipe refused by
        the engine (the recipe named).

    Examples
    --------
    >>> result = find_episodes_on_engine("postgres", ["consensus-2024"], out="episodes-pg",
    ...                                  dsn="postgresql://postgres@127.0.0.1:5432/postgres")  # doctest: +SKIP
    >>> result.manifest["engine"]["name"]                                                       # doctest: +SKIP
    'postgres'
    """
    if engine not in ENGINES:
        msg = f"unknown engine {engine!r}; expected one of {', '.join(ENGINES)}"
        raise InputError(msg)
    if engine == "duckdb":
        from cohort.episodes import find_episodes

        if source is None:
            msg = "--engine duckdb needs --source, the extract (a Parquet folder, a CSV folder or a DuckDB file)"
            raise InputError(msg)
        return find_episodes(Path(source), definitions, out=None if out is None else Path(out),
                             overrides=overrides, codelists=None if codelists is None else Path(codelists),
                             threads=threads, memory_limit=memory_limit, progress=not quiet)
    if threads is not None or memory_limit is not None:
        msg = f"--threads and --memory-limit are DuckDB settings; --engine {engine} does not take them"
        raise InputError(msg)
    return _run_on_engine(engine, definitions, out=out, dsn=dsn, schema=schema, spark=spark,
                          spark_master=spark_master, source=source, staging=staging, codelists=codelists,
                          overrides=overrides, quiet=quiet)


def _run_on_engine(engine: str, definitions: Sequence[Any], *, out: str | Path | None, dsn: str | None,
                   schema: str | None, spark: Any, spark_master: str | None, source: str | Path | None,
                   staging: str | Path | None, codelists: str | Path | None,
                   overrides: Mapping[str, object] | None, quiet: bool) -> Any:
    from cohort._agreement import agreement_table
    from cohort._codelists import read_codelists
    from cohort._labs import LAB_COUNTS_SQL, default_as_of
    from cohort._manifest import build_manifest, utc_now, write_manifest
    from cohort.engines._dialect import recipe_values
    from cohort.engines._run import (
        episodes_from_tables,
        run_definition_steps,
        run_finder_steps,
        run_lab_steps,
        run_state_step,
    )
    from cohort._outputs import check_output_folder, output_folder
    from cohort.episodes import (
        _ATTRITION_SCHEMA,
        _EPISODE_SCHEMA,
        CODE_FINDER,
        EpisodeResult,
        _load,
        _state_key,
        _Steps,
        attrition_head,
        attrition_tail,
    )

    started_at = utc_now()
    started = time.perf_counter()
    loaded = _load(definitions, overrides)
    target = check_output_folder(Path(out).expanduser().absolute()) if out is not None else None
    lists = read_codelists(None if codelists is None else Path(codelists))
    groups: dict[tuple[Any, ...], list[Any]] = {}
    for definition in loaded:
        groups.setdefault(_state_key(definition), []).append(definition)
    steps = _Steps(total=5 + len(groups) + len(loaded) + (1 if target else 0), show=not quiet)
    session = ours = None
    try:
        with steps.step("connect", f"connecting to {engine}"):
            session, ours = _open_session(engine, dsn=dsn, schema=schema, spark=spark,
                                          spark_master=spark_master, source=source, staging=staging)
        with steps.step("lab_events", f"harmonising lab results ({engine})"):
            session.register_codelists(lists)
            as_of = default_as_of()
            run_lab_steps(session, as_of=as_of)
            rows_read = _scalar(session, "select count(*) from measurement", "measurement rows")
            lab_persons, rows_used = _pair(session, LAB_COUNTS_SQL, "lab events")
            rows_quarantined = _scalar(
                session, "select count(*) from dka_quarantine where source_table = 'measurement'", "quarantine")
            rows_other = _scalar(
                session, "select count(*) from measurement left join (select distinct concept_id from "
                "dka_concept_lab) as lab_concepts on lab_concepts.concept_id = "
                "measurement.measurement_concept_id where lab_concepts.concept_id is null", "other analytes")
            if rows_read != rows_used + rows_quarantined + rows_other:
                msg = (f"measurement rows do not reconcile on {engine}: read {rows_read}, but used {rows_used} "
                       f"+ quarantined {rows_quarantined} + other analytes {rows_other}; check "
                       "dka_concept_lab and dka_concept_unit for repeated concept_ids")
                raise CohortError(msg)
            persons_total = _scalar(session, "select count(*) from person", "persons")
        frames: list[pl.DataFrame] = []
        attrition_rows: list[dict[str, Any]] = []
        state_rows: dict[str, int] = {}
        for members in groups.values():
            values = recipe_values(members)
            with steps.step("lab_state", "lab state over time"):
                run_state_step(session, values["state"])
                state_persons, rows = _pair(
                    session, "select count(distinct person_id), count(*) from dka_lab_state", "lab state")
            for definition in members:
                name = definition.name
                state_rows[name] = rows
                with steps.step(f"episodes:{name}", f"episodes: {name}"):
                    run_definition_steps(session, {**values["state"], **values[name]})
                    frame = episodes_from_tables(session.fetch("dka_episodes"), definition)
                    candidates = _pair(session, "select count(distinct person_id), count(*) from "
                                       "dka_onset_candidates", "onset candidates")
                    chain = _pair(session, "select count(distinct person_id), count(*) from "
                                  "dka_episode_chain", "episode chain")
                frames.append(frame)
                head = attrition_head(persons_total, (lab_persons, rows_used), (state_persons, rows))
                tail = attrition_tail(definition, candidates, chain, frame)
                for number, row in enumerate(head + tail, start=1):
                    attrition_rows.append({"definition": name, "step": number, **row})
        with steps.step("code_finder", "code-based finder"):
            run_finder_steps(session)
            codes = _code_episodes(session.fetch("dka_code_episodes"))
        with steps.step("agreement", "agreement between finders"):
            episodes = pl.concat(frames, how="vertical") if frames else pl.DataFrame(schema=_EPISODE_SCHEMA)
            finders = {definition.name: episodes.filter(pl.col("definition") == definition.name)
                       for definition in loaded}
            finders[CODE_FINDER] = codes
            stays = session.fetch("dka_hospital_stays")
            stay_rows = list(zip(stays.get_column("visit_occurrence_id").to_list(),
                                 stays.get_column("stay_visit_occurrence_id").to_list(), strict=True))
            agreement = agreement_table(finders, [row[0] for row in stay_rows], stays=dict(stay_rows))
        with steps.step("fetch", "quarantine and data quality"):
            quarantine = _quarantine(session)
            data_quality = _data_quality(session)
            fingerprint, described = _engine_fingerprint(session, engine, dsn=dsn, schema=schema, source=source)
        attrition = pl.DataFrame(attrition_rows, schema=_ATTRITION_SCHEMA)
        parameters = {
            "definitions": [definition.name for definition in loaded],
            "overrides": dict(overrides or {}),
            "codelists": str(codelists) if codelists is not None else None,
            "engine": engine,
            "schema": schema if engine == "postgres" or source is None else None,
            "spark_master": spark_master if engine == "spark" else None,
            "out": str(target) if target else None,
            "as_of": as_of.isoformat(),
        }
        counts = {
            "measurement_rows_read": rows_read,
            "lab_events": rows_used,
            "quarantined": rows_quarantined,
            "other_analytes": rows_other,
            "reconciles": True,
            "lab_state_rows": state_rows,
            "episodes": {name: int(frame.height) for name, frame in finders.items()},
        }

        def manifest_now() -> dict[str, Any]:
            made = build_manifest(
                command="episodes", definitions=loaded, source=fingerprint, parameters=parameters,
                started=started_at, finished=utc_now(), counts=counts,
                seconds={**steps.seconds, "total": time.perf_counter() - started},
            )
            made["engine"] = described
            return made

        if target is not None:
            with steps.step("write", "writing outputs"), output_folder(target, command="episodes") as folder:
                episodes.write_parquet(folder / "episodes.parquet")
                attrition.write_csv(folder / "attrition.csv")
                quarantine.write_parquet(folder / "quarantine.parquet")
                data_quality.write_csv(folder / "data_quality.csv")
                agreement.write_csv(folder / "agreement.csv")
                codes.write_parquet(folder / "code_episodes.parquet")
                manifest = manifest_now()
                write_manifest(manifest, folder / "manifest.json")  # last: it marks the folder complete
        else:
            manifest = manifest_now()
    finally:
        try:
            if session is not None:
                session.close()
        finally:
            if ours is not None:
                ours.stop()
            steps.close()
    return EpisodeResult(episodes=episodes, attrition=attrition, quarantine=quarantine,
                         data_quality=data_quality, agreement=agreement, manifest=manifest,
                         code_episodes=codes, out=target)


# --------------------------------------------------------------------------- command line
def add_engine_arguments(parser: argparse.ArgumentParser) -> None:
    """Add ``--engine``, ``--dsn``, ``--schema``, ``--spark-master`` to the ``episodes`` parser.

    ``--source`` stays the extract for DuckDB and becomes the Parquet folder for Spark; it must no
    longer be required by the parser (:func:`episodes_command` says when it is missing).
    """
    parser.add_argument("--engine", choices=ENGINES, default="duckdb",
                        help="where the recipes run (default duckdb; postgres and spark write the same folder)")
    parser.add_argument("--dsn", help="postgres: a libpq connection string, e.g. postgresql://user@host:5432/db")
    parser.add_argument("--schema", default=None,
                        help="postgres: the schema holding the CDM tables (default cdm); spark: a catalog "
                             "database holding them, instead of --source")
    parser.add_argument("--spark-master", default=None,
                        help="spark: master URL (default local[2]; spark://host:7077, or sc://host:15002)")


def episodes_command(args: argparse.Namespace) -> int:
    """What ``dka-cohort episodes`` does with ``--engine``; returns the exit code.

    Reads ``args.engine`` (default duckdb), ``dsn``, ``schema``, ``spark_master``, ``source``,
    ``definition``, ``out``, ``set``, ``codelists``, ``threads``, ``memory_limit`` and ``quiet``;
    prints the episodes per definition and where they were written.
    """
    from cohort.definitions import parse_override

    engine = getattr(args, "engine", None) or "duckdb"
    schema = getattr(args, "schema", None)
    if engine == "postgres" and schema is None:
        schema = "cdm"
    result = find_episodes_on_engine(
        engine,
        getattr(args, "definition", None) or ["consensus-2024"],
        out=Path(args.out),
        dsn=getattr(args, "dsn", None),
        schema=schema,
        spark_master=getattr(args, "spark_master", None),
        source=getattr(args, "source", None),
        codelists=getattr(args, "codelists", None),
        overrides=dict(parse_override(pair) for pair in (getattr(args, "set", None) or [])),
        threads=getattr(args, "threads", None),
        memory_limit=getattr(args, "memory_limit", None),
        quiet=bool(getattr(args, "quiet", False)),
    )
    counts = result.episodes.group_by("definition").len().sort("definition")
    for definition, episodes in counts.iter_rows():
        print(f"{definition}: {episodes:,} episodes")
    where = f" ({engine})" if engine != "duckdb" else ""
    print(f"episodes written to {Path(args.out).resolve()}{where}")
    sys.stdout.flush()
    return 0
