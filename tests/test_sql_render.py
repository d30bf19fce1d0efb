"""The recipe renderer admits only typed slot values (DESIGN.md: no text of a file reaches SQL unchecked)."""

from __future__ import annotations

import duckdb
import pytest

from cohort._errors import CohortError
from cohort._sql import Fragment, Identifier, render, render_recipe


def test_numbers_booleans_and_word_lists_render_as_literals() -> None:
    sql = render(
        "select {{ hours }} as hours, {{ cut }} as cut, {{ flag }} as flag, 'venous' in {{ kinds }} as ok",
        {"hours": 6, "cut": 7.3, "flag": True, "kinds": ("venous", "arterial")},
    )
    assert sql == "select 6 as hours, 7.3 as cut, true as flag, 'venous' in ('venous', 'arterial') as ok"
    hours, cut, flag, ok = duckdb.sql(sql).fetchall()[0]
    assert (hours, float(cut), flag, ok) == (6, 7.3, True, True)


def test_fragments_and_identifiers_pass_through() -> None:
    sql = render("select {{ expr }} from {{ tab }}", {"expr": Fragment("1 + 1"), "tab": Identifier("dka_x")})
    assert sql == "select 1 + 1 from dka_x"


@pytest.mark.parametrize(
    ("value", "message"),
    [
        ("7.3; drop table person", "takes a number, a boolean, a compiled fragment"),
        (float("nan"), "must be a finite number"),
        (float("inf"), "must be a finite number"),
        (("venous'; --",), "takes words of [a-z0-9_]"),
        ((), "needs at least one item"),
        ([1, 2], "takes a number, a boolean, a compiled fragment"),
    ],
)
def test_untyped_or_unsafe_values_are_refused(value: object, message: str) -> None:
    with pytest.raises(CohortError, match=message.replace("[", r"\[").replace("]", r"\]")):
        render("select {{ slot }}", {"slot": value})  # type: ignore[dict-item]


def test_identifier_is_checked() -> None:
    with pytest.raises(CohortError, match="identifier must match"):
        Identifier("person; drop table person")


def test_missing_slot_is_named() -> None:
    with pytest.raises(CohortError, match="no value given for slot\\(s\\) gap_hours"):
        render("select {{ gap_hours }}", {}, recipe="41_x.sql")


def test_unknown_recipe_lists_what_exists() -> None:
    with pytest.raises(CohortError, match="no recipe named 'nope.sql'"):
        render_recipe("nope.sql", {})
