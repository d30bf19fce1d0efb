"""The bad-input corpus of issue 9: broken extracts, each with the exact outcome written beside it.

Every case is built in code from a small clean extract (``tests/cdmkit.py``, invented data of the
fictional Harrowmere Valley Health network) and written in each format where the fault can occur
(Parquet folder, CSV folder, DuckDB file). A case ends in one of three ways, never in a traceback
and never in a silent drop:

``REFUSED``
    :func:`cohort.source.open_extract` raises :class:`SchemaError` or :class:`InputError` before
    any heavy work, with the exact message in the table (naming the table, the column, example
    values and the row count, and how to fix it); ``dka-cohort episodes`` on the same extract
    exits with code 2 and prints that message after ``dka-cohort: error:``, without a traceback.
``QUARANTINED``
    the rows are read; the rows that cannot be used are quarantined with the reason and count in
    the table (the reasons of ``sql/20_measurement_checked.sql``), and the reconciliation identity
    rows read = used + quarantined + other analytes holds.
``ACCEPTED``
    a quirk of real exports (case of names, extra columns, delimiters, byte-order marks, quoted
    numbers, Windows line ends, numbers and dates as text, parts of one table with different
    column types) reads to exactly the rows of the clean extract.

The table and column names and types are those of the OMOP CDM v5.4 DDL (OHDSI CommonDataModel,
OMOPCDM_duckdb_5.4_ddl.sql) [from memory]. The plausible ranges behind `implausible` are the
documented ones of cohort/codelists/units.csv (common practice). The quirks listed are common
practice of database exports (no single source).
"""

from __future__ import annotations

import datetime as dt
import functools
import gzip
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from cohort._errors import CohortError, ExtractWarning, InputError, SchemaError
from cohort._labs import DATA_QUALITY_REASONS, prepare_lab_events
from cohort.cli import main
from cohort.source import open_extract
from tests.cdmkit import MiniCdm

FORMATS = ("parquet", "csv", "duckdb")
Tables = dict[str, pa.Table]

_SCHEMA_TAIL = (" Fix the extract (or rename the tables and columns to their CDM v5.4 names) and "
                "run again.")
_DATE_HINT = ("; write dates as YYYY-MM-DD and date-times as YYYY-MM-DD HH:MM:SS (the order of day "
              "and month is never guessed)")
_NUMBER_HINT = "; write plain numbers with a decimal point (7.12)"
_MARKER_HINT = ("; {} looks like a null marker: write a missing value as an empty field (or as a "
                "null in Parquet and DuckDB)")
_WHOLE_HINT = "; write whole numbers (digits only)"
_DUCKDB_TAIL = ("; check that it is a complete DuckDB database file (copy or export it again)")
_FIELDS_TAIL = ("; the file may be cut short (an interrupted export or copy) or a value holds the "
                "delimiter without quotes: export the table again")
_NOT_UTF8_TAIL = (": it may be latin-1 or Windows-1252; save it as UTF-8 (for example `iconv -f "
                  "latin1 -t utf-8 measurement.csv > fixed.csv`) or as UTF-16 with a byte-order "
                  "mark, and run again (the encoding is never guessed)")


def _one_fault(fault: str) -> str:
    """The whole SchemaError message for an extract with one fault (``{path}`` is filled later)."""
    stop = "" if fault.endswith("?") else "."  # a did-you-mean question ends the sentence
    return ("the extract at {path} does not fit the OMOP CDM v5.4 shape dka-cohort reads: "
            + fault + stop + _SCHEMA_TAIL)


# ----------------------------------------------------------------------------- the clean extract
def _clean() -> MiniCdm:
    """Two persons, one ERIP visit, four lab rows (measurement_id 1..4), a diagnosis, an infusion."""
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01", gender="F")
    cdm.person(2, birth="1990-01-01", gender="M")
    cdm.visit(10, person_id=1, start="2024-03-01 09:00", end="2024-03-04 12:00", kind="ERIP")
    cdm.lab(1, "2746-6", 7.12, unit="[pH]", at="2024-03-01 09:30", visit=10)        # id 1
    cdm.lab(1, "14749-6", 25.0, unit="mmol/L", at="2024-03-01 09:30", visit=10)     # id 2
    cdm.lab(1, "1963-8", 12.0, unit="mmol/L", at="2024-03-01 09:30", visit=10)      # id 3
    cdm.lab(2, "14749-6", 6.1, unit="mmol/L", at="2024-05-01 10:00")                # id 4
    cdm.condition(1, "E10.10", at="2024-03-01 10:00", visit=10)
    cdm.drug(1, "253182", start="2024-03-01 10:30", end="2024-03-02 08:00", route="intravenous",
             visit=10)
    return cdm


def _set(tables: Tables, table: str, column: str, values: list, kind: pa.DataType | None = None) -> None:
    frame = tables[table]
    index = frame.column_names.index(column)
    tables[table] = frame.set_column(index, column, pa.array(values, type=kind))


def _rename(tables: Tables, table: str, old: str, new: str) -> None:
    tables[table] = tables[table].rename_columns(
        [new if name == old else name for name in tables[table].column_names])


