"""The recipes rendered for another SQL engine, through sqlglot, with the known pitfalls handled.

The recipes under ``sql/`` are written in DuckDB SQL. :func:`transpile` parses one rendered recipe
as DuckDB, checks it for constructs that do not carry over, rewrites the few that can be rewritten
exactly, and writes it in the target dialect with ``unsupported_level=ErrorLevel.RAISE``: anything
sqlglot cannot translate is a :class:`~cohort._errors.CohortError` naming the recipe and the
construct, never a warning.

Constructs refused (they give wrong answers or fail on the target; the recipe must change):

- ``ASOF JOIN`` (every target but DuckDB): sqlglot passes it through untouched;
- ``IGNORE NULLS`` / ``RESPECT NULLS`` (every target but DuckDB): dropped silently for PostgreSQL;
  write bounded carry-forward with the ``carry_forward`` macro (``cohort/_macros.py``), which
  renders DuckDB's ``last_value(... ignore nulls)`` only for DuckDB and the portable
  count-then-``first_value`` form for every engine this module writes for;
- ``LATERAL`` subqueries with ``LIMIT`` (Spark): wrong rows with adaptive query execution on;
  use ``row_number()`` over a join;
- ``date_diff`` / ``datediff`` (every target but DuckDB): DuckDB counts unit boundaries crossed,
  Spark whole units elapsed; subtract ``extract(epoch from ...)`` instead;
- interval arithmetic :func:`add_hours` cannot write for BigQuery, Snowflake or T-SQL (an
  interval of months or years, an interval outside ``time +/- interval [* n]``);
- for T-SQL, a condition as a function's argument (``max(a > b)``: T-SQL has no boolean type);
- a select-list alias used again in the same ``select`` (projections, ``where``, ``group by``,
  ``having``) (every target but DuckDB): PostgreSQL 15 refuses it, others may bind the source
  column of the same name.

Constructs rewritten (exactly):

- ``group by all`` becomes the list of non-aggregate projections;
- a derived table without an alias gets one (``_derived_1``, ...);
- ``order by`` keys whose null placement the target cannot state (``NULLS LAST`` in T-SQL and
  BigQuery window clauses) get an explicit ``case when key is null`` key first, so DuckDB's order
  (nulls last) holds on every engine;
- ``extract(epoch from ts)`` on Spark becomes ``unix_micros(cast(ts as timestamp_ltz)) / 1e6``
  as a double (Spark has no epoch field; the session time zone must be UTC, as
  :func:`cohort.engines.local_spark` sets it and :class:`cohort.engines.SparkSession` checks);
- ``make_date`` on PostgreSQL stays ``make_date`` (sqlglot 30 writes ``date_from_parts``);
- ``cast(float as varchar)`` on PostgreSQL writes whole numbers as DuckDB does (``8.0``, not ``8``);
- ``cast(... as timestamp)`` on Spark becomes ``timestamp_ntz`` (CDM times are naive local times);
- ``add_hours``: ``time +/- interval 'k unit' [* n]`` on BigQuery, Snowflake and T-SQL becomes the
  engine's own shift by ``round(k * n * unit seconds)`` whole seconds (``DATETIME_ADD``,
  ``DATEADD(SECOND, ...)``; :func:`add_hours`);
- ``extract(epoch from ts)`` on BigQuery, Snowflake and T-SQL becomes microseconds since 1970 over
  10^6 (``UNIX_MICROS``, ``DATE_PART(EPOCH_MICROSECOND, ...)``, ``DATEDIFF_BIG(MICROSECOND, ...)``);
- ``least``/``greatest`` on BigQuery (null when any argument is null there) take
  ``coalesce(argument, the others...)`` so nulls are skipped as in DuckDB;
- a condition used as a value on T-SQL (``a is not null as flag``, ``true``) becomes a ``bit``
  (``cast(case when c then 1 when not (c) then 0 end as bit)``).

Only DuckDB, PostgreSQL and Spark are run by the tests; the BigQuery, Snowflake and T-SQL texts are
checked for constructs (every recipe renders or is refused by name), not run.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import sqlglot
from sqlglot import ErrorLevel, exp
from sqlglot.errors import SqlglotError

from cohort._errors import CohortError

__all__ = [
    "DIALECTS",
    "ADD_HOURS_DIALECTS",
    "add_hours",
    "transpile",
    "render_for",
    "render_all",
    "recipe_values",
    "session_sql",
    "write_rendered",
    "sql_command",
]

#: Target dialects (sqlglot names).
DIALECTS: tuple[str, ...] = ("duckdb", "postgres", "spark", "bigquery", "snowflake", "tsql")

# Implicit null placement of each target for ascending keys (sqlglot's NULL_ORDERING words):
# "nulls_are_small" puts nulls first ascending and last descending; "nulls_are_large" the
# reverse; "nulls_are_last" last both ways (DuckDB).
_NULLS_CANNOT_BE_STATED = frozenset({"tsql", "bigquery"})


def _fail(recipe: str, dialect: str, construct: str, why: str, fix: str) -> CohortError:
    return CohortError(
        f"recipe {recipe}: `{construct}` cannot be rendered for {dialect}: {why}. {fix}"
    )


def _snippet(node: exp.Expression, limit: int = 80) -> str:
    text = " ".join(node.sql(dialect="duckdb").split())
    return text if len(text) <= limit else text[: limit - 3] + "..."


# --------------------------------------------------------------------------- checks
def _check_asof(tree: exp.Expression, recipe: str, dialect: str) -> None:
    for join in tree.find_all(exp.Join):
        words = " ".join(str(join.args.get(key) or "") for key in ("method", "side", "kind")).upper()
        if "ASOF" in words:
            raise _fail(recipe, dialect, "ASOF JOIN", "sqlglot passes it through untouched and "
                        f"{dialect} has no such join", "Rank the candidate rows with row_number() "
                        "over (partition by ... order by time desc) and keep rank 1")


def _check_ignore_nulls(tree: exp.Expression, recipe: str, dialect: str) -> None:
    for node in tree.find_all(exp.IgnoreNulls, exp.RespectNulls):
        word = "IGNORE NULLS" if isinstance(node, exp.IgnoreNulls) else "RESPECT NULLS"
        raise _fail(recipe, dialect, f"{word} in {_snippet(node)}",
                    "sqlglot drops it for PostgreSQL (wrong answers) and the engines differ",
                    "Carry values forward with the carry_forward macro (cohort/_macros.py), as "
                    "sql/31_lab_state.sql does: it renders the portable count-then-first-value "
                    "form for every engine but DuckDB")


def _check_lateral_limit(tree: exp.Expression, recipe: str, dialect: str) -> None:
    if dialect != "spark":
        return
    for lateral in tree.find_all(exp.Lateral):
        if lateral.find(exp.Limit) is not None:
            raise _fail(recipe, dialect, "LATERAL (... LIMIT n)", "it gave wrong rows on Spark "
                        "with adaptive query execution on (issue 8)", "Join, then keep "
                        "row_number() over (partition by ... order by ...) = 1")
    for join in tree.find_all(exp.Join):
        if isinstance(join.this, exp.Lateral) and join.this.find(exp.Limit) is not None:
            raise _fail(recipe, dialect, "join LATERAL (... LIMIT n)", "wrong rows on Spark "
                        "with adaptive query execution on", "Use row_number() over a join")


def _check_date_diff(tree: exp.Expression, recipe: str, dialect: str) -> None:
    kinds = (exp.DateDiff, exp.TimestampDiff, exp.DatetimeDiff, exp.TsOrDsDiff)
    for node in tree.find_all(*kinds):
        raise _fail(recipe, dialect, _snippet(node), "DuckDB counts unit boundaries crossed "
                    "while Spark counts whole units elapsed (and others differ again)",
                    "Subtract extract(epoch from ...) values and divide by the unit's seconds")


def _check_intervals(tree: exp.Expression, recipe: str, dialect: str) -> None:
    """Interval arithmetic: tested on PostgreSQL and Spark only; refused where it does not carry."""
    if dialect in ("duckdb", "postgres", "spark"):
        return
    for interval in tree.find_all(exp.Interval):
        if dialect == "tsql":
            raise _fail(recipe, dialect, _snippet(interval.parent or interval), "T-SQL has no "
                        "interval type (sqlglot writes INTERVAL literals T-SQL cannot parse)",
                        "Ask for a named macro slot (add_hours(ts, hours)) rendered as DATEADD")
        parent = interval.parent
        while isinstance(parent, exp.Paren):
            parent = parent.parent
        if isinstance(parent, exp.Mul):
            raise _fail(recipe, dialect, _snippet(parent), f"{dialect} does not multiply an "
                        "interval by a number as DuckDB does (interval arithmetic differs between "
                        "engines)", "Ask for a named macro slot (add_hours(ts, hours)) rendered "
                        "per engine")


def _projection_aliases(select: exp.Select) -> dict[str, exp.Expression]:
    out: dict[str, exp.Expression] = {}
    for projection in select.expressions:
        if isinstance(projection, exp.Alias):
            inner = projection.this
            # `x.name as name` and `name as name` pass the source column through: no reuse
            if isinstance(inner, exp.Column) and inner.name == projection.alias:
                continue
            out[projection.alias] = projection
    return out


def _check_alias_reuse(tree: exp.Expression, recipe: str, dialect: str) -> None:
    for select in tree.find_all(exp.Select):
        aliases = _projection_aliases(select)
        if not aliases:
            continue
        sources = {source.alias_or_name for source in _sources(select)}
        places: list[tuple[str, exp.Expression]] = []
        for projection in select.expressions:
            places.append(("select list", projection))
        for key in ("where", "group", "having", "qualify"):
            if select.args.get(key) is not None:
                places.append((key.replace("group", "group by"), select.args[key]))
        for place, node in places:
            for column in node.find_all(exp.Column):
                if column.table or column.name not in aliases:
                    continue
                if _inside_subquery(column, node):
                    continue
                owner = aliases[column.name]
                if place == "select list" and _defined_by(column, owner):
                    continue  # `lower(kind) as kind` reads the source column
                raise _fail(recipe, dialect, f"{column.name} (alias reused in the {place})",
                            f"`{column.name}` is defined in the same select as "
                            f"`{_snippet(owner)}`; PostgreSQL 15 refuses this and other engines "
                            f"may read a source column of that name instead (sources: "
                            f"{', '.join(sorted(sources)) or 'none'})",
                            "Compute it in an earlier CTE and select it from there")


def _defined_by(column: exp.Column, owner: exp.Expression) -> bool:
    parent = column.parent
    while parent is not None:
        if parent is owner:
            return True
        parent = parent.parent
    return False


def _inside_subquery(column: exp.Column, top: exp.Expression) -> bool:
    parent = column.parent
    while parent is not None and parent is not top:
        if isinstance(parent, (exp.Subquery, exp.Select)) and parent is not top:
            return True
        parent = parent.parent
    return False


def _sources(select: exp.Select) -> Iterable[exp.Expression]:
    from_ = select.args.get("from") or select.args.get("from_")
    if from_ is not None:
        yield from_.this
    for join in select.args.get("joins") or []:
        yield join.this


# --------------------------------------------------------------------------- transforms
#: Seconds in one interval unit the ``add_hours`` transform rewrites (fixed-length units only:
#: months and years have no fixed length and are left to the interval check, which refuses them).
_UNIT_SECONDS: dict[str, int] = {
    "second": 1, "seconds": 1, "minute": 60, "minutes": 60, "hour": 3600, "hours": 3600,
    "day": 86400, "days": 86400, "week": 604800, "weeks": 604800,
}

#: Dialects whose ``timestamp +/- interval [* n]`` is written by :func:`add_hours`.
ADD_HOURS_DIALECTS: tuple[str, ...] = ("bigquery", "snowflake", "tsql")


def _interval_seconds(node: exp.Expression) -> exp.Expression | None:
    """Seconds of ``interval 'k unit'``, ``interval 'k unit' * n`` or ``n * interval ...`` as SQL; else None."""
    while isinstance(node, exp.Paren):
        node = node.this
    factor: exp.Expression | None = None
    interval = node
    if isinstance(node, exp.Mul):
        left, right = node.this, node.expression
        while isinstance(left, exp.Paren):
            left = left.this
        while isinstance(right, exp.Paren):
            right = right.this
        if isinstance(left, exp.Interval) and not isinstance(right, exp.Interval):
            interval, factor = left, right
        elif isinstance(right, exp.Interval) and not isinstance(left, exp.Interval):
            interval, factor = right, left
        else:
            return None
    if not isinstance(interval, exp.Interval):
        return None
    text = interval.this.name if isinstance(interval.this, exp.Literal) else None
    unit = interval.args.get("unit")
    unit_name = unit.name.lower() if unit is not None else ""
    if text is None:
        return None
    parts = text.split()
    if len(parts) == 2 and not unit_name:
        text, unit_name = parts[0], parts[1].lower()
    elif len(parts) != 1:
        return None
    if unit_name not in _UNIT_SECONDS or not re.fullmatch(r"[0-9]+(\.[0-9]+)?", text):
        return None
    seconds = float(text) * _UNIT_SECONDS[unit_name]
    literal = exp.Literal.number(repr(seconds) if seconds != int(seconds) else str(int(seconds)))
    if factor is None:
        return literal
    return exp.Mul(this=exp.Paren(this=factor.copy()), expression=literal)


def _whole_seconds(seconds: exp.Expression, dialect: str) -> exp.Expression:
    """``cast(round(seconds, 0) as <integer>)``: a whole number of seconds for the engine's add."""
    if isinstance(seconds, exp.Literal):
        return seconds
    integer = {"bigquery": "int64", "snowflake": "bigint", "tsql": "int"}[dialect]
    rounded = exp.Anonymous(this="ROUND", expressions=[seconds, exp.Literal.number(0)])
    return exp.Cast(this=rounded, to=exp.DataType.build(integer, dialect=dialect))


