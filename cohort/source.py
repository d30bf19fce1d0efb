"""Open an OMOP CDM v5.4 extract read-only and check its schema.

Three layouts are read:

``parquet``
    a folder holding ``<table>.parquet`` or a folder ``<table>/`` of Parquet part files;
``csv``
    a folder holding ``<table>.csv`` or ``<table>.csv.gz`` with a header line, as databases export
    them: empty strings are nulls, dates and datetimes are text (``2024-03-01``,
    ``2024-03-01 09:30:00``, ``2024-03-01T09:30:00``, or ``20240301`` as in vocabulary
    downloads), numbers are text, the delimiter (comma, tab, ...) is detected;
``duckdb``
    a DuckDB database file, attached read-only; tables are read from schema ``main``, or from
    another schema given as ``fmt="duckdb:<schema>"``.

Table and column names are matched case-insensitively (exports from some databases write
``PERSON_ID``). The format is detected when ``fmt`` is not given: a file is a DuckDB database; a
folder with Parquet files is ``parquet``; a folder with CSV files is ``csv``.

The schema check runs before any heavy work and reports every fault in one :class:`SchemaError`:
missing required tables, missing columns the pipeline reads (with a did-you-mean suggestion for
near misses), and columns of the wrong type (with example values and the number of rows that do
not convert). Then each CDM table is visible on :attr:`Extract.con` as a view under its CDM name
with the full v5.4 column list, typed as :mod:`cohort._cdm` says (columns the source lacks, and
that the pipeline does not read, are typed nulls; source columns outside the CDM are left out).
An optional table the extract lacks (visit_detail, concept_ancestor, care_site) is an empty view
with its full column list, so recipes may always name it; :attr:`Extract.tables` says which
tables the extract really has.

The source is never written: Parquet and CSV are only read, a DuckDB file is attached
``read_only``; intermediate tables are DuckDB temporary tables of the in-memory session.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from cohort._cdm import CDM_TABLES, OPTIONAL_TABLES, REQUIRED_TABLES, CdmColumn
from cohort._errors import InputError, SchemaError

__all__ = ["Extract", "open_extract", "FORMATS"]

#: Formats :func:`open_extract` reads (``duckdb:<schema>`` selects a schema of a DuckDB file).
FORMATS: tuple[str, ...] = ("parquet", "csv", "duckdb")

_INTEGER_TYPES = {
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
    "UBIGINT", "UHUGEINT", '"NULL"', "NULL",
}
_FLOAT_TYPES = {"FLOAT", "DOUBLE", "REAL"}
_TIMESTAMP_PREFIX = ("TIMESTAMP",)
_EXAMPLES = 3


def _quote_ident(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _quote_text(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


@dataclass
class _Source:
    """Where one table lives and how to read it raw."""

    table: str
    files: list[Path]
    relation: str  # SQL text of a relation reading the raw table
    columns: dict[str, str] = field(default_factory=dict)  # lower name -> (actual name)
    types: dict[str, str] = field(default_factory=dict)  # lower name -> DuckDB type


class Extract:
    """A read-only handle on an opened CDM extract.

    Attributes
    ----------
    path
        The extract's folder or file.
    fmt
        ``parquet``, ``csv`` or ``duckdb`` (``duckdb:<schema>`` when a schema was chosen).
    tables
        The CDM tables present (required ones and the optional ones found).
    con
        The DuckDB session: CDM tables are views under their CDM names; recipes add ``dka_*``
        temporary tables.

    Use :func:`open_extract` to make one; close it with :meth:`close` or a ``with`` block.
    """

    def __init__(self, path: Path, fmt: str, con: duckdb.DuckDBPyConnection,
                 sources: dict[str, _Source]) -> None:
        self.path = path
        self.fmt = fmt
        self.con = con
        self._sources = sources
        self.tables: frozenset[str] = frozenset(sources)
        self._row_counts: dict[str, int] = {}

    def __repr__(self) -> str:
        return f"Extract(path={str(self.path)!r}, fmt={self.fmt!r}, tables={sorted(self.tables)})"

    def __enter__(self) -> Extract:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def has_table(self, table: str) -> bool:
        """Return True when the CDM table ``table`` is present."""
        return table in self.tables

    def row_count(self, table: str) -> int:
        """Return the number of rows of CDM table ``table`` (from Parquet metadata when possible).

        Examples
        --------
        >>> extract.row_count("person")  # doctest: +SKIP
        5000
        """
        if table not in self._sources:
            msg = f"table `{table}` is not in the extract; tables are: {', '.join(sorted(self.tables))}"
            raise InputError(msg)
        if table not in self._row_counts:
            source = self._sources[table]
            if self.fmt == "parquet":
                files = ", ".join(_quote_text(str(file)) for file in source.files)
                sql = f"select coalesce(sum(num_rows), 0) from parquet_file_metadata([{files}])"
            else:
                sql = f"select count(*) from {source.relation}"
            self._row_counts[table] = int(self.con.execute(sql).fetchall()[0][0])
        return self._row_counts[table]

    def fingerprint(self) -> dict[str, Any]:
        """Describe the source cheaply: per table its files (name, bytes, mtime) and row count.

        The ``digest`` is a SHA-256 of that description (file names, sizes, modification times and
        row counts), not of the file contents: it changes when a file is rewritten, and costs no
        full read.

        Returns
        -------
        dict
            ``{"path", "format", "tables": {table: {"files": [...], "rows": n}}, "digest"}``.
        """
        tables: dict[str, Any] = {}
        for table in sorted(self._sources):
            files = []
            for file in self._sources[table].files:
                stat = file.stat()
                name = str(file.relative_to(self.path)) if self.path.is_dir() else file.name
                files.append({"name": name, "bytes": stat.st_size, "mtime_ns": stat.st_mtime_ns})
            tables[table] = {"files": files, "rows": self.row_count(table)}
        body = {"path": str(self.path), "format": self.fmt, "tables": tables}
        digest = hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()
        return {**body, "digest": digest}

    def close(self) -> None:
        """Close the DuckDB session (the source files are untouched)."""
        self.con.close()


# ---------------------------------------------------------------------------- discovery
def _detect_format(path: Path) -> str:
    if path.is_file():
        return "duckdb"
    if not path.is_dir():
        msg = f"extract not found: {path} is neither a folder (Parquet or CSV) nor a DuckDB file"
        raise InputError(msg)
    names = [entry.name.lower() for entry in path.iterdir()]
    has_parquet = any(name.endswith(".parquet") for name in names) or any(
        (path / entry).is_dir() and any(part.suffix == ".parquet" for part in (path / entry).iterdir())
        for entry in names
    )
    has_csv = any(name.endswith((".csv", ".csv.gz")) for name in names)
    if has_parquet and has_csv:
        msg = (f"extract folder {path} holds both Parquet and CSV files; pass fmt='parquet' or "
               "fmt='csv' to say which to read")
        raise InputError(msg)
    if has_parquet:
        return "parquet"
    if has_csv:
        return "csv"
    msg = (f"extract folder {path} holds no <table>.parquet, <table>/ of Parquet parts, "
           "<table>.csv or <table>.csv.gz files")
    raise InputError(msg)


def _discover_files(path: Path, fmt: str) -> dict[str, list[Path]]:
    """Map each table name (lower case) found in the folder to its file(s)."""
    found: dict[str, list[Path]] = {}
    forms: dict[str, list[str]] = {}
    for entry in sorted(path.iterdir()):
        lower = entry.name.lower()
        if fmt == "parquet":
            if entry.is_file() and lower.endswith(".parquet"):
                table = lower[: -len(".parquet")]
                found.setdefault(table, []).append(entry)
                forms.setdefault(table, []).append(entry.name)
            elif entry.is_dir():
                parts = sorted(part for part in entry.rglob("*.parquet") if part.is_file())
                if parts:
                    found.setdefault(lower, []).extend(parts)
                    forms.setdefault(lower, []).append(entry.name + "/")
        elif entry.is_file():
            for suffix in (".csv.gz", ".csv"):
                if lower.endswith(suffix):
                    table = lower[: -len(suffix)]
                    found.setdefault(table, []).append(entry)
                    forms.setdefault(table, []).append(entry.name)
                    break
    for table, names in forms.items():
        if len(names) > 1:
            msg = (f"extract folder {path} holds table `{table}` more than once ({', '.join(names)}); "
                   "keep one of them")
            raise InputError(msg)
    return found


def _file_relation(fmt: str, files: list[Path]) -> str:
    listed = "[" + ", ".join(_quote_text(str(file)) for file in files) + "]"
    if fmt == "parquet":
        return f"read_parquet({listed}, union_by_name = true)"
    return (f"read_csv({listed}, header = true, all_varchar = true, nullstr = '', "
            "union_by_name = true)")


# ---------------------------------------------------------------------------- type rules
def _family_ok(kind: str, found: str) -> str:
    """Classify a source type for a CDM kind: 'ok', 'convert' (check values) or 'bad'."""
    upper = found.upper()
    is_int = upper in _INTEGER_TYPES
    is_float = upper in _FLOAT_TYPES or upper.startswith("DECIMAL")
    is_text = upper == "VARCHAR"
    if kind == "text":
        return "ok"
    if is_text:
        return "convert"
    if kind in ("id", "concept", "int"):
        if is_int or (upper.startswith("DECIMAL") and upper.endswith(",0)")):
            return "ok"
        if is_float or upper.startswith("DECIMAL"):
            return "convert"  # whole numbers written as floats (a common export quirk)
        return "bad"
    if kind == "float":
        return "ok" if (is_int or is_float) else "bad"
    if kind == "date":
        return "ok" if (upper == "DATE" or upper.startswith(_TIMESTAMP_PREFIX)) else "bad"
    if kind == "datetime":
        return "ok" if upper.startswith(_TIMESTAMP_PREFIX) else "bad"
    return "bad"  # pragma: no cover - kinds are a closed list


def _text_timestamp(text: str) -> str:
    """Text to timestamp: ISO forms (``2024-03-01``, ``2024-03-01 09:30[:00]``, ``...T09:30``)
    and the compact ``20240301`` of vocabulary downloads; null when neither reads (the schema
    check has counted such values for every column the pipeline uses)."""
    return f"coalesce(try_cast({text} as timestamp), try_strptime({text}, '%Y%m%d'))"


def _failure_condition(kind: str, expr: str, found: str) -> str:
    """SQL condition true for a non-null source value that does not convert to ``kind``."""
    if found.upper() == "VARCHAR":
        text = f"nullif(trim({expr}), '')"
        if kind in ("id", "concept", "int"):
            number = f"try_cast({text} as decimal(38, 10))"
            return f"{text} is not null and ({number} is null or {number} <> floor({number}))"
        if kind == "float":
            return f"{text} is not null and try_cast({text} as double) is null"
        if kind in ("date", "datetime"):
            return f"{text} is not null and {_text_timestamp(text)} is null"
    # numeric (float/decimal) source for an integer kind: whole, finite numbers convert
    number = f"cast({expr} as double)"
    return f"{expr} is not null and (isnan({number}) or isinf({number}) or {number} <> round({number}))"


def _typed_expr(column: CdmColumn, source: _Source) -> str:
    """SQL expression reading ``column`` from the raw source, typed as the CDM says."""
    sql_type = column.sql_type
    if column.name not in source.columns:
        return f"cast(null as {sql_type})"
    expr = _quote_ident(source.columns[column.name])
    found = source.types[column.name].upper()
    verdict = _family_ok(column.kind, found)
    cast = "cast" if column.used else "try_cast"
    if found == "VARCHAR":
        text = f"nullif(trim({expr}), '')"
        if column.kind == "text":
            return f"nullif({expr}, '')"
        if column.kind in ("id", "concept", "int"):
            return f"{cast}({cast}({text} as decimal(38, 10)) as {sql_type})"
        if column.kind == "date":
            return f"cast({_text_timestamp(text)} as date)"
        if column.kind == "datetime":
            return _text_timestamp(text)
        return f"{cast}({text} as {sql_type})"
    if verdict == "bad":  # only reachable for unused columns: keep the view usable
        return f"cast(null as {sql_type})"
    if found == sql_type.upper():
        return expr
    if column.kind == "datetime" and "TIME ZONE" in found:
        return f"cast({expr} as timestamp)"
    return f"{cast}({expr} as {sql_type})"


# ---------------------------------------------------------------------------- checking
def _inspect(con: duckdb.DuckDBPyConnection, source: _Source) -> None:
    rows = con.execute(f"describe select * from {source.relation}").fetchall()
    for name, type_name, *_ in rows:
        lower = str(name).lower()
        source.columns.setdefault(lower, str(name))
        source.types.setdefault(lower, str(type_name))


def _check(con: duckdb.DuckDBPyConnection, sources: dict[str, _Source], where: str,
           others: list[str]) -> None:
    faults: list[str] = []
    for table in REQUIRED_TABLES:
        if table not in sources:
            hint = difflib.get_close_matches(table, others, n=1, cutoff=0.75)
            tip = f"; did you mean `{hint[0]}`?" if hint else ""
            faults.append(f"missing table `{table}` (required){tip}")
    for table, source in sorted(sources.items()):
        spec = CDM_TABLES[table]
        known = {column.name for column in spec}
        extra = [name for name in source.columns if name not in known]
        converting: list[tuple[CdmColumn, str]] = []
        for column in spec:
            if column.name not in source.columns:
                if column.used:
                    hint = difflib.get_close_matches(column.name, extra, n=1, cutoff=0.75)
                    tip = f"; did you mean `{source.columns[hint[0]]}`?" if hint else ""
                    faults.append(f"`{table}`: missing column `{column.name}` "
                                  f"({column.sql_type}){tip}")
                continue
            found = source.types[column.name]
            verdict = _family_ok(column.kind, found)
            if verdict == "bad" and column.used:
                faults.append(f"`{table}`.`{column.name}`: expected {column.sql_type}, found "
                              f"{found}; write it as {column.sql_type}")
            elif verdict == "convert" and column.used:
                converting.append((column, found))
        if converting:
            faults.extend(_conversion_faults(con, table, source, converting))
    if faults:
        lines = "\n".join(f"  - {fault}" for fault in faults)
        msg = (f"the extract at {where} does not fit the OMOP CDM v5.4 shape dka-cohort reads "
               f"({len(faults)} problem(s)):\n{lines}\nFix the extract (or rename the tables and "
               "columns to their CDM v5.4 names) and run again.")
        raise SchemaError(msg)


def _conversion_faults(con: duckdb.DuckDBPyConnection, table: str, source: _Source,
                       converting: list[tuple[CdmColumn, str]]) -> list[str]:
    """Count, in one scan, the rows of each column whose values do not convert."""
    counts = []
    for index, (column, found) in enumerate(converting):
        condition = _failure_condition(column.kind, _quote_ident(source.columns[column.name]), found)
        counts.append(f"count(*) filter (where {condition}) as bad_{index}")
    row = con.execute(f"select {', '.join(counts)} from {source.relation}").fetchall()[0]
    faults = []
    for index, (column, found) in enumerate(converting):
        bad = int(row[index])
        if not bad:
            continue
        expr = _quote_ident(source.columns[column.name])
        condition = _failure_condition(column.kind, expr, found)
        examples = con.execute(
            f"select distinct cast({expr} as varchar) as example from {source.relation} "
            f"where {condition} order by example limit {_EXAMPLES}"
        ).fetchall()
        shown = ", ".join(repr(value[0]) for value in examples)
        faults.append(f"`{table}`.`{column.name}`: expected {column.sql_type}, found {found} with "
                      f"{bad} row(s) that do not convert (for example {shown})")
    return faults


def _create_views(con: duckdb.DuckDBPyConnection, sources: dict[str, _Source]) -> None:
    for table, source in sources.items():
        select = ",\n    ".join(f"{_typed_expr(column, source)} as {column.name}"
                                for column in CDM_TABLES[table])
        con.execute(f"create or replace view {table} as\nselect\n    {select}\nfrom {source.relation}")
    for table in OPTIONAL_TABLES:
        if table not in sources:  # an absent optional table reads as an empty typed view
            select = ", ".join(f"cast(null as {column.sql_type}) as {column.name}"
                               for column in CDM_TABLES[table])
            con.execute(f"create or replace view {table} as select {select} where false")


# ---------------------------------------------------------------------------- entry point
def open_extract(
    path: str | Path,
    *,
    fmt: str | None = None,
    threads: int | None = None,
    memory_limit: str | None = None,
    temp_directory: str | Path | None = None,
) -> Extract:
    """Open a CDM extract read-only, check its schema and expose its tables as views.

    Parameters
    ----------
    path
        A Parquet folder, a CSV folder or a DuckDB file.
    fmt
        ``parquet``, ``csv``, ``duckdb`` or ``duckdb:<schema>``; detected when None.
    threads
        DuckDB worker threads (default: DuckDB's, one per core).
    memory_limit
        DuckDB memory limit such as ``"4GB"`` (default: DuckDB's, 80% of RAM).
    temp_directory
        Where DuckDB may spill (default: DuckDB's).

    Returns
    -------
    Extract
        The handle; CDM tables are views on ``extract.con``.

    Raises
    ------
    InputError
        The path does not exist or its format cannot be told.
    SchemaError
        Tables or columns are missing or wrongly typed (every fault listed at once).

    Examples
    --------
    >>> with open_extract("demo-output/extract") as extract:  # doctest: +SKIP
    ...     extract.con.execute("select count(*) from person").fetchall()
    [(5000,)]
    """
    where = Path(path).expanduser().resolve()
    if not where.exists():
        msg = f"extract not found: {where} does not exist; give a Parquet folder, a CSV folder or a DuckDB file"
        raise InputError(msg)
    chosen = fmt or _detect_format(where)
    schema = "main"
    base = chosen
    if chosen.startswith("duckdb:"):
        base, schema = "duckdb", chosen.split(":", 1)[1]
    if base not in FORMATS:
        msg = f"fmt must be one of parquet, csv, duckdb or duckdb:<schema>; got {fmt!r}"
        raise InputError(msg)
    config: dict[str, Any] = {}
    if threads is not None:
        if int(threads) < 1:
            msg = f"threads must be a whole number >= 1, got {threads!r}"
            raise InputError(msg)
        config["threads"] = int(threads)
    if memory_limit is not None:
        config["memory_limit"] = str(memory_limit)
    # DuckDB spills to `.tmp` in the current folder by default: use the system's temp folder
    # instead, so that a run never writes beside the user's files (nor into a read-only folder)
    config["temp_directory"] = str(temp_directory if temp_directory is not None else Path(tempfile.gettempdir()) / "dka-cohort-spill")
    try:
        con = duckdb.connect(":memory:", config=config)
    except duckdb.Error as error:
        msg = f"could not start DuckDB with threads={threads!r}, memory_limit={memory_limit!r}: {error}"
        raise InputError(msg) from error
    try:
        # timestamps WITH TIME ZONE (rare in CDM extracts) are read as UTC wall-clock times
        con.execute("set TimeZone = 'UTC'")
        sources, others = _sources(con, where, base, schema)
        for source in sources.values():
            _inspect(con, source)
        _check(con, sources, str(where), others)
        _create_views(con, sources)
    except BaseException:
        con.close()
        raise
    return Extract(where, chosen if base == "duckdb" and schema != "main" else base, con, sources)


def _sources(con: duckdb.DuckDBPyConnection, where: Path, fmt: str,
             schema: str) -> tuple[dict[str, _Source], list[str]]:
    """Find the CDM tables; also return the names of other tables (for did-you-mean hints)."""
    wanted = set(REQUIRED_TABLES) | set(OPTIONAL_TABLES)
    sources: dict[str, _Source] = {}
    others: list[str] = []
    if fmt == "duckdb":
        if not where.is_file():
            msg = f"fmt='duckdb' needs a DuckDB database file, but {where} is a folder"
            raise InputError(msg)
        try:
            con.execute(f"attach {_quote_text(str(where))} as cdm_source (read_only)")
        except duckdb.Error as error:
            msg = f"could not open {where} as a DuckDB database (read-only): {error}"
            raise InputError(msg) from error
        rows = con.execute(
            "select table_schema, table_name from information_schema.tables "
            "where table_catalog = 'cdm_source'"
        ).fetchall()
        schemas = sorted(str(row[0]) for row in con.execute(
            "select schema_name from duckdb_schemas() where database_name = 'cdm_source' "
            "and schema_name not in ('information_schema', 'pg_catalog')").fetchall())
        if schema not in schemas:
            msg = (f"DuckDB file {where} has no schema `{schema}`; schemas are: "
                   f"{', '.join(schemas) or '(none)'}; choose one with fmt='duckdb:<schema>'")
            raise InputError(msg)
        for table_schema, table_name in rows:
            lower = str(table_name).lower()
            if table_schema == schema and lower in wanted:
                relation = f"cdm_source.{_quote_ident(schema)}.{_quote_ident(str(table_name))}"
                sources[lower] = _Source(lower, [where], relation)
            elif table_schema == schema:
                others.append(lower)
        if not sources:
            elsewhere = sorted({str(row[0]) for row in rows if str(row[1]).lower() in wanted})
            if elsewhere:
                msg = (f"DuckDB file {where} has no CDM tables in schema `{schema}`, but schema "
                       f"`{elsewhere[0]}` has; open it with fmt='duckdb:{elsewhere[0]}'")
                raise InputError(msg)
        return sources, others
    if not where.is_dir():
        msg = f"fmt={fmt!r} needs a folder, but {where} is a file"
        raise InputError(msg)
    for table, files in _discover_files(where, fmt).items():
        if table in wanted:
            sources[table] = _Source(table, files, _file_relation(fmt, files))
        else:
            others.append(table)
    return sources, others
