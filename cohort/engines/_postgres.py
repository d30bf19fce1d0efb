"""PostgreSQL: load a CDM extract into a schema, and run the recipes there (psycopg 3).

:func:`load_extract_postgres` opens an extract with :func:`cohort.source.open_extract` (so the
schema check and the typed views are the ones DuckDB uses) and copies every CDM table into a
schema of a PostgreSQL database, with its full v5.4 column list. :class:`PostgresSession` then
runs the recipes there (:func:`cohort.engines.run_recipes`): every recipe becomes a temporary
table of the connection, analysed after it is made, and tables come back as polars.
"""

from __future__ import annotations

import re
import tempfile
import time
from decimal import Decimal
from pathlib import Path
from typing import Any

import polars as pl

from cohort._errors import CohortError, InputError

__all__ = ["PG_TYPES", "connect_postgres", "load_extract_postgres", "PostgresSession"]

#: PostgreSQL type of each CDM column kind (cohort._cdm kinds).
PG_TYPES: dict[str, str] = {
    "id": "bigint",
    "concept": "integer",
    "int": "integer",
    "float": "double precision",
    "date": "date",
    "datetime": "timestamp",
    "text": "text",
}

_IDENT = re.compile(r"^[a-z_][a-z0-9_]*$")
_POLARS_PG = {
    pl.Int8: "smallint", pl.Int16: "smallint", pl.Int32: "integer", pl.Int64: "bigint",
    pl.Float32: "real", pl.Float64: "double precision", pl.String: "text", pl.Boolean: "boolean",
    pl.Date: "date",
}


def _psycopg() -> Any:
    try:
        import psycopg
    except ImportError:  # pragma: no cover - depends on the environment
        msg = ("the PostgreSQL engine needs psycopg 3: pip install 'psycopg[binary]' "
               "(or the project's test extra)")
        raise CohortError(msg) from None
    return psycopg


def _check_ident(name: str, what: str) -> str:
    if not _IDENT.match(name):
        msg = f"{what} must match [a-z_][a-z0-9_]*, got {name!r}"
        raise InputError(msg)
    return name


def connect_postgres(dsn: str) -> Any:
    """Open an autocommit psycopg connection, with a clear error when the server is not there.

    Examples
    --------
    >>> con = connect_postgres("postgresql://postgres@127.0.0.1:5432/postgres")  # doctest: +SKIP
    """
    psycopg = _psycopg()
    try:
        return psycopg.connect(dsn, autocommit=True)
    except psycopg.OperationalError as error:
        msg = (f"cannot connect to PostgreSQL at {dsn!r}: {str(error).strip()}. Start a server "
               "(.ci/postgres.sh starts a throwaway one on 127.0.0.1 and prints its DSN)")
        raise CohortError(msg) from None


def load_extract_postgres(
    source: str | Path,
    dsn: str,
    *,
    schema: str = "cdm",
    replace: bool = True,
) -> dict[str, int]:
    """Copy a CDM extract (Parquet or CSV folder, DuckDB file) into a PostgreSQL schema.

    Parameters
    ----------
    source
        The extract, as :func:`cohort.source.open_extract` reads it (its schema is checked).
    dsn
        A libpq connection string.
    schema
        The schema to create (``[a-z_][a-z0-9_]*``); it is dropped first when ``replace``.
    replace
        Drop an existing schema of that name first; otherwise an existing schema is an error.

    Returns
    -------
    dict
        table -> rows copied (every CDM table, empty optional ones included).

    Examples
    --------
    >>> load_extract_postgres("demo/extract", dsn, schema="cdm")   # doctest: +SKIP
    {'person': 2000, ...}
    """
    from cohort._cdm import CDM_TABLES
    from cohort.source import open_extract

    _check_ident(schema, "schema")
    counts: dict[str, int] = {}
    with open_extract(source) as extract, connect_postgres(dsn) as pg:
        exists = pg.execute("select 1 from information_schema.schemata where schema_name = %s",
                            [schema]).fetchall()
        if exists and not replace:
            msg = f"schema {schema} already exists in {dsn!r}; pass replace=True or another schema"
            raise InputError(msg)
        pg.execute(f"drop schema if exists {schema} cascade")
        pg.execute(f"create schema {schema}")
        with tempfile.TemporaryDirectory(prefix="dka-pg-load-") as folder:
            for table, columns in CDM_TABLES.items():
                names = [column.name for column in columns]
                ddl = ", ".join(f"{column.name} {PG_TYPES[column.kind]}" for column in columns)
                pg.execute(f"create table {schema}.{table} ({ddl})")
                path = Path(folder) / f"{table}.csv"
                # CSV with a null marker no value can have: quoted text is never null in PostgreSQL
                extract.con.execute(
                    f"copy (select {', '.join(names)} from {table}) to '{path}' "
                    "(format csv, header false, nullstr '\\N', force_quote *)"
                )
                with pg.cursor() as cursor:
                    with cursor.copy(f"copy {schema}.{table} ({', '.join(names)}) from stdin "
                                     "(format csv, null '\\N')") as copy:
                        with path.open("rb") as handle:
                            while chunk := handle.read(1 << 20):
                                copy.write(chunk)
                path.unlink()
                pg.execute(f"analyze {schema}.{table}")
                counts[table] = int(pg.execute(f"select count(*) from {schema}.{table}").fetchone()[0])
    return counts