def _write(tables: Tables, target: Path, fmt: str, *, delimiter: str = ",",
           parts: dict[str, int] | None = None) -> Path:
    """Write Arrow tables as a Parquet folder, a CSV folder (an export: empty string for null,
    ISO dates as text) or a DuckDB file, and return the path."""
    if fmt == "parquet":
        target.mkdir(parents=True)
        for name, table in tables.items():
            count = (parts or {}).get(name)
            if count:
                (target / name).mkdir()
                size = -(-table.num_rows // count)
                for index in range(count):
                    pq.write_table(table.slice(index * size, size), target / name / f"part-{index:03d}.parquet")
            else:
                pq.write_table(table, target / f"{name}.parquet")
        return target
    con = duckdb.connect(str(target) if fmt == "duckdb" else ":memory:")
    try:
        if fmt == "csv":
            target.mkdir(parents=True)
        for name, table in tables.items():
            con.register("frame", table)
            if fmt == "duckdb":
                con.execute(f'create table "{name}" as select * from frame')
            else:
                file = str(target / f"{name}.csv").replace("'", "''")
                con.execute(f"copy frame to '{file}' (header, delimiter '{delimiter}', nullstr '', "
                            "timestampformat '%Y-%m-%d %H:%M:%S', dateformat '%Y-%m-%d')")
            con.unregister("frame")
    finally:
        con.close()
    return target


def _extract_path(tmp_path: Path, fmt: str) -> Path:
    return tmp_path / ("extract.duckdb" if fmt == "duckdb" else f"extract_{fmt}")


# ----------------------------------------------------------------------------- REFUSED
@dataclass(frozen=True)
class Refused:
    """A bad extract that must be refused before heavy work, with this exact message."""

    name: str
    formats: tuple[str, ...]
    error: type[CohortError]
    message: str | dict[str, str]  # one text, or one per format; {path} is the extract's path
    change: Callable[[Tables], None] | None = None  # on the clean Arrow tables before writing
    after: Callable[[Path], None] | None = None  # on the written files
    delimiter: str = ","
    parts: dict[str, int] = field(default_factory=dict)
    builder: Callable[[], MiniCdm] = _clean


def _drop_table(name: str) -> Callable[[Tables], None]:
    def change(tables: Tables) -> None:
        del tables[name]
    return change


def _rename_table(old: str, new: str) -> Callable[[Tables], None]:
    def change(tables: Tables) -> None:
        tables[new] = tables.pop(old)
    return change


def _drop_column(table: str, column: str) -> Callable[[Tables], None]:
    def change(tables: Tables) -> None:
        tables[table] = tables[table].drop_columns([column])
    return change


def _rename_column(table: str, old: str, new: str) -> Callable[[Tables], None]:
    def change(tables: Tables) -> None:
        _rename(tables, table, old, new)
    return change


def _column(table: str, column: str, values: list, kind: pa.DataType | None = None) -> Callable[[Tables], None]:
    def change(tables: Tables) -> None:
        _set(tables, table, column, values, kind)
    return change


def _empty(table: str) -> Callable[[Tables], None]:
    def change(tables: Tables) -> None:
        tables[table] = tables[table].slice(0, 0)
    return change


def _repeat_person(tables: Tables) -> None:
    person = tables["person"]
    tables["person"] = pa.concat_tables([person, person.slice(0, 1), person.slice(0, 1)])


def _two_faults(tables: Tables) -> None:
    del tables["death"]
    _rename(tables, "measurement", "value_as_number", "value_as_numbr")


def _case_twin_column(tables: Tables) -> None:
    person = tables["person"]
    tables["person"] = person.append_column("PERSON_ID", person.column("person_id"))


def _twin_header(path: Path) -> None:
    """In a CSV export the second name is written as it is (DuckDB's writer renamed it)."""
    file = path / "person.csv"
    if file.is_file():
        file.write_text(file.read_text().replace(",PERSON_ID_1\n", ",PERSON_ID\n", 1))


def _two_fields_more(path: Path) -> None:
    file = path / "measurement.csv"
    lines = file.read_text().splitlines()
    lines[2] += ",x,y"
    file.write_text("\n".join(lines) + "\n")


def _cut_parquet(name: str, keep: float) -> Callable[[Path], None]:
    def after(path: Path) -> None:
        file = path / name
        data = file.read_bytes()
        file.write_bytes(data[: int(len(data) * keep)])
    return after


def _cut_last_csv_line(path: Path) -> None:
    """An interrupted export: the file ends inside its last row (after 10 of its 23 fields)."""
    file = path / "measurement.csv"
    lines = file.read_text().splitlines()
    lines[-1] = ",".join(lines[-1].split(",")[:10])
    file.write_text("\n".join(lines))


def _unquote_comma(path: Path) -> None:
    """A value holding the delimiter, written without quotes (a hand-made export)."""
    file = path / "measurement.csv"
    file.write_text(file.read_text().replace('"2+, moderate"', "2+, moderate"))


def _as_latin1(path: Path) -> None:
    file = path / "measurement.csv"
    file.write_bytes(file.read_text().encode("latin-1"))


def _as_utf16_be(path: Path) -> None:
    file = path / "measurement.csv"
    file.write_bytes(b"\xfe\xff" + file.read_text().encode("utf-16-be"))


def _zero_bytes(name: str) -> Callable[[Path], None]:
    def after(path: Path) -> None:
        (path / name).write_bytes(b"")
    return after


def _also_gzipped(path: Path) -> None:
    data = (path / "measurement.csv").read_bytes()
    (path / "measurement.csv.gz").write_bytes(gzip.compress(data))


def _cut_gzip(path: Path) -> None:
    """measurement.csv.gz whose copy stopped half-way."""
    data = gzip.compress((path / "measurement.csv").read_bytes())
    (path / "measurement.csv").unlink()
    (path / "measurement.csv.gz").write_bytes(data[: len(data) // 2])


def _cut_duckdb(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[:5000])


def _not_a_database(path: Path) -> None:
    path.write_text("person_id,year_of_birth\n1,1980\n")


def _many_rows_latin1_at_end() -> MiniCdm:
    """3,000 rows of another analyte (past the 64 KiB head read in Python), the last one latin-1."""
    cdm = _clean()
    for index in range(3_000):
        cdm.lab(2, "718-7", 13.5, unit="g/dL", at="2024-05-01 10:00",
                value_source="négatif" if index == 2_999 else None)
    return cdm


def _latin1_late(path: Path) -> None:
    file = path / "measurement.csv"
    file.write_bytes(file.read_text().encode("latin-1"))


def _text_part(path: Path) -> None:
    """Part 2 of measurement/ holds value_as_number as text, one value not a number."""
    file = path / "measurement" / "part-001.parquet"
    table = pq.read_table(file)
    index = table.column_names.index("value_as_number")
    values = ["12.0", "n/a"][: table.num_rows]
    pq.write_table(table.set_column(index, "value_as_number", pa.array(values)), file)


_EPOCHS = [1709285400, 1709285400, 1709285400, 1714557600]  # 2024-03-01 09:30, 2024-05-01 10:00 UTC

REFUSED: tuple[Refused, ...] = (
    Refused("missing table", FORMATS, SchemaError,
            _one_fault("missing table `measurement` (required)"), change=_drop_table("measurement")),
    Refused("misnamed table", FORMATS, SchemaError,
            _one_fault("missing table `measurement` (required); did you mean `measurements`?"),
            change=_rename_table("measurement", "measurements")),
    Refused("missing column", FORMATS, SchemaError,
            _one_fault("`measurement`: missing column `unit_concept_id` (integer)"),
            change=_drop_column("measurement", "unit_concept_id")),
    Refused("misspelled column", FORMATS, SchemaError,
            _one_fault("`measurement`: missing column `value_as_number` (double); did you mean "
                       "`value_as_numbr`?"),
            change=_rename_column("measurement", "value_as_number", "value_as_numbr")),
    Refused("every fault at once", FORMATS, SchemaError,
            "the extract at {path} does not fit the OMOP CDM v5.4 shape dka-cohort reads "
            "(2 problem(s)):\n  - missing table `death` (required)\n  - `measurement`: missing "
            "column `value_as_number` (double); did you mean `value_as_numbr`?\nFix the extract (or "
            "rename the tables and columns to their CDM v5.4 names) and run again.",
            change=_two_faults),
    Refused("text dates in odd formats", FORMATS, SchemaError,
            _one_fault("`measurement`.`measurement_datetime`: expected timestamp, found VARCHAR with "
                       "3 row(s) that do not convert (for example '01/03/2024 09:30', "
                       "'1 March 2024 09:30')" + _DATE_HINT),
            change=_column("measurement", "measurement_datetime",
                           ["01/03/2024 09:30", "01/03/2024 09:30", "1 March 2024 09:30",
                            "2024-05-01T10:00"])),
    Refused("impossible calendar date", FORMATS, SchemaError,
            _one_fault("`measurement`.`measurement_date`: expected date, found VARCHAR with 1 "
                       "row(s) that do not convert (for example '2024-02-30')" + _DATE_HINT),
            change=_column("measurement", "measurement_date",
                           ["2024-03-01", "2024-03-01", "2024-02-30", "2024-05-01"])),
    Refused("datetimes as epoch numbers", FORMATS, SchemaError, {
        "parquet": _one_fault("`measurement`.`measurement_datetime`: expected timestamp, found "
                              "BIGINT; write it as timestamp"),
        "duckdb": _one_fault("`measurement`.`measurement_datetime`: expected timestamp, found "
                             "BIGINT; write it as timestamp"),
        "csv": _one_fault("`measurement`.`measurement_datetime`: expected timestamp, found VARCHAR "
                          "with 4 row(s) that do not convert (for example '1709285400', "
                          "'1714557600')" + _DATE_HINT),
    }, change=_column("measurement", "measurement_datetime", _EPOCHS, pa.int64())),
    Refused("datetimes as booleans", ("parquet", "duckdb"), SchemaError,
            _one_fault("`measurement`.`measurement_datetime`: expected timestamp, found BOOLEAN; "
                       "write it as timestamp"),
            change=_column("measurement", "measurement_datetime", [True, False, True, False])),
    Refused("numbers stored as text, some not numbers", FORMATS, SchemaError,
            _one_fault("`measurement`.`value_as_number`: expected double, found VARCHAR with 2 "
                       "row(s) that do not convert (for example '<0.1', 'high')" + _NUMBER_HINT),
            change=_column("measurement", "value_as_number", ["7.12", "high", "<0.1", "6.1"])),
    Refused("decimal commas", FORMATS, SchemaError,
            _one_fault("`measurement`.`value_as_number`: expected double, found VARCHAR with 4 "
                       "row(s) that do not convert (for example '12,0', '25,0', '6,1'); these look "
                       "like decimal commas: write numbers with a decimal point (7.12, not 7,12)"),
            change=_column("measurement", "value_as_number", ["7,12", "25,0", "12,0", "6,1"]),
            delimiter=";"),
    Refused("fractional person_id", FORMATS, SchemaError, {
        "parquet": _one_fault("`measurement`.`person_id`: expected bigint, found DOUBLE with 1 "
                              "row(s) that do not convert (for example '1.5')" + _WHOLE_HINT),
        "duckdb": _one_fault("`measurement`.`person_id`: expected bigint, found DOUBLE with 1 "
                             "row(s) that do not convert (for example '1.5')" + _WHOLE_HINT),
        "csv": _one_fault("`measurement`.`person_id`: expected bigint, found VARCHAR with 1 "
                          "row(s) that do not convert (for example '1.5')" + _WHOLE_HINT),
    }, change=_column("measurement", "person_id", [1.0, 1.5, 1.0, 2.0])),
    Refused("concept_id beyond 32 bits", FORMATS, SchemaError, {
        fmt: _one_fault(f"`measurement`.`measurement_concept_id`: expected integer, found {found} "
                        "with 1 row(s) that do not convert (for example '3000000000'); these are "
                        "out of the range of integer (-2147483648 .. 2147483647), the CDM type of "
                        "the column: renumber them")
        for fmt, found in (("parquet", "BIGINT"), ("duckdb", "BIGINT"), ("csv", "VARCHAR"))
    }, change=_column("measurement", "measurement_concept_id",
                      [3_000_000_000, 2_000_000_002, 2_000_000_003, 2_000_000_002], pa.int64())),
    Refused("measurement_id beyond 64 bits, as text", FORMATS, SchemaError,
            _one_fault("`measurement`.`measurement_id`: expected bigint, found VARCHAR with 1 "
                       "row(s) that do not convert (for example '99999999999999999999'); these "
                       "are out of the range of bigint (-9223372036854775808 .. "
                       "9223372036854775807), the CDM type of the column: renumber them"),
            change=_column("measurement", "measurement_id", ["99999999999999999999", "2", "3", "4"])),
    Refused("date-times stored as dates", ("parquet", "duckdb"), SchemaError,
            _one_fault("`measurement`.`measurement_datetime`: expected timestamp, found DATE; "
                       "write it as timestamp"),
            change=_column("measurement", "measurement_datetime",
                           [dt.date(2024, 3, 1)] * 3 + [dt.date(2024, 5, 1)])),
    Refused("duplicate person_id in person", FORMATS, SchemaError,
            _one_fault("`person`.`person_id`: 1 person_id value(s) occur on more than one row "
                       "(3 rows in all; for example 1 (3 rows)); person holds one row per person: "
                       "remove the repeated rows"),
            change=_repeat_person),
    Refused("person row without person_id", FORMATS, SchemaError,
            _one_fault("`person`.`person_id`: 1 of 2 row(s) have no person_id; every person row "
                       "needs one"),
            change=_column("person", "person_id", [1, None], pa.int64())),
    Refused("empty person table", FORMATS, SchemaError,
            _one_fault("`person` has no rows; the extract needs its persons (one row each)"),
            change=_empty("person")),
    Refused("empty concept table", FORMATS, SchemaError,
            _one_fault("`concept` has no rows; the code lists are resolved through concept "
                       "(vocabulary_id, concept_code): load the OMOP vocabulary tables into the "
                       "extract"),
            change=_empty("concept")),
    Refused("column name twice, differing in case", ("parquet", "csv"), SchemaError,
            _one_fault("`person`: column `person_id` is given twice (names are matched whatever "
                       "their case); keep one of them"),
            change=_case_twin_column, after=_twin_header),
    Refused("rows with two fields too many", ("csv",), InputError,
            "table `measurement`: line 3 of measurement.csv has 25 field(s), but the header line "
            "has 23" + _FIELDS_TAIL,
            after=_two_fields_more),
    Refused("a part of one table with a text column", ("parquet",), SchemaError,
            _one_fault("`measurement`.`value_as_number`: expected double, found VARCHAR with 1 "
                       "row(s) that do not convert (for example 'n/a')" + _MARKER_HINT.format("'n/a'")),
            after=_text_part, parts={"measurement": 2}),
    Refused("nulls written as NULL or \\N", FORMATS, SchemaError,
            _one_fault("`measurement`.`visit_occurrence_id`: expected bigint, found VARCHAR with 2 "
                       "row(s) that do not convert (for example 'NULL', '\\N')"
                       + _MARKER_HINT.format("'NULL'")),
            change=_column("measurement", "visit_occurrence_id", ["10", "NULL", "\\N", ""])),
    Refused("truncated Parquet file", ("parquet",), InputError,
            "table `measurement`: measurement.parquet is not a complete Parquet file (it has no "
            "Parquet footer); it may be cut short by an interrupted copy or export: copy or export "
            "it again",
            after=_cut_parquet("measurement.parquet", 0.5)),
    Refused("truncated Parquet part file", ("parquet",), InputError,
            "table `measurement`: part-001.parquet is not a complete Parquet file (it has no "
            "Parquet footer); it may be cut short by an interrupted copy or export: copy or export "
            "it again",
            after=_cut_parquet("measurement/part-001.parquet", 0.9), parts={"measurement": 2}),
    Refused("zero-byte Parquet file", ("parquet",), InputError,
            "table `person`: person.parquet is not a complete Parquet file (it is too small to be "
            "Parquet); it may be cut short by an interrupted copy or export: copy or export it "
            "again",
            after=_zero_bytes("person.parquet")),
    Refused("CSV cut inside its last row", ("csv",), InputError,
            "table `measurement`: 1 row(s) of measurement.csv have more or fewer fields than the 23 "
            "of its header line, for example the row(s) whose first field is '4'" + _FIELDS_TAIL,
            after=_cut_last_csv_line),
    Refused("CSV value holding the delimiter unquoted", ("csv",), InputError,
            "table `measurement`: 1 row(s) of measurement.csv have more or fewer fields than the 23 "
            "of its header line, for example the row(s) whose first field is '1'" + _FIELDS_TAIL,
            change=_column("measurement", "value_source_value", ["2+, moderate", None, None, None]),
            after=_unquote_comma),
    Refused("CSV in latin-1", ("csv",), InputError,
            "table `measurement`: measurement.csv is not UTF-8 text (line 3)" + _NOT_UTF8_TAIL,
            change=_column("measurement", "value_source_value", [None, "négatif", None, None]),
            after=_as_latin1),
    Refused("CSV in latin-1, the bad byte past the first 64 KiB", ("csv",), InputError,
            "table `measurement`: measurement.csv is not UTF-8 text (line 3005)" + _NOT_UTF8_TAIL,
            builder=_many_rows_latin1_at_end, after=_latin1_late),
    Refused("CSV in UTF-16 big-endian", ("csv",), InputError,
            "table `measurement`: measurement.csv is UTF-16 big-endian text, which is not read; "
            "save it as UTF-8 (or UTF-16 little-endian with a byte-order mark) and run again",
            after=_as_utf16_be),
    Refused("zero-byte CSV file", ("csv",), InputError,
            "table `measurement`: measurement.csv is empty: it has no header line; export the "
            "table with its header line (the column names), even when the table has no rows",
            after=_zero_bytes("measurement.csv")),
    Refused("truncated CSV.gz file", ("csv",), InputError,
            "table `measurement`: could not read measurement.csv.gz: Compressed file ended before "
            "the end-of-stream marker was reached; export the file again",
            after=_cut_gzip),
    Refused("a table given as CSV and as CSV.gz", ("csv",), InputError,
            "extract folder {path} holds table `measurement` more than once (measurement.csv, "
            "measurement.csv.gz); keep one of them",
            after=_also_gzipped),
    Refused("truncated DuckDB file", ("duckdb",), InputError,
            "could not open {path} as a DuckDB database (read-only): IO Error: Could not read "
            "enough bytes from file \"{path}\": attempted to read 3192 bytes from location 5000"
            + _DUCKDB_TAIL,
            after=_cut_duckdb),
    Refused("a CSV file named as a DuckDB file", ("duckdb",), InputError,
            "could not open {path} as a DuckDB database (read-only): IO Error: The file "
            "\"{path}\" exists, but it is not a valid DuckDB database file!" + _DUCKDB_TAIL,
            after=_not_a_database),
)


def _cases(table: tuple) -> list:
    return [pytest.param(case, fmt, id=f"{case.name}-{fmt}") for case in table for fmt in case.formats]


@functools.cache
def _clean_tables() -> Tables:
    return _clean().tables()


def _build(case: Refused | Quarantined | Accepted, tmp_path: Path, fmt: str) -> Path:
    tables = dict(_clean_tables()) if case.builder is _clean else case.builder().tables()
    if case.change is not None:
        case.change(tables)
    path = _write(tables, _extract_path(tmp_path, fmt), fmt, delimiter=case.delimiter,
                  parts=case.parts)
    if case.after is not None:
        case.after(path)
    return path


@pytest.mark.parametrize(("case", "fmt"), _cases(REFUSED))
def test_bad_extract_is_refused_with_the_exact_message(case: Refused, fmt: str, tmp_path: Path,
                                                       capsys: pytest.CaptureFixture[str]) -> None:
    path = _build(case, tmp_path, fmt)
    template = case.message[fmt] if isinstance(case.message, dict) else case.message
    expected = template.replace("{path}", str(path.resolve()))
    with pytest.raises(case.error) as caught:
        open_extract(path)
    assert str(caught.value) == expected
    if fmt != case.formats[0]:
        return  # the command line is checked on the first format of each case
    # the command line: one message after `dka-cohort: error:`, exit code 2, no traceback
    capsys.readouterr()
    code = main(["episodes", "--source", str(path), "--out", str(tmp_path / "out"), "--quiet"])
    printed = capsys.readouterr()
    assert code == 2
    assert printed.err == f"dka-cohort: error: {expected}\n"
    assert "Traceback" not in printed.err + printed.out
    assert not (tmp_path / "out").exists()


# ----------------------------------------------------------------------------- QUARANTINED
@dataclass(frozen=True)
class Quarantined:
    """Bad rows that are read and quarantined: the measurement reasons and counts expected."""

    name: str
    builder: Callable[[], MiniCdm]
    reasons: dict[str, int]
    formats: tuple[str, ...] = FORMATS
    change: Callable[[Tables], None] | None = None
    after: Callable[[Path], None] | None = None
    delimiter: str = ","
    parts: dict[str, int] = field(default_factory=dict)


def _with(*adds: Callable[[MiniCdm], object]) -> Callable[[], MiniCdm]:
    def builder() -> MiniCdm:
        cdm = _clean()
        for add in adds:
            add(cdm)
        return cdm
    return builder


def _unit_only_as_text(cdm: MiniCdm) -> None:
    """unit_concept_id 0, the unit only in unit_source_value: never guessed from the text."""
    cdm.lab(1, "14749-6", 25.0, unit=None, at="2024-03-01 11:00")
    cdm._rows["measurement"][-1]["unit_source_value"] = "mmol/l"


def _all_values_null(tables: Tables) -> None:
    _set(tables, "measurement", "value_as_number", [None] * 4, pa.float64())


def _null_measurement_person(tables: Tables) -> None:
    _set(tables, "measurement", "person_id", [1, 1, 1, None], pa.int64())


QUARANTINED: tuple[Quarantined, ...] = (
    Quarantined("all-null measurement values", _clean, {"no_value": 4}, change=_all_values_null),
    Quarantined("a measurement for a person not in person",
                _with(lambda cdm: cdm.lab(3, "14749-6", 30.0, unit="mmol/L", at="2024-03-01 09:30")),
                {"person_unknown": 1}),
    Quarantined("a measurement with no person_id", _clean, {"person_unknown": 1},
                change=_null_measurement_person),
    # units.csv ranges (common practice): bicarbonate 0..60 mmol/L, glucose 0.5..150 mmol/L,
    # pH 6.3..8.0; NaN and infinities are outside every range
    Quarantined("negative or absurd values",
                _with(lambda cdm: cdm.lab(1, "1963-8", -5.0, unit="mmol/L", at="2024-03-01 11:00"),
                      lambda cdm: cdm.lab(1, "14749-6", 9999.0, unit="mmol/L", at="2024-03-01 11:00"),
                      lambda cdm: cdm.lab(1, "2746-6", 71.2, unit="[pH]", at="2024-03-01 11:00"),
                      lambda cdm: cdm.lab(1, "14749-6", float("nan"), unit="mmol/L", at="2024-03-01 12:00"),
                      lambda cdm: cdm.lab(1, "14749-6", float("inf"), unit="mmol/L", at="2024-03-01 13:00")),
                {"implausible": 5}),
    Quarantined("unknown unit strings",
                _with(_unit_only_as_text,
                      lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="g/dL", at="2024-03-01 12:00"),
                      lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="mmol/l (lab 3)", at="2024-03-01 13:00")),
                {"unit_unknown": 3}),
    Quarantined("timestamps before 1900",
                _with(lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="mmol/L", at="1899-12-31 23:00"),
                      lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="mmol/L", at="0001-01-01 00:00")),
                {"before_birth": 2}),
    Quarantined("timestamps in the future",
                _with(lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="mmol/L", at="2090-03-01 09:30"),
                      lambda cdm: cdm.lab(2, "14749-6", 25.0, unit="mmol/L", at="9999-12-31 00:00")),
                {"outside_observation": 2}),
    Quarantined("date-only results",
                _with(lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="mmol/L", date="2024-03-02")),
                {"no_time": 1}),
    Quarantined("exact duplicate rows",
                _with(lambda cdm: cdm.lab(1, "14749-6", 25.0, unit="mmol/L", at="2024-03-01 09:30",
                                          visit=10)),
                {"duplicate": 1}),
)


