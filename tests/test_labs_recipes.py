"""The lab and concept recipes (sql/10 .. 22) follow the recipe rules of DEVELOPERS.md.

Portability is checked by parsing each recipe, as written, with sqlglot's PostgreSQL and Spark
readers (a later issue runs them on PostgreSQL 15 and Spark 4); the rules on shape (header,
CTEs first, `final`, lower-case keywords, no `select *`, no one-letter aliases) are the
project's own (DEVELOPERS.md "Recipes").
"""

from __future__ import annotations

import re

import pytest
import sqlglot

from cohort._labs import LAB_RECIPES
from cohort._paths import sql_dir

RECIPES = [name for name, _ in LAB_RECIPES]
KEYWORDS = ("SELECT", "FROM", "WHERE", "JOIN", "GROUP BY", "ORDER BY", "UNION", "CASE", "WHEN",
            "THEN", "END", "AS", "ON", "AND", "OR", "WITH", "DISTINCT", "CAST", "OVER")


def _code(text: str) -> str:
    """The recipe without comments and string literals."""
    text = re.sub(r"--[^\n]*", "", text)
    return re.sub(r"'[^']*'", "''", text)


@pytest.mark.parametrize("name", RECIPES)
def test_recipe_shape(name: str) -> None:
    text = (sql_dir() / name).read_text(encoding="utf-8")
    header = text.split("\nwith", 1)[0]
    for word in ("grain:", "inputs:", "output:"):
        assert word in header, f"{name}: header comment lacks `{word}`"
    code = _code(text)
    assert code.lstrip().startswith("with"), f"{name}: must start with `with` after its header"
    assert re.search(r"\bfinal as \(", code), f"{name}: no `final` CTE"
    tail = code.rsplit("final as (", 1)[1]
    assert re.search(r"\)\s*select\b[^;]*\bfrom final\b", tail, re.S), f"{name}: must end with select ... from final"
    assert not re.search(r"select\s+\*", code), f"{name}: `select *`"
    for keyword in KEYWORDS:
        assert not re.search(rf"\b{keyword}\b", code), f"{name}: upper-case `{keyword}`"
    assert not re.search(r"\bas [a-z]\b", code), f"{name}: one-letter alias"
    assert not re.search(r"\b(asof|ignore nulls|group by all|lateral)\b", code), f"{name}: DuckDB-only construct"


@pytest.mark.parametrize("dialect", ["postgres", "spark"])
@pytest.mark.parametrize("name", RECIPES)
def test_recipe_parses_in_other_dialects(name: str, dialect: str) -> None:
    text = (sql_dir() / name).read_text(encoding="utf-8")
    parsed = sqlglot.parse(text, read=dialect)
    assert len(parsed) == 1 and parsed[0] is not None
