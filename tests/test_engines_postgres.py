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
