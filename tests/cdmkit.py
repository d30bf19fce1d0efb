"""A tiny OMOP CDM v5.4 extract builder for tests.

Write real CDM-format folders (Parquet, CSV) or DuckDB files from a few lines of Python, with
every table carrying its full v5.4 column list and types (from :mod:`cohort._cdm`).

The ``concept`` table is filled from the bundled code lists (``cohort/codelists/*.csv``) plus the
Gender (F, M), Visit (IP, ER, ERIP, OP, ICU) and a few non-DKA LOINC codes, with INVENTED
concept_ids from 2_000_000_000 upwards (assigned in a fixed order, so two builders with the same
calls give the same ids). Any other code used in a call (a unit, a condition, a drug) gets a new
invented concept on first use.

Example
-------
>>> cdm = MiniCdm()
>>> cdm.person(1, birth="1980-05-01", gender="F")
>>> cdm.visit(10, person_id=1, start="2024-03-01 09:00", end="2024-03-04 12:00", kind="ERIP")
>>> mid = cdm.lab(1, "2746-6", 7.12, unit="[pH]", at="2024-03-01 09:30", visit=10)
>>> path = cdm.write(tmp_path / "extract", fmt="parquet")      # doctest: +SKIP

Invented data only: nothing here is a reference value.
"""

from __future__ import annotations

import csv
import datetime as dt
import random
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq

from cohort._cdm import CDM_TABLES, arrow_schema
from cohort._paths import codelists_dir

__all__ = ["MiniCdm", "CONCEPT_ID_BASE"]

#: First invented concept_id (real OMOP vocabularies stay below 2_000_000_000).
CONCEPT_ID_BASE = 2_000_000_000

_DEFAULT_OBSERVATION = ("2015-01-01", "2025-12-31")

# Non-DKA LOINC codes for "other analyte" rows [from memory]: haemoglobin 718-7, ALT 1742-6,
# platelets 777-3, leukocytes 6690-2, cholesterol 2093-3.
_EXTRA_LOINC = (
    ("718-7", "Hemoglobin [Mass/volume] in Blood"),
    ("1742-6", "Alanine aminotransferase [Enzymatic activity/volume] in Serum or Plasma"),
    ("777-3", "Platelets [#/volume] in Blood by Automated count"),
    ("6690-2", "Leukocytes [#/volume] in Blood by Automated count"),
    ("2093-3", "Cholesterol [Mass/volume] in Serum or Plasma"),
)
_EXTRA_UCUM = ("g/dL", "U/L", "10*3/uL", "mg/L", "mmol/L", "mg/dL", "%", "mmol/mol", "umol/L")

# ICD-10-CM code -> SNOMED CT concept a CDM would map it to (condition_concept_id); DKA codes to
# 420422005 (diabetic ketoacidosis), other E10/E11 codes to type 1 / type 2 diabetes [from memory;
# a real vocabulary maps the E10.1x codes to more specific SNOMED children].
_DKA_ICD = {"E08.10", "E08.11", "E09.10", "E09.11", "E10.10", "E10.11", "E11.10", "E11.11",
            "E13.10", "E13.11"}


def _snomed_for_icd(code: str) -> str | None:
    if code in _DKA_ICD:
        return "420422005"
    if code.startswith("E10"):
        return "46635009"
    if code.startswith("E11"):
        return "44054006"
    return None


def _ts(value: str | dt.datetime | None) -> dt.datetime | None:
    if value is None or isinstance(value, dt.datetime):
        return value
    text = value.strip().replace("T", " ")
    for pattern in ("%Y-%m-%d %H:%M:%S", "%Y-%m-%d %H:%M", "%Y-%m-%d"):
        try:
            return dt.datetime.strptime(text, pattern)
        except ValueError:
            continue
    msg = f"MiniCdm: expected a datetime like '2024-03-01 09:30', got {value!r}"
    raise ValueError(msg)


def _date(value: str | dt.date | dt.datetime | None) -> dt.date | None:
    if value is None:
        return None
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    return _ts(value).date()  # type: ignore[union-attr]


