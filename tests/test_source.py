"""Reading an extract: formats, CSV export quirks, the schema check, read-only access.

The table and column names and types checked here are those of the OMOP CDM v5.4 DDL (OHDSI
CommonDataModel, OMOPCDM_duckdb_5.4_ddl.sql) [from memory]; extracts are built with tests/cdmkit.py
(invented data).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from cohort._cdm import CDM_TABLES, OPTIONAL_TABLES, REQUIRED_TABLES
from cohort._errors import InputError, SchemaError
from cohort.source import open_extract
from tests.cdmkit import MiniCdm

FORMATS = ("parquet", "csv", "csv.gz", "duckdb")


def _small() -> MiniCdm:
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01", gender="F", care_site_id=1)
    cdm.person(2, birth="2010-02-03", gender="M")
    cdm.care_site(1, "Harrowmere Valley General")
    cdm.visit(10, person_id=1, start="2024-03-01 09:00", end="2024-03-04 12:00", kind="ERIP")
    cdm.lab(1, "2746-6", 7.12, unit="[pH]", at="2024-03-01 09:30", visit=10)
    cdm.lab(1, "2514-8", None, at="2024-03-01 09:30", value_as="2+")
    cdm.lab(2, "14749-6", 25.0, unit="mmol/L", date="2024-03-01", at=None)
    cdm.condition(1, "E10.10", at="2024-03-01 10:00", visit=10)
    cdm.drug(1, "253182", start="2024-03-01 10:30", end="2024-03-02 08:00", route="intravenous",
             visit=10)
    cdm.death(1, at="2024-03-03 04:00")
    return cdm


def _write(cdm: MiniCdm, tmp_path: Path, fmt: str, **options: object) -> Path:
    name = "extract.duckdb" if fmt == "duckdb" else f"extract_{fmt.replace('.', '_')}"
    return cdm.write(tmp_path / name, fmt=fmt, **options)  # type: ignore[arg-type]


def _tree_digest(path: Path) -> str:
    digest = hashlib.sha256()
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    for file in files:
        digest.update(str(file.relative_to(path.parent)).encode())
        digest.update(file.read_bytes())
        digest.update(str(file.stat().st_mtime_ns).encode())
    return digest.hexdigest()


@pytest.mark.parametrize("fmt", FORMATS)
def test_every_format_opens_with_typed_cdm_views(tmp_path: Path, fmt: str) -> None:
    path = _write(_small(), tmp_path, fmt)
    with open_extract(path) as extract:
        assert extract.fmt == ("csv" if fmt == "csv.gz" else fmt)
        assert extract.tables == frozenset(CDM_TABLES)
        for table, spec in CDM_TABLES.items():
            described = extract.con.execute(f"describe {table}").fetchall()
            assert [(row[0], row[1]) for row in described] == [
                (column.name, column.sql_type.upper()) for column in spec
            ], table
        assert extract.row_count("measurement") == 3
        assert extract.row_count("person") == 2


def test_formats_give_identical_rows(tmp_path: Path) -> None:
    cdm = _small()
    seen = {}
    for fmt in FORMATS:
        with open_extract(_write(cdm, tmp_path, fmt)) as extract:
            seen[fmt] = {
                table: sorted(extract.con.execute(f"select * from {table}").fetchall(), key=repr)
                for table in CDM_TABLES
            }
    assert seen["csv"] == seen["parquet"] == seen["duckdb"] == seen["csv.gz"]


def test_csv_export_quirks_are_read(tmp_path: Path) -> None:
    """Empty strings are nulls, dates as text (ISO with T or space), ids written as 10.0."""
    folder = _write(_small(), tmp_path, "csv")
    text = (folder / "measurement.csv").read_text()
    text = text.replace("2024-03-01 09:30:00", "2024-03-01T09:30:00", 1)
    lines = text.splitlines()
    header = lines[0].split(",")
    first = lines[1].split(",")
    first[header.index("visit_occurrence_id")] = "10.0"
    lines[1] = ",".join(first)
    (folder / "measurement.csv").write_text("\n".join(lines) + "\n")
    with open_extract(folder) as extract:
        rows = extract.con.execute(
            "select measurement_id, measurement_datetime, visit_occurrence_id, unit_source_value, "
            "range_low from measurement order by measurement_id").fetchall()
    assert str(rows[0][1]) == "2024-03-01 09:30:00"
    assert rows[0][2] == 10
    assert rows[1][3] is None  # empty string in the export -> null
    assert rows[0][4] is None


def test_parquet_parts_folder_and_upper_case_names(tmp_path: Path) -> None:
    cdm = _small()
    folder = _write(cdm, tmp_path, "parquet", parts={"measurement": 2})
    assert (folder / "measurement").is_dir()
    person = pq.read_table(folder / "person.parquet")
    pq.write_table(person.rename_columns([name.upper() for name in person.column_names]),
                   folder / "person.parquet")
    (folder / "person.parquet").rename(folder / "PERSON.parquet")
    with open_extract(folder) as extract:
        assert extract.row_count("measurement") == 3
        assert extract.con.execute("select count(*) from measurement").fetchall() == [(3,)]
        assert extract.con.execute("select min(person_id) from person").fetchall() == [(1,)]


def test_duckdb_schema_is_chosen_with_fmt(tmp_path: Path) -> None:
    path = _write(_small(), tmp_path, "duckdb", schema="cdm")
    with pytest.raises(InputError, match="open it with fmt='duckdb:cdm'"):
        open_extract(path)  # the file's `main` schema is empty
    with pytest.raises(InputError, match="has no schema `other`; schemas are: cdm, main"):
        open_extract(path, fmt="duckdb:other")
    with open_extract(path, fmt="duckdb:cdm") as extract:
        assert extract.fmt == "duckdb:cdm"
        assert extract.row_count("measurement") == 3


def test_absent_optional_tables_read_as_empty_views(tmp_path: Path) -> None:
    path = _write(_small(), tmp_path, "parquet", omit_tables=OPTIONAL_TABLES)
    with open_extract(path) as extract:
        assert extract.tables == frozenset(REQUIRED_TABLES)
        for table in OPTIONAL_TABLES:
            assert extract.con.execute(f"select count(*) from {table}").fetchall() == [(0,)]


def test_schema_error_lists_every_fault_at_once(tmp_path: Path) -> None:
    folder = _write(_small(), tmp_path, "csv", omit_tables=("death", "concept"),
                    omit_columns={"measurement": ("unit_concept_id",)})
    text = (folder / "measurement.csv").read_text()
    text = text.replace("value_as_number", "value_as_numbr")
    text = text.replace("2024-03-01 09:30:00", "01/03/2024 09:30")  # two rows, not ISO
    (folder / "measurement.csv").write_text(text)
    person = (folder / "person.csv").read_text().replace(",1980,", ",nineteen80,")
    (folder / "person.csv").write_text(person)
    with pytest.raises(SchemaError) as caught:
        open_extract(folder)
    message = str(caught.value)
    assert "(6 problem(s))" in message
    assert "missing table `death` (required)" in message
    assert "missing table `concept` (required)" in message
    assert "`measurement`: missing column `value_as_number` (double); did you mean `value_as_numbr`?" in message
    assert "`measurement`: missing column `unit_concept_id` (integer)" in message
    assert ("`measurement`.`measurement_datetime`: expected timestamp, found VARCHAR with 2 row(s) "
            "that do not convert (for example '01/03/2024 09:30')") in message
    assert "`person`.`year_of_birth`: expected integer, found VARCHAR with 1 row(s)" in message
    assert "'nineteen80'" in message


def test_wrong_parquet_types_are_named(tmp_path: Path) -> None:
    folder = _write(_small(), tmp_path, "parquet")
    table = pq.read_table(folder / "measurement.parquet")
    index = table.column_names.index("measurement_datetime")
    table = table.set_column(index, "measurement_datetime", pa.array([True, False, True]))
    index = table.column_names.index("person_id")
    table = table.set_column(index, "person_id", pa.array([1.0, 1.5, 2.0]))
    pq.write_table(table, folder / "measurement.parquet")
    with pytest.raises(SchemaError) as caught:
        open_extract(folder)
    message = str(caught.value)
    assert "`measurement`.`measurement_datetime`: expected timestamp, found BOOLEAN" in message
    assert "`measurement`.`person_id`: expected bigint, found DOUBLE with 1 row(s) that do not convert (for example '1.5')" in message


def test_whole_number_floats_are_accepted_as_ids(tmp_path: Path) -> None:
    """pandas writes nullable integer columns as float64: whole numbers convert."""
    folder = _write(_small(), tmp_path, "parquet")
    table = pq.read_table(folder / "measurement.parquet")
    index = table.column_names.index("visit_occurrence_id")
    table = table.set_column(index, "visit_occurrence_id", pa.array([10.0, None, None]))
    pq.write_table(table, folder / "measurement.parquet")
    with open_extract(folder) as extract:
        assert extract.con.execute(
            "select visit_occurrence_id from measurement order by measurement_id").fetchall() == [
            (10,), (None,), (None,)]


def test_missing_path_and_mixed_folder_are_input_errors(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="does not exist"):
        open_extract(tmp_path / "nowhere")
    folder = tmp_path / "mixed"
    folder.mkdir()
    (folder / "person.csv").write_text("person_id\n1\n")
    pq.write_table(pa.table({"person_id": [1]}), folder / "death.parquet")
    with pytest.raises(InputError, match="both Parquet and CSV"):
        open_extract(folder)
    with pytest.raises(InputError, match="fmt must be one of"):
        open_extract(folder, fmt="xlsx")


@pytest.mark.parametrize("fmt", ("parquet", "csv", "duckdb"))
def test_source_is_never_written(tmp_path: Path, fmt: str) -> None:
    from cohort._labs import prepare_lab_events

    path = _write(_small(), tmp_path, fmt)
    before = _tree_digest(path)
    with open_extract(path, threads=1, memory_limit="512MB", temp_directory=tmp_path / "spill") as extract:
        prepare_lab_events(extract)
        with pytest.raises(duckdb.Error):
            if fmt == "duckdb":
                extract.con.execute("create table cdm_source.main.intruder as select 1 as x")
            else:
                extract.con.execute("insert into measurement (measurement_id) values (99)")
    assert _tree_digest(path) == before


def test_fingerprint_is_stable_and_sees_rewrites(tmp_path: Path) -> None:
    path = _write(_small(), tmp_path, "parquet")
    with open_extract(path) as extract:
        first = extract.fingerprint()
    with open_extract(path) as extract:
        assert extract.fingerprint() == first
    assert first["tables"]["measurement"]["rows"] == 3
    assert first["tables"]["measurement"]["files"][0]["name"] == "measurement.parquet"
    table = pq.read_table(path / "measurement.parquet")
    pq.write_table(table.slice(0, 2), path / "measurement.parquet")
    with open_extract(path) as extract:
        second = extract.fingerprint()
    assert second["digest"] != first["digest"]
    assert second["tables"]["measurement"]["rows"] == 2


def test_connection_options_reach_duckdb(tmp_path: Path) -> None:
    path = _write(_small(), tmp_path, "parquet")
    with open_extract(path, threads=1, memory_limit="256MB") as extract:
        threads = extract.con.execute("select current_setting('threads')").fetchall()[0][0]
        limit = extract.con.execute("select current_setting('memory_limit')").fetchall()[0][0]
    assert int(threads) == 1
    assert limit.replace(" ", "").lower().startswith(("256", "244"))  # 256MB or 244.1 MiB
    with pytest.raises(InputError, match="threads must be"):
        open_extract(path, threads=0)


def test_misnamed_table_gets_a_suggestion(tmp_path: Path) -> None:
    folder = _write(_small(), tmp_path, "parquet")
    (folder / "measurement.parquet").rename(folder / "measurements.parquet")
    with pytest.raises(SchemaError, match="missing table `measurement` \\(required\\); did you mean `measurements`\\?"):
        open_extract(folder)


def test_a_table_given_twice_is_refused(tmp_path: Path) -> None:
    folder = _write(_small(), tmp_path, "parquet", parts={"person": 2})
    pq.write_table(pq.read_table(folder / "death.parquet"), folder / "person.parquet")
    with pytest.raises(InputError, match="holds table `person` more than once \\(person/, person.parquet\\); keep one"):
        open_extract(folder)


def test_large_ids_as_text_keep_every_digit(tmp_path: Path) -> None:
    """Ids beyond 2**53 must not pass through a double on the way from CSV text."""
    folder = _write(_small(), tmp_path, "csv")
    big = 9_007_199_254_740_993  # 2**53 + 1
    text = (folder / "measurement.csv").read_text()
    lines = text.splitlines()
    cells = lines[1].split(",")
    cells[0] = str(big)
    lines[1] = ",".join(cells)
    (folder / "measurement.csv").write_text("\n".join(lines) + "\n")
    with open_extract(folder) as extract:
        ids = [row[0] for row in extract.con.execute("select measurement_id from measurement").fetchall()]
    assert big in ids


def test_nan_in_a_float_id_column_is_a_type_fault(tmp_path: Path) -> None:
    folder = _write(_small(), tmp_path, "parquet")
    table = pq.read_table(folder / "measurement.parquet")
    index = table.column_names.index("visit_occurrence_id")
    table = table.set_column(index, "visit_occurrence_id", pa.array([10.0, float("nan"), None]))
    pq.write_table(table, folder / "measurement.parquet")
    with pytest.raises(SchemaError, match="`measurement`.`visit_occurrence_id`: expected bigint, found DOUBLE with 1 row"):
        open_extract(folder)


def test_compact_vocabulary_dates_and_tab_delimiters_are_read(tmp_path: Path) -> None:
    """Vocabulary downloads write dates as 20240301 and separate fields by tabs."""
    folder = _write(_small(), tmp_path, "csv")
    concept = (folder / "concept.csv").read_text().replace("1970-01-01", "19700101").replace(",", "\t")
    (folder / "concept.csv").write_text(concept)
    text = (folder / "measurement.csv").read_text().replace(",2024-03-01,", ",20240301,")
    (folder / "measurement.csv").write_text(text)
    with open_extract(folder) as extract:
        dates = {row[0] for row in extract.con.execute("select measurement_date from measurement").fetchall()}
        valid = {row[0] for row in extract.con.execute("select valid_start_date from concept").fetchall()}
    assert {str(day) for day in dates} == {"2024-03-01"}
    assert {str(day) for day in valid} == {"1970-01-01"}
