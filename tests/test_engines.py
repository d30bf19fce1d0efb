"""The dialect layer (cohort.engines._dialect): pitfalls refused or rewritten exactly (issue 8).

The engine behaviours these tests guard against are each stated in the engine's own manual:

- PostgreSQL 15 documentation, "SELECT" (sql-select.html): GROUP BY takes expressions, input
  column names or output column ordinals, no ``ALL``; "an output column's name can be used to
  refer to the column's value in ORDER BY and GROUP BY clauses, but not in the WHERE or HAVING
  clauses"; a sub-SELECT in FROM "must be surrounded by parentheses, and an alias can be
  provided for it" (aliases became optional only in PostgreSQL 16 release notes, E.x) [from memory];
  "Window Functions" (functions-window.html): "The SQL standard defines a RESPECT NULLS or
  IGNORE NULLS option for lead, lag, first_value, last_value, and nth_value. This is not
  implemented in PostgreSQL" [from memory];
  "ORDER BY": "NULLS FIRST is the default for DESC order, and NULLS LAST otherwise".
- DuckDB documentation, "ORDER BY Clause": the default null order is NULLS LAST for both ASC and
  DESC [from memory]; "Timestamp Functions": ``date_diff(part, a, b)`` is "the number of partition
  boundaries between the timestamps" [from memory].
- Spark SQL reference (sql-ref-null-semantics / sql-ref-syntax-qry-select-orderby): the default
  null order is NULLS FIRST for ASC [from memory]; ``timestampdiff``/``datediff(unit, ...)``
  counts whole units elapsed [from memory].
- T-SQL (Microsoft Learn, "ORDER BY Clause"): NULL values are treated as the lowest possible
  values; T-SQL has no NULLS FIRST/LAST syntax [from memory].
"""

from __future__ import annotations

import duckdb
import pytest
import sqlglot

from cohort._errors import CohortError
from cohort._sql import recipe_names
from cohort.engines import DIALECTS, recipe_values, render_all, render_for, transpile, write_rendered

TARGETS = [dialect for dialect in DIALECTS if dialect != "duckdb"]
BUNDLED = ["ada-2009", "consensus-2024", "jbds-2023", "ispad-2022"]


# --------------------------------------------------------------------------- refused constructs
@pytest.mark.parametrize("dialect", ["postgres", "spark"])
def test_asof_join_is_refused_issue_8(dialect: str) -> None:
    sql = ("select a.person_id, b.value from a asof join b on a.person_id = b.person_id "
           "and a.t >= b.t")
    # the measured pitfall: plain sqlglot passes it through for both engines
    assert "ASOF" in sqlglot.transpile(sql, read="duckdb", write=dialect)[0].upper()
    with pytest.raises(CohortError, match=r"recipe demo.sql: `ASOF JOIN` cannot be rendered"):
        transpile(sql, dialect, recipe="demo.sql")


def test_ignore_nulls_is_refused_for_every_target_issue_8() -> None:
    sql = ("select first_value(value ignore nulls) over (partition by person_id order by t "
           "rows between unbounded preceding and current row) as carried from labs")
    # the measured pitfall: plain sqlglot drops IGNORE NULLS for PostgreSQL (a different answer)
    assert "IGNORE" not in sqlglot.transpile(sql, read="duckdb", write="postgres")[0].upper()
    for dialect in TARGETS:
        with pytest.raises(CohortError, match="IGNORE NULLS"):
            transpile(sql, dialect, recipe="carry.sql")
    assert "IGNORE NULLS" in transpile(sql, "duckdb").upper()


def test_lateral_limit_is_refused_on_spark_issue_8() -> None:
    sql = ("select onsets.person_id, nearest.value from onsets, lateral (select labs.value from labs "
           "where labs.person_id = onsets.person_id order by labs.t desc limit 1) as nearest")
    with pytest.raises(CohortError, match=r"LATERAL \(\.\.\. LIMIT n\)"):
        transpile(sql, "spark")
    assert "LATERAL" in transpile(sql, "postgres").upper()


@pytest.mark.parametrize("dialect", TARGETS)
def test_date_diff_is_refused_issue_8(dialect: str) -> None:
    # DuckDB: date_diff('hour', 10:59, 11:01) = 1 (one boundary crossed); Spark: 0 whole hours
    sql = "select date_diff('hour', a, b) as hours from t"
    assert duckdb.sql("select date_diff('hour', timestamp '2024-01-01 10:59:00', "
                      "timestamp '2024-01-01 11:01:00')").fetchall()[0][0] == 1
    with pytest.raises(CohortError, match="boundaries"):
        transpile(sql, dialect)