def _dq(summary) -> dict[str, int]:
    rows = summary.data_quality.filter(summary.data_quality["table"] == "measurement").rows()
    return {reason: count for _, reason, count in rows}


@pytest.mark.parametrize(("case", "fmt"), _cases(QUARANTINED))
def test_bad_rows_are_quarantined_and_counted(case: Quarantined, fmt: str, tmp_path: Path) -> None:
    path = _build(case, tmp_path, fmt)
    with open_extract(path) as extract:
        summary = prepare_lab_events(extract)
        read = extract.row_count("measurement")
    expected = {reason: case.reasons.get(reason, 0) for reason in DATA_QUALITY_REASONS["measurement"]}
    assert _dq(summary) == expected
    assert summary.rows_read == read
    assert summary.rows_quarantined == sum(case.reasons.values())
    assert summary.reconciles  # rows read = used + quarantined + other analytes


def _future_in_open_period() -> MiniCdm:
    """Open-ended observation periods (end 2099-12-31, a common export convention) cover a result
    dated 2090 and one dated 1895 of a person whose recorded birth year is 1850."""
    cdm = _clean()
    cdm.person(3, birth="1850-01-01", observation=("1850-01-01", "2099-12-31"))
    cdm.lab(3, "14749-6", 25.0, unit="mmol/L", at="2090-03-01 09:30")
    cdm.lab(3, "14749-6", 25.0, unit="mmol/L", at="1895-03-01 09:30")
    return cdm


