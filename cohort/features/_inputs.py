"""The plain input frames of the feature builders, their schemas and their checks.

The builders are pure polars functions over these frames; :func:`load_feature_inputs` (in
:mod:`cohort.features._loader`) pulls them from an extract's DuckDB session, and tests build them
by hand. Every frame has a fixed set of columns with fixed types; extra columns are ignored.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, fields

import polars as pl

from cohort._errors import InputError, SchemaError

__all__ = ["EPISODE_SCHEMA", "INPUT_SCHEMAS", "FeatureInputs", "check_episodes"]

DT = pl.Datetime("us")

#: Columns every input frame must have, with their types.
INPUT_SCHEMAS: dict[str, dict[str, pl.DataType]] = {
    # intravenous regular insulin (drug_exposure, route intravenous, class insulin_regular)
    "infusions": {
        "person_id": pl.Int64(),
        "drug_exposure_id": pl.Int64(),
        "visit_occurrence_id": pl.Int64(),
        "start_datetime": DT,
        "end_datetime": DT,
    },
    # subcutaneous (any route but intravenous) basal insulin doses
    "basal_doses": {
        "person_id": pl.Int64(),
        "drug_exposure_id": pl.Int64(),
        "start_datetime": DT,
    },
    # usable lab results in canonical units (a slice of dka_lab_events)
    "labs": {
        "person_id": pl.Int64(),
        "event_datetime": DT,
        "analyte": pl.String(),
        "value": pl.Float64(),
    },
    "visits": {
        "visit_occurrence_id": pl.Int64(),
        "person_id": pl.Int64(),
        "visit_start_datetime": DT,
        "visit_end_datetime": DT,
        "care_site_id": pl.Int64(),
        "visit_kind": pl.String(),
    },
    "visit_details": {
        "visit_detail_id": pl.Int64(),
        "person_id": pl.Int64(),
        "visit_occurrence_id": pl.Int64(),
        "visit_kind": pl.String(),
    },
    "persons": {
        "person_id": pl.Int64(),
        "birth_datetime": DT,
        "sex": pl.String(),
        "care_site_id": pl.Int64(),
    },
    "deaths": {
        "person_id": pl.Int64(),
        "death_date": pl.Date(),
        "death_datetime": DT,
    },
    "observation_periods": {
        "person_id": pl.Int64(),
        "observation_period_start_date": pl.Date(),
        "observation_period_end_date": pl.Date(),
    },
    # one row per person, coded day and diabetes type (type1 | type2 | other | unspecified:
    # a ketoacidosis-only code, which dates the diabetes but does not type it)
    "diabetes_records": {
        "person_id": pl.Int64(),
        "record_date": pl.Date(),
        "diabetes_type": pl.String(),
    },
    "hba1c": {
        "person_id": pl.Int64(),
        "event_datetime": DT,
        "value_mmol_mol": pl.Float64(),
    },
    "sglt2_exposures": {
        "person_id": pl.Int64(),
        "start_datetime": DT,
        "end_datetime": DT,
        "days_supply": pl.Int64(),
    },
}

#: Columns of the episodes frame (DESIGN.md episodes.parquet contract); the optional ones are
#: filled with nulls (is_rebound with false) when absent.
EPISODE_SCHEMA: dict[str, pl.DataType] = {
    "episode_id": pl.String(),
    "person_id": pl.Int64(),
    "definition": pl.String(),
    "visit_occurrence_id": pl.Int64(),
    "onset_datetime": DT,
    "resolution_datetime": DT,
    "end_datetime": DT,
    "end_reason": pl.String(),
    "hours_to_resolution": pl.Float64(),
    "severity": pl.String(),
    "glucose_mmol_l": pl.Float64(),
    "ph": pl.Float64(),
    "bicarbonate_mmol_l": pl.Float64(),
    "bhb_mmol_l": pl.Float64(),
    "anion_gap_mmol_l": pl.Float64(),
    "is_rebound": pl.Boolean(),
}
_EPISODE_REQUIRED = ("episode_id", "person_id", "definition", "onset_datetime", "end_datetime")

_KNOWN_VALUES = {
    ("diabetes_records", "diabetes_type"): ("type1", "type2", "other", "unspecified"),
}


def _empty(name: str) -> pl.DataFrame:
    return pl.DataFrame(schema=INPUT_SCHEMAS[name])


def _conform(name: str, frame: pl.DataFrame, schema: Mapping[str, pl.DataType]) -> pl.DataFrame:
    if not isinstance(frame, pl.DataFrame):
        msg = f"feature input `{name}` must be a polars DataFrame, got {type(frame).__name__}"
        raise InputError(msg)
    missing = [column for column in schema if column not in frame.columns]
    if missing:
        msg = (
            f"feature input `{name}` lacks column(s) {', '.join(missing)}; expected "
            f"{', '.join(schema)}; found {', '.join(frame.columns) or 'no columns'}"
        )
        raise SchemaError(msg)
    out = []
    for column, dtype in schema.items():
        series = frame.get_column(column)
        if series.dtype == dtype:
            out.append(series)
            continue
        try:
            if series.dtype == pl.String and isinstance(dtype, pl.Datetime):
                cast = series.str.to_datetime(time_unit="us", strict=True)
            elif series.dtype == pl.String and isinstance(dtype, pl.Date):
                cast = series.str.to_date(strict=True)
            else:
                cast = series.cast(dtype, strict=True)
        except (pl.exceptions.InvalidOperationError, pl.exceptions.ComputeError) as error:
            msg = (
                f"feature input `{name}` column `{column}` must be {dtype}; found {series.dtype} "
                f"that does not convert ({error.__class__.__name__})"
            )
            raise SchemaError(msg) from None
        out.append(cast)
    return pl.DataFrame(out)


@dataclass(frozen=True)
class FeatureInputs:
    """The frames the feature builders read, besides the episodes.

    Every field defaults to an empty frame of its schema (:data:`INPUT_SCHEMAS`), so a test can
    give only what it needs. Frames are checked and cast to their schema on construction;
    columns beyond the schema are dropped.

    Examples
    --------
    >>> import polars as pl
    >>> inputs = FeatureInputs(persons=pl.DataFrame({"person_id": [1], "birth_datetime": [None],
    ...     "sex": ["female"], "care_site_id": [None]}))
    >>> inputs.persons.height, inputs.infusions.height
    (1, 0)
    """

    infusions: pl.DataFrame = field(default_factory=lambda: _empty("infusions"))
    basal_doses: pl.DataFrame = field(default_factory=lambda: _empty("basal_doses"))
    labs: pl.DataFrame = field(default_factory=lambda: _empty("labs"))
    visits: pl.DataFrame = field(default_factory=lambda: _empty("visits"))
    visit_details: pl.DataFrame = field(default_factory=lambda: _empty("visit_details"))
    persons: pl.DataFrame = field(default_factory=lambda: _empty("persons"))
    deaths: pl.DataFrame = field(default_factory=lambda: _empty("deaths"))
    observation_periods: pl.DataFrame = field(
        default_factory=lambda: _empty("observation_periods")
    )
    diabetes_records: pl.DataFrame = field(default_factory=lambda: _empty("diabetes_records"))
    hba1c: pl.DataFrame = field(default_factory=lambda: _empty("hba1c"))
    sglt2_exposures: pl.DataFrame = field(default_factory=lambda: _empty("sglt2_exposures"))

    def __post_init__(self) -> None:
        for item in fields(self):
            frame = _conform(item.name, getattr(self, item.name), INPUT_SCHEMAS[item.name])
            for (table, column), allowed in _KNOWN_VALUES.items():
                if table != item.name:
                    continue
                bad = frame.filter(~pl.col(column).is_in(allowed) | pl.col(column).is_null())
                if bad.height:
                    found = bad.get_column(column).unique().head(5).to_list()
                    msg = (
                        f"feature input `{table}` column `{column}` takes "
                        f"{', '.join(allowed)}; {bad.height} row(s) hold something else, "
                        f"e.g. {found}"
                    )
                    raise InputError(msg)
            object.__setattr__(self, item.name, frame)


def check_episodes(episodes: pl.DataFrame) -> pl.DataFrame:
    """Check the episodes frame and return it cast to :data:`EPISODE_SCHEMA`.

    Raises
    ------
    SchemaError
        When a required column is missing or does not convert to its type.
    InputError
        When rows have no onset or end, end before onset, or a repeated
        (definition, episode_id); the message gives the row count and an example id.
    """
    if not isinstance(episodes, pl.DataFrame):
        msg = f"episodes must be a polars DataFrame, got {type(episodes).__name__}"
        raise InputError(msg)
    frame = episodes
    for column, dtype in EPISODE_SCHEMA.items():
        if column not in frame.columns and column not in _EPISODE_REQUIRED:
            fill = pl.lit(False) if column == "is_rebound" else pl.lit(None)
            frame = frame.with_columns(fill.cast(dtype).alias(column))
    frame = _conform("episodes", frame, EPISODE_SCHEMA)
    frame = frame.with_columns(pl.col("is_rebound").fill_null(False))
    problems = {
        "no onset_datetime": pl.col("onset_datetime").is_null(),
        "no end_datetime": pl.col("end_datetime").is_null(),
        "no person_id": pl.col("person_id").is_null(),
        "no episode_id or definition": pl.col("episode_id").is_null()
        | pl.col("definition").is_null(),
        "end_datetime before onset_datetime": pl.col("end_datetime") < pl.col("onset_datetime"),
        "resolution_datetime before onset_datetime": pl.col("resolution_datetime")
        < pl.col("onset_datetime"),
        "repeated (definition, episode_id)": pl.struct("definition", "episode_id").is_duplicated(),
    }
    for problem, predicate in problems.items():
        bad = frame.filter(predicate.fill_null(False))
        if bad.height:
            example = bad.get_column("episode_id").head(1).to_list()
            msg = (
                f"episodes: {bad.height} row(s) with {problem} (e.g. episode_id {example}); "
                "features need every episode with an onset and an end, as episodes.parquet "
                "is written by `dka-cohort episodes`"
            )
            raise InputError(msg)
    return frame
