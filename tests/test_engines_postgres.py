"""The recipes inside PostgreSQL give DuckDB's tables, row for row (issue 8).

A throwaway server is started on 127.0.0.1 by ``.ci/postgres.sh`` (skipped, with the reason, when
none can be started), a 2,000-person synthetic extract is loaded into schema ``cdm``, and every
``dka_*`` table of recipes 10 .. 51 is compared with the project's own DuckDB run on the same
extract: same rows, times to the second, floats to 1e-9. The server is stopped at the end.

Engine behaviour referenced: PostgreSQL 15 documentation, "Window Functions" (RESPECT/IGNORE
NULLS "is not implemented in PostgreSQL") and "ORDER BY" (NULLS FIRST is the default for DESC)
[from memory]; DuckDB documentation, "ORDER BY Clause" (NULLS LAST by default) [from memory].
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import polars as pl
import pytest
import sqlglot

ROOT = Path(__file__).resolve().parents[1]
DEFINITION = "consensus-2024"

psycopg = pytest.importorskip("psycopg", reason="psycopg 3 is not installed (pip install 'psycopg[binary]')")


@pytest.fixture(scope="module")
def dsn(tmp_path_factory):
    if os.environ.get("DKA_POSTGRES_DSN"):
        yield os.environ["DKA_POSTGRES_DSN"]
        return
    folder = tmp_path_factory.mktemp("pg") / "cluster"
    env = {**os.environ, "DKA_PG_DIR": str(folder)}
    try:
        done = subprocess.run([str(ROOT / ".ci" / "postgres.sh")], env=env, capture_output=True,
                              text=True, timeout=300, check=False)
    except (OSError, subprocess.TimeoutExpired) as error:
        pytest.skip(f"no PostgreSQL server could be started by .ci/postgres.sh: {error}")
    if done.returncode != 0 or not done.stdout.strip():
        pytest.skip("no PostgreSQL server could be started by .ci/postgres.sh "
                    f"(exit {done.returncode}): {done.stderr.strip()[-400:]}")
    try:
        yield done.stdout.strip().splitlines()[-1]
    finally:
        subprocess.run([str(ROOT / ".ci" / "postgres.sh"), "stop"], env=env, capture_output=True,
                       timeout=120, check=False)
        shutil.rmtree(folder, ignore_errors=True)


@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> Path:
    from synthetic import generate_extract

    out = tmp_path_factory.mktemp("pg_synth")
    return generate_extract(persons=2000, seed=1, out=out / "synth", progress=False).extract_dir


@pytest.fixture(scope="module")
def loaded(dsn, extract):
    from cohort.engines import load_extract_postgres

    return load_extract_postgres(extract, dsn, schema="cdm")


@pytest.fixture(scope="module")
def runs(dsn, extract, loaded):
    from cohort.engines import PostgresSession, duckdb_reference, run_recipes
    from cohort.source import open_extract

    with PostgresSession(dsn, schema="cdm") as session:
        made = run_recipes(session, DEFINITION)
        postgres = {table: session.fetch(table) for table in made}
    with open_extract(extract, threads=2) as opened:
        reference = duckdb_reference(opened, DEFINITION)
    return reference, postgres


def test_loader_copies_every_cdm_row(loaded, extract) -> None:
    from cohort.source import open_extract

    with open_extract(extract) as opened:
        for table in ("person", "measurement", "visit_occurrence", "drug_exposure", "death"):
            assert loaded[table] == opened.row_count(table), table
    assert loaded["person"] == 2000


def test_every_recipe_table_is_identical_issue_8(runs) -> None:
    from cohort.engines import compare_runs

    reference, postgres = runs
    assert set(postgres) == set(reference)
    faults = compare_runs(reference, postgres, tolerance=1e-9)
    assert faults == {}, "\n".join(line for lines in faults.values() for line in lines)
    # not a comparison of empty tables: the extract yields lab events, states and episodes
    assert reference["dka_lab_events"].height > 10_000
    assert reference["dka_quarantine"].height > 0
    assert reference["dka_episodes"].height > 20


def test_episodes_parquet_rows_are_identical_issue_8(runs, extract) -> None:
    from cohort.engines import episodes_from_tables
    from cohort.episodes import find_episodes

    _, postgres = runs
    expected = find_episodes(extract, [DEFINITION], threads=2).episodes
    found = episodes_from_tables(postgres["dka_episodes"], DEFINITION)
    assert found.columns == expected.columns
    assert found.schema == expected.schema
    assert found.equals(expected.sort(["person_id", "onset_datetime"]))


def test_ignore_nulls_would_silently_differ_on_postgres_issue_8(dsn) -> None:
    # why the dialect layer refuses IGNORE NULLS: plain sqlglot drops it and PostgreSQL answers
    # differently from DuckDB without any error
    import duckdb

    from cohort._errors import CohortError
    from cohort.engines import connect_postgres, transpile

    sql = ("select t, first_value(v ignore nulls) over (order by t desc rows between unbounded "
           "preceding and unbounded following) as carried from (values (1, 5.0), (2, null)) as rows(t, v)")
    expected = sorted(duckdb.sql(sql).fetchall())
    plain = sqlglot.transpile(sql, read="duckdb", write="postgres")[0]
    with connect_postgres(dsn) as con:
        silently = sorted(tuple(float(x) if x is not None and not isinstance(x, int) else x for x in row)
                          for row in con.execute(plain).fetchall())
    assert expected == [(1, 5.0), (2, 5.0)]
    assert silently == [(1, None), (2, None)]
    with pytest.raises(CohortError, match="IGNORE NULLS"):
        transpile(sql, "postgres")


def test_float_text_and_null_order_match_duckdb_on_postgres(dsn) -> None:
    import duckdb

    from cohort.engines import connect_postgres, transpile

    sql = ("select cast(v as varchar) as text_v, cast(n as varchar) as text_n, "
           "row_number() over (order by v desc) as rank_v "
           "from (values (8.0, 3), (73.4, 4), (null, 5)) as rows(v, n)")
    expected = sorted(duckdb.sql(sql).fetchall(), key=lambda row: row[2])
    with connect_postgres(dsn) as con:
        found = sorted(con.execute(transpile(sql, "postgres")).fetchall(), key=lambda row: row[2])
    assert expected == [("73.4", "4", 1), ("8.0", "3", 2), (None, "5", 3)]
    assert found == expected


def test_missing_schema_is_a_clear_error(dsn) -> None:
    from cohort._errors import InputError
    from cohort.engines import PostgresSession

    with pytest.raises(InputError, match="schema nowhere holds no tables"):
        PostgresSession(dsn, schema="nowhere")


def test_session_fetch_types(runs) -> None:
    _, postgres = runs
    episodes = postgres["dka_episodes"]
    assert episodes.schema["person_id"] == pl.Int64
    assert isinstance(episodes.schema["onset_datetime"], pl.Datetime)


# --------------------------------------------------------------------------- dka-cohort episodes --engine postgres
# two definitions with different populations (adults; under 18: ISPAD 2022) so the lab state is
# shared and the attrition and agreement tables have several finders
COMMAND_DEFINITIONS = ["consensus-2024", "ispad-2022"]
CONTRACT_TABLES = ("episodes.parquet", "quarantine.parquet", "code_episodes.parquet")
CONTRACT_CSVS = ("attrition.csv", "data_quality.csv", "agreement.csv")


@pytest.fixture(scope="module")
def command_runs(dsn, extract, loaded, tmp_path_factory):
    import argparse
    import time

    from cohort.engines import episodes_command
    from cohort.episodes import find_episodes

    folder = tmp_path_factory.mktemp("pg_command")
    args = argparse.Namespace(engine="postgres", dsn=dsn, schema="cdm", spark_master=None, source=None,
                              definition=COMMAND_DEFINITIONS, out=str(folder / "postgres"), set=[],
                              codelists=None, threads=None, memory_limit=None, quiet=True)
    started = time.perf_counter()
    assert episodes_command(args) == 0
    seconds = time.perf_counter() - started
    find_episodes(extract, COMMAND_DEFINITIONS, out=folder / "duckdb", threads=2)
    return folder / "postgres", folder / "duckdb", seconds


def test_episodes_command_on_postgres_writes_the_duckdb_folder_issue_8(command_runs) -> None:
    postgres, duckdb_out, _ = command_runs
    assert sorted(path.name for path in postgres.iterdir()) == sorted(path.name for path in duckdb_out.iterdir())
    for name in CONTRACT_TABLES:
        found, expected = pl.read_parquet(postgres / name), pl.read_parquet(duckdb_out / name)
        assert found.schema == expected.schema, name
        assert found.equals(expected), name
    for name in CONTRACT_CSVS:
        assert (postgres / name).read_text() == (duckdb_out / name).read_text(), name
    episodes = pl.read_parquet(postgres / "episodes.parquet")
    # not a comparison of empty tables: both definitions find episodes in the extract
    assert set(episodes.get_column("definition")) == set(COMMAND_DEFINITIONS)
    assert episodes.height > 20
    assert episodes.get_column("onset_datetime").dt.microsecond().max() == 0  # times to the second


def test_episodes_command_records_the_engine_in_the_manifest(command_runs, dsn) -> None:
    import json

    postgres, duckdb_out, _ = command_runs
    manifest = json.loads((postgres / "manifest.json").read_text())
    assert manifest["engine"]["name"] == "postgres"
    assert manifest["engine"]["version"].startswith("15")  # the server .ci/postgres.sh starts
    assert manifest["parameters"]["engine"] == "postgres"
    assert manifest["source"]["schema"] == "cdm"
    reference = json.loads((duckdb_out / "manifest.json").read_text())
    assert manifest["counts"] == {**reference["counts"], "reconciles": True}
    for table in ("person", "measurement"):
        assert manifest["source"]["tables"][table]["rows"] == reference["source"]["tables"][table]["rows"]


def test_episodes_on_postgres_leaves_the_cdm_schema_as_it_was(command_runs, dsn) -> None:
    from cohort._cdm import CDM_TABLES
    from cohort.engines import connect_postgres

    with connect_postgres(dsn) as con:
        tables = {row[0] for row in con.execute(
            "select table_name from information_schema.tables where table_schema = 'cdm'").fetchall()}
        schemas = {row[0] for row in con.execute("select schema_name from information_schema.schemata")}
    assert tables == set(CDM_TABLES)
    assert not any(name.startswith("dka") for name in schemas)


def test_engine_errors_are_one_clear_message_each(dsn, tmp_path, monkeypatch) -> None:
    import socket
    import sys

    from cohort._errors import CohortError, InputError
    from cohort.engines import connect_postgres, find_episodes_on_engine

    with pytest.raises(InputError, match="--engine postgres needs --dsn"):
        find_episodes_on_engine("postgres", ["ada-2009"], out=tmp_path / "a")
    with pytest.raises(InputError, match="unknown engine 'oracle'"):
        find_episodes_on_engine("oracle", ["ada-2009"])
    # a port nothing listens on
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()
    with pytest.raises(CohortError, match=r"cannot connect to PostgreSQL at .*\.ci/postgres\.sh"):
        find_episodes_on_engine("postgres", ["ada-2009"], dsn=f"postgresql://postgres@127.0.0.1:{port}/postgres",
                                out=tmp_path / "b")
    # a schema holding some CDM tables but not all
    with connect_postgres(dsn) as con:
        con.execute("drop schema if exists partial cascade")
        con.execute("create schema partial")
        con.execute("create table partial.person (person_id bigint, year_of_birth integer)")
    try:
        with pytest.raises(InputError, match=r"schema partial .* lacks the CDM table\(s\) observation_period, "
                                             r"visit_occurrence"):
            find_episodes_on_engine("postgres", ["ada-2009"], dsn=dsn, schema="partial", out=tmp_path / "c")
    finally:
        with connect_postgres(dsn) as con:
            con.execute("drop schema partial cascade")
    # psycopg missing
    monkeypatch.setitem(sys.modules, "psycopg", None)
    with pytest.raises(CohortError, match=r"needs psycopg 3: pip install 'psycopg\[binary\]'"):
        find_episodes_on_engine("postgres", ["ada-2009"], dsn=dsn, out=tmp_path / "d")
    assert not any(tmp_path.iterdir())  # nothing written by a run that failed


def test_fetch_streams_every_type_back(dsn, loaded) -> None:
    from datetime import date, datetime

    from cohort.engines import PostgresSession

    with PostgresSession(dsn, schema="cdm") as session:
        session.materialise("dka_types", "select cast(1 as bigint) as id, 2.5::float8 as value, "
                            "0.1::float8 + 0.2::float8 as inexact, 'a,\"b\"' as text_value, '' as empty_text, "
                            "cast(null as text) as no_text, true as flag, cast(null as boolean) as no_flag, "
                            "timestamp '2024-03-01 10:00:00.5' as at, date '2024-03-01' as day")
        frame = session.fetch("dka_types")
    assert frame.rows() == [(1, 2.5, 0.1 + 0.2, 'a,"b"', "", None, True, None,
                             datetime(2024, 3, 1, 10, 0, 0, 500000), date(2024, 3, 1))]
    assert frame.schema["id"] == pl.Int64 and frame.schema["at"] == pl.Datetime("us")