def _add_seconds(ts: exp.Expression, seconds: exp.Expression, negative: bool, dialect: str) -> exp.Expression:
    amount = _whole_seconds(seconds, dialect)
    if dialect == "bigquery":
        name = "DATETIME_SUB" if negative else "DATETIME_ADD"
        return exp.Anonymous(this=name, expressions=[ts, exp.Interval(this=amount, unit=exp.Var(this="SECOND"))])
    if negative:
        amount = exp.Neg(this=exp.Paren(this=amount)) if not isinstance(amount, exp.Literal) else \
            exp.Literal.number(f"-{amount.name}")
    return exp.Anonymous(this="DATEADD", expressions=[exp.Var(this="SECOND"), amount, ts])


def add_hours(tree: exp.Expression, dialect: str) -> exp.Expression:
    """The ``add_hours(ts, hours)`` construct: ``ts +/- interval 'k unit' [* n]`` as the engine's add.

    The recipes write a shift of a time by a number of hours (or minutes, days, seconds) as DuckDB
    interval arithmetic, ``ts + interval '1 hour' * n``, which PostgreSQL and Spark run as it is.
    BigQuery and Snowflake do not multiply an interval by a number that way and T-SQL has no
    interval type, so for :data:`ADD_HOURS_DIALECTS` the shift becomes a whole number of seconds
    (``round(n * 3600)``, exact to the second for any fraction of an hour) added by the engine's
    function:

    - BigQuery: ``datetime_add(ts, interval cast(round((n) * 3600, 0) as int64) second)``
      (``datetime_sub`` for a minus; CDM times are naive, BigQuery's ``DATETIME``);
    - Snowflake: ``dateadd(second, cast(round((n) * 3600, 0) as bigint), ts)``;
    - T-SQL: ``dateadd(second, cast(round((n) * 3600, 0) as int), ts)`` (T-SQL's ``dateadd``
      takes an ``int``: shifts up to 68 years).

    A minus negates the seconds. Intervals in any other position, or of months and years (no fixed
    length), are left alone, so the interval check still refuses them with the recipe named.
    Other dialects are returned unchanged.

    Examples
    --------
    >>> tree = sqlglot.parse_one("select t + interval '1 hour' * 1.5 as later from labs", read="duckdb")
    >>> add_hours(tree, "snowflake").sql(dialect="snowflake")
    'SELECT DATEADD(SECOND, CAST(ROUND((1.5) * 3600, 0) AS BIGINT), t) AS later FROM labs'
    """
    if dialect not in ADD_HOURS_DIALECTS:
        return tree

    def convert(node: exp.Expression) -> exp.Expression:
        if not isinstance(node, (exp.Add, exp.Sub)):
            return node
        seconds = _interval_seconds(node.expression)
        negative = isinstance(node, exp.Sub)
        ts = node.this
        if seconds is None and isinstance(node, exp.Add):
            # `interval ... + ts`: the interval on the left
            seconds = _interval_seconds(node.this)
            ts = node.expression
        if seconds is None:
            return node
        if _interval_seconds(ts) is not None:
            return node  # interval +/- interval: no time to shift
        return _add_seconds(convert(ts.copy()), seconds, negative, dialect)

    return tree.transform(convert)