class MiniCdm:
    """Build a tiny CDM v5.4 extract in memory, then :meth:`write` it.

    Parameters
    ----------
    codelists
        Folder of code-list CSVs to fill ``concept`` from (default: the bundled ones).

    Notes
    -----
    Ids are auto-assigned when not given (``measurement_id`` from 1 upward etc.). ``person``
    gives each person an observation period 2015-01-01 .. 2025-12-31 unless
    :meth:`observation_period` is called for that person or ``observation=False`` is passed.
    """

    def __init__(self, *, codelists: Path | None = None) -> None:
        self._codelists = Path(codelists) if codelists is not None else codelists_dir()
        self._concepts: dict[tuple[str, str], dict[str, Any]] = {}
        self._ancestors: list[tuple[int, int, int]] = []
        self._rows: dict[str, list[dict[str, Any]]] = {name: [] for name in CDM_TABLES}
        self._next_id: dict[str, int] = {}
        self._auto_observation: set[int] = set()
        self._explicit_observation: set[int] = set()
        self._fill_vocabulary()

    # ------------------------------------------------------------------ vocabulary
    def concept(
        self,
        vocabulary: str,
        code: str,
        *,
        name: str | None = None,
        domain: str = "Observation",
        concept_class: str = "Undefined",
        standard: str | None = "S",
        ancestors: tuple[tuple[str, str], ...] = (),
    ) -> int:
        """Return the invented concept_id of (vocabulary, code), adding the concept if new.

        ``ancestors`` lists (vocabulary, code) pairs this concept descends from (one level);
        :meth:`write` writes ``concept_ancestor`` with self rows (level 0) for every concept.
        """
        key = (vocabulary, code)
        if key not in self._concepts:
            self._concepts[key] = {
                "concept_id": CONCEPT_ID_BASE + len(self._concepts) + 1,
                "concept_name": name or f"{vocabulary} {code}",
                "domain_id": domain,
                "vocabulary_id": vocabulary,
                "concept_class_id": concept_class,
                "standard_concept": standard,
                "concept_code": code,
                "valid_start_date": dt.date(1970, 1, 1),
                "valid_end_date": dt.date(2099, 12, 31),
                "invalid_reason": None,
            }
        concept_id = self._concepts[key]["concept_id"]
        for ancestor in ancestors:
            ancestor_id = self.concept(*ancestor)
            self._ancestors.append((ancestor_id, concept_id, 1))
        return concept_id

    def concept_id(self, vocabulary: str, code: str) -> int:
        """Return the concept_id already assigned to (vocabulary, code); KeyError if none."""
        return self._concepts[(vocabulary, code)]["concept_id"]

    def _fill_vocabulary(self) -> None:
        folder = self._codelists
        for row in _read_csv_from(folder, "labs.csv"):
            self.concept(row["vocabulary_id"], row["concept_code"], name=row["description"],
                         domain="Measurement", concept_class="Lab Test")
        for code, name in _EXTRA_LOINC:
            self.concept("LOINC", code, name=name, domain="Measurement", concept_class="Lab Test")
        for row in _read_csv_from(folder, "units.csv"):
            if row["vocabulary_id"] == "UCUM":
                self.concept("UCUM", row["concept_code"], domain="Unit", concept_class="Unit")
        for code in _EXTRA_UCUM:
            self.concept("UCUM", code, domain="Unit", concept_class="Unit")
        for row in _read_csv_from(folder, "ketone_ordinals.csv"):
            if row["vocabulary_id"]:
                self.concept(row["vocabulary_id"], row["concept_code"], name=row["text"],
                             domain="Meas Value", concept_class="Qualifier Value")
        for row in _read_csv_from(folder, "conditions.csv"):
            self.concept(row["vocabulary_id"], row["concept_code"], name=row["description"],
                         domain="Condition",
                         standard="S" if row["vocabulary_id"] == "SNOMED" else None)
        for row in _read_csv_from(folder, "drugs.csv"):
            self.concept(row["vocabulary_id"], row["concept_code"], name=row["description"],
                         domain="Drug", concept_class="Ingredient")
        for row in _read_csv_from(folder, "routes.csv"):
            self.concept(row["vocabulary_id"], row["concept_code"], name=row["description"],
                         domain="Route")
        for row in _read_csv_from(folder, "visits.csv"):
            self.concept(row["vocabulary_id"], row["concept_code"], name=row["description"],
                         domain="Visit")
        self.concept("Gender", "F", name="FEMALE", domain="Gender")
        self.concept("Gender", "M", name="MALE", domain="Gender")

    def _new_id(self, table: str, given: int | None) -> int:
        if given is not None:
            self._next_id[table] = max(self._next_id.get(table, 1), given + 1)
            return given
        value = self._next_id.get(table, 1)
        self._next_id[table] = value + 1
        return value

    # ------------------------------------------------------------------ clinical tables
    def person(
        self,
        person_id: int,
        *,
        birth: str | dt.date = "1980-01-01",
        gender: str | None = "F",
        care_site_id: int | None = None,
        observation: tuple[str, str] | bool = True,
        birth_precision: str = "day",
    ) -> None:
        """Add a person (year/month/day of birth and birth_datetime from ``birth``).

        ``birth_precision`` ``"day"`` writes everything; ``"month"`` leaves birth_datetime and
        day_of_birth null; ``"year"`` leaves month_of_birth null too.

        ``observation``: True gives the default period 2015-01-01 .. 2025-12-31 (dropped if
        :meth:`observation_period` is called for the person), a (start, end) pair gives that
        period, False gives none.
        """
        born = _date(birth)
        assert born is not None
        self._rows["person"].append({
            "person_id": person_id,
            "gender_concept_id": self.concept("Gender", gender) if gender else 0,
            "year_of_birth": born.year,
            "month_of_birth": born.month if birth_precision in ("day", "month") else None,
            "day_of_birth": born.day if birth_precision == "day" else None,
            "birth_datetime": (dt.datetime(born.year, born.month, born.day)
                               if birth_precision == "day" else None),
            "race_concept_id": 0,
            "ethnicity_concept_id": 0,
            "care_site_id": care_site_id,
            "person_source_value": f"P{person_id}",
            "gender_source_value": gender,
        })
        if observation is True:
            self._auto_observation.add(person_id)
        elif observation:
            self.observation_period(person_id, start=observation[0], end=observation[1])

    def observation_period(
        self, person_id: int, *, start: str, end: str, observation_period_id: int | None = None
    ) -> None:
        """Add an observation period (replaces the person's default one)."""
        self._explicit_observation.add(person_id)
        self._rows["observation_period"].append({
            "observation_period_id": self._new_id("observation_period", observation_period_id),
            "person_id": person_id,
            "observation_period_start_date": _date(start),
            "observation_period_end_date": _date(end),
            "period_type_concept_id": 0,
        })

    def care_site(self, care_site_id: int, name: str) -> None:
        """Add a care site (invented name)."""
        self._rows["care_site"].append({
            "care_site_id": care_site_id,
            "care_site_name": name,
            "place_of_service_concept_id": 0,
            "care_site_source_value": name,
        })

    def visit(
        self,
        visit_occurrence_id: int | None = None,
        *,
        person_id: int,
        start: str,
        end: str | None,
        kind: str = "IP",
        care_site_id: int | None = None,
        preceding: int | None = None,
    ) -> int:
        """Add a visit_occurrence; ``kind`` is a Visit vocabulary code (IP, ER, ERIP, OP)."""
        visit_id = self._new_id("visit_occurrence", visit_occurrence_id)
        started, ended = _ts(start), _ts(end)
        self._rows["visit_occurrence"].append({
            "visit_occurrence_id": visit_id,
            "person_id": person_id,
            "visit_concept_id": self.concept("Visit", kind, domain="Visit"),
            "visit_start_date": _date(started),
            "visit_start_datetime": started,
            "visit_end_date": _date(ended),
            "visit_end_datetime": ended,
            "visit_type_concept_id": 0,
            "care_site_id": care_site_id,
            "visit_source_value": kind,
            "preceding_visit_occurrence_id": preceding,
        })
        return visit_id

    def visit_detail(
        self,
        visit_detail_id: int | None = None,
        *,
        visit_occurrence_id: int,
        person_id: int,
        start: str,
        end: str | None,
        kind: str = "ICU",
        care_site_id: int | None = None,
    ) -> int:
        """Add a visit_detail row (an ICU stay by default)."""
        detail_id = self._new_id("visit_detail", visit_detail_id)
        started, ended = _ts(start), _ts(end)
        self._rows["visit_detail"].append({
            "visit_detail_id": detail_id,
            "person_id": person_id,
            "visit_detail_concept_id": self.concept("Visit", kind, domain="Visit"),
            "visit_detail_start_date": _date(started),
            "visit_detail_start_datetime": started,
            "visit_detail_end_date": _date(ended),
            "visit_detail_end_datetime": ended,
            "visit_detail_type_concept_id": 0,
            "care_site_id": care_site_id,
            "visit_detail_source_value": kind,
            "visit_occurrence_id": visit_occurrence_id,
        })
        return detail_id

    def lab(
        self,
        person_id: int,
        code: str,
        value: float | None,
        *,
        unit: str | None = None,
        at: str | None = None,
        date: str | None = None,
        visit: int | None = None,
        value_as: str | None = None,
        value_source: str | None = None,
        vocabulary: str = "LOINC",
        measurement_id: int | None = None,
        visit_detail: int | None = None,
    ) -> int:
        """Add a measurement row and return its measurement_id.

        ``unit=None`` writes unit_concept_id 0 (no unit); ``at=None`` with ``date`` writes a
        date-only result. ``value_as`` is an ordinal answer: a SNOMED code (digits) goes to
        value_as_concept_id, any other text to value_source_value. ``value_source`` sets
        value_source_value directly.
        """
        row_id = self._new_id("measurement", measurement_id)
        when = _ts(at)
        day = _date(when) if when is not None else _date(date)
        if day is None:
            msg = "MiniCdm.lab: give `at` (a datetime) or `date` (measurement_date is required)"
            raise ValueError(msg)
        value_concept = 0
        source_text = value_source
        if value_as is not None:
            if value_as.isdigit():
                value_concept = self.concept("SNOMED", value_as, domain="Meas Value")
            else:
                source_text = value_as
        unit_id = self.concept("UCUM", unit, domain="Unit", concept_class="Unit") if unit else 0
        self._rows["measurement"].append({
            "measurement_id": row_id,
            "person_id": person_id,
            "measurement_concept_id": self.concept(vocabulary, code, domain="Measurement"),
            "measurement_date": day,
            "measurement_datetime": when,
            "measurement_time": when.strftime("%H:%M:%S") if when else None,
            "measurement_type_concept_id": 0,
            "operator_concept_id": 0,
            "value_as_number": value,
            "value_as_concept_id": value_concept,
            "unit_concept_id": unit_id,
            "visit_occurrence_id": visit,
            "visit_detail_id": visit_detail,
            "measurement_source_value": code,
            "measurement_source_concept_id": 0,
            "unit_source_value": unit,
            "value_source_value": source_text,
        })
        return row_id

    def condition(
        self,
        person_id: int,
        code: str,
        *,
        vocabulary: str = "ICD10CM",
        at: str | None = None,
        date: str | None = None,
        visit: int | None = None,
        condition_occurrence_id: int | None = None,
    ) -> int:
        """Add a condition_occurrence.

        An ICD10CM code goes to condition_source_concept_id and, when a SNOMED mapping is known
        (DKA codes -> 420422005, E10* -> 46635009, E11* -> 44054006), the SNOMED concept to
        condition_concept_id (else 0). A SNOMED code fills both.
        """
        row_id = self._new_id("condition_occurrence", condition_occurrence_id)
        when = _ts(at)
        day = _date(when) if when is not None else _date(date)
        if day is None:
            msg = "MiniCdm.condition: give `at` or `date`"
            raise ValueError(msg)
        source_id = self.concept(vocabulary, code, domain="Condition",
                                 standard="S" if vocabulary == "SNOMED" else None)
        if vocabulary == "SNOMED":
            standard_id = source_id
        else:
            snomed = _snomed_for_icd(code) if vocabulary == "ICD10CM" else None
            standard_id = self.concept("SNOMED", snomed, domain="Condition") if snomed else 0
        self._rows["condition_occurrence"].append({
            "condition_occurrence_id": row_id,
            "person_id": person_id,
            "condition_concept_id": standard_id,
            "condition_start_date": day,
            "condition_start_datetime": when,
            "condition_type_concept_id": 0,
            "condition_status_concept_id": 0,
            "visit_occurrence_id": visit,
            "condition_source_value": code,
            "condition_source_concept_id": source_id,
        })
        return row_id

    def drug(
        self,
        person_id: int,
        code: str,
        *,
        start: str | None,
        end: str | None = None,
        start_date: str | None = None,
        end_date: str | None = None,
        route: str | None = None,
        visit: int | None = None,
        vocabulary: str = "RxNorm",
        quantity: float | None = None,
        sig: str | None = None,
        drug_exposure_id: int | None = None,
    ) -> int:
        """Add a drug_exposure; ``route`` is a routes.csv name (intravenous, subcutaneous) or None.

        ``start=None`` with ``start_date`` writes an exposure with no start datetime.
        """
        row_id = self._new_id("drug_exposure", drug_exposure_id)
        started, ended = _ts(start), _ts(end)
        first_day = _date(started) if started is not None else _date(start_date)
        last_day = _date(ended) if ended is not None else _date(end_date)
        if first_day is None:
            msg = "MiniCdm.drug: give `start` or `start_date`"
            raise ValueError(msg)
        route_id = 0
        if route is not None:
            route_codes = {row["route"]: (row["vocabulary_id"], row["concept_code"])
                           for row in _read_csv_from(self._codelists, "routes.csv")}
            if route not in route_codes:
                msg = f"MiniCdm.drug: route must be one of {sorted(route_codes)}, got {route!r}"
                raise ValueError(msg)
            route_id = self.concept(*route_codes[route])
        self._rows["drug_exposure"].append({
            "drug_exposure_id": row_id,
            "person_id": person_id,
            "drug_concept_id": self.concept(vocabulary, code, domain="Drug"),
            "drug_exposure_start_date": first_day,
            "drug_exposure_start_datetime": started,
            "drug_exposure_end_date": last_day if last_day is not None else first_day,
            "drug_exposure_end_datetime": ended,
            "drug_type_concept_id": 0,
            "quantity": quantity,
            "sig": sig,
            "route_concept_id": route_id,
            "visit_occurrence_id": visit,
            "drug_source_value": code,
            "drug_source_concept_id": 0,
            "route_source_value": route,
        })
        return row_id

    def death(self, person_id: int, *, at: str | None = None, date: str | None = None) -> None:
        """Add a death record (datetime ``at``, or date only)."""
        when = _ts(at)
        day = _date(when) if when is not None else _date(date)
        self._rows["death"].append({
            "person_id": person_id,
            "death_date": day,
            "death_datetime": when,
            "death_type_concept_id": 0,
            "cause_concept_id": 0,
        })

    # ------------------------------------------------------------------ output
    def tables(self) -> dict[str, pa.Table]:
        """Return every CDM table as an Arrow table with its full v5.4 schema."""
        rows = {name: list(values) for name, values in self._rows.items()}
        next_period = self._next_id.get("observation_period", 1)
        for offset, person_id in enumerate(sorted(self._auto_observation - self._explicit_observation)):
            rows["observation_period"].append({
                "observation_period_id": next_period + offset,
                "person_id": person_id,
                "observation_period_start_date": _date(_DEFAULT_OBSERVATION[0]),
                "observation_period_end_date": _date(_DEFAULT_OBSERVATION[1]),
                "period_type_concept_id": 0,
            })
        rows["concept"] = list(self._concepts.values())
        pairs = {(cid["concept_id"], cid["concept_id"], 0) for cid in self._concepts.values()
                 if cid["domain_id"] == "Drug"}
        pairs.update(self._ancestors)
        rows["concept_ancestor"] = [
            {"ancestor_concept_id": a, "descendant_concept_id": d,
             "min_levels_of_separation": level, "max_levels_of_separation": level}
            for a, d, level in sorted(pairs)
        ]
        out = {}
        for name in CDM_TABLES:
            schema = arrow_schema(name)
            data = {field.name: [row.get(field.name) for row in rows[name]] for field in schema}
            out[name] = pa.table(data, schema=schema)
        return out

    def write(
        self,
        path: str | Path,
        *,
        fmt: str = "parquet",
        omit_tables: tuple[str, ...] = (),
        omit_columns: dict[str, tuple[str, ...]] | None = None,
        shuffle_seed: int | None = None,
        parts: dict[str, int] | None = None,
        schema: str = "main",
    ) -> Path:
        """Write the extract and return its path.

        Parameters
        ----------
        path
            A folder (parquet, csv, csv.gz) or a file (duckdb) to create.
        fmt
            ``parquet`` (``<table>.parquet``), ``csv`` (``<table>.csv`` as a real export:
            empty strings for null, dates and datetimes as text), ``csv.gz``, or ``duckdb``
            (one ``.duckdb`` file, tables in ``schema``).
        omit_tables, omit_columns
            Leave tables or columns out (for schema-check tests).
        shuffle_seed
            Shuffle the row order of every table with this seed.
        parts
            For parquet: write these tables as a folder ``<table>/`` of that many part files.
        """
        target = Path(path)
        omit_columns = omit_columns or {}
        parts = parts or {}
        tables = {}
        for name, table in self.tables().items():
            if name in omit_tables:
                continue
            if shuffle_seed is not None and table.num_rows > 1:
                order = list(range(table.num_rows))
                random.Random(shuffle_seed).shuffle(order)
                table = table.take(pa.array(order))
            drop = [col for col in omit_columns.get(name, ()) if col in table.column_names]
            tables[name] = table.drop_columns(drop) if drop else table
        if fmt == "parquet":
            target.mkdir(parents=True, exist_ok=False)
            for name, table in tables.items():
                count = parts.get(name)
                if count:
                    folder = target / name
                    folder.mkdir()
                    size = max(1, -(-table.num_rows // count))
                    for index in range(count):
                        pq.write_table(table.slice(index * size, size),
                                       folder / f"part-{index:03d}.parquet")
                else:
                    pq.write_table(table, target / f"{name}.parquet")
        elif fmt in ("csv", "csv.gz"):
            target.mkdir(parents=True, exist_ok=False)
            con = duckdb.connect()
            try:
                for name, table in tables.items():
                    con.register("frame", table)
                    suffix = ".csv.gz" if fmt == "csv.gz" else ".csv"
                    file = str(target / f"{name}{suffix}").replace("'", "''")
                    options = "header, delimiter ',', nullstr '', " \
                              "timestampformat '%Y-%m-%d %H:%M:%S', dateformat '%Y-%m-%d'"
                    if fmt == "csv.gz":
                        options += ", compression 'gzip'"
                    con.execute(f"copy frame to '{file}' ({options})")
                    con.unregister("frame")
            finally:
                con.close()
        elif fmt == "duckdb":
            target.parent.mkdir(parents=True, exist_ok=True)
            if target.exists():
                msg = f"MiniCdm.write: {target} exists already"
                raise FileExistsError(msg)
            con = duckdb.connect(str(target))
            try:
                if schema != "main":
                    con.execute(f"create schema {schema}")
                for name, table in tables.items():
                    con.register("frame", table)
                    con.execute(f"create table {schema}.{name} as select * from frame")
                    con.unregister("frame")
            finally:
                con.close()
        else:
            msg = f"MiniCdm.write: fmt must be parquet, csv, csv.gz or duckdb, got {fmt!r}"
            raise ValueError(msg)
        return target


def _read_csv_from(folder: Path, name: str) -> list[dict[str, str]]:
    with (Path(folder) / name).open(newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))

