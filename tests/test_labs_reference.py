"""sql/20 against a second, plain polars implementation of the same rules (STYLE.md habit 9).

The reference below re-implements, independently of the SQL, the documented rules of
sql/20_measurement_checked.sql: lab concepts and unit rules resolved by (vocabulary_id,
concept_code), canonical value = value * multiply + add, urine-ketone ordinals, and the reason
priority person_unknown, no_time, before_birth, after_death, outside_observation, no_value,
unit_unknown, implausible, duplicate. Both run on hypothesis-drawn tiny extracts (invented data)
and on the synthetic demo extract; every row must get the same reason and value.
"""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cohort._codelists import read_codelists
from cohort._labs import prepare_lab_events
from cohort.source import open_extract
from tests.cdmkit import MiniCdm


def _key(text: pl.Expr) -> pl.Expr:
    return text.str.strip_chars().str.replace_all(" ", "", literal=True).str.to_lowercase()


def reference_checked(folder: Path) -> pl.DataFrame:
    """measurement_id, analyte, value, reason for every measurement row of a DKA analyte."""
    lists = read_codelists()
    read = lambda name: pl.read_parquet(folder / f"{name}.parquet")  # noqa: E731
    concept = read("concept").select("concept_id", "vocabulary_id", "concept_code")
    labs = lists["lab"].join(concept, on=["vocabulary_id", "concept_code"]).select(
        pl.col("concept_id").alias("measurement_concept_id"), "analyte")
    units = lists["unit"]
    coded_units = units.filter(pl.col("vocabulary_id") == "UCUM").join(
        concept.filter(pl.col("vocabulary_id") == "UCUM").select("concept_id", "concept_code"),
        on="concept_code").select("analyte", pl.col("concept_id").cast(pl.Int64).alias("unit_key"),
                                  "multiply", "add", "low", "high")
    none_units = units.filter(pl.col("vocabulary_id") == "none").select(
        "analyte", pl.lit(-1, pl.Int64).alias("unit_key"), "multiply", "add", "low", "high")
    rules = pl.concat([coded_units, none_units])
    ketone = lists["ketone"]
    ketone_codes = ketone.filter(pl.col("concept_code").is_not_null()).join(
        concept, on=["vocabulary_id", "concept_code"]).select(
        pl.col("concept_id").alias("value_as_concept_id"), pl.col("ordinal").alias("code_ordinal"))
    ketone_texts = ketone.select(_key(pl.col("text")).alias("text_key"),
                                 pl.col("ordinal").alias("text_ordinal")).unique("text_key")

    person = read("person").with_columns(
        pl.coalesce(
            pl.col("birth_datetime"),
            pl.datetime(pl.col("year_of_birth"),
                        pl.when(pl.col("month_of_birth").is_between(1, 12))
                        .then(pl.col("month_of_birth")).otherwise(1), 1),
        ).alias("birth")).group_by("person_id").agg(pl.col("birth").min())
    death = read("death").select(
        "person_id", pl.coalesce("death_date", pl.col("death_datetime").dt.date()).alias("death_day")
    ).group_by("person_id").agg(pl.col("death_day").min())
    periods = read("observation_period").select(
        "person_id", "observation_period_start_date", "observation_period_end_date")

    rows = read("measurement").join(labs, on="measurement_concept_id", how="inner")
    rows = rows.with_columns(
        pl.when(pl.col("unit_concept_id") == 0).then(None).otherwise(pl.col("unit_concept_id"))
        .alias("unit_concept_id"))
    observed = rows.select("measurement_id", "person_id", "measurement_datetime").join(
        periods, on="person_id").filter(
        (pl.col("measurement_datetime").dt.date() >= pl.col("observation_period_start_date"))
        & (pl.col("measurement_datetime").dt.date() <= pl.col("observation_period_end_date"))
    ).select("measurement_id").unique().with_columns(pl.lit(True).alias("observed"))
    dup_key = ["person_id", "measurement_concept_id", "measurement_datetime", "unit_concept_id",
               "value_as_number", "value_as_concept_id", "text_if_no_number"]
    rows = (
        rows.with_columns(
            pl.when(pl.col("value_as_number").is_null()).then(_key(pl.col("value_source_value")))
            .alias("text_if_no_number"),
            pl.col("unit_concept_id").cast(pl.Int64).fill_null(-1).alias("unit_key"),
            _key(pl.col("value_source_value")).alias("text_key"),
        )
        .sort("measurement_id")
        .with_columns(pl.int_range(pl.len()).over(dup_key).alias("copy"))
        .join(person.with_columns(pl.lit(True).alias("known")), on="person_id", how="left")
        .join(death, on="person_id", how="left")
        .join(observed, on="measurement_id", how="left")
        .join(rules, on=["analyte", "unit_key"], how="left")
        .join(ketone_codes, on="value_as_concept_id", how="left")
        .join(ketone_texts, on="text_key", how="left")
    )
    ordinal = pl.when(pl.col("analyte") == "urine_ketones").then(
        pl.coalesce("code_ordinal", "text_ordinal"))
    rows = rows.with_columns(ordinal.alias("ordinal")).with_columns(
        pl.when(pl.col("ordinal").is_not_null()).then(pl.col("ordinal").cast(pl.Float64))
        .when(pl.col("value_as_number").is_not_null() & pl.col("multiply").is_not_null())
        .then(pl.col("value_as_number") * pl.col("multiply") + pl.col("add"))
        .alias("value"))
    reason = (
        pl.when(pl.col("known").is_null()).then(pl.lit("person_unknown"))
        .when(pl.col("measurement_datetime").is_null()).then(pl.lit("no_time"))
        .when(pl.col("measurement_datetime") < pl.col("birth")).then(pl.lit("before_birth"))
        .when(pl.col("measurement_datetime").dt.date() > pl.col("death_day")).then(pl.lit("after_death"))
        .when(pl.col("observed").is_null()).then(pl.lit("outside_observation"))
        .when(pl.col("ordinal").is_null() & pl.col("value_as_number").is_null()).then(pl.lit("no_value"))
        .when(pl.col("ordinal").is_null() & pl.col("multiply").is_null()).then(pl.lit("unit_unknown"))
        .when((pl.col("value") < pl.col("low")) | (pl.col("value") > pl.col("high"))
              | ((pl.col("analyte") == "urine_ketones") & (pl.col("value") != pl.col("value").floor())))
        .then(pl.lit("implausible"))
        .when(pl.col("copy") > 0).then(pl.lit("duplicate"))
    )
    return rows.select("measurement_id", "analyte", "value", reason.alias("reason")).sort("measurement_id")