def _expand_group_by_all(tree: exp.Expression) -> exp.Expression:
    for select in list(tree.find_all(exp.Select)):
        group = select.args.get("group")
        if group is None or not group.args.get("all"):
            continue
        keys = []
        for projection in select.expressions:
            inner = projection.this if isinstance(projection, exp.Alias) else projection
            if inner.find(exp.AggFunc) is not None or inner.find(exp.Window) is not None:
                continue
            if isinstance(inner, exp.Literal):
                continue
            keys.append(inner.copy())
        select.set("group", exp.Group(expressions=keys) if keys else None)
    return tree


def _alias_derived_tables(tree: exp.Expression) -> exp.Expression:
    number = 0
    for subquery in list(tree.find_all(exp.Subquery)):
        parent = subquery.parent
        in_from = isinstance(parent, (exp.From, exp.Join)) and parent.this is subquery
        if in_from and not subquery.alias:
            number += 1
            subquery.set("alias", exp.TableAlias(this=exp.to_identifier(f"_derived_{number}")))
    return tree


def _explicit_null_keys(tree: exp.Expression, dialect: str) -> exp.Expression:
    """Put nulls last (DuckDB's order) through a leading ``case`` key where the target cannot say so."""
    if dialect not in _NULLS_CANNOT_BE_STATED:
        return tree
    for ordered in list(tree.find_all(exp.Ordered)):
        desc = bool(ordered.args.get("desc"))
        nulls_first = bool(ordered.args.get("nulls_first"))
        target_nulls_first = not desc  # tsql and bigquery: nulls are small
        if nulls_first == target_nulls_first:
            continue
        key = exp.Case(
            ifs=[exp.If(this=exp.Is(this=ordered.this.copy(), expression=exp.Null()),
                        true=exp.Literal.number(0 if nulls_first else 1))],
            default=exp.Literal.number(1 if nulls_first else 0),
        )
        holder = ordered.parent
        field = ordered.arg_key
        items = holder.args.get(field)
        if not isinstance(items, list):
            continue
        position = items.index(ordered)
        lead = exp.Ordered(this=key, desc=False, nulls_first=target_nulls_first)
        ordered.set("nulls_first", target_nulls_first)
        items.insert(position, lead)
        holder.set(field, items)
    return tree