@pytest.mark.parametrize(
    "sql",
    [
        "select value * 2 as doubled, doubled + 1 as plus_one from labs",
        "select value * 2 as doubled from labs where doubled > 3",
        "select person_id, max(value) as top from labs group by person_id having top > 3",
    ],
)
def test_select_alias_reuse_is_refused_issue_8(sql: str) -> None:
    # DuckDB accepts all three (its extension); PostgreSQL 15 refuses each
    duckdb.sql("create or replace temp table labs as select 1 as person_id, 2.0 as value")
    duckdb.sql(sql).fetchall()
    with pytest.raises(CohortError, match="alias reused"):
        transpile(sql, "postgres")


def test_passing_a_column_through_under_its_own_name_is_not_alias_reuse() -> None:
    sql = ("select labs.person_id as person_id, lower(labs.kind) as kind from labs "
           "where labs.person_id > 0")
    assert "LOWER(labs.kind) AS kind" in transpile(sql, "postgres", pretty=False)


# --------------------------------------------------------------------------- rewritten constructs
def test_group_by_all_becomes_the_projection_list_issue_8() -> None:
    sql = "select person_id, analyte, count(*) as n, 1 as one from labs group by all"
    out = transpile(sql, "postgres", pretty=False)
    assert out.endswith("GROUP BY person_id, analyte")
    con = duckdb.connect()
    con.execute("create table labs as select * from (values (1, 'ph'), (1, 'ph'), (2, 'bhb')) "
                "as rows(person_id, analyte)")
    assert sorted(con.sql(sql).fetchall()) == sorted(con.sql(out).fetchall())


def test_unaliased_derived_table_gets_an_alias_issue_8() -> None:
    out = transpile("select total from (select 1 as total) where total > 0", "postgres", pretty=False)
    assert "AS _derived_1" in out


def test_nulls_last_kept_where_the_target_cannot_say_it_issue_8() -> None:
    sql = ("select max(v) over (partition by p order by v rows between unbounded preceding and "
           "1 preceding) as previous_max from t")
    # plain sqlglot refuses: 'NULLS LAST' translation not supported in window function MAX
    with pytest.raises(sqlglot.errors.UnsupportedError, match="NULLS LAST"):
        sqlglot.transpile(sql, read="duckdb", write="tsql",
                          unsupported_level=sqlglot.ErrorLevel.RAISE)
    out = transpile(sql, "tsql", pretty=False)
    assert "ORDER BY CASE WHEN v IS NULL THEN 1 ELSE 0 END ASC, v" in out
    # the leading key gives DuckDB's order (null last) under the target's nulls-first default
    con = duckdb.connect()
    con.execute("create table t as select * from (values (1, null), (1, 2), (1, 1)) as rows(p, v)")
    rewritten = ("select v from t order by case when v is null then 1 else 0 end, v nulls first")
    assert [row[0] for row in con.sql(rewritten).fetchall()] == [1, 2, None]
    assert [row[0] for row in con.sql("select v from t order by v").fetchall()] == [1, 2, None]


def test_postgres_keeps_duckdb_null_order_for_descending_keys_issue_8() -> None:
    # PostgreSQL puts nulls first for DESC; DuckDB last: the rendering must say NULLS LAST
    out = transpile("select row_number() over (order by v desc) as r from t", "postgres", pretty=False)
    assert "ORDER BY v DESC NULLS LAST" in out


def test_spark_epoch_and_naive_timestamps_issue_8() -> None:
    out = transpile("select (extract(epoch from b) - extract(epoch from a)) / 3600.0 as hours, "
                    "cast(d as timestamp) as at from t", "spark", pretty=False)
    assert "EPOCH" not in out.upper()
    assert "UNIX_MICROS(CAST(b AS TIMESTAMP_LTZ)) AS DOUBLE) / 1000000.0" in out
    assert "CAST(d AS TIMESTAMP_NTZ)" in out


def test_postgres_make_date_and_float_text() -> None:
    out = transpile("select make_date(2000, 1, 2) as d, cast(x as varchar) as text_x from t",
                    "postgres", pretty=False)
    assert "MAKE_DATE(2000, 1, 2)" in out and "DATE_FROM_PARTS" not in out
    assert "PG_TYPEOF" in out


