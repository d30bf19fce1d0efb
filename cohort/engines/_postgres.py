"""PostgreSQL: load a CDM extract into a schema, and run the recipes there (psycopg 3).

:func:`load_extract_postgres` opens an extract with :func:`cohort.source.open_extract` (so the
schema check and the typed views are the ones DuckDB uses) and copies every CDM table into a
schema of a PostgreSQL database, with its full v5.4 column list. :class:`PostgresSession` then
runs the recipes there (:func:`cohort.engines.run_recipes`): every recipe becomes a temporary
table of the connection, analysed after it is made, and tables come back as polars.
"""

from __future__ import annotations

import io
import re
import tempfile
import time
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
        msg = (f"cannot connect to PostgreSQL at {_safe_dsn(dsn)!r}: {' '.join(str(error).split())} Check --dsn, or start a server "
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
        The schema holding the CDM tables (see :func:`load_extract_postgres`). It must hold every
        required CDM table (:data:`cohort._cdm.REQUIRED_TABLES`) with the columns the pipeline
        reads; an optional table it lacks is stood in for by an empty temporary table.

    Every recipe is materialised as a temporary table of this connection (never in the CDM
    schema), analysed after it is made so the planner knows its size, and dropped by
    :meth:`close` (temporary tables go with the connection in any case). ``seconds`` holds the
    wall time per table. Tables are fetched with ``copy (...) to stdout`` as CSV into polars.

    Examples
    --------
    >>> with PostgresSession(dsn, schema="cdm") as session:        # doctest: +SKIP
    ...     run_recipes(session, "consensus-2024")
    ...     episodes = session.fetch("dka_episodes")
    """

    dialect = "postgres"

    def __init__(self, dsn: str, *, schema: str = "cdm") -> None:
        self.schema = _check_ident(schema, "schema")
        self.dsn = dsn
        self.con = connect_postgres(dsn)
        self._temp: list[str] = []
        self.seconds: dict[str, float] = {}
        try:
            self._check_schema()
            self.con.execute(f"set search_path to pg_temp, {schema}")
            self.con.execute("set timezone to 'UTC'")
            self.con.execute("set datestyle to 'ISO, YMD'")
            self.con.execute("set extra_float_digits to 1")  # shortest text that reads back exactly
            self._stand_in_optional_tables()
        except BaseException:
            self.con.close()
            raise
        self.server_version = str(self.con.execute("show server_version").fetchone()[0])

    def _check_schema(self) -> None:
        from cohort._cdm import REQUIRED_TABLES, used_columns

        rows = self.con.execute(
            "select table_name, column_name from information_schema.columns where table_schema = %s",
            [self.schema]).fetchall()
        found: dict[str, set[str]] = {}
        for table, column in rows:
            found.setdefault(str(table).lower(), set()).add(str(column).lower())
        self._tables = found
        where = f"schema {self.schema} at {_safe_dsn(self.dsn)}"
        if not found:
            msg = (f"schema {self.schema} holds no tables at {_safe_dsn(self.dsn)!r}; load an extract first "
                   "(cohort.engines.load_extract_postgres) or give the schema holding the CDM tables "
                   "(--schema)")
            raise InputError(msg)
        missing = [table for table in REQUIRED_TABLES if table not in found]
        if missing:
            msg = (f"{where} lacks the CDM table(s) {', '.join(missing)} (found: "
                   f"{', '.join(sorted(found))}); the episodes need {', '.join(REQUIRED_TABLES)}. "
                   "Give the schema holding the OMOP CDM tables (--schema), or load them")
            raise InputError(msg)
        faults = []
        for table, names in sorted(found.items()):
            try:
                wanted = used_columns(table)
            except KeyError:
                continue
            lacking = [column.name for column in wanted if column.name not in names]
            if lacking:
                faults.append(f"{table} ({', '.join(lacking)})")
        if faults:
            msg = (f"{where}: CDM table(s) lack columns the pipeline reads: {'; '.join(faults)}. "
                   "Add the columns (OMOP CDM v5.4 names) to those tables")
            raise InputError(msg)

    def _stand_in_optional_tables(self) -> None:
        from cohort._cdm import CDM_TABLES, OPTIONAL_TABLES

        for table in OPTIONAL_TABLES:
            if table in self._tables:
                continue
            ddl = ", ".join(f"{column.name} {PG_TYPES[column.kind]}" for column in CDM_TABLES[table])
            self.execute(f"create temp table {table} ({ddl})", f"empty stand-in for {table}")
            self._temp.append(table)

    def __enter__(self) -> PostgresSession:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Drop the temporary tables made here and close the connection."""
        if self.con.closed:
            return
        try:
            for table in reversed(self._temp):
                self.con.execute(f"drop table if exists pg_temp.{table}")
        except Exception:  # noqa: BLE001 - the connection going away drops them too
            pass
        self._temp.clear()
        self.con.close()

    def execute(self, sql: str, recipe: str = "<statement>") -> None:
        """Run one statement; a PostgreSQL error becomes a :class:`CohortError` naming ``recipe``."""
        psycopg = _psycopg()
        try:
            self.con.execute(sql)
        except psycopg.Error as error:
            msg = f"PostgreSQL refused {recipe}: {str(error).strip()}"
            raise CohortError(msg) from None

    def query(self, sql: str, recipe: str = "<query>") -> list[tuple[Any, ...]]:
        """Rows of a select (written for PostgreSQL)."""
        psycopg = _psycopg()
        try:
            return list(self.con.execute(sql).fetchall())
        except psycopg.Error as error:
            msg = f"PostgreSQL refused {recipe}: {str(error).strip()}"
            raise CohortError(msg) from None

    def _remember(self, table: str) -> None:
        if table not in self._temp:
            self._temp.append(table)

    def register_codelists(self, lists: Any) -> None:
        """Create the ``dka_codelist_<name>`` temporary tables from validated code lists."""
        for name, frame in lists.frames.items():
            table = f"dka_codelist_{_check_ident(name, 'code list')}"
            ddl = ", ".join(f"{column} {_polars_type_sql(dtype)}" for column, dtype in frame.schema.items())
            self.execute(f"drop table if exists {table}")
            self.execute(f"create temp table {table} ({ddl})")
            self._remember(table)
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
        self._remember(target)
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

    def fetch(self, table: str, *, order_by: str | None = None) -> pl.DataFrame:
        """Table ``table`` as polars, streamed with ``copy (select ...) to stdout`` as CSV.

        Types follow the table's columns: integers as Int64/Int32/Int16, ``numeric`` and
        ``double precision`` as Float64 (PostgreSQL writes the shortest text that reads back to the
        same double), timestamps naive to the microsecond, booleans, dates and text. ``order_by``
        is a column list to sort on in PostgreSQL.
        """
        _check_ident(table, "table")
        types = self._column_types(table)
        names = list(types)
        selects = []
        for name, (dtype, pg_type) in types.items():
            if pg_type.startswith("timestamp"):
                selects.append(f"to_char({name}, 'YYYY-MM-DD HH24:MI:SS.US') as {name}")
            elif pg_type == "boolean":
                selects.append(f"case when {name} then 1 when not {name} then 0 end as {name}")
            else:
                selects.append(name)
        order = f" order by {order_by}" if order_by else ""
        sql = f"copy (select {', '.join(selects)} from {table}{order}) to stdout (format csv)"
        buffer = io.BytesIO()
        psycopg = _psycopg()
        try:
            with self.con.cursor() as cursor:
                with cursor.copy(sql) as copy:
                    for chunk in copy:
                        buffer.write(chunk)
        except psycopg.Error as error:
            msg = f"PostgreSQL refused fetching {table}: {str(error).strip()}"
            raise CohortError(msg) from None
        if not names:
            return pl.DataFrame()
        if buffer.tell() == 0:
            return pl.DataFrame(schema={name: dtype or pl.String for name, (dtype, _) in types.items()})
        buffer.seek(0)
        raw = pl.read_csv(buffer, has_header=False, new_columns=names, infer_schema=False)
        columns = []
        for name, (dtype, pg_type) in types.items():
            column = pl.col(name)
            if pg_type.startswith("timestamp"):
                column = column.str.to_datetime("%Y-%m-%d %H:%M:%S%.6f", time_unit="us")
            elif pg_type == "boolean":
                column = column.cast(pl.Int8).cast(pl.Boolean)
            elif pg_type == "date":
                column = column.str.to_date("%Y-%m-%d")
            elif dtype is not None and dtype != pl.String:
                column = column.cast(dtype)
            columns.append(column.alias(name))
        return raw.select(columns)

    def _column_types(self, table: str) -> dict[str, tuple[Any, str]]:
        rows = self.con.execute(
            "select attname, format_type(atttypid, atttypmod) from pg_attribute "
            "where attrelid = %s::regclass and attnum > 0 and not attisdropped order by attnum",
            [table]).fetchall()
        mapping = {
            "bigint": pl.Int64, "integer": pl.Int32, "smallint": pl.Int16, "double precision": pl.Float64,
            "real": pl.Float32, "numeric": pl.Float64, "text": pl.String, "boolean": pl.Boolean,
            "date": pl.Date, "timestamp without time zone": pl.Datetime("us"),
        }
        out: dict[str, tuple[Any, str]] = {}
        for name, type_name in rows:
            base = type_name.split("(")[0].strip()
            if base.startswith("character"):
                out[name] = (pl.String, "text")
            elif base.startswith("timestamp"):
                out[name] = (pl.Datetime("us"), base)
            else:
                out[name] = (mapping.get(base, pl.String), base)
        return out


def _safe_dsn(dsn: str) -> str:
    """The DSN with any password hidden (for messages and the manifest)."""
    text = re.sub(r"(password\s*=\s*)(\S+)", r"\1***", dsn, flags=re.IGNORECASE)
    return re.sub(r"(://[^:/@]+:)([^@]+)(@)", r"\1***\3", text)