def _bigquery_null_skipping_extrema(tree: exp.Expression) -> exp.Expression:
    """``least``/``greatest`` skip nulls in DuckDB, PostgreSQL and Spark; BigQuery returns null.

    Each argument becomes ``coalesce(itself, the others...)``: a null argument takes another
    argument's value, which cannot change the least (or greatest) of the non-null ones, and all
    null stays null, so the answer is DuckDB's exactly.
    """
    def rewrite(node: exp.Expression) -> exp.Expression:
        if not isinstance(node, (exp.Least, exp.Greatest)):
            return node
        items = [node.this, *node.expressions]
        if len(items) < 2:
            return node
        guarded = [
            exp.Coalesce(this=item.copy(), expressions=[other.copy() for other in items if other is not item])
            for item in items
        ]
        return type(node)(this=guarded[0], expressions=guarded[1:])

    return tree.transform(rewrite)


def _epoch_seconds(tree: exp.Expression, dialect: str) -> exp.Expression:
    """``extract(epoch from ts)`` (seconds since 1970 as a double) where the engine has no epoch field.

    BigQuery's ``extract`` has no ``EPOCH`` and T-SQL's ``datepart`` none either; Snowflake's
    ``EPOCH`` part is whole seconds. Each becomes microseconds since 1970 divided by 10^6 (as
    Spark's rendering does), the naive time read as UTC:

    - BigQuery: ``unix_micros(timestamp(ts)) / 1000000.0``;
    - Snowflake: ``date_part(epoch_microsecond, ts) / 1000000.0``;
    - T-SQL: ``cast(datediff_big(microsecond, cast('1970-01-01' as datetime2), ts) as float) / 1000000.0``
      (a count of microsecond boundaries is the exact number of microseconds).
    """
    if dialect not in ("bigquery", "snowflake", "tsql"):
        return tree

    def rewrite(node: exp.Expression) -> exp.Expression:
        if not (isinstance(node, exp.Extract) and node.this.name.lower() == "epoch"):
            return node
        value = node.expression.copy()
        if dialect == "bigquery":
            micros: exp.Expression = exp.Anonymous(
                this="UNIX_MICROS", expressions=[exp.Anonymous(this="TIMESTAMP", expressions=[value])])
        elif dialect == "snowflake":
            micros = exp.Anonymous(this="DATE_PART", expressions=[exp.Var(this="EPOCH_MICROSECOND"), value])
        else:
            start = exp.Cast(this=exp.Literal.string("1970-01-01"), to=exp.DataType.build("datetime2", dialect="tsql"))
            micros = exp.Cast(this=exp.Anonymous(this="DATEDIFF_BIG", expressions=[
                exp.Var(this="MICROSECOND"), start, value]), to=exp.DataType.build("float", dialect="tsql"))
        return exp.Paren(this=exp.Div(this=micros, expression=exp.Literal.number("1000000.0")))

    return tree.transform(rewrite)


