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
from sqlglot import exp

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
# --------------------------------------------------------------------------- add_hours
# The engines' own functions for shifting a time [from memory: Google Cloud, "BigQuery datetime
# functions", DATETIME_ADD/DATETIME_SUB(datetime, INTERVAL int64 part); Snowflake documentation,
# "DATEADD(date_or_time_part, value, date_or_time_expr)"; Microsoft Learn, "DATEADD (Transact-SQL)",
# number "an expression that can resolve to an int"]. Each takes a whole number of seconds here.
ADD_HOURS_EXPECTED = {
    "bigquery": "SELECT DATETIME_ADD(t, INTERVAL (CAST(ROUND((6.5) * 3600, 0) AS INT64)) SECOND) AS later, "
                "DATETIME_SUB(t, INTERVAL (CAST(ROUND((n) * 60, 0) AS INT64)) SECOND) AS earlier FROM labs",
    "snowflake": "SELECT DATEADD(SECOND, CAST(ROUND((6.5) * 3600, 0) AS BIGINT), t) AS later, "
                 "DATEADD(SECOND, -(CAST(ROUND((n) * 60, 0) AS BIGINT)), t) AS earlier FROM labs",
    "tsql": "SELECT DATEADD(SECOND, CAST(ROUND((6.5) * 3600, 0) AS INTEGER), t) AS later, "
            "DATEADD(SECOND, -(CAST(ROUND((n) * 60, 0) AS INTEGER)), t) AS earlier FROM labs",
}


@pytest.mark.parametrize("dialect", sorted(ADD_HOURS_EXPECTED))
def test_add_hours_renders_the_engines_own_time_shift(dialect: str) -> None:
    from cohort.engines import ADD_HOURS_DIALECTS

    assert dialect in ADD_HOURS_DIALECTS
    sql = ("select t + interval '1 hour' * 6.5 as later, t - interval '1 minute' * n as earlier "
           "from labs")
    assert transpile(sql, dialect, pretty=False) == ADD_HOURS_EXPECTED[dialect]


@pytest.mark.parametrize("dialect", sorted(ADD_HOURS_EXPECTED))
def test_add_hours_end_of_day_is_two_whole_second_shifts(dialect: str) -> None:
    # `date + interval '1 day' - interval '1 second'` (sql/42, 43, 50, 51): 86400 s then -1 s
    out = transpile("select cast(d as timestamp) + interval '1 day' - interval '1 second' as ends from v",
                    dialect, pretty=False)
    assert "INTERVAL '" not in out
    if dialect == "bigquery":
        assert "DATETIME_SUB(DATETIME_ADD(CAST(d AS DATETIME), INTERVAL 86400 SECOND), INTERVAL 1 SECOND)" in out
    else:
        assert "DATEADD(SECOND, -1, DATEADD(SECOND, 86400, CAST(d AS " in out


@pytest.mark.parametrize("hours", [0.5, 1.5, 6.0, 1 / 3, 0.01, 23.999, 48.0])
def test_add_hours_seconds_match_duckdb_interval_arithmetic(hours: float) -> None:
    # the rendered shift is round(hours * 3600) whole seconds; DuckDB's `interval '1 hour' * h`
    # gives the same time to the second for any fraction of an hour (arithmetic, common practice)
    con = duckdb.connect()
    start = "timestamp '2024-02-28 22:15:07'"
    exact, rounded = con.execute(
        f"select {start} + interval '1 hour' * cast({hours!r} as double), "
        f"{start} + to_seconds(cast(round(cast({hours!r} as double) * 3600, 0) as bigint))").fetchall()[0]
    assert exact.replace(microsecond=0) == rounded.replace(microsecond=0)
    assert abs((exact - rounded).total_seconds()) < 1


@pytest.mark.parametrize("dialect", sorted(ADD_HOURS_EXPECTED))
def test_add_hours_leaves_months_to_the_interval_check(dialect: str) -> None:
    # a month has no fixed number of seconds: not rewritten, refused with the recipe named
    sql = "select t + interval '1 month' * 2 as later from labs"
    with pytest.raises(CohortError, match=r"recipe months.sql: `t \+ INTERVAL '1' MONTH \* 2`|"
                                          r"recipe months.sql: `INTERVAL '1' MONTH \* 2`"):
        transpile(sql, dialect, recipe="months.sql")


def test_add_hours_leaves_other_dialects_alone() -> None:
    from cohort.engines import add_hours

    sql = "select t + interval '1 hour' * 6.5 as later from labs"
    tree = sqlglot.parse_one(sql, read="duckdb")
    for dialect in ("duckdb", "postgres", "spark"):
        assert add_hours(tree.copy(), dialect).sql(dialect="duckdb") == tree.sql(dialect="duckdb")
    assert "INTERVAL '1 HOUR' * 6.5" in transpile(sql, "postgres", pretty=False).upper()