def _compare(folder: Path) -> pl.DataFrame:
    with open_extract(folder) as extract:
        summary = prepare_lab_events(extract)
        # sql/20 gives reasons 1-9; the quarantine (sql/24) adds `duplicate` for repeated copies
        got = extract.con.sql(
            "select checked.measurement_id, checked.analyte, checked.value, "
            "coalesce(checked.reason, quarantine.reason) as reason from dka_measurement_checked as checked "
            "left join dka_quarantine as quarantine on quarantine.source_table = 'measurement' "
            "and quarantine.source_row_id = checked.measurement_id order by checked.measurement_id").pl()
    expected = reference_checked(folder)
    assert got["measurement_id"].to_list() == expected["measurement_id"].to_list()
    assert got["analyte"].to_list() == expected["analyte"].to_list()
    assert got["reason"].to_list() == expected["reason"].to_list()
    usable = got.join(expected, on="measurement_id", suffix="_ref").filter(pl.col("reason").is_null())
    assert ((usable["value"] - usable["value_ref"]).abs() <= 1e-9 * usable["value_ref"].abs().clip(1)).all()
    assert summary.reconciles
    return got


_CODES = (("14749-6", ("mmol/L", "mg/dL", None, "g/L")), ("2345-7", ("mg/dL", "mmol/L", None)),
          ("2746-6", ("[pH]", None, "mmol/L")), ("2514-8", (None, "mg/dL")),
          ("1963-8", ("meq/L", "mmol/L", None)), ("718-7", ("g/dL",)))
_TIMES = (None, "2010-01-01 00:00", "2015-05-30 08:00", "2015-06-01 08:00", "2024-03-01 09:00", "2024-03-01 09:00",
          "2024-03-03 23:00", "2024-03-04 01:00", "2026-02-01 10:00")
_VALUES = (None, 0.0, 1.0, 2.0, 2.5, 7.1, 12.0, 72.0, 250.0, 1000.0)
_ANSWERS = (None, None, "2+", "Moderate", "positive", "260349009")