def test_impossible_times_inside_observation_are_quarantined(tmp_path: Path) -> None:
    """A result after the run date or before 1900 cannot be a DKA lab result of this era."""
    path = _write(_future_in_open_period().tables(), tmp_path / "extract", "parquet")
    with open_extract(path) as extract:
        summary = prepare_lab_events(extract)
    assert _dq(summary)["implausible_time"] == 2
    assert summary.reconciles


def _lab_event_ids(extract: object) -> list[int]:
    return [row[0] for row in extract.con.execute(  # type: ignore[attr-defined]
        "select measurement_id from dka_lab_events order by measurement_id").fetchall()]


def _duplicate_details(extract: object) -> list[tuple[int, str]]:
    return extract.con.execute(  # type: ignore[attr-defined]
        "select source_row_id, detail from dka_quarantine where reason = 'duplicate' "
        "order by source_row_id, detail").fetchall()


def test_a_row_given_twice_with_its_measurement_id_keeps_one_copy(tmp_path: Path) -> None:
    """An overlapping part file repeats rows, ids included: one copy of measurement_id 2 is used
    and the other quarantined as `duplicate` (nothing is lost, nothing counted twice)."""
    tables = dict(_clean_tables())
    tables["measurement"] = pa.concat_tables([tables["measurement"], tables["measurement"].slice(1, 1)])
    path = _write(tables, tmp_path / "extract", "parquet")
    with open_extract(path) as extract:
        summary = prepare_lab_events(extract)
        assert _lab_event_ids(extract) == [1, 2, 3, 4]
        assert _duplicate_details(extract) == [
            (2, "the same row given twice (measurement_id, person, concept, time, unit and value); "
                "one copy is kept")]
    assert (summary.rows_read, summary.rows_used, summary.rows_quarantined) == (5, 4, 1)
    assert _dq(summary)["duplicate"] == 1
    assert summary.reconciles