def test_bigquery_least_skips_nulls_as_duckdb_does() -> None:
    # DuckDB's least/greatest skip nulls; BigQuery's return null if any argument is null [from
    # memory: Google Cloud, "BigQuery mathematical functions", LEAST]. The coalesce form gives
    # DuckDB's answer for every pattern of nulls.
    out = transpile("select least(a, b, c) as low, greatest(a, b, c) as high from t", "bigquery", pretty=False)
    assert out.startswith("SELECT LEAST(COALESCE(a, b, c), COALESCE(b, a, c), COALESCE(c, a, b)) AS low")
    con = duckdb.connect()
    con.execute("create table t as select * from (values (1, null, 3), (null, null, 2), (null, null, null),"
                " (5, 4, null)) as rows(a, b, c)")
    duck = con.sql("select least(a, b, c), greatest(a, b, c) from t order by all").fetchall()
    guarded = con.sql("select least(coalesce(a, b, c), coalesce(b, a, c), coalesce(c, a, b)), "
                      "greatest(coalesce(a, b, c), coalesce(b, a, c), coalesce(c, a, b)) from t "
                      "order by all").fetchall()
    assert guarded == duck
    assert con.sql("select least(1, null::int)").fetchall() == [(1,)]


@pytest.mark.parametrize("dialect", ["bigquery", "snowflake", "tsql"])
def test_epoch_seconds_where_the_engine_has_no_epoch_field(dialect: str) -> None:
    out = transpile("select (extract(epoch from b) - extract(epoch from a)) / 3600.0 as hours from t",
                    dialect, pretty=False)
    assert "EPOCH FROM" not in out.upper() and "DATEPART(EPOCH" not in out.upper()
    assert {"bigquery": "UNIX_MICROS(TIMESTAMP(b)) / 1000000.0",
            "snowflake": "DATE_PART(EPOCH_MICROSECOND, b) / 1000000.0",
            "tsql": "DATEDIFF_BIG(MICROSECOND, CAST('1970-01-01' AS DATETIME2), b)"}[dialect] in out


def test_tsql_conditions_as_values_become_bits() -> None:
    # T-SQL has no boolean type [from memory: Microsoft Learn, "bit (Transact-SQL)"]
    out = transpile("select a is not null as known, coalesce(b <= c, false) as before, true as yes "
                    "from t where known_flag", "tsql", pretty=False)
    assert out == ("SELECT CAST(CASE WHEN NOT a IS NULL THEN 1 WHEN NOT (NOT a IS NULL) THEN 0 END AS BIT) AS known, "
                   "COALESCE(CAST(CASE WHEN b <= c THEN 1 WHEN NOT (b <= c) THEN 0 END AS BIT), CAST(0 AS BIT)) "
                   "AS before, CAST(1 AS BIT) AS yes FROM t WHERE known_flag <> 0")
    with pytest.raises(CohortError, match=r"recipe agg.sql: `MAX\(a > b\)` cannot be rendered for tsql"):
        transpile("select max(a > b) as any_above from t", "tsql", recipe="agg.sql")


# constructs that must not reach a target's text: found there, they were passed through untranslated
_LEFTOVERS: dict[str, tuple[type, ...]] = {
    "postgres": (exp.IgnoreNulls, exp.RespectNulls, exp.DateDiff),
    "spark": (exp.IgnoreNulls, exp.RespectNulls, exp.DateDiff),
    "bigquery": (exp.IgnoreNulls, exp.RespectNulls, exp.DateDiff),
    "snowflake": (exp.IgnoreNulls, exp.RespectNulls, exp.DateDiff),
    "tsql": (exp.IgnoreNulls, exp.RespectNulls, exp.DateDiff, exp.Interval),
}


def _leftover_text(dialect: str, sql: str) -> list[str]:
    upper = sql.upper()
    words = ["ASOF ", "IGNORE NULLS", "GROUP BY ALL"]
    if dialect == "spark":
        words += ["EPOCH"]
    if dialect in ("bigquery", "snowflake", "tsql"):
        words += ["EXTRACT(EPOCH", "DATE_PART(EPOCH,", "DATEPART(EPOCH"]
    if dialect in ("bigquery", "snowflake"):
        words += ["HOUR *", "MINUTE *", "DAY *", "SECOND *"]  # an interval times a number
    if dialect == "tsql":
        words += ["INTERVAL", "NULLS FIRST", "NULLS LAST", "TRUE", "FALSE"]
    return [word for word in words if word in upper]


def _recipes_per_definition() -> list[tuple[str, str]]:
    # every recipe for one definition; for the others the recipes their criteria are compiled into
    # (the screen, diagnosis and severity of 31 and 40, the resolution of 41; 42 .. 46 take numbers)
    slotted = {"31_lab_state.sql", "40_onset_candidates.sql", "41_resolution_candidates.sql"}
    pairs = [("consensus-2024", name) for name in recipe_names()]
    pairs += [(definition, name) for definition in BUNDLED if definition != "consensus-2024"
              for name in recipe_names() if name in slotted]
    return pairs