def test_unknown_dialect_and_bad_text() -> None:
    with pytest.raises(CohortError, match="unknown dialect 'oracle'"):
        transpile("select 1", "oracle")
    with pytest.raises(CohortError, match="recipe broken.sql: the DuckDB text does not parse"):
        transpile("select from where (", "postgres", recipe="broken.sql")


# --------------------------------------------------------------------------- every recipe
@pytest.mark.parametrize("dialect", ["duckdb", "postgres", "spark"])
@pytest.mark.parametrize("definition", BUNDLED)
def test_every_recipe_renders_for_the_tested_engines(dialect: str, definition: str) -> None:
    rendered = render_all(dialect, definition)
    assert list(rendered) == recipe_names()
    for name, sql in rendered.items():
        # the output parses back in the target dialect as one statement
        assert len([tree for tree in sqlglot.parse(sql, read=dialect) if tree is not None]) == 1, name


@pytest.mark.parametrize("dialect", ["bigquery", "snowflake", "tsql"])
def test_interval_arithmetic_is_refused_where_it_does_not_carry_issue_8(dialect: str) -> None:
    # the recipes' `interval '1 hour' * hours` runs on DuckDB, PostgreSQL and Spark (checked by
    # the engine tests); BigQuery multiplies intervals by INT64 only, Snowflake not at all, and
    # T-SQL has no interval type [from memory: each engine's reference, "interval" arithmetic]
    with pytest.raises(CohortError, match=r"recipe 31_lab_state.sql: `INTERVAL '1' HOUR \* 6.0`"):
        render_all(dialect, "consensus-2024")
    # recipes without intervals render
    assert "dka_codelist_lab" in render_for(dialect, "10_concept_lab.sql", {})


def test_duckdb_rendering_gives_the_same_rows_as_the_recipe(tmp_path) -> None:
    # a recipe round-tripped through sqlglot (duckdb -> duckdb) reads the same on a CDM-shaped input
    from cohort._codelists import read_codelists, register_codelists

    con = duckdb.connect()
    con.execute("create table concept (concept_id integer, vocabulary_id varchar, concept_code varchar)")
    con.execute("insert into concept values (1, 'LOINC', '2345-7'), (2, 'LOINC', '2746-6')")
    register_codelists(con, read_codelists())
    original = sorted(con.sql(render_for("duckdb", "10_concept_lab.sql", {})).fetchall())
    from cohort._sql import render_recipe

    assert original == sorted(con.sql(render_recipe("10_concept_lab.sql", {})).fetchall())
    assert [row[0] for row in original] == [1, 2]


def test_write_rendered_writes_one_file_per_recipe(tmp_path) -> None:
    written = write_rendered(render_all("postgres", "consensus-2024"), tmp_path / "pg")
    assert [path.name for path in written] == recipe_names()
    assert all(path.read_text().rstrip().endswith(";") for path in written)


def test_sql_command_prints_or_writes(tmp_path) -> None:
    from cohort.engines import sql_command

    text = sql_command("postgres", "ada-2009")
    assert text.startswith("-- 10_concept_lab.sql\n")
    assert text.count(";\n") == len(recipe_names())
    assert sql_command("spark", "ada-2009", tmp_path / "out").startswith(
        f"wrote {len(recipe_names())} recipes for spark")
    with pytest.raises(CohortError, match="cannot be rendered for tsql"):
        sql_command("tsql", "ada-2009")


def test_recipe_values_match_what_find_episodes_passes(tmp_path, monkeypatch) -> None:
    # the slot values the engines use are the ones cohort.episodes renders the recipes with
    import cohort._sql as sql_module
    from cohort.episodes import find_episodes
    from synthetic import generate_extract

    summary = generate_extract(persons=150, seed=8, out=tmp_path / "synth", progress=False)
    seen: dict[str, dict] = {}
    original = sql_module.render_recipe

    def record(name, values):
        seen.setdefault(name, dict(values))
        return original(name, values)

    monkeypatch.setattr(sql_module, "render_recipe", record)
    find_episodes(summary.extract_dir, ["jbds-2023"], threads=1)
    values = recipe_values("jbds-2023")
    expected = {**values["state"], **values["jbds-2023"]}
    for name in ("31_lab_state.sql", "40_onset_candidates.sql", "44_episode_step.sql", "46_episodes.sql"):
        for key, value in seen[name].items():
            assert expected[key] == value, (name, key)