_BOOLEAN_NODES = (exp.Predicate, exp.Not, exp.And, exp.Or, exp.Boolean, exp.Xor)


def _tsql_boolean_values(tree: exp.Expression, recipe: str) -> exp.Expression:
    """T-SQL has no boolean type: a condition used as a value becomes a ``bit``.

    A select-list item that is a condition (``a is not null as flag``, ``coalesce(a <= b, false)``,
    a ``then``/``else`` of a ``case``) becomes ``cast(case when c then 1 when not (c) then 0 end
    as bit)``, which keeps the unknown of a null comparison; ``true``/``false`` values become
    ``cast(1 as bit)``/``cast(0 as bit)``. sqlglot already writes a ``bit`` column used as a
    condition as ``column <> 0``. A condition in any other value place (an aggregate's argument)
    is refused with the recipe named.
    """
    def as_bit(node: exp.Expression) -> exp.Expression:
        bit = exp.DataType.build("bit", dialect="tsql")
        if isinstance(node, exp.Boolean):
            return exp.Cast(this=exp.Literal.number(1 if node.this else 0), to=bit)
        case = exp.Case(ifs=[
            exp.If(this=node.copy(), true=exp.Literal.number(1)),
            exp.If(this=exp.Not(this=exp.Paren(this=node.copy())), true=exp.Literal.number(0)),
        ])
        return exp.Cast(this=case, to=bit)

    def value(node: exp.Expression) -> exp.Expression:
        if isinstance(node, _BOOLEAN_NODES):
            return as_bit(node)
        if isinstance(node, exp.Paren):
            node.set("this", value(node.this))
        elif isinstance(node, exp.Coalesce):
            node.set("this", value(node.this))
            node.set("expressions", [value(item) for item in node.expressions])
        elif isinstance(node, exp.Case):
            for branch in node.args.get("ifs") or []:
                branch.set("true", value(branch.args["true"]))
            if node.args.get("default") is not None:
                node.set("default", value(node.args["default"]))
        return node

    for select in list(tree.find_all(exp.Select)):
        items = []
        for projection in select.expressions:
            if isinstance(projection, exp.Alias):
                projection.set("this", value(projection.this))
                items.append(projection)
            else:
                items.append(value(projection))
        select.set("expressions", items)
    for node in tree.find_all(*_BOOLEAN_NODES):
        parent = node.parent
        if isinstance(parent, exp.Func) and not isinstance(parent, (exp.Case, exp.If, exp.Coalesce, *_BOOLEAN_NODES)):
            raise _fail(recipe, "tsql", _snippet(parent), "T-SQL has no boolean type, so a condition "
                        "cannot be a function's argument", "Compute it as a case when ... then 1 "
                        "else 0 end in an earlier CTE")
    return tree


