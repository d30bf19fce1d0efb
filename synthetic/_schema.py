"""Arrow schemas of the CDM v5.4 tables the generator writes.

Column names and order follow the OMOP CDM v5.4 DDL (OHDSI CommonDataModel,
``inst/ddl/5.4/duckdb/OMOPCDM_duckdb_5.4_ddl.sql``). Types: every integer column int64,
``*_date`` date32, ``*_datetime`` timestamp[us] without time zone, text string, NUMERIC float64.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

I = pa.int64()
D = pa.date32()
T = pa.timestamp("us")
S = pa.string()
F = pa.float64()

_COLUMNS: dict[str, list[tuple[str, pa.DataType]]] = {
    "person": [
        ("person_id", I), ("gender_concept_id", I), ("year_of_birth", I), ("month_of_birth", I),
        ("day_of_birth", I), ("birth_datetime", T), ("race_concept_id", I),
        ("ethnicity_concept_id", I), ("location_id", I), ("provider_id", I), ("care_site_id", I),
        ("person_source_value", S), ("gender_source_value", S), ("gender_source_concept_id", I),
        ("race_source_value", S), ("race_source_concept_id", I), ("ethnicity_source_value", S),
        ("ethnicity_source_concept_id", I),
    ],
    "observation_period": [
        ("observation_period_id", I), ("person_id", I), ("observation_period_start_date", D),
        ("observation_period_end_date", D), ("period_type_concept_id", I),
    ],
    "visit_occurrence": [
        ("visit_occurrence_id", I), ("person_id", I), ("visit_concept_id", I),
        ("visit_start_date", D), ("visit_start_datetime", T), ("visit_end_date", D),
        ("visit_end_datetime", T), ("visit_type_concept_id", I), ("provider_id", I),
        ("care_site_id", I), ("visit_source_value", S), ("visit_source_concept_id", I),
        ("admitted_from_concept_id", I), ("admitted_from_source_value", S),
        ("discharged_to_concept_id", I), ("discharged_to_source_value", S),
        ("preceding_visit_occurrence_id", I),
    ],
    "visit_detail": [
        ("visit_detail_id", I), ("person_id", I), ("visit_detail_concept_id", I),
        ("visit_detail_start_date", D), ("visit_detail_start_datetime", T),
        ("visit_detail_end_date", D), ("visit_detail_end_datetime", T),
        ("visit_detail_type_concept_id", I), ("provider_id", I), ("care_site_id", I),
        ("visit_detail_source_value", S), ("visit_detail_source_concept_id", I),
        ("admitted_from_concept_id", I), ("admitted_from_source_value", S),
        ("discharged_to_source_value", S), ("discharged_to_concept_id", I),
        ("preceding_visit_detail_id", I), ("parent_visit_detail_id", I),
        ("visit_occurrence_id", I),
    ],
    "condition_occurrence": [
        ("condition_occurrence_id", I), ("person_id", I), ("condition_concept_id", I),
        ("condition_start_date", D), ("condition_start_datetime", T), ("condition_end_date", D),
        ("condition_end_datetime", T), ("condition_type_concept_id", I),
        ("condition_status_concept_id", I), ("stop_reason", S), ("provider_id", I),
        ("visit_occurrence_id", I), ("visit_detail_id", I), ("condition_source_value", S),
        ("condition_source_concept_id", I), ("condition_status_source_value", S),
    ],
    "drug_exposure": [
        ("drug_exposure_id", I), ("person_id", I), ("drug_concept_id", I),
        ("drug_exposure_start_date", D), ("drug_exposure_start_datetime", T),
        ("drug_exposure_end_date", D), ("drug_exposure_end_datetime", T),
        ("verbatim_end_date", D), ("drug_type_concept_id", I), ("stop_reason", S),
        ("refills", I), ("quantity", F), ("days_supply", I), ("sig", S), ("route_concept_id", I),
        ("lot_number", S), ("provider_id", I), ("visit_occurrence_id", I), ("visit_detail_id", I),
        ("drug_source_value", S), ("drug_source_concept_id", I), ("route_source_value", S),
        ("dose_unit_source_value", S),
    ],
    "measurement": [
        ("measurement_id", I), ("person_id", I), ("measurement_concept_id", I),
        ("measurement_date", D), ("measurement_datetime", T), ("measurement_time", S),
        ("measurement_type_concept_id", I), ("operator_concept_id", I), ("value_as_number", F),
        ("value_as_concept_id", I), ("unit_concept_id", I), ("range_low", F), ("range_high", F),
        ("provider_id", I), ("visit_occurrence_id", I), ("visit_detail_id", I),
        ("measurement_source_value", S), ("measurement_source_concept_id", I),
        ("unit_source_value", S), ("unit_source_concept_id", I), ("value_source_value", S),
        ("measurement_event_id", I), ("meas_event_field_concept_id", I),
    ],
    "death": [
        ("person_id", I), ("death_date", D), ("death_datetime", T), ("death_type_concept_id", I),
        ("cause_concept_id", I), ("cause_source_value", S), ("cause_source_concept_id", I),
    ],
    "location": [
        ("location_id", I), ("address_1", S), ("address_2", S), ("city", S), ("state", S),
        ("zip", S), ("county", S), ("location_source_value", S), ("country_concept_id", I),
        ("country_source_value", S), ("latitude", F), ("longitude", F),
    ],
    "care_site": [
        ("care_site_id", I), ("care_site_name", S), ("place_of_service_concept_id", I),
        ("location_id", I), ("care_site_source_value", S), ("place_of_service_source_value", S),
    ],
    "concept": [
        ("concept_id", I), ("concept_name", S), ("domain_id", S), ("vocabulary_id", S),
        ("concept_class_id", S), ("standard_concept", S), ("concept_code", S),
        ("valid_start_date", D), ("valid_end_date", D), ("invalid_reason", S),
    ],
    "concept_ancestor": [
        ("ancestor_concept_id", I), ("descendant_concept_id", I),
        ("min_levels_of_separation", I), ("max_levels_of_separation", I),
    ],
}

TABLES: tuple[str, ...] = tuple(_COLUMNS)
SCHEMAS: dict[str, pa.Schema] = {name: pa.schema(cols) for name, cols in _COLUMNS.items()}


class Str:
    """A string column given as integer codes into a list of labels (code -1 is null)."""

    def __init__(self, codes: object, labels: list[str]) -> None:
        self.codes = codes
        self.labels = labels


class Masked:
    """A numeric, date or timestamp column with a null mask (True = null)."""

    def __init__(self, values: object, mask: object) -> None:
        self.values = values
        self.mask = mask


def _np_to_arrow(value: np.ndarray, typ: pa.DataType, mask: np.ndarray | None) -> pa.Array:
    if mask is not None and not mask.any():
        mask = None
    if typ == T and value.dtype.kind in "iu":
        return pa.array(value.astype(np.int64), type=pa.int64(), mask=mask).view(T)
    if typ == D and value.dtype.kind in "iu":
        return pa.array(value.astype(np.int32), type=pa.int32(), mask=mask).view(D)
    if value.dtype == object:
        return pa.array(value, type=typ, mask=mask)
    return pa.array(value, mask=mask).cast(typ)


def make_table(name: str, columns: dict[str, object], n: int) -> pa.Table:
    """Build table ``name`` of ``n`` rows; columns not given are all null.

    ``columns`` values may be numpy arrays (timestamps as int64 microseconds since 1970,
    dates as int days since 1970), :class:`Str`, :class:`Masked` or pyarrow arrays. :class:`Str`
    columns come out dictionary-encoded (written to Parquet without the Arrow schema, they read
    back as plain strings, the CDM type).
    """

    schema = SCHEMAS[name]
    unknown = set(columns) - set(schema.names)
    if unknown:  # pragma: no cover - programming error
        raise KeyError(f"{name}: unknown columns {sorted(unknown)}")
    arrays = []
    for field in schema:
        value = columns.get(field.name)
        if value is None:
            arrays.append(pa.nulls(n, field.type))
            continue
        if isinstance(value, Str):
            codes = np.asarray(value.codes)
            mask = codes < 0
            idx = pa.array(np.where(mask, 0, codes).astype(np.int32), mask=mask if mask.any() else None)
            # dictionary-encoded in memory; Parquet stores it as a plain UTF-8 string column
            arr = pa.DictionaryArray.from_arrays(idx, pa.array(list(value.labels), type=pa.string()))
        elif isinstance(value, Masked):
            arr = _np_to_arrow(np.asarray(value.values), field.type, np.asarray(value.mask, dtype=bool))
        elif isinstance(value, (pa.Array, pa.ChunkedArray)):
            arr = value.cast(field.type)
        else:
            arr = _np_to_arrow(np.asarray(value), field.type, None)
        if len(arr) != n:  # pragma: no cover - programming error
            raise ValueError(f"{name}.{field.name}: {len(arr)} values for {n} rows")
        arrays.append(arr)
    return pa.Table.from_arrays(arrays, names=schema.names)
