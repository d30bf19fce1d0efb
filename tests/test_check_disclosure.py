"""The disclosure scanner (cohort.report._check) against the rule of cohort.disclosure."""

from __future__ import annotations

import polars as pl
import pytest

from cohort._errors import InputError
from cohort.disclosure import suppress_counts
from cohort.report._check import check_disclosure


def _rules(found):
    return sorted((v.row, v.column, v.rule) for v in found)


def test_small_count_in_csv_is_found_and_zero_is_allowed(tmp_path):
    # Rule (cohort.disclosure; Hundepool et al., Statistical Disclosure Control, 2012, ch. 4):
    # counts 1..threshold-1 must not be shown; 0 may be.
    (tmp_path / "a.csv").write_text("reason,rows,share\nno_time,120,0.5\nimplausible,4,0.01\nduplicate,0,0\n")
    assert _rules(check_disclosure(tmp_path / "a.csv")) == [(2, "rows", "small_count")]
    assert check_disclosure(tmp_path / "a.csv", threshold=4) == []


def test_output_of_suppress_counts_passes(tmp_path):
    table = pl.DataFrame({"reason": ["a", "b", "c", "d"], "rows": [120, 4, 35, 0], "share": [0.7, 0.02, 0.2, 0.0]})
    suppress_counts(table, ["rows"], dependent_columns={"share": "rows"}).write_csv(tmp_path / "t.csv")
    assert check_disclosure(tmp_path) == []


def test_single_suppressed_cell_with_a_total_row_is_recoverable(tmp_path):
    (tmp_path / "t.csv").write_text("group,episodes\ntype1,120\ntype2,<10\ntotal,127\n")
    assert _rules(check_disclosure(tmp_path)) == [(2, "episodes", "recoverable")]
    (tmp_path / "t.csv").write_text("group,episodes\ntype1,withheld\ntype2,<10\ntotal,127\n")
    assert check_disclosure(tmp_path) == []


def test_identifiers_and_exact_dates(tmp_path):
    (tmp_path / "t.csv").write_text("person_id,onset_datetime,period\n1,2026-01-03 10:00:00,2026-01\n")
    found = _rules(check_disclosure(tmp_path))
    assert (0, "person_id", "person_identifier") in found
    assert (0, "onset_datetime", "exact_date") in found
    assert (1, "onset_datetime", "exact_date") in found
    assert not any(column == "period" for _, column, _ in found)   # a month is not an exact date


def test_html_tables_are_scanned(tmp_path):
    page = """<html><body><p>7 people</p>
    <table id="attrition"><thead><tr><th>step</th><th>persons</th></tr></thead>
    <tbody><tr><td>1</td><td>1,200</td></tr><tr><td>2</td><td>7</td></tr></tbody></table>
    <table><tr><th>time</th><th>at_risk</th></tr><tr><td>0</td><td>&lt;10</td></tr></table>
    </body></html>"""
    (tmp_path / "r.html").write_text(page)
    found = check_disclosure(tmp_path / "r.html")
    assert [(v.table, v.row, v.column, v.rule) for v in found] == [("attrition", 2, "persons", "small_count")]


def test_bad_paths(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        check_disclosure(tmp_path / "missing.html")
    (tmp_path / "x.parquet").write_bytes(b"")
    with pytest.raises(InputError, match="not a .csv or .html"):
        check_disclosure(tmp_path / "x.parquet")