def _postgres_make_date(tree: exp.Expression) -> exp.Expression:
    """sqlglot 30 writes ``make_date`` as ``date_from_parts`` for PostgreSQL, which has no such function."""
    def rewrite(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.DateFromParts):
            parts = [node.args.get(key) for key in ("year", "month", "day")]
            return exp.Anonymous(this="make_date", expressions=[part.copy() for part in parts])
        return node

    return tree.transform(rewrite)


_TEXT_TYPES = frozenset({exp.DataType.Type.VARCHAR, exp.DataType.Type.TEXT, exp.DataType.Type.NVARCHAR})


def _postgres_float_text(tree: exp.Expression) -> exp.Expression:
    """Write whole floats as DuckDB does (``8.0``, PostgreSQL says ``8``) in casts to text.

    The operand's type is not known from the text alone, so the test is made at run time with
    ``pg_typeof``; integers, timestamps and text keep PostgreSQL's own rendering (the same as
    DuckDB's).
    """
    def rewrite(node: exp.Expression) -> exp.Expression:
        if not isinstance(node, exp.Cast):
            return node
        to = node.args.get("to")
        operand = node.this
        if not isinstance(to, exp.DataType) or to.this not in _TEXT_TYPES:
            return node
        if isinstance(operand, (exp.Literal, exp.Null)):
            return node
        value = operand.sql(dialect="postgres")
        template = (
            f"case when pg_typeof(({value})) in ('double precision'::regtype, 'real'::regtype) "
            f"and cast(({value}) as text) ~ '^-?[0-9]+$' then cast(({value}) as text) || '.0' "
            f"else cast(({value}) as text) end"
        )
        return sqlglot.parse_one(template, read="postgres")

    return tree.transform(rewrite)


def _spark_epoch_and_timestamps(tree: exp.Expression) -> exp.Expression:
    def rewrite(node: exp.Expression) -> exp.Expression:
        if isinstance(node, exp.Extract) and node.this.name.lower() == "epoch":
            value = node.expression.copy()
            micros = exp.Anonymous(this="unix_micros", expressions=[
                exp.Cast(this=value, to=exp.DataType.build("timestamp_ltz", dialect="spark"))])
            # as double: bigint / 1000000.0 would be a Spark decimal of limited scale
            seconds = exp.Div(this=exp.Cast(this=micros, to=exp.DataType.build("double")),
                              expression=exp.Literal.number("1000000.0"))
            return exp.Paren(this=seconds)
        return node

    tree = tree.transform(rewrite)
    for cast in tree.find_all(exp.Cast):
        to = cast.args.get("to")
        if isinstance(to, exp.DataType) and to.this == exp.DataType.Type.TIMESTAMP:
            cast.set("to", exp.DataType.build("timestamp_ntz", dialect="spark"))
    return tree


