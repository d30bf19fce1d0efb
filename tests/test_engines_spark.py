"""The recipes through Spark give DuckDB's tables, row for row (issue 8).

A local Spark session (local[2], driver host and bind address 127.0.0.1, session time zone UTC,
adaptive query execution on) runs recipes 10 .. 51 on a small synthetic extract (200 persons: the
machine's 2 cores are shared, and Spark's cost here is per statement, not per row); every
``dka_*`` table is compared with the project's own DuckDB run: same rows, times to the second,
floats to 1e-9. Skipped, with the reason, when Java or pyspark is missing (``.ci/spark.sh``
installs both). The session is stopped at the end.

Engine behaviour referenced: Spark SQL reference, "EXTRACT" (fields YEAR .. SECOND, no EPOCH) and
"Datetime patterns / TIMESTAMP_NTZ" (``spark.sql.timestampType``) [from memory].
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

DEFINITION = "jbds-2023"

# about two minutes on 2 shared cores (Spark's cost is per statement): slow by the project's rule
pytestmark = pytest.mark.slow

pytest.importorskip("pyspark", reason="pyspark is not installed (pip install 'dka-cohort[spark]')")
if shutil.which("java") is None:
    pytest.skip("no java on PATH (.ci/spark.sh installs openjdk-17-jre-headless)", allow_module_level=True)


@pytest.fixture(scope="module")
def spark():
    from cohort._errors import CohortError
    from cohort.engines import local_spark

    try:
        session = local_spark(cores=2, memory="1g", app="dka-cohort-tests")
    except CohortError as error:
        pytest.skip(str(error))
    try:
        yield session
    finally:
        session.stop()


@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> Path:
    from synthetic import generate_extract

    out = tmp_path_factory.mktemp("spark_synth")
    return generate_extract(persons=200, seed=3, out=out / "synth", progress=False).extract_dir


@pytest.fixture(scope="module")
def runs(spark, extract):
    from cohort.engines import SparkSession, duckdb_reference, run_recipes
    from cohort.source import open_extract

    with SparkSession(spark, extract) as session:
        made = run_recipes(session, DEFINITION)
        found = {table: session.fetch(table) for table in made}
    with open_extract(extract, threads=2) as opened:
        reference = duckdb_reference(opened, DEFINITION)
    return reference, found


def test_session_settings(spark) -> None:
    conf = spark.conf
    assert conf.get("spark.sql.session.timeZone") == "UTC"
    assert conf.get("spark.sql.adaptive.enabled") == "true"
    assert conf.get("spark.driver.host") == "127.0.0.1"
    assert conf.get("spark.driver.bindAddress") == "127.0.0.1"


def test_every_recipe_table_is_identical_issue_8(runs) -> None:
    from cohort.engines import compare_runs

    reference, found = runs
    assert set(found) == set(reference)
    faults = compare_runs(reference, found, tolerance=1e-9)
    assert faults == {}, "\n".join(line for lines in faults.values() for line in lines)
    assert reference["dka_lab_events"].height > 1_000
    assert reference["dka_episodes"].height > 0


def test_episodes_parquet_rows_are_identical_issue_8(runs, extract) -> None:
    from cohort.engines import episodes_from_tables
    from cohort.episodes import find_episodes

    _, found = runs
    expected = find_episodes(extract, [DEFINITION], threads=2).episodes
    rows = episodes_from_tables(found["dka_episodes"], DEFINITION)
    assert rows.schema == expected.schema
    assert rows.equals(expected.sort(["person_id", "onset_datetime"]))


def test_hours_between_times_on_spark(spark) -> None:
    # extract(epoch ...) rewritten for Spark: 90 minutes is 1.5 hours, to the microsecond
    from cohort.engines import transpile

    sql = ("select (extract(epoch from cast('2024-03-01 11:30:00' as timestamp)) - "
           "extract(epoch from cast('2024-03-01 10:00:00' as timestamp))) / 3600.0 as hours")
    assert spark.sql(transpile(sql, "spark")).collect()[0][0] == pytest.approx(1.5, abs=1e-12)


# --------------------------------------------------------------------------- dka-cohort episodes --engine spark
def test_episodes_on_spark_write_the_duckdb_folder_issue_8(spark, extract, tmp_path) -> None:
    # Spark reads the Parquet folder itself (as a remote session would), not DuckDB's staging
    import json

    import polars as pl

    from cohort.engines import find_episodes_on_engine
    from cohort.episodes import find_episodes

    result = find_episodes_on_engine("spark", [DEFINITION], source=extract, spark=spark, out=tmp_path / "spark")
    find_episodes(extract, [DEFINITION], out=tmp_path / "duckdb", threads=2)
    found, expected = tmp_path / "spark", tmp_path / "duckdb"
    assert sorted(path.name for path in found.iterdir()) == sorted(path.name for path in expected.iterdir())
    for name in ("episodes.parquet", "quarantine.parquet", "code_episodes.parquet"):
        a, b = pl.read_parquet(found / name), pl.read_parquet(expected / name)
        assert a.schema == b.schema and a.equals(b), name
    for name in ("attrition.csv", "data_quality.csv", "agreement.csv"):
        assert (found / name).read_text() == (expected / name).read_text(), name
    manifest = json.loads((found / "manifest.json").read_text())
    assert manifest["engine"]["name"] == "spark" and manifest["parameters"]["engine"] == "spark"
    assert result.episodes.height > 0 and result.quarantine.height > 0
    # the session given is left running; the views made for the run are gone
    assert spark.sql("select 1").collect()[0][0] == 1
    assert "dka_episodes" not in {table.name for table in spark.catalog.listTables()}


def test_spark_sources_missing_tables_are_clear_errors(spark, tmp_path) -> None:
    from cohort._errors import InputError
    from cohort.engines import SparkSession

    with pytest.raises(InputError, match="the Spark catalog has no database 'nowhere'"):
        SparkSession(spark, database="nowhere")
    (tmp_path / "cdm").mkdir()
    with pytest.raises(InputError, match=r"lacks the CDM table\(s\) person, observation_period"):
        SparkSession(spark, str(tmp_path / "cdm"), reader="spark")
    with pytest.raises(InputError, match="exactly one place"):
        SparkSession(spark)


def test_spark_without_java_is_one_clear_error(tmp_path) -> None:
    # a fresh interpreter with no java on PATH and no JAVA_HOME: the JVM cannot start
    import os
    import subprocess
    import sys

    env = {key: value for key, value in os.environ.items() if key not in ("JAVA_HOME", "SPARK_HOME")}
    env["PATH"] = str(Path(sys.executable).parent) + os.pathsep + "/nonexistent"
    code = ("from cohort.engines import local_spark\n"
            "from cohort._errors import CohortError\n"
            "try:\n    local_spark()\nexcept CohortError as error:\n    print(error)\n")
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120,
                          cwd=Path(__file__).resolve().parents[1], check=False)
    lines = [line for line in done.stdout.splitlines() if line.strip()]
    assert len(lines) == 1, done.stdout + done.stderr
    assert lines[0].startswith("could not start a local Spark session: ")
    assert "Install Java 17" in lines[0]


def test_catalog_database_gives_the_same_cdm_views_as_the_parquet_folder(spark, extract, tmp_path) -> None:
    # --schema: CDM tables already in a database of the session's catalog (here a throwaway one
    # with its own location, so nothing is written to the default warehouse)
    from cohort._cdm import REQUIRED_TABLES
    from cohort.engines import SparkSession

    database = "dka_test_cdm"
    spark.sql(f"drop database if exists {database} cascade")
    spark.sql(f"create database {database} location '{tmp_path / 'warehouse'}'")
    try:
        for table in REQUIRED_TABLES:
            spark.read.parquet(str(Path(extract) / f"{table}.parquet")).write.saveAsTable(f"{database}.{table}")
        with SparkSession(spark, str(extract), reader="spark") as from_folder:
            folder_views = {table: (spark.table(table).schema.simpleString(), spark.table(table).count())
                            for table in REQUIRED_TABLES}
        with SparkSession(spark, database=database) as from_catalog:
            catalog_views = {table: (spark.table(table).schema.simpleString(), spark.table(table).count())
                             for table in REQUIRED_TABLES}
            # an optional table the database lacks is an empty view with the CDM columns
            assert spark.table("visit_detail").count() == 0
            assert "visit_detail_id" in spark.table("visit_detail").columns
        assert catalog_views == folder_views
        assert folder_views["person"][1] == 200
    finally:
        spark.sql(f"drop database if exists {database} cascade")