def _polars_type_sql(dtype: Any) -> str:
    for key, name in _POLARS_PG.items():
        if dtype == key:
            return name
    if isinstance(dtype, pl.Datetime):
        return "timestamp"
    msg = f"no PostgreSQL type for polars {dtype}"
    raise CohortError(msg)


class PostgresSession:
    """Run recipes inside PostgreSQL against a CDM schema; tables come back as polars.

    Parameters
    ----------
    dsn
        A libpq connection string.
    schema
        The schema holding the CDM tables (see :func:`load_extract_postgres`).

    Every recipe is materialised as a temporary table of this connection (gone when it closes)
    and analysed, so the planner knows its size. ``seconds`` holds the wall time per table.

    Examples
    --------
    >>> with PostgresSession(dsn, schema="cdm") as session:        # doctest: +SKIP
    ...     run_recipes(session, "consensus-2024")
    ...     episodes = session.fetch("dka_episodes")
    """

    dialect = "postgres"

    def __init__(self, dsn: str, *, schema: str = "cdm") -> None:
        self.schema = _check_ident(schema, "schema")
        self.con = connect_postgres(dsn)
        found = self.con.execute("select count(*) from information_schema.tables where "
                                 "table_schema = %s", [schema]).fetchone()[0]
        if not found:
            self.con.close()
            msg = (f"schema {schema} holds no tables at {dsn!r}; load an extract first "
                   "(cohort.engines.load_extract_postgres)")
            raise InputError(msg)
        self.con.execute(f"set search_path to pg_temp, {schema}")
        self.con.execute("set timezone to 'UTC'")
        self.seconds: dict[str, float] = {}

    def __enter__(self) -> PostgresSession:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection (its temporary tables go with it)."""
        self.con.close()

    def execute(self, sql: str, recipe: str = "<statement>") -> None:
        psycopg = _psycopg()
        try:
            self.con.execute(sql)
        except psycopg.Error as error:
            msg = f"PostgreSQL refused {recipe}: {str(error).strip()}"
            raise CohortError(msg) from None

    def register_codelists(self, lists: Any) -> None:
        """Create the ``dka_codelist_<name>`` temporary tables from validated code lists."""
        for name, frame in lists.frames.items():
            table = f"dka_codelist_{_check_ident(name, 'code list')}"
            ddl = ", ".join(f"{column} {_polars_type_sql(dtype)}" for column, dtype in frame.schema.items())
            self.execute(f"drop table if exists {table}")
            self.execute(f"create temp table {table} ({ddl})")
            with self.con.cursor() as cursor:
                with cursor.copy(f"copy {table} ({', '.join(frame.columns)}) from stdin") as copy:
                    for row in frame.iter_rows():
                        copy.write_row(row)

    def materialise(self, target: str, sql: str) -> None:
        """Create temporary table ``target`` from ``sql`` (replacing it) and analyse it."""
        _check_ident(target, "table")
        started = time.perf_counter()
        self.execute(f"drop table if exists {target}", target)
        self.execute(f"create temp table {target} as\n{sql}", target)
        self.execute(f"analyze {target}", target)
        self.seconds[target] = self.seconds.get(target, 0.0) + time.perf_counter() - started

    def append(self, target: str, sql: str) -> None:
        """Insert the rows of ``sql`` into ``target``."""
        _check_ident(target, "table")
        self.execute(f"insert into {target}\n{sql}", target)

    def count(self, table: str) -> int:
        """Rows of ``table``."""
        _check_ident(table, "table")
        return int(self.con.execute(f"select count(*) from {table}").fetchone()[0])

    def fetch(self, table: str) -> pl.DataFrame:
        """Table ``table`` as polars (numeric columns as Float64, timestamps naive)."""
        _check_ident(table, "table")
        with self.con.cursor() as cursor:
            cursor.execute(f"select * from {table}")
            names = [column.name for column in cursor.description]
            rows = cursor.fetchall()
        data = {name: [row[index] for row in rows] for index, name in enumerate(names)}
        for name, values in data.items():
            if any(isinstance(value, Decimal) for value in values):
                data[name] = [None if value is None else float(value) for value in values]
        types = self._column_types(table)
        schema = {name: types.get(name) for name in names}
        return pl.DataFrame(data, schema={name: dtype for name, dtype in schema.items()}, strict=False)

    def _column_types(self, table: str) -> dict[str, Any]:
        rows = self.con.execute(
            "select attname, format_type(atttypid, atttypmod) from pg_attribute "
            "where attrelid = %s::regclass and attnum > 0 and not attisdropped", [table]).fetchall()
        mapping = {
            "bigint": pl.Int64, "integer": pl.Int32, "smallint": pl.Int16, "double precision": pl.Float64,
            "real": pl.Float32, "numeric": pl.Float64, "text": pl.String, "boolean": pl.Boolean,
            "date": pl.Date, "timestamp without time zone": pl.Datetime("us"),
        }
        out: dict[str, Any] = {}
        for name, type_name in rows:
            base = type_name.split("(")[0]
            if base.startswith("character varying") or base.startswith("character"):
                out[name] = pl.String
            else:
                out[name] = mapping.get(base, None)
        return out