# --------------------------------------------------------------------------- entry points
def transpile(sql: str, dialect: str, *, recipe: str = "<text>", pretty: bool = True) -> str:
    """Write one rendered DuckDB recipe in another engine's SQL.

    Parameters
    ----------
    sql
        Recipe text with every slot filled (DuckDB SQL, one ``with ... select`` statement).
    dialect
        One of :data:`DIALECTS`.
    recipe
        The recipe's name, for error messages.
    pretty
        Indent the output.

    Returns
    -------
    str
        The statement in the target dialect (DuckDB text is normalised, not changed in meaning).

    Raises
    ------
    CohortError
        The dialect is unknown, the text does not parse, or it holds a construct the target cannot
        run with the same answers (the message names the recipe, the construct and the fix).

    Examples
    --------
    >>> transpile("select a from t group by all", "postgres", pretty=False)
    'SELECT a FROM t GROUP BY a'
    """
    if dialect not in DIALECTS:
        msg = f"unknown dialect {dialect!r}; expected one of {', '.join(DIALECTS)}"
        raise CohortError(msg)
    try:
        trees = sqlglot.parse(sql, read="duckdb", error_level=ErrorLevel.RAISE)
    except SqlglotError as error:
        msg = f"recipe {recipe}: the DuckDB text does not parse: {error}"
        raise CohortError(msg) from None
    trees = [tree for tree in trees if tree is not None]
    if len(trees) != 1:
        msg = f"recipe {recipe}: expected one statement, found {len(trees)}"
        raise CohortError(msg)
    tree = trees[0]
    if dialect != "duckdb":
        _check_asof(tree, recipe, dialect)
        _check_ignore_nulls(tree, recipe, dialect)
        _check_lateral_limit(tree, recipe, dialect)
        _check_date_diff(tree, recipe, dialect)
        _check_alias_reuse(tree, recipe, dialect)
        tree = add_hours(tree, dialect)
        _check_intervals(tree, recipe, dialect)
        tree = _expand_group_by_all(tree)
        tree = _alias_derived_tables(tree)
        tree = _explicit_null_keys(tree, dialect)
        if dialect == "spark":
            tree = _spark_epoch_and_timestamps(tree)
        if dialect == "bigquery":
            tree = _bigquery_null_skipping_extrema(tree)
        tree = _epoch_seconds(tree, dialect)
        if dialect == "tsql":
            tree = _tsql_boolean_values(tree, recipe)
        if dialect == "postgres":
            tree = _postgres_make_date(tree)
            tree = _postgres_float_text(tree)
    try:
        return tree.sql(dialect=dialect, pretty=pretty, unsupported_level=ErrorLevel.RAISE)
    except SqlglotError as error:
        first = str(error).strip().splitlines()[0] if str(error).strip() else type(error).__name__
        msg = f"recipe {recipe}: cannot be rendered for {dialect}: {first}"
        raise CohortError(msg) from None
    except Exception as error:  # sqlglot generator faults (seen for tsql and bigquery)
        msg = (f"recipe {recipe}: sqlglot failed writing {dialect} ({type(error).__name__}: "
               f"{error}); this construct has no tested rendering for {dialect}")
        raise CohortError(msg) from None


def render_for(dialect: str, recipe_name: str, values: Mapping[str, Any]) -> str:
    """Render recipe ``recipe_name`` with slot ``values`` and write it for ``dialect``.

    Parameters
    ----------
    dialect
        One of :data:`DIALECTS`.
    recipe_name
        A file under ``sql/``, e.g. ``"31_lab_state.sql"``.
    values
        Slot values (:mod:`cohort._sql` types); values the recipe does not use are ignored.

    Returns
    -------
    str
        The SQL statement for the engine.

    Examples
    --------
    >>> "FROM dka_codelist_lab" in render_for("postgres", "10_concept_lab.sql", {})
    True
    """
    from cohort._sql import render_recipe

    return transpile(render_recipe(recipe_name, values, dialect=dialect), dialect, recipe=recipe_name)


def _definition(definition: Any) -> Any:
    from cohort.definitions import Definition, load_definition

    return definition if isinstance(definition, Definition) else load_definition(definition)


def recipe_values(definitions: Any | Sequence[Any]) -> dict[str, dict[str, Any]]:
    """Slot values of every recipe for one definition (or a group sharing their lab state).

    The values are built as :func:`cohort.episodes.find_episodes` builds them (same compiler
    calls, same numbers); ``tests/test_engines.py`` checks the two agree.

    Parameters
    ----------
    definitions
        A definition (name, path or :class:`~cohort.definitions.Definition`), or several with the
        same look-backs and specimens (the lab state is built once for them).

    Returns
    -------
    dict
        ``{"state": {...}, "<definition name>": {...}}``: the slots of the lab recipes and ``sql/31`` and, per
        definition, the slots of ``sql/40`` .. ``sql/46``.
    """
    from cohort._compile import compile_criterion, compile_severity
    from cohort.episodes import (
        _OPEN_MAX_AGE,
        _OPEN_MIN_AGE,
        _dx_column,
        _resolution_after_onset,
        _state_slots,
        screen_fragment,
    )

    items = [definitions] if not isinstance(definitions, (list, tuple)) else list(definitions)
    loaded = [_definition(item) for item in items]
    from cohort._labs import lab_slots

    # the lab recipes' slot (results_before, as of today) rides along, so every recipe renders
    state: dict[str, Any] = {**lab_slots(), **_state_slots(loaded)}
    state["person_screen"] = screen_fragment([item.diagnosis for item in loaded])
    out: dict[str, dict[str, Any]] = {"state": state}
    for definition in loaded:
        def flag(name: str) -> str:
            return f"lab_state.{name}"

        population = definition.population
        timing = definition.timing
        out[definition.name] = {
            "diagnosis": compile_criterion(definition.diagnosis, column_for=_dx_column, flag_for=flag),
            "severity": compile_severity(definition.severity, column_for=_dx_column, flag_for=flag),
            "resolution_screen": compile_criterion(
                definition.resolution.when, column_for=lambda analyte: f"lab_state.rs_{analyte}",
                flag_for=flag),
            "resolution": compile_criterion(
                definition.resolution.when, column_for=_resolution_after_onset,
                flag_for=lambda name: f"resolution_points.{name}"),
            "episode_gap_hours": float(timing.episode_gap_hours),
            "rebound_hours": float(timing.rebound_hours),
            "min_age_years": (float(population.min_age_years)
                              if population.min_age_years is not None else _OPEN_MIN_AGE),
            "max_age_years": (float(population.max_age_years)
                              if population.max_age_years is not None else _OPEN_MAX_AGE),
        }
    return out


