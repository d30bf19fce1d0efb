"""Open an OMOP CDM v5.4 extract read-only and check its schema.

Three layouts are read:

``parquet``
    a folder holding ``<table>.parquet`` or a folder ``<table>/`` of Parquet part files;
``csv``
    a folder holding ``<table>.csv`` or ``<table>.csv.gz`` with a header line, as databases export
    them: empty strings are nulls, dates and datetimes are text (``2024-03-01``,
    ``2024-03-01 09:30:00``, ``2024-03-01T09:30:00``, or ``20240301`` as in vocabulary
    downloads), numbers are text (quoted or not). The delimiter (comma, tab, semicolon or bar)
    is the one the header line uses most; the text is UTF-8 (a byte-order mark is skipped) or
    UTF-16 with a byte-order mark; Windows line ends are read. Anything else is refused rather
    than guessed: text that is not UTF-8 (latin-1, Windows-1252), a file with no header line,
    and rows with more or fewer fields than the header (a cut-short file, a value holding the
    delimiter without quotes), with the line or the rows named;
``duckdb``
    a DuckDB database file, attached read-only; tables are read from schema ``main``, or from
    another schema given as ``fmt="duckdb:<schema>"``.

Table and column names are matched case-insensitively (exports from some databases write
``PERSON_ID``). The format is detected when ``fmt`` is not given: a file is a DuckDB database; a
folder with Parquet files is ``parquet``; a folder with CSV files is ``csv``.

The schema check runs before any heavy work and reports every fault in one :class:`SchemaError`
(on one line when there is one): missing required tables, missing columns the pipeline reads
(with a did-you-mean suggestion for near misses), a column given twice under names that differ
only in case, columns of the wrong type (with example values, the number of rows that do not
convert and how to write them: decimal commas, day/month dates and null markers such as ``NULL``
are named), an empty ``person`` or ``concept``, and ``person`` rows with no or a repeated
person_id. A file that cannot be read at all (a truncated Parquet file, a CSV file in another
encoding or with ragged rows) is an :class:`InputError` naming the table and the file. An empty
``measurement`` table is read, with a sentence in :attr:`Extract.warnings`. Row-level faults
of lab results (unknown person, no time, implausible values, unknown units ...) are not errors:
the recipes quarantine those rows with a reason (``sql/20_measurement_checked.sql``). Then each CDM table is visible on :attr:`Extract.con` as a view under its CDM name
with the full v5.4 column list, typed as :mod:`cohort._cdm` says (columns the source lacks, and
that the pipeline does not read, are typed nulls; source columns outside the CDM are left out).
An optional table the extract lacks (visit_detail, concept_ancestor, care_site) is an empty view
with its full column list, so recipes may always name it; :attr:`Extract.tables` says which
tables the extract really has.

The source is never written: Parquet and CSV are only read, a DuckDB file is attached
``read_only``; intermediate tables are DuckDB temporary tables of the in-memory session.
"""

from __future__ import annotations

import codecs
import csv
import difflib
import gzip
import hashlib
import json
import re
import tempfile
import warnings as _warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from cohort._cdm import CDM_TABLES, KIND_SQL_TYPE, OPTIONAL_TABLES, REQUIRED_TABLES, CdmColumn
from cohort._errors import ExtractWarning, InputError, SchemaError

__all__ = ["Extract", "open_extract", "FORMATS"]

#: Formats :func:`open_extract` reads (``duckdb:<schema>`` selects a schema of a DuckDB file).
FORMATS: tuple[str, ...] = ("parquet", "csv", "duckdb")

