"""The OMOP CDM v5.4 tables and columns dka-cohort reads, with their types.

One specification serves three jobs: the schema check of :mod:`cohort.source` (which tables and
columns must be present and of which type), the typed views the recipes read, and the test
extract builder ``tests/cdmkit.py`` (which writes every table with its full column list).

Column lists follow the OMOP CDM v5.4 DDL (OHDSI CommonDataModel, ``OMOPCDM_duckdb_5.4_ddl.sql``)
[from memory]; the order is the DDL's order. Each column has a *kind*:

``id``
    a row identifier or foreign key (the CDM's ``integer``; read as ``bigint`` because extracts of
    large networks overflow 32 bits);
``concept``
    a concept_id (``integer``);
``int``
    another whole number (``integer``);
``float``
    a measured number (``float``, read as ``double``);
``date``, ``datetime``
    ``date`` and ``timestamp`` (naive local time, as the CDM stores it);
``text``
    ``varchar``.

A column is *used* when some recipe or feature of the pipeline reads it; the schema check requires
used columns of required tables and of optional tables that are present, and accepts the absence
of any other column (the views fill it with typed nulls).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "CdmColumn",
    "CDM_TABLES",
    "REQUIRED_TABLES",
    "OPTIONAL_TABLES",
    "KIND_SQL_TYPE",
    "KIND_ARROW_TYPE",
    "columns",
    "used_columns",
    "arrow_schema",
]

#: DuckDB type each column kind is read as.
KIND_SQL_TYPE: dict[str, str] = {
    "id": "bigint",
    "concept": "integer",
    "int": "integer",
    "float": "double",
    "date": "date",
    "datetime": "timestamp",
    "text": "varchar",
}

#: Arrow type name each column kind is written as by the test builder (see :func:`arrow_schema`).
KIND_ARROW_TYPE: dict[str, str] = {
    "id": "int64",
    "concept": "int32",
    "int": "int32",
    "float": "float64",
    "date": "date32",
    "datetime": "timestamp[us]",
    "text": "string",
}


@dataclass(frozen=True)
class CdmColumn:
    """One CDM column: its name, kind (see module docstring) and whether the pipeline reads it."""

    name: str
    kind: str
    used: bool = False

    @property
    def sql_type(self) -> str:
        """The DuckDB type the column is read as (``bigint``, ``timestamp`` ...)."""
        return KIND_SQL_TYPE[self.kind]


def _cols(spec: str) -> tuple[CdmColumn, ...]:
    """Parse ``name:kind[*]`` words; a trailing ``*`` marks a column the pipeline uses."""
    out = []
    for word in spec.split():
        name, kind = word.split(":")
        used = kind.endswith("*")
        out.append(CdmColumn(name, kind.rstrip("*"), used))
    return tuple(out)


#: Every CDM table dka-cohort knows, with its full v5.4 column list.
CDM_TABLES: dict[str, tuple[CdmColumn, ...]] = {
    "person": _cols(
        "person_id:id* gender_concept_id:concept* year_of_birth:int* month_of_birth:int* "
        "day_of_birth:int* birth_datetime:datetime race_concept_id:concept "
        "ethnicity_concept_id:concept location_id:id provider_id:id care_site_id:id* "
        "person_source_value:text gender_source_value:text gender_source_concept_id:concept "
        "race_source_value:text race_source_concept_id:concept ethnicity_source_value:text "
        "ethnicity_source_concept_id:concept"
    ),
    "observation_period": _cols(
        "observation_period_id:id person_id:id* observation_period_start_date:date* "
        "observation_period_end_date:date* period_type_concept_id:concept"
    ),
    "visit_occurrence": _cols(
        "visit_occurrence_id:id* person_id:id* visit_concept_id:concept* visit_start_date:date* "
        "visit_start_datetime:datetime* visit_end_date:date* visit_end_datetime:datetime* "
        "visit_type_concept_id:concept provider_id:id care_site_id:id* visit_source_value:text "
        "visit_source_concept_id:concept admitted_from_concept_id:concept "
        "admitted_from_source_value:text discharged_to_concept_id:concept "
        "discharged_to_source_value:text preceding_visit_occurrence_id:id"
    ),
    "visit_detail": _cols(
        "visit_detail_id:id* person_id:id* visit_detail_concept_id:concept* "
        "visit_detail_start_date:date* visit_detail_start_datetime:datetime* "
        "visit_detail_end_date:date* visit_detail_end_datetime:datetime* "
        "visit_detail_type_concept_id:concept provider_id:id care_site_id:id "
        "visit_detail_source_value:text visit_detail_source_concept_id:concept "
        "admitted_from_concept_id:concept admitted_from_source_value:text "
        "discharged_to_source_value:text discharged_to_concept_id:concept "
        "preceding_visit_detail_id:id parent_visit_detail_id:id visit_occurrence_id:id*"
    ),
    "condition_occurrence": _cols(
        "condition_occurrence_id:id* person_id:id* condition_concept_id:concept* "
        "condition_start_date:date* condition_start_datetime:datetime* condition_end_date:date "
        "condition_end_datetime:datetime condition_type_concept_id:concept "
        "condition_status_concept_id:concept stop_reason:text provider_id:id "
        "visit_occurrence_id:id* visit_detail_id:id condition_source_value:text "
        "condition_source_concept_id:concept* condition_status_source_value:text"
    ),
    "measurement": _cols(
        "measurement_id:id* person_id:id* measurement_concept_id:concept* measurement_date:date* "
        "measurement_datetime:datetime* measurement_time:text measurement_type_concept_id:concept "
        "operator_concept_id:concept value_as_number:float* value_as_concept_id:concept* "
        "unit_concept_id:concept* range_low:float range_high:float provider_id:id "
        "visit_occurrence_id:id* visit_detail_id:id measurement_source_value:text "
        "measurement_source_concept_id:concept unit_source_value:text "
        "unit_source_concept_id:concept value_source_value:text* measurement_event_id:id "
        "meas_event_field_concept_id:concept"
    ),
    "drug_exposure": _cols(
        "drug_exposure_id:id* person_id:id* drug_concept_id:concept* "
        "drug_exposure_start_date:date* drug_exposure_start_datetime:datetime* "
        "drug_exposure_end_date:date* drug_exposure_end_datetime:datetime* verbatim_end_date:date "
        "drug_type_concept_id:concept stop_reason:text refills:int quantity:float "
        "days_supply:int sig:text route_concept_id:concept* lot_number:text provider_id:id "
        "visit_occurrence_id:id* visit_detail_id:id drug_source_value:text "
        "drug_source_concept_id:concept route_source_value:text dose_unit_source_value:text"
    ),
    "death": _cols(
        "person_id:id* death_date:date* death_datetime:datetime* death_type_concept_id:concept "
        "cause_concept_id:concept cause_source_value:text cause_source_concept_id:concept"
    ),
    "concept": _cols(
        "concept_id:concept* concept_name:text* domain_id:text vocabulary_id:text* "
        "concept_class_id:text standard_concept:text concept_code:text* valid_start_date:date "
        "valid_end_date:date invalid_reason:text"
    ),
    "concept_ancestor": _cols(
        "ancestor_concept_id:concept* descendant_concept_id:concept* "
        "min_levels_of_separation:int max_levels_of_separation:int"
    ),
    "care_site": _cols(
        "care_site_id:id* care_site_name:text* place_of_service_concept_id:concept location_id:id "
        "care_site_source_value:text place_of_service_source_value:text"
    ),
}

#: Tables an extract must have.
REQUIRED_TABLES: tuple[str, ...] = (
    "person",
    "observation_period",
    "visit_occurrence",
    "condition_occurrence",
    "measurement",
    "drug_exposure",
    "death",
    "concept",
)

#: Tables read when present.
OPTIONAL_TABLES: tuple[str, ...] = ("visit_detail", "concept_ancestor", "care_site")


def columns(table: str) -> tuple[CdmColumn, ...]:
    """Return the full v5.4 column list of ``table``.

    Examples
    --------
    >>> [column.name for column in columns("death")][:3]
    ['person_id', 'death_date', 'death_datetime']
    """
    return CDM_TABLES[table]


def used_columns(table: str) -> tuple[CdmColumn, ...]:
    """Return the columns of ``table`` the pipeline reads (the ones the schema check requires).

    Examples
    --------
    >>> [column.name for column in used_columns("observation_period")]
    ['person_id', 'observation_period_start_date', 'observation_period_end_date']
    """
    return tuple(column for column in CDM_TABLES[table] if column.used)


def arrow_schema(table: str):  # -> pyarrow.Schema (pyarrow imported lazily)
    """Return the Arrow schema the test builder writes ``table`` with (full column list).

    Examples
    --------
    >>> str(arrow_schema("death").field("death_datetime").type)
    'timestamp[us]'
    """
    import pyarrow as pa

    types = {
        "id": pa.int64(),
        "concept": pa.int32(),
        "int": pa.int32(),
        "float": pa.float64(),
        "date": pa.date32(),
        "datetime": pa.timestamp("us"),
        "text": pa.string(),
    }
    return pa.schema([pa.field(column.name, types[column.kind]) for column in CDM_TABLES[table]])
