"""Scale run of recipes 10 .. 22 (slow; not part of `make test`).

Writes an invented Parquet extract straight from DuckDB (DKA_LABS_SCALE_PERSONS persons,
DKA_LABS_SCALE_ROWS_PER_PERSON measurement rows each, 40 % of rows DKA analytes in their
canonical unit, planted faults: 1 in 97 rows without time, 1 in 211 with no unit, values up to 1 %
above the plausible range), runs prepare_lab_events on 2 threads with a 3 GB DuckDB memory limit,
prints wall time, peak RSS and the time of a bare scan of the measurement columns read, and checks
the accounting and the planted faults.

    DKA_LABS_SCALE_PERSONS=1000000 .venv/bin/python -m pytest tests/test_labs_scale.py -m slow -s
"""

from __future__ import annotations

import csv
import os
import resource
import time
from pathlib import Path

import duckdb
import pytest

from cohort._cdm import CDM_TABLES
from cohort._labs import prepare_lab_events
from cohort._paths import codelists_dir
from cohort.source import open_extract
from tests.cdmkit import MiniCdm

PERSONS = int(os.environ.get("DKA_LABS_SCALE_PERSONS", "100000"))
ROWS_PER_PERSON = int(os.environ.get("DKA_LABS_SCALE_ROWS_PER_PERSON", "100"))


def _typed(table: str, exprs: dict[str, str]) -> str:
    return ", ".join(f"cast({exprs.get(column.name, 'null')} as {column.sql_type}) as {column.name}"
                     for column in CDM_TABLES[table])


def write_scale_extract(out: Path, persons: int, per_person: int) -> Path:
    """Write the invented scale extract described in the module docstring."""
    cdm = MiniCdm()
    cdm.person(1)
    cdm.write(out, fmt="parquet")
    first_unit: dict[str, dict[str, str]] = {}
    with (codelists_dir() / "units.csv").open(newline="") as handle:
        for row in csv.DictReader(handle):
            first_unit.setdefault(row["analyte"], row)
    mapping = []
    with (codelists_dir() / "labs.csv").open(newline="") as handle:
        for row in csv.DictReader(handle):
            unit = first_unit[row["analyte"]]
            unit_id = cdm.concept_id("UCUM", unit["concept_code"]) if unit["vocabulary_id"] == "UCUM" else 0
            mapping.append((cdm.concept_id("LOINC", row["concept_code"]), unit_id,
                            float(unit["low"]), float(unit["high"])))
    other = [(cdm.concept_id("LOINC", code), cdm.concept_id("UCUM", "g/dL"), 1.0, 20.0)
             for code in ("718-7", "1742-6", "777-3", "6690-2", "2093-3")]
    con = duckdb.connect(config={"threads": 2, "memory_limit": "3GB"})
    try:
        con.execute("create table map (k integer, concept_id integer, unit_id integer, low double, high double)")
        con.executemany("insert into map values (?, ?, ?, ?, ?)",
                        [(k, *(mapping[k % len(mapping)] if k < 40 else other[k % len(other)]))
                         for k in range(100)])
        person = _typed("person", {"person_id": "i", "gender_concept_id": "0",
                                   "year_of_birth": "1950 + i % 60", "month_of_birth": "1 + i % 12",
                                   "day_of_birth": "1 + i % 28"})
        con.execute(f"copy (select {person} from range(1, {persons} + 1) as r(i)) to '{out}/person.parquet'")
        period = _typed("observation_period", {
            "observation_period_id": "i", "person_id": "i",
            "observation_period_start_date": "date '2015-01-01'",
            "observation_period_end_date": "date '2025-12-31'"})
        con.execute(f"copy (select {period} from range(1, {persons} + 1) as r(i)) "
                    f"to '{out}/observation_period.parquet'")
        when = "timestamp '2019-01-01' + to_minutes(cast((i * 37) % 3600000 as bigint))"
        measurement = _typed("measurement", {
            "measurement_id": "i", "person_id": f"1 + (i - 1) // {per_person}",
            "measurement_concept_id": "map.concept_id",
            "measurement_date": f"cast({when} as date)",
            "measurement_datetime": f"case when i % 97 = 0 then null else {when} end",
            "value_as_number": "map.low + ((i % 1000) / 1000.0) * (map.high - map.low) * 1.01",
            "value_as_concept_id": "0",
            "unit_concept_id": "case when i % 211 = 0 then 0 else map.unit_id end"})
        con.execute(
            f"copy (select {measurement} from range(1, {persons * per_person} + 1) as r(i) "
            f"inner join map on map.k = (i * 13) % 100 order by i) to '{out}/measurement.parquet' "
            "(row_group_size 1000000)")
    finally:
        con.close()
    return out


@pytest.mark.slow
def test_lab_events_at_scale(tmp_path: Path) -> None:
    path = write_scale_extract(tmp_path / "scale", PERSONS, ROWS_PER_PERSON)
    started = time.perf_counter()
    with open_extract(path, threads=2, memory_limit="3GB") as extract:
        summary = prepare_lab_events(extract)
        seconds = time.perf_counter() - started
        scan_started = time.perf_counter()
        extract.con.execute(
            "select count(*), max(measurement_id), max(person_id), max(measurement_concept_id), "
            "max(measurement_date), max(measurement_datetime), sum(value_as_number), "
            "max(value_as_concept_id), max(unit_concept_id), max(unit_source_value), "
            "max(visit_occurrence_id), max(value_source_value) from measurement").fetchall()
        scan = time.perf_counter() - scan_started
        no_time = extract.con.execute(
            "select count(*) from measurement inner join dka_concept_lab on "
            "dka_concept_lab.concept_id = measurement.measurement_concept_id "
            "where measurement.measurement_datetime is null").fetchall()[0][0]
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"\nlab events: {summary.rows_read:,} measurement rows in {seconds:.1f} s "
          f"(bare scan {scan:.1f} s, ratio {seconds / scan:.1f}); peak RSS {peak:,.0f} MiB; "
          f"used {summary.rows_used:,}, quarantined {summary.rows_quarantined:,}, other {summary.rows_other:,}")
    assert summary.reconciles
    assert summary.rows_read == PERSONS * ROWS_PER_PERSON
    assert summary.rows_other == summary.rows_read * 60 // 100
    counts = dict(summary.data_quality.filter(summary.data_quality["table"] == "measurement")
                  .select("reason", "rows").iter_rows())
    assert counts["no_time"] == no_time  # every planted date-only DKA row, none lost
    assert counts["unit_unknown"] > 0 and counts["implausible"] > 0
    assert counts["person_unknown"] == counts["duplicate"] == 0