_INTEGER_TYPES = {
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
    "UBIGINT", "UHUGEINT", '"NULL"', "NULL",
}
_FLOAT_TYPES = {"FLOAT", "DOUBLE", "REAL"}
#: Integer types whose every value fits the CDM's bigint ids, or its integer concept_ids.
_FITS_INTEGER = {"TINYINT", "SMALLINT", "INTEGER", "UTINYINT", "USMALLINT", '"NULL"', "NULL"}
_FITS_BIGINT = _FITS_INTEGER | {"BIGINT", "UINTEGER"}
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
    rows: int | None = None  # row count, when the schema check has counted it
    malformed: str | None = None  # CSV: SQL condition true for a row with too many or few fields
    twice: list[str] = field(default_factory=list)  # column names given twice (any case)


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
    warnings
        What the schema check accepted but a reader should know (an empty ``measurement`` table),
        one sentence each.

    Use :func:`open_extract` to make one; close it with :meth:`close` or a ``with`` block.
    """

    def __init__(self, path: Path, fmt: str, con: duckdb.DuckDBPyConnection,
                 sources: dict[str, _Source], warnings: tuple[str, ...] = ()) -> None:
        self.path = path
        self.fmt = fmt
        self.con = con
        self._sources = sources
        self.tables: frozenset[str] = frozenset(sources)
        self.warnings: tuple[str, ...] = tuple(warnings)
        self._row_counts: dict[str, int] = {
            table: source.rows for table, source in sources.items() if source.rows is not None}

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


def _parquet_relation(files: list[Path]) -> str:
    listed = "[" + ", ".join(_quote_text(str(file)) for file in files) + "]"
    return f"read_parquet({listed}, union_by_name = true)"


#: Field delimiters a CSV export may use, tried on the header line (ties go to the first).
_CSV_DELIMITERS: tuple[str, ...] = (",", "\t", ";", "|")
_CSV_HEAD_BYTES = 1 << 16


@dataclass(frozen=True)
class _CsvDialect:
    """How one CSV file is written: its encoding, delimiter and header names."""

    encoding: str  # "utf-8" or "utf-16"
    delimiter: str
    names: tuple[str, ...]


def _not_utf8(name: str, line: int | None) -> str:
    where = f" (line {line})" if line is not None else ""
    return (f"{name} is not UTF-8 text{where}: it may be latin-1 or Windows-1252; save it as UTF-8 "
            f"(for example `iconv -f latin1 -t utf-8 {name} > fixed.csv`) or as UTF-16 with a "
            "byte-order mark, and run again (the encoding is never guessed)")


def _csv_dialect(file: Path, table: str) -> _CsvDialect:
    """Read a CSV file's head: encoding from its byte-order mark, delimiter from its header line.

    UTF-8 (with or without a byte-order mark) and UTF-16 little-endian with a byte-order mark are
    read; text that is not valid UTF-8 is refused, not guessed. The delimiter is the one of
    comma, tab, semicolon and bar that occurs most often in the header line.
    """
    opener = gzip.open if file.name.lower().endswith(".gz") else open
    try:
        with opener(file, "rb") as handle:
            head = handle.read(_CSV_HEAD_BYTES)
    except (OSError, EOFError) as error:
        msg = f"table `{table}`: could not read {file.name}: {error}; export the file again"
        raise InputError(msg) from None
    if head.startswith(b"\xfe\xff"):
        msg = (f"table `{table}`: {file.name} is UTF-16 big-endian text, which is not read; save it as UTF-8 "
               "(or UTF-16 little-endian with a byte-order mark) and run again")
        raise InputError(msg)
    if head.startswith(b"\xff\xfe"):
        encoding = "utf-16"
        text = head[2:].decode("utf-16-le", errors="ignore")  # a character cut at the end is dropped
    else:
        encoding = "utf-8"
        body = head[3:] if head.startswith(b"\xef\xbb\xbf") else head
        try:
            text = codecs.getincrementaldecoder("utf-8")().decode(body, final=len(head) < _CSV_HEAD_BYTES)
        except UnicodeDecodeError as error:
            line = body[: error.start].count(b"\n") + 1
            raise InputError(f"table `{table}`: {_not_utf8(file.name, line)}") from None
    lines = text.splitlines()
    header = lines[0] if lines else ""
    if not header.strip():
        msg = (f"table `{table}`: {file.name} is empty: it has no header line; export the table with its header "
               "line (the column names), even when the table has no rows")
        raise InputError(msg)
    delimiter = max(_CSV_DELIMITERS, key=header.count)
    names = [name.strip() for name in next(csv.reader([header], delimiter=delimiter))]
    names = [name or f"column_{index + 1}" for index, name in enumerate(names)]
    return _CsvDialect(encoding, delimiter, tuple(names))


#: Name of the extra column a CSV file is read with: it catches a field beyond the header's.
_OVERFLOW = "dka_overflow_field"
#: The reader's null string, one no export writes: an empty field reads as '' and a missing one
#: (a short row, padded) as null; the views turn '' into null.
_NO_NULL = "\x01"


def _csv_relation(file: Path, dialect: _CsvDialect) -> str:
    """A strict reader of one CSV file: every field text, the header line's names, no sniffing.

    The file is read with one column more than its header names, padded with nulls: a row with
    more fields than the header fills that column, a row with fewer leaves its last named column
    null (an empty field reads as ''); :func:`_check` counts both and refuses the file, so that a
    cut-short file or a value holding the delimiter without quotes never shifts fields silently.
    """
    seen: dict[str, int] = {}
    names = []
    for name in dialect.names:  # two headers equal but for case: keep both, the check refuses them
        count = seen.get(name.lower(), 0)
        seen[name.lower()] = count + 1
        names.append(name if count == 0 else f"{name}__{count + 1}")
    columns = "{" + ", ".join(f"{_quote_text(name)}: 'VARCHAR'" for name in [*names, _OVERFLOW]) + "}"
    return (f"read_csv([{_quote_text(str(file))}], header = true, auto_detect = false, "
            f"columns = {columns}, delim = {_quote_text(dialect.delimiter)}, quote = '\"', "
            f"escape = '\"', nullstr = {_quote_text(_NO_NULL)}, null_padding = true, "
            f"encoding = {_quote_text(dialect.encoding)}, strict_mode = true)")


def _csv_malformed(dialect: _CsvDialect) -> str:
    """SQL condition true for a row read from the file with more or fewer fields than its header."""
    last = dialect.names[-1]
    twice = [name.lower() for name in dialect.names].count(last.lower()) > 1
    short = "" if twice else f" or {_quote_ident(last)} is null"
    return f"{_quote_ident(_OVERFLOW)} is not null{short}"


_SERIAL_CSV = "does not support null_padding in conjunction with quoted new lines"
_CSV_LINE = re.compile(r"CSV Error on Line: (\d+)")
_CSV_FIELDS = re.compile(r"Expected Number of Columns: (\d+) Found: (\d+)")
_ERROR_FILE = re.compile(r"file(?: = |\s+')([^'\n]+)'?", re.IGNORECASE)


def _read_error(table: str, source: _Source, error: duckdb.Error) -> InputError:
    """Turn a DuckDB read failure of one table into an InputError naming table, file and fix."""
    text = str(error)
    first = text.strip().splitlines()[0] if text.strip() else type(error).__name__
    found = _ERROR_FILE.search(text)
    name = Path(found.group(1).strip()).name if found else ", ".join(file.name for file in source.files)
    line_match = _CSV_LINE.search(text)
    line = int(line_match.group(1)) if line_match else None
    if "Invalid unicode" in text:
        msg = f"table `{table}`: {_not_utf8(name, line)}"
    elif (fields := _CSV_FIELDS.search(text)) is not None:
        # the reader has one column more than the header (see _csv_relation)
        header = int(fields.group(1)) - 1
        msg = (f"table `{table}`: line {line} of {name} has {fields.group(2)} field(s), but the header "
               f"line has {header}; the file may be cut short (an interrupted export or "
               "copy) or a value holds the delimiter without quotes: export the table again")
    elif "magic bytes" in text or "too small to be a Parquet file" in text:
        why = "it has no Parquet footer" if "magic bytes" in text else "it is too small to be Parquet"
        msg = (f"table `{table}`: {name} is not a complete Parquet file ({why}); it may be cut "
               "short by an interrupted copy or export: copy or export it again")
    else:
        msg = f"table `{table}`: could not read {name}: {first}; check the file or export it again"
    return InputError(msg)


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
        fits = _FITS_BIGINT if kind == "id" else _FITS_INTEGER
        if upper in fits:
            return "ok"
        if is_int or is_float:
            # whole numbers written as floats (a common export quirk), or integers of a wider
            # type (int64 concept ids from pandas): the values are checked to convert and fit
            return "convert"
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
    """SQL condition true for a non-null source value that does not convert to ``kind``
    (for whole numbers: not a number, not whole, or out of the range of the CDM type)."""
    sql_type = KIND_SQL_TYPE[kind]
    if found.upper() == "VARCHAR":
        text = f"nullif(trim({expr}), '')"
        if kind in ("id", "concept", "int"):
            number = f"try_cast({text} as decimal(38, 10))"
            return (f"{text} is not null and ({number} is null or {number} <> floor({number}) "
                    f"or try_cast({number} as {sql_type}) is null)")
        if kind == "float":
            return f"{text} is not null and try_cast({text} as double) is null"
        if kind in ("date", "datetime"):
            return f"{text} is not null and {_text_timestamp(text)} is null"
    if found.upper() in _INTEGER_TYPES:  # a wider integer type: the value must fit
        return f"{expr} is not null and try_cast({expr} as {sql_type}) is null"
    # numeric (float/decimal) source for an integer kind: whole, finite numbers in range convert
    number = f"cast({expr} as double)"
    return (f"{expr} is not null and (isnan({number}) or isinf({number}) or {number} <> round({number}) "
            f"or try_cast({expr} as {sql_type}) is null)")


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
    try:
        rows = con.execute(f"describe select * from {source.relation}").fetchall()
    except duckdb.Error as error:
        raise _read_error(source.table, source, error) from None
    for name, type_name, *_ in rows:
        lower = str(name).lower()
        if lower == _OVERFLOW:
            continue
        twin = _DEDUPED.match(lower)
        if twin and twin.group(1) in source.columns and twin.group(1) in _CDM_NAMES[source.table]:
            lower = twin.group(1)  # DuckDB renamed a second `person_id` (any case) `person_id_1`
        if lower in source.columns:
            if lower not in source.twice:
                source.twice.append(lower)
            continue
        source.columns[lower] = str(name)
        source.types[lower] = str(type_name)


_DEDUPED = re.compile(r"^(.+)_(\d+)$")
_CDM_NAMES = {table: frozenset(column.name for column in spec) for table, spec in CDM_TABLES.items()}
_WHOLE = re.compile(r"^\s*[-+]?\d+(\.0*)?\s*$")
_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d+,\d+\s*$")


#: Null markers some exports write instead of an empty field (PostgreSQL COPY, R, SQL Server).
_NULL_MARKERS = frozenset({"null", "\\n", "na", "n/a", "nan", "none", "nat"})


def _conversion_hint(kind: str, examples: list[str]) -> str:
    """How to write values of ``kind`` so that they read (after the examples of a fault)."""
    markers = [example for example in examples if example.strip().lower() in _NULL_MARKERS]
    if markers:
        return (f"; '{markers[0]}' looks like a null marker: write a missing value as an empty "
                "field (or as a null in Parquet and DuckDB)")
    if kind in ("date", "datetime"):
        return ("; write dates as YYYY-MM-DD and date-times as YYYY-MM-DD HH:MM:SS (the order of "
                "day and month is never guessed)")
    if kind == "float":
        if any(_DECIMAL_COMMA.match(example) for example in examples):
            return "; these look like decimal commas: write numbers with a decimal point (7.12, not 7,12)"
        return "; write plain numbers with a decimal point (7.12)"
    if examples and all(_WHOLE.match(example) for example in examples):
        low, high = _INTEGER_RANGE[KIND_SQL_TYPE[kind]]
        return (f"; these are out of the range of {KIND_SQL_TYPE[kind]} ({low} .. {high}), the "
                "CDM type of the column: renumber them")
    return "; write whole numbers (digits only)"


def _check(con: duckdb.DuckDBPyConnection, sources: dict[str, _Source], where: str,
           others: list[str]) -> list[str]:
    """Check every table; raise one SchemaError listing every fault, or return warnings."""
    faults: list[str] = []
    warnings: list[str] = []
    for table in REQUIRED_TABLES:
        if table not in sources:
            hint = difflib.get_close_matches(table, others, n=1, cutoff=0.75)
            tip = f"; did you mean `{hint[0]}`?" if hint else ""
            faults.append(f"missing table `{table}` (required){tip}")
    for table, source in sorted(sources.items()):
        spec = CDM_TABLES[table]
        known = {column.name for column in spec}
        extra = [name for name in source.columns if name not in known]
        for lower in sorted(set(source.twice)):
            faults.append(f"`{table}`: column `{lower}` is given twice (names are matched whatever "
                          "their case); keep one of them")
        converting: list[tuple[CdmColumn, str]] = []
        faulty: set[str] = set(source.twice)
        for column in spec:
            if column.name not in source.columns:
                if column.used:
                    hint = difflib.get_close_matches(column.name, extra, n=1, cutoff=0.75)
                    tip = f"; did you mean `{source.columns[hint[0]]}`?" if hint else ""
                    faults.append(f"`{table}`: missing column `{column.name}` "
                                  f"({column.sql_type}){tip}")
                    faulty.add(column.name)
                continue
            found = source.types[column.name]
            verdict = _family_ok(column.kind, found)
            if verdict == "bad" and column.used:
                faults.append(f"`{table}`.`{column.name}`: expected {column.sql_type}, found "
                              f"{found}; write it as {column.sql_type}")
                faulty.add(column.name)
            elif verdict == "convert" and column.used:
                converting.append((column, found))
        if converting and source.relation.startswith("read_parquet"):
            converting = _unproven(con, source, converting)
        # a CSV file is read in full here (every field is text): the row count, the values that
        # do not convert, and any fault of the file itself (encoding, ragged rows) come out of
        # this one scan, before any heavy work
        touch = ([column.name for column in spec if column.name in source.columns]
                 if source.relation.startswith("read_csv") else [])
        for attempt in (1, 2):
            try:
                found_faults = (_conversion_faults(con, table, source, converting, touch)
                                if converting or touch else [])
                table_faults, table_warnings = _content_faults(
                    con, table, source, faulty | {name for name, _ in found_faults})
                break
            except duckdb.Error as error:
                if attempt == 1 and _SERIAL_CSV in str(error):
                    # DuckDB's parallel CSV scanner cannot pad short rows when a quoted value
                    # holds a line break: read this file with one scanner (slower, as strict)
                    source.relation = source.relation.replace(
                        "strict_mode = true)", "strict_mode = true, parallel = false)")
                    continue
                raise _read_error(table, source, error) from None
        faults.extend(text for _, text in found_faults)
        faults.extend(table_faults)
        warnings.extend(table_warnings)
    if len(faults) == 1:
        stop = "" if faults[0].endswith("?") else "."
        msg = (f"the extract at {where} does not fit the OMOP CDM v5.4 shape dka-cohort reads: "
               f"{faults[0]}{stop} Fix the extract (or rename the tables and columns to their CDM "
               "v5.4 names) and run again.")
        raise SchemaError(msg)
    if faults:
        lines = "\n".join(f"  - {fault}" for fault in faults)
        msg = (f"the extract at {where} does not fit the OMOP CDM v5.4 shape dka-cohort reads "
               f"({len(faults)} problem(s)):\n{lines}\nFix the extract (or rename the tables and "
               "columns to their CDM v5.4 names) and run again.")
        raise SchemaError(msg)
    return warnings


_INTEGER_RANGE: dict[str, tuple[int, int]] = {
    "integer": (-(2**31), 2**31 - 1),
    "bigint": (-(2**63), 2**63 - 1),
}


def _unproven(con: duckdb.DuckDBPyConnection, source: _Source,
              converting: list[tuple[CdmColumn, str]]) -> list[tuple[CdmColumn, str]]:
    """Drop the wider-integer Parquet columns whose row-group statistics prove every value fits.

    Extracts written by pandas or Spark store every integer as int64; the CDM's concept_ids are
    32-bit. The min and max of each row group (Parquet metadata, no data read) settle it for
    almost every file; a column with a row group lacking statistics is scanned.
    """
    wide = [(column, found) for column, found in converting if found.upper() in _INTEGER_TYPES]
    if not wide:
        return converting
    files = ", ".join(_quote_text(str(file)) for file in source.files)
    stats = {str(name): (low, high, unknown) for name, low, high, unknown in con.execute(
        "select path_in_schema, min(try_cast(stats_min_value as hugeint)), "
        "max(try_cast(stats_max_value as hugeint)), "
        "count(*) filter (where (stats_min_value is null or stats_max_value is null) "
        "and coalesce(stats_null_count, -1) < num_values) "
        f"from parquet_metadata([{files}]) group by path_in_schema").fetchall()}
    proven = set()
    for column, _ in wide:
        low, high, unknown = stats.get(source.columns[column.name], (None, None, 1))
        floor, ceiling = _INTEGER_RANGE[column.sql_type]
        if not unknown and (low is None or floor <= low) and (high is None or high <= ceiling):
            proven.add(column.name)
    return [(column, found) for column, found in converting if column.name not in proven]


def _conversion_faults(con: duckdb.DuckDBPyConnection, table: str, source: _Source,
                       converting: list[tuple[CdmColumn, str]],
                       touch: list[str]) -> list[tuple[str, str]]:
    """Count, in one scan, the rows of each column whose values do not convert.

    ``touch`` names further columns the scan reads (so that a CSV file is decoded in full) and
    makes it count the rows too. Returns (column, fault) pairs.
    """
    counts = []
    for index, (column, found) in enumerate(converting):
        condition = _failure_condition(column.kind, _quote_ident(source.columns[column.name]), found)
        counts.append(f"count(*) filter (where {condition}) as bad_{index}")
    if touch:
        counts.append("count(*) as row_count")
        counts.append(f"count(*) filter (where {source.malformed or 'false'}) as malformed")
        counts.extend(f"count({_quote_ident(source.columns[name])}) as seen_{index}"
                      for index, name in enumerate(touch))
    row = con.execute(f"select {', '.join(counts)} from {source.relation}").fetchall()[0]
    if touch:
        source.rows = int(row[len(converting)])
        if int(row[len(converting) + 1]):
            raise _malformed_error(con, table, source, int(row[len(converting) + 1]))
    faults = []
    for index, (column, found) in enumerate(converting):
        bad = int(row[index])
        if not bad:
            continue
        expr = _quote_ident(source.columns[column.name])
        condition = _failure_condition(column.kind, expr, found)
        examples = [str(value[0]) for value in con.execute(
            f"select distinct cast({expr} as varchar) as example from {source.relation} "
            f"where {condition} order by example limit {_EXAMPLES}"
        ).fetchall()]
        shown = ", ".join(f"'{value}'" for value in examples)  # as written, not escaped
        faults.append((column.name,
                       f"`{table}`.`{column.name}`: expected {column.sql_type}, found {found} with "
                       f"{bad} row(s) that do not convert (for example {shown})"
                       f"{_conversion_hint(column.kind, examples)}"))
    return faults


def _malformed_error(con: duckdb.DuckDBPyConnection, table: str, source: _Source,
                     count: int) -> InputError:
    """A CSV file with rows of more or fewer fields than its header line."""
    first = next(iter(source.columns.values()))
    examples = con.execute(
        f"select distinct {_quote_ident(first)} as first from {source.relation} "
        f"where {source.malformed} order by first limit {_EXAMPLES}").fetchall()
    shown = ", ".join(repr(value[0]) for value in examples)
    msg = (f"table `{table}`: {count} row(s) of {source.files[0].name} have more or fewer fields "
           f"than the {len(source.columns)} of its header line, for example the row(s) whose first "
           f"field is {shown}; the file may be cut short (an interrupted export or copy) or a value "
           "holds the delimiter without quotes: export the table again")
    return InputError(msg)


#: Tables that must hold rows: without persons or a vocabulary nothing can be found, and an
#: empty vocabulary would pass every measurement row off as "another analyte".
_NOT_EMPTY: dict[str, str] = {
    "person": "the extract needs its persons (one row each)",
    "concept": ("the code lists are resolved through concept (vocabulary_id, concept_code): load "
                "the OMOP vocabulary tables into the extract"),
}


def _table_rows(con: duckdb.DuckDBPyConnection, source: _Source) -> int:
    if source.rows is None:
        if source.relation.startswith("read_parquet"):
            files = ", ".join(_quote_text(str(file)) for file in source.files)
            sql = f"select coalesce(sum(num_rows), 0) from parquet_file_metadata([{files}])"
        else:
            sql = f"select count(*) from {source.relation}"
        source.rows = int(con.execute(sql).fetchall()[0][0])
    return source.rows


def _content_faults(con: duckdb.DuckDBPyConnection, table: str, source: _Source,
                    faulty: set[str]) -> tuple[list[str], list[str]]:
    """Faults of content the recipes cannot quarantine row by row, and warnings.

    ``person`` must have rows and one row per person_id (no nulls, no repeats: a repeated
    person would count twice in every denominator); ``concept`` must have rows. An empty
    ``measurement`` is accepted with a warning (no lab-based episode can be found).
    """
    faults: list[str] = []
    warnings: list[str] = []
    if table in _NOT_EMPTY or table == "measurement":
        rows = _table_rows(con, source)
        if rows == 0 and table in _NOT_EMPTY:
            faults.append(f"`{table}` has no rows; {_NOT_EMPTY[table]}")
        elif rows == 0:
            warnings.append("table `measurement` has no rows: no lab result can be read, so no "
                            "lab-based episode can be found")
    if table == "person" and "person_id" not in faulty and "person_id" in source.columns:
        column = next(column for column in CDM_TABLES["person"] if column.name == "person_id")
        typed = _typed_expr(column, source)
        rows, with_id, distinct = con.execute(
            f"select count(*), count(person_id), count(distinct person_id) from "
            f"(select {typed} as person_id from {source.relation}) as ids").fetchall()[0]
        nulls = int(rows) - int(with_id)
        repeated = repeated_rows = 0
        if distinct < with_id:  # rare: only then find which ids repeat
            repeated, repeated_rows = con.execute(
                f"select count(*), sum(copies) from (select person_id, count(*) as copies from "
                f"(select {typed} as person_id from {source.relation}) as ids where person_id is "
                "not null group by person_id having count(*) > 1) as repeats").fetchall()[0]
        if nulls:
            faults.append(f"`person`.`person_id`: {nulls} of {rows} row(s) have no person_id; "
                          "every person row needs one")
        if repeated:
            examples = con.execute(
                f"select person_id, count(*) as copies from (select {typed} as person_id from "
                f"{source.relation}) as ids where person_id is not null group by person_id "
                f"having count(*) > 1 order by person_id limit {_EXAMPLES}"
            ).fetchall()
            shown = ", ".join(f"{value} ({copies} rows)" for value, copies in examples)
            faults.append(f"`person`.`person_id`: {repeated} person_id value(s) occur on more than "
                          f"one row ({repeated_rows} rows in all; for example {shown}); person "
                          "holds one row per person: remove the repeated rows")
    return faults, warnings


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
        The path does not exist, its format cannot be told, or a file cannot be read (a truncated
        Parquet or DuckDB file; a CSV file that is empty, not UTF-8, or has ragged rows).
    SchemaError
        Tables or columns are missing or wrongly typed, ``person`` or ``concept`` is empty, or
        ``person`` has null or repeated person_id values (every fault listed at once).

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
        warnings = _check(con, sources, str(where), others)
        _create_views(con, sources)
    except BaseException:
        con.close()
        raise
    for sentence in warnings:  # also on Extract.warnings; the command line shows them as notes
        _warnings.warn(sentence, ExtractWarning, stacklevel=2)
    return Extract(where, chosen if base == "duckdb" and schema != "main" else base, con, sources,
                   tuple(warnings))


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
            msg = (f"could not open {where} as a DuckDB database (read-only): {error}; check "
                   "that it is a complete DuckDB database file (copy or export it again)")
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
            if fmt == "parquet":
                sources[table] = _Source(table, files, _parquet_relation(files))
                continue
            dialect = _csv_dialect(files[0], table)  # one file a table (see _discover_files)
            source = _Source(table, files, _csv_relation(files[0], dialect))
            lowered = [name.lower() for name in dialect.names]
            source.twice.extend(sorted({name for name in lowered if lowered.count(name) > 1}))
            source.malformed = _csv_malformed(dialect)
            sources[table] = source
        else:
            others.append(table)
    return sources, others