#: Recipes of the episode finder that take the definition's slots, in run order.
EPISODE_RECIPES: tuple[str, ...] = (
    "40_onset_candidates.sql", "41_resolution_candidates.sql", "42_onset_visit.sql",
    "43_onset_censoring.sql", "44_episode_step.sql", "45_episode_rebound.sql", "46_episodes.sql",
)

#: The statements :func:`cohort.episodes.episodes_in_session` runs between recipes (the episode
#: loop), as DuckDB selects; engines render them through :func:`transpile` like the recipes.
SESSION_SELECTS: dict[str, str] = {
    "first_cutoff": ("select distinct person_id, 1 as episode_number, "
                     "cast(null as timestamp) as cutoff_datetime from dka_onset_context"),
    "next_cutoff": ("select person_id, episode_number + 1 as episode_number, "
                    "next_cutoff_datetime as cutoff_datetime from dka_episode_next"),
}


def session_sql(name: str, dialect: str) -> str:
    """One of :data:`SESSION_SELECTS` written for ``dialect``."""
    return transpile(SESSION_SELECTS[name], dialect, recipe=f"<episode loop: {name}>", pretty=False)


def render_all(
    dialect: str,
    definition: Any,
    *,
    recipes: Sequence[str] | None = None,
) -> dict[str, str]:
    """Every recipe, in run order, rendered for one definition and written for ``dialect``.

    Parameters
    ----------
    dialect
        One of :data:`DIALECTS`.
    definition
        A bundled definition name (``consensus-2024``), a path, or a loaded definition.
    recipes
        Only these recipe files (default: every file under ``sql/``).

    Returns
    -------
    dict
        recipe file name -> SQL statement, in run order.

    Raises
    ------
    CohortError
        A recipe holds a construct the target cannot run with the same answers.

    Examples
    --------
    >>> rendered = render_all("postgres", "consensus-2024")   # doctest: +SKIP
    >>> list(rendered)[:2]                                     # doctest: +SKIP
    ['10_concept_lab.sql', '11_concept_unit.sql']
    """
    from cohort._sql import recipe_names

    loaded = _definition(definition)
    values = recipe_values(loaded)
    slots: dict[str, Any] = {**values["state"], **values[loaded.name]}
    names = list(recipes) if recipes is not None else recipe_names()
    return {name: render_for(dialect, name, slots) for name in names}


def sql_command(dialect: str, definition: Any, out: str | Path | None = None) -> str:
    """What ``dka-cohort sql --dialect D --definition NAME [--out DIR]`` does.

    Renders every recipe for ``dialect``; with ``out`` writes one ``<recipe>.sql`` per recipe
    there and returns a one-line summary, otherwise returns every statement, each headed by a
    ``-- <recipe>`` comment and ended by ``;``, for printing.

    Examples
    --------
    >>> print(sql_command("postgres", "consensus-2024")[:25])   # doctest: +SKIP
    -- 10_concept_lab.sql
    """
    rendered = render_all(dialect, definition)
    if out is not None:
        written = write_rendered(rendered, out)
        return f"wrote {len(written)} recipes for {dialect} to {Path(out)}"
    return "\n\n".join(f"-- {name}\n{sql.rstrip()};" for name, sql in rendered.items()) + "\n"


def write_rendered(rendered: Mapping[str, str], out: str | Path) -> list[Path]:
    """Write one ``<recipe>.sql`` per rendered recipe into folder ``out`` (created if missing)."""
    folder = Path(out)
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name, sql in rendered.items():
        path = folder / name
        path.write_text(sql.rstrip() + ";\n", encoding="utf-8")
        written.append(path)
    return written