def test_a_row_given_three_times_and_again_under_a_new_id_keeps_one_copy(tmp_path: Path) -> None:
    """measurement_id 2 three times and its values again as measurement_id 9: one row used (id 2,
    the lowest), three quarantined, each once, the new id's detail naming the kept row."""
    tables = dict(_clean_tables())
    again = tables["measurement"].slice(1, 1)
    renumbered = again.set_column(again.column_names.index("measurement_id"), "measurement_id",
                                  pa.array([9], type=again.schema.field("measurement_id").type))
    tables["measurement"] = pa.concat_tables([tables["measurement"], again, again, renumbered])
    path = _write(tables, tmp_path / "extract", "parquet")
    with open_extract(path) as extract:
        summary = prepare_lab_events(extract)
        assert _lab_event_ids(extract) == [1, 2, 3, 4]
        assert [row_id for row_id, _ in _duplicate_details(extract)] == [2, 2, 9]
        assert _duplicate_details(extract)[2] == (
            9, "same person, concept, time, unit and value as measurement_id 2, which is kept")
    assert (summary.rows_read, summary.rows_used, summary.rows_quarantined) == (7, 4, 3)
    assert summary.reconciles


def test_quarantine_reaches_data_quality_csv_through_the_command(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    case = QUARANTINED[3]  # negative or absurd values
    path = _build(case, tmp_path, "csv")
    code = main(["episodes", "--source", str(path), "--out", str(tmp_path / "out"), "--quiet"])
    printed = capsys.readouterr()
    assert code == 0, printed.err
    lines = (tmp_path / "out" / "data_quality.csv").read_text().splitlines()
    assert "measurement,implausible,5" in lines
    assert "measurement,person_unknown,0" in lines


def test_quarantine_of_a_written_run_is_read_from_its_folder(tmp_path: Path) -> None:
    """find_episodes with out reads result.quarantine from out/quarantine.parquet when asked."""
    from cohort.episodes import find_episodes

    case = QUARANTINED[3]  # negative or absurd values
    path = _build(case, tmp_path, "parquet")
    result = find_episodes(path, ["consensus-2024"], out=tmp_path / "out")
    assert result.__dict__["_quarantine"] is None  # not fetched during the run
    assert result.quarantine.filter(pl.col("reason") == "implausible").height == 5
    assert result.quarantine.equals(pl.read_parquet(tmp_path / "out" / "quarantine.parquet"))


# ----------------------------------------------------------------------------- ACCEPTED
@dataclass(frozen=True)
class Accepted:
    """A quirk of real exports that must read to exactly the clean extract's rows."""

    name: str
    formats: tuple[str, ...]
    change: Callable[[Tables], None] | None = None
    after: Callable[[Path], None] | None = None
    delimiter: str = ","
    parts: dict[str, int] = field(default_factory=dict)
    builder: Callable[[], MiniCdm] = _clean
    expect: Callable[[Tables], None] | None = None  # the rows expected, from the clean tables


def _upper_names(tables: Tables) -> None:
    for name in ("person", "measurement"):
        tables[name] = tables[name].rename_columns([col.upper() for col in tables[name].column_names])
    tables["MEASUREMENT"] = tables.pop("measurement")


def _extra_column(tables: Tables) -> None:
    frame = tables["measurement"]
    tables["measurement"] = frame.append_column("lab_site_note", pa.array(["ward 4"] * frame.num_rows))


def _numbers_as_text(tables: Tables) -> None:
    _set(tables, "measurement", "value_as_number", ["7.12", " 25 ", "12.0", "6.1"])
    _set(tables, "measurement", "person_id", ["1", "1", "1", "2"])


def _dates_as_text(tables: Tables) -> None:
    _set(tables, "measurement", "measurement_datetime",
         ["2024-03-01 09:30:00", "2024-03-01T09:30", "2024-03-01 09:30", "2024-05-01 10:00:00"])
    _set(tables, "measurement", "measurement_date", ["2024-03-01", "20240301", "2024-03-01", "2024-05-01"])


def _rewrite(transform: Callable[[bytes], bytes], name: str = "measurement.csv") -> Callable[[Path], None]:
    def after(path: Path) -> None:
        file = path / name
        file.write_bytes(transform(file.read_bytes()))
    return after


def _quote_numbers(data: bytes) -> bytes:
    return data.replace(b",7.12,", b',"7.12",').replace(b",25.0,", b',"25.0",')


def _quote_header(data: bytes) -> bytes:
    header, rest = data.split(b"\n", 1)
    return b",".join(b'" ' + name + b' "' for name in header.split(b",")) + b"\n" + rest


def _wide_concepts(tables: Tables) -> None:
    frame = tables["measurement"]
    for name in ("measurement_concept_id", "unit_concept_id", "value_as_concept_id"):
        _set(tables, "measurement", name, frame.column(name).cast(pa.int64()).to_pylist(), pa.int64())


def _mixed_part_types(path: Path) -> None:
    """Part 1 of measurement/ as written; part 2 with ids as int32 and values as numeric text."""
    file = path / "measurement" / "part-001.parquet"
    table = pq.read_table(file)
    index = table.column_names.index("value_as_number")
    table = table.set_column(index, "value_as_number",
                             pa.array([str(v) for v in table.column("value_as_number").to_pylist()]))
    index = table.column_names.index("person_id")
    table = table.set_column(index, "person_id", table.column("person_id").cast(pa.int32()))
    pq.write_table(table, file)


def _zoned_times(tables: Tables) -> None:
    values = tables["measurement"].column("measurement_datetime").to_pylist()
    zoned = [value.replace(tzinfo=dt.timezone.utc) for value in values]
    _set(tables, "measurement", "measurement_datetime", zoned, pa.timestamp("us", tz="UTC"))


ACCEPTED: tuple[Accepted, ...] = (
    Accepted("upper-case table and column names", FORMATS, change=_upper_names),
    Accepted("an extra unexpected column", FORMATS, change=_extra_column),
    Accepted("numbers and ids stored as text", ("parquet", "duckdb"), change=_numbers_as_text),
    Accepted("dates as text in the usual forms", ("parquet", "csv", "duckdb"), change=_dates_as_text),
    Accepted("quoted numbers", ("csv",), after=_rewrite(_quote_numbers)),
    Accepted("Windows line ends", ("csv",), after=_rewrite(lambda data: data.replace(b"\n", b"\r\n"))),
    Accepted("a UTF-8 byte-order mark", ("csv",), after=_rewrite(lambda data: b"\xef\xbb\xbf" + data)),
    Accepted("UTF-16 with a byte-order mark", ("csv",),
             after=_rewrite(lambda data: data.decode().encode("utf-16"))),
    Accepted("semicolon delimiter", ("csv",), delimiter=";"),
    Accepted("tab delimiter", ("csv",), delimiter="\t"),
    Accepted("bar delimiter", ("csv",), delimiter="|"),
    Accepted("a quoted line break inside a value", ("csv",),
             change=_column("measurement", "value_source_value", [None, "see\nnote", None, None]),
             after=_rewrite(lambda data: data.replace(b'"see\nnote"', b'"see\r\nnote"')),
             expect=_column("measurement", "value_source_value", [None, "see\r\nnote", None, None])),
    Accepted("quoted header names with spaces", ("csv",), after=_rewrite(_quote_header)),
    Accepted("int64 concept ids (as pandas writes them)", ("parquet", "duckdb"), change=_wide_concepts),
    Accepted("parts of one table with different column types", ("parquet",), after=_mixed_part_types,
             parts={"measurement": 2}),
    Accepted("timestamps with a time zone", ("parquet", "duckdb"), change=_zoned_times),
)


def _rows(path: Path) -> dict[str, list[tuple]]:
    with open_extract(path) as extract:
        assert extract.warnings == ()
        return {table: sorted(extract.con.execute(f"select * from {table}").fetchall(), key=repr)
                for table in ("person", "measurement")}


@pytest.mark.parametrize(("case", "fmt"), _cases(ACCEPTED))
def test_export_quirks_read_to_the_clean_rows(case: Accepted, fmt: str, tmp_path: Path) -> None:
    path = _build(case, tmp_path, fmt)
    expected = dict(_clean_tables())
    if case.expect is not None:
        case.expect(expected)
    clean = _write(expected, tmp_path / "clean", "parquet")
    assert _rows(path) == _rows(clean)


# ----------------------------------------------------------------------------- empty tables
@pytest.mark.parametrize("fmt", FORMATS)
def test_empty_measurement_table_is_read_with_a_warning(fmt: str, tmp_path: Path) -> None:
    """A header-only measurement.csv (or an empty table): nothing to quarantine, and the reader is
    told that no lab-based episode can be found."""
    tables = dict(_clean_tables())
    _empty("measurement")(tables)
    path = _write(tables, _extract_path(tmp_path, fmt), fmt)
    sentence = ("table `measurement` has no rows: no lab result can be read, so no lab-based episode "
                "can be found")
    with pytest.warns(ExtractWarning, match="has no rows"), open_extract(path) as extract:
        assert extract.warnings == (sentence,)
        summary = prepare_lab_events(extract)
    assert (summary.rows_read, summary.rows_used, summary.rows_quarantined) == (0, 0, 0)
    assert summary.reconciles


@pytest.mark.parametrize("fmt", ["parquet"])
def test_empty_measurement_table_is_a_note_on_the_command_line(
        fmt: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    tables = dict(_clean_tables())
    _empty("measurement")(tables)
    path = _write(tables, _extract_path(tmp_path, fmt), fmt)
    code = main(["episodes", "--source", str(path), "--definition", "consensus-2024",
                     "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 0
    assert "dka-cohort: note: table `measurement` has no rows" in err
    assert "Traceback" not in err and "UserWarning" not in err


@pytest.mark.parametrize("fmt", FORMATS)
def test_empty_clinical_tables_are_accepted(fmt: str, tmp_path: Path) -> None:
    """No deaths, no drugs, no diagnoses, no visits: a plausible small extract, read as it is."""
    tables = dict(_clean_tables())
    for name in ("death", "drug_exposure", "condition_occurrence", "visit_occurrence"):
        _empty(name)(tables)
    _set(tables, "measurement", "visit_occurrence_id", [None] * 4, pa.int64())
    path = _write(tables, _extract_path(tmp_path, fmt), fmt)
    with open_extract(path) as extract:
        assert extract.warnings == ()
        summary = prepare_lab_events(extract)
    assert (summary.rows_read, summary.rows_used, summary.rows_quarantined) == (4, 4, 0)

