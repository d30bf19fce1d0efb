"""The recipes on other engines: sqlglot rendering, PostgreSQL and Spark runners.

- :func:`render_for`, :func:`render_all`, :func:`transpile`: the DuckDB recipes written for
  ``duckdb``, ``postgres``, ``spark``, ``bigquery``, ``snowflake`` or ``tsql``; constructs that do
  not carry over raise :class:`~cohort._errors.CohortError` (see :mod:`cohort.engines._dialect`).
- :func:`load_extract_postgres`, :class:`PostgresSession`: a CDM extract copied into a PostgreSQL
  schema, and the recipes run there (psycopg 3).
- :func:`local_spark`, :class:`SparkSession`: the recipes run through Spark (pyspark 4, optional
  extra ``spark``).
- :func:`find_episodes_on_engine` and :func:`episodes_command` (``dka-cohort episodes --engine
  postgres|spark``): the episodes output folder of :func:`cohort.episodes.find_episodes`, with the
  recipes run inside PostgreSQL or Spark.
- :func:`run_recipes` drives any session through the recipes in DuckDB's order with DuckDB's slot
  values; :func:`duckdb_reference`, :func:`compare_runs` and :func:`episodes_from_tables` check
  that an engine gives the same tables and the same ``episodes.parquet`` rows.
"""

from cohort.engines._dialect import (
    ADD_HOURS_DIALECTS,
    DIALECTS,
    add_hours,
    recipe_values,
    render_all,
    render_for,
    sql_command,
    transpile,
    write_rendered,
)
from cohort.engines._episodes import ENGINES, add_engine_arguments, episodes_command, find_episodes_on_engine
from cohort.engines._postgres import PostgresSession, connect_postgres, load_extract_postgres
from cohort.engines._run import (
    compare_runs,
    compare_tables,
    duckdb_reference,
    episodes_from_tables,
    run_recipes,
)
from cohort.engines._spark import SparkSession, connect_spark, local_spark

__all__ = [
    "DIALECTS",
    "ADD_HOURS_DIALECTS",
    "add_hours",
    "ENGINES",
    "find_episodes_on_engine",
    "episodes_command",
    "add_engine_arguments",
    "connect_spark",
    "transpile",
    "render_for",
    "render_all",
    "recipe_values",
    "write_rendered",
    "sql_command",
    "load_extract_postgres",
    "connect_postgres",
    "PostgresSession",
    "local_spark",
    "SparkSession",
    "run_recipes",
    "duckdb_reference",
    "compare_tables",
    "compare_runs",
    "episodes_from_tables",
]