@pytest.mark.parametrize("dialect", DIALECTS)
def test_every_recipe_renders_or_is_refused_by_name_for_every_dialect(dialect: str) -> None:
    # every construct the recipes use either has a rendering for the dialect or is refused with the
    # recipe named; a rendered text parses back in the dialect and holds no DuckDB-only construct
    pairs = _recipes_per_definition()
    slots_of = {}
    for definition in BUNDLED:
        values = recipe_values(definition)
        slots_of[definition] = {**values["state"], **values[definition]}
    rendered = 0
    for definition, name in pairs:
        slots = slots_of[definition]
        try:
            sql = render_for(dialect, name, slots)
        except CohortError as error:
            assert str(error).startswith(f"recipe {name}: "), str(error)
            continue
        rendered += 1
        trees = [tree for tree in sqlglot.parse(sql, read=dialect) if tree is not None]
        assert len(trees) == 1, name
        if dialect != "duckdb":
            found = [node for node in trees[0].find_all(*_LEFTOVERS[dialect])
                     # T-SQL's epoch seconds are a microsecond count since 1970 (exact: our rendering)
                     if not (dialect == "tsql" and isinstance(node, exp.DateDiff)
                             and str(node.args.get("unit")).upper() == "MICROSECOND")]
            assert not found, (dialect, name, found[:1])
            text = trees[0].sql(dialect=dialect, comments=False)  # the recipes' comments name pitfalls
            assert _leftover_text(dialect, text) == [], (dialect, name, _leftover_text(dialect, text))
    # today every recipe renders for every dialect (a refusal is a CohortError naming the recipe)
    assert rendered == len(pairs)
    assert {name for _, name in pairs} == set(recipe_names())



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
    # T-SQL renders every recipe now that time shifts are written with DATEADD (add_hours)
    assert "DATEADD(SECOND" in sql_command("tsql", "ada-2009")


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


# --------------------------------------------------------------------------- dka-cohort episodes --engine
def test_episodes_command_on_duckdb_is_find_episodes(tmp_path, capsys) -> None:
    import argparse

    import polars as pl

    from cohort.engines import add_engine_arguments, episodes_command
    from cohort.episodes import find_episodes
    from synthetic import generate_extract

    extract = generate_extract(persons=150, seed=8, out=tmp_path / "synth", progress=False).extract_dir
    parser = argparse.ArgumentParser()
    add_engine_arguments(parser)
    for option in ("--source", "--out", "--codelists", "--threads", "--memory-limit"):
        parser.add_argument(option)
    parser.add_argument("--definition", action="append")
    parser.add_argument("--set", action="append", default=[])
    parser.add_argument("--quiet", action="store_true")
    args = parser.parse_args(["--source", str(extract), "--out", str(tmp_path / "cli"), "--definition",
                              "jbds-2023", "--quiet"])
    assert args.engine == "duckdb" and args.dsn is None and args.spark_master is None
    assert episodes_command(args) == 0
    assert f"episodes written to {(tmp_path / 'cli').resolve()}" in capsys.readouterr().out
    expected = find_episodes(extract, ["jbds-2023"]).episodes
    assert pl.read_parquet(tmp_path / "cli" / "episodes.parquet").equals(expected)


def test_engine_options_are_checked_before_connecting(tmp_path) -> None:
    from cohort._errors import InputError
    from cohort.engines import find_episodes_on_engine

    with pytest.raises(InputError, match="unknown engine 'oracle'; expected one of duckdb, postgres, spark"):
        find_episodes_on_engine("oracle")
    with pytest.raises(InputError, match="--engine duckdb needs --source"):
        find_episodes_on_engine("duckdb")
    with pytest.raises(InputError, match="--threads and --memory-limit are DuckDB settings"):
        find_episodes_on_engine("postgres", dsn="postgresql://nowhere", threads=2)
    with pytest.raises(InputError, match="--engine postgres needs --dsn"):
        find_episodes_on_engine("postgres", out=tmp_path / "pg")
    with pytest.raises(InputError, match="--engine spark needs the CDM tables from one place"):
        find_episodes_on_engine("spark", out=tmp_path / "spark")
    with pytest.raises(InputError, match="--out .* is a file"):
        (tmp_path / "file").write_text("x")
        find_episodes_on_engine("postgres", dsn="postgresql://nowhere", out=tmp_path / "file")


def test_spark_engine_without_pyspark_is_one_clear_error(tmp_path, monkeypatch) -> None:
    import sys

    from cohort.engines import find_episodes_on_engine

    monkeypatch.setitem(sys.modules, "pyspark", None)
    monkeypatch.setitem(sys.modules, "pyspark.sql", None)
    with pytest.raises(CohortError, match=r"the Spark engine needs pyspark 4 and Java 17: pip install "
                                          r"'dka-cohort\[spark\]'"):
        find_episodes_on_engine("spark", ["ada-2009"], source=tmp_path, out=tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_passwords_stay_out_of_messages_and_the_manifest() -> None:
    # libpq connection strings, key=value and URI forms [from memory: PostgreSQL 15 documentation,
    # libpq "Connection Strings"]
    from cohort.engines._postgres import _safe_dsn

    assert _safe_dsn("host=h user=u password=secret dbname=d") == "host=h user=u password=*** dbname=d"
    assert _safe_dsn("postgresql://u:secret@h:5432/d") == "postgresql://u:***@h:5432/d"
    assert _safe_dsn("postgresql://u@h/d") == "postgresql://u@h/d"