row_strategy = st.tuples(
    st.sampled_from((1, 2, 3, 99)),
    st.integers(0, len(_CODES) - 1),
    st.integers(0, 3),
    st.sampled_from(_TIMES),
    st.sampled_from(_VALUES),
    st.sampled_from(_ANSWERS),
)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(row_strategy, min_size=1, max_size=25))
def test_sql_matches_reference_on_drawn_extracts(tmp_path_factory: pytest.TempPathFactory, rows: list) -> None:
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01")
    cdm.person(2, birth="2012-01-01", observation=("2012-01-01", "2025-12-31"))
    cdm.person(3, birth="2015-06-20", observation=("2015-01-01", "2016-01-01"), birth_precision="month")
    cdm.observation_period(3, start="2020-01-01", end="2024-12-31")
    cdm.death(1, date="2024-03-03")
    for person, code_index, unit_index, at, value, answer in rows:
        code, units = _CODES[code_index]
        unit = units[unit_index % len(units)]
        cdm.lab(person, code, value, unit=unit, at=at, date=None if at else "2024-03-02",
                value_as=answer)
    folder = cdm.write(tmp_path_factory.mktemp("drawn") / "x", fmt="parquet")
    _compare(folder)


def test_sql_matches_reference_on_the_synthetic_extract(tmp_path: Path) -> None:
    synthetic = pytest.importorskip("synthetic")
    summary = synthetic.generate_extract(persons=600, seed=11, out=tmp_path / "demo", progress=False)
    got = _compare(Path(summary.extract_dir))
    # the generator plants date-only results and duplicate postings (its truth/faults.json)
    assert {"no_time", "duplicate"} <= set(got["reason"].drop_nulls())
    assert got.filter(pl.col("reason").is_null()).height > 0.9 * got.height



def _compare_scoped(folder: Path, persons: list[int]) -> pl.DataFrame:
    """A run limited to ``persons`` against the reference restricted to their rows."""
    with open_extract(folder) as extract:
        summary = prepare_lab_events(extract, persons=persons)
        con = extract.con
        got = con.sql(
            "select checked.measurement_id, checked.analyte, checked.value, "
            "coalesce(checked.reason, quarantine.reason) as reason from dka_measurement_checked as checked "
            "left join dka_quarantine as quarantine on quarantine.source_table = 'measurement' "
            "and quarantine.source_row_id = checked.measurement_id order by checked.measurement_id").pl()
        quarantined = con.execute("select count(*) from dka_quarantine where source_table = 'measurement'"
                                  ).fetchall()[0][0]
    measurement = pl.read_parquet(folder / "measurement.parquet")
    theirs = measurement.filter(pl.col("person_id").is_in(persons))
    expected = reference_checked(folder).join(theirs.select("measurement_id"), on="measurement_id")
    assert got["measurement_id"].to_list() == expected["measurement_id"].to_list()
    assert got["reason"].to_list() == expected["reason"].to_list()
    assert quarantined == expected["reason"].is_not_null().sum()
    assert summary.persons == len(set(persons))
    assert summary.rows_read == theirs.height and summary.reconciles
    return got


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(row_strategy, min_size=1, max_size=25),
       persons=st.lists(st.sampled_from((1, 2, 3, 99)), min_size=0, max_size=3))
def test_run_limited_to_some_persons_matches_the_reference_on_their_rows(
        tmp_path_factory: pytest.TempPathFactory, rows: list, persons: list[int]) -> None:
    # prepare_lab_events(persons=...) (the features' reading): the same reasons and values as the
    # full run for those persons' rows, nothing of anyone else, and their rows reconcile
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01")
    cdm.person(2, birth="2012-01-01", observation=("2012-01-01", "2025-12-31"))
    cdm.person(3, birth="2015-06-20", observation=("2015-01-01", "2016-01-01"), birth_precision="month")
    cdm.death(1, date="2024-03-03")
    for person, code_index, unit_index, at, value, answer in rows:
        code, units = _CODES[code_index]
        cdm.lab(person, code, value, unit=units[unit_index % len(units)], at=at,
                date=None if at else "2024-03-02", value_as=answer)
    _compare_scoped(cdm.write(tmp_path_factory.mktemp("scoped") / "x", fmt="parquet"), persons)


def test_run_limited_to_some_persons_gives_their_lab_events_of_the_full_run(tmp_path: Path) -> None:
    synthetic = pytest.importorskip("synthetic")
    summary = synthetic.generate_extract(persons=600, seed=11, out=tmp_path / "demo", progress=False)
    folder = Path(summary.extract_dir)
    persons = pl.read_parquet(folder / "person.parquet")["person_id"].head(150).to_list()
    events = "select * from dka_lab_events order by measurement_id"
    with open_extract(folder) as extract:
        prepare_lab_events(extract)
        full = extract.con.sql(events).pl().filter(pl.col("person_id").is_in(persons))
    with open_extract(folder) as extract:
        prepare_lab_events(extract, persons=pl.Series(persons))
        limited = extract.con.sql(events).pl()
    assert limited.height > 0 and limited.equals(full)
    _compare_scoped(folder, persons)
