"""The named SQL macros (cohort/_macros.py): each engine's form gives the same rows.

``carry_forward`` is rendered twice, as DuckDB's ``last_value(... ignore nulls)`` window and as
the portable count-then-first-value form every other engine runs, and both are run in DuckDB on
the same rows; a plain-Python last-observation-carried-forward is the reference (the rule itself
is common practice: the latest non-null value at or before each time, with its time).
"""

from __future__ import annotations

import datetime as dt

import duckdb
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cohort._errors import CohortError
from cohort._macros import carry_forward, expand
from cohort._sql import render
from cohort.engines._dialect import transpile

T0 = dt.datetime(2024, 1, 1)


def _carry(rows: list[tuple[int, int, float | None, float | None]], dialect: str,
           only: tuple[str, ...] | None = None) -> list[tuple]:
    con = duckdb.connect()
    con.execute("create table source_rows (person_id bigint, at_time timestamp, keep_me bigint, "
                "a double, b double)")
    con.executemany("insert into source_rows values (?, ?, ?, ?, ?)",
                    [(person, T0 + dt.timedelta(hours=hour), person * 100 + hour, a, b)
                     for person, hour, a, b in rows])
    ctes = carry_forward(dialect, name="carried", source="src", partition="person_id", order="at_time",
                         keep=("keep_me",), columns=("a", "b"), only=only)
    sql = (f"with src as (select person_id, at_time, keep_me, a, b from source_rows),\n{ctes}\n"
           "select person_id, at_time, keep_me, a_last, a_last_datetime, b_last, b_last_datetime "
           "from carried order by person_id, at_time")
    return con.execute(sql).fetchall()


def _reference(rows: list[tuple[int, int, float | None, float | None]]) -> list[tuple]:
    out = []
    last: dict[tuple[int, str], tuple[float, dt.datetime]] = {}
    for person, hour, a, b in sorted(rows, key=lambda row: (row[0], row[1])):
        at = T0 + dt.timedelta(hours=hour)
        for name, value in (("a", a), ("b", b)):
            if value is not None:
                last[(person, name)] = (value, at)
        a_last = last.get((person, "a"), (None, None))
        b_last = last.get((person, "b"), (None, None))
        out.append((person, at, person * 100 + hour, *a_last, *b_last))
    return out


_ROWS = st.lists(
    st.tuples(st.integers(1, 3), st.integers(0, 40),
              st.one_of(st.none(), st.floats(-5, 5, allow_nan=False)),
              st.one_of(st.none(), st.floats(-5, 5, allow_nan=False))),
    min_size=1,
    max_size=40,
    unique_by=lambda row: (row[0], row[1]),  # the order column is unique within a partition
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_ROWS)
def test_both_forms_equal_a_plain_python_carry_forward(rows):
    expected = _reference(rows)
    assert _carry(rows, "duckdb") == expected
    assert _carry(rows, "postgres") == expected


def test_worked_example_a_gap_of_nulls_carries_the_last_value_and_its_time():
    rows = [(1, 0, 7.1, None), (1, 1, None, 3.0), (1, 2, None, None), (1, 5, 7.3, None), (2, 0, None, None)]
    for dialect in ("duckdb", "spark"):
        got = _carry(rows, dialect)
        assert [row[3] for row in got] == [7.1, 7.1, 7.1, 7.3, None]
        assert got[2][4] == T0  # the 7.1 came from hour 0
        assert [row[5] for row in got] == [None, 3.0, 3.0, 3.0, None]


def test_columns_left_out_by_only_come_out_null_on_both_forms():
    rows = [(1, 0, 7.1, 2.0), (1, 1, None, None)]
    for dialect in ("duckdb", "postgres"):
        got = _carry(rows, dialect, only=("a",))
        assert [row[3] for row in got] == [7.1, 7.1]
        assert [row[5] for row in got] == [None, None]
        assert [row[6] for row in got] == [None, None]


def test_only_duckdb_gets_ignore_nulls_and_the_portable_form_transpiles():
    call = "name=c, source=s, partition=p, order=t, columns=x y"
    assert "ignore nulls" in expand("carry_forward", call, {}, "duckdb")
    sql = f"with s as (select 1 as p, 2 as t, 3.0 as x, 4.0 as y),\n{expand('carry_forward', call, {}, 'postgres')}\nselect * from c"
    for dialect in ("postgres", "spark", "bigquery", "snowflake", "tsql"):
        assert "IGNORE NULLS" not in transpile(sql, dialect)
    # the DuckDB form is refused by the transpiler for another engine: it cannot leak through
    duck = f"with s as (select 1 as p, 2 as t, 3.0 as x, 4.0 as y),\n{expand('carry_forward', call, {}, 'duckdb')}\nselect * from c"
    with pytest.raises(CohortError, match="IGNORE NULLS"):
        transpile(duck, "postgres")


def test_a_recipe_macro_call_renders_per_dialect_and_reads_its_only_slot():
    text = ("with s as (select 1 as p, 2 as t, 3.0 as x),\n"
            "{{ carry_forward(name=c, source=s, partition=p, order=t, columns=x, only=wanted) }}\n"
            "select c.x_last from c where {{ flag }}")
    duck = render(text, {"wanted": ("x",), "flag": True})
    portable = render(text, {"wanted": ("x",), "flag": True}, dialect="postgres")
    assert "ignore nulls" in duck and "ignore nulls" not in portable
    assert duckdb.sql(duck).fetchall() == duckdb.sql(portable).fetchall() == [(3.0,)]


@pytest.mark.parametrize(("arguments", "message"), [
    ("name=c, source=s, partition=p, order=t", "missing columns"),
    ("name=c, source=s, partition=p, order=t, columns=x, colour=red", "unknown argument"),
    ("name=c; drop table x, source=s, partition=p, order=t, columns=x", "identifier"),
    ("name=c, source=s, partition=p q, order=t, columns=x", "one identifier"),
    ("name=c, source=s, partition=p, order=t, columns=x, only=missing_slot", "tuple of words"),
    ("name=c, name=d, source=s, partition=p, order=t, columns=x", "given twice"),
    ("name, source=s", "key=value"),
])
def test_malformed_macro_calls_are_refused_with_the_argument_named(arguments, message):
    with pytest.raises(CohortError, match=message):
        expand("carry_forward", arguments, {}, "duckdb")


def test_an_unknown_macro_is_refused():
    with pytest.raises(CohortError, match="unknown SQL macro"):
        expand("carry_back", "name=c", {}, "duckdb")
