"""Table 1 (cohort.report._table_one): standardised differences and disclosure control."""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest

from cohort._errors import InputError
from cohort.report._table_one import standardised_difference, standardised_difference_share, table_one


def test_standardised_difference_of_a_measurement():
    # Austin PC. Balance diagnostics ... Stat Med 2009;28:3083-3107: d = (m1 - m2) / sqrt((s1^2 + s2^2) / 2)
    # [formula from memory]. With equal group sizes the pooled SD of Cohen's d (Cohen J. Statistical
    # Power Analysis for the Behavioral Sciences, 1988) is the same, so both readings give one number.
    rng = np.random.default_rng(1)
    a, b = rng.normal(10, 2, 200), rng.normal(9, 3, 200)
    pooled = math.sqrt(((a.size - 1) * a.var(ddof=1) + (b.size - 1) * b.var(ddof=1)) / (a.size + b.size - 2))
    assert standardised_difference(a.mean(), a.var(ddof=1), b.mean(), b.var(ddof=1)) == pytest.approx(
        (a.mean() - b.mean()) / pooled, rel=1e-12)
    assert math.isnan(standardised_difference(1.0, 0.0, 1.0, 0.0))


def test_standardised_difference_of_a_share():
    # Austin 2009: d = (p1 - p2) / sqrt((p1 (1 - p1) + p2 (1 - p2)) / 2); 0.5 vs 0.3 by hand:
    # 0.2 / sqrt(0.23) = 0.41703
    assert standardised_difference_share(0.5, 0.3) == pytest.approx(0.2 / math.sqrt(0.23), rel=1e-12)
    assert standardised_difference_share(0.3, 0.5) == pytest.approx(-0.41703, abs=1e-5)
    with pytest.raises(InputError, match=r"\[0, 1\]"):
        standardised_difference_share(1.2, 0.5)


def _persons() -> pl.DataFrame:
    rows = []
    for index in range(60):
        rows.append({"diabetes_type": "type1", "age_at_onset": 20 + index % 30, "sex": "female" if index % 2 else "male",
                     "severity": ["mild", "moderate", "severe"][index % 3], "has_icu_stay": index < 5})
    for index in range(25):
        rows.append({"diabetes_type": "type2", "age_at_onset": 50 + index, "sex": "female" if index < 20 else "male",
                     "severity": "mild" if index < 22 else "severe", "has_icu_stay": index < 12})
    for index in range(3):
        rows.append({"diabetes_type": "other", "age_at_onset": 40, "sex": "male", "severity": "mild",
                     "has_icu_stay": False})
    return pl.DataFrame(rows)


def test_table_one_suppresses_small_cells_and_the_differences_that_reveal_them():
    table = table_one(_persons(), threshold=10, groups=["type1", "type2", "other"])
    rows = {(r["characteristic"], r["level"]): r for r in table.iter_rows(named=True)}
    assert rows[("Persons", "")]["type1_n"] == "60" and rows[("Persons", "")]["other_n"] == "<10"
    assert rows[("Age at onset (years)", "median (IQR)")]["type1_summary"] == "34.5 (27.0-42.0)"   # numpy linear
    assert rows[("Age at onset (years)", "median (IQR)")]["other_summary"] == ""
    # type 2: 20 female, 5 male -> male "<10", and female withheld (its complement in the group)
    assert rows[("Sex", "male")]["type2_n"] == "<10"
    assert rows[("Sex", "female")]["type2_n"] == "withheld"
    assert rows[("Sex", "female")]["std_difference"] is None
    # ICU in type 1: 5 of 60 -> "<10", no share, no difference
    assert rows[("ICU stay", "yes")]["type1_n"] == "<10" and rows[("ICU stay", "yes")]["type1_summary"] == ""
    assert rows[("ICU stay", "yes")]["std_difference"] is None
    # severity in type 2: 22 mild, 0 moderate, 3 severe -> severe "<10" draws mild (the only other
    # non-zero count) as withheld; moderate 0 stays 0
    assert [rows[("Severity at onset", level)]["type2_n"] for level in ("mild", "moderate", "severe")] == [
        "withheld", "0", "<10"]
    assert rows[("Severity at onset", "mild")]["std_difference"] is None
    # age: both groups shown, the difference is given
    persons = _persons()
    a = persons.filter(pl.col("diabetes_type") == "type1")["age_at_onset"].cast(pl.Float64)
    b = persons.filter(pl.col("diabetes_type") == "type2")["age_at_onset"].cast(pl.Float64)
    expected = standardised_difference(a.mean(), a.var(), b.mean(), b.var())
    assert rows[("Age at onset (years)", "median (IQR)")]["std_difference"] == pytest.approx(expected, abs=1e-3)


def test_table_one_needs_the_group_column():
    with pytest.raises(InputError, match="diabetes_type"):
        table_one(pl.DataFrame({"x": [1]}), threshold=10)
