"""The episode recipes stay in portable SQL (rules: window functions, no DuckDB-only constructs).

Each recipe this module owns is rendered with typical slot values and parsed by sqlglot (a general
SQL library) as DuckDB, then written as PostgreSQL and Spark SQL without an unsupported-construct
error. The DuckDB-only constructs the project rules forbid (ASOF JOIN, IGNORE NULLS, LATERAL,
GROUP BY ALL, QUALIFY, select *) are looked for in the parsed tree, not in the text. Recipes are
rendered here in the portable form of their macros (``dialect="postgres"``), as every engine but
DuckDB receives them; the DuckDB form of a macro (cohort/_macros.py) is the one place IGNORE NULLS
is allowed, and only the DuckDB rendering carries it.
"""

from __future__ import annotations

import pytest
import sqlglot
from sqlglot import exp
from sqlglot.errors import ErrorLevel

from cohort._compile import parse_criterion
from cohort._sql import Fragment, render_recipe
from cohort.episodes import STATE_ANALYTES, screen_fragment

RECIPES = ("30_person_diabetes.sql", "31_lab_state.sql", "40_onset_candidates.sql",
           "41_resolution_candidates.sql", "42_onset_visit.sql", "43_onset_censoring.sql",
           "44_episode_step.sql", "45_episode_rebound.sql", "46_episodes.sql", "50_code_episodes.sql",
           "51_hospital_stays.sql")

SLOTS = {
    "diagnosis_lookback_hours": 6.0, "resolution_lookback_hours": 4.0, "anion_gap_pairing_minutes": 30.0,
    "ph_specimens": ("venous", "arterial"), "bicarbonate_specimens": ("serum",),
    "person_screen": screen_fragment([parse_criterion({"analyte": "bhb", "op": ">=", "value": 3.0})]),
    "state_analytes": STATE_ANALYTES,
    "diagnosis": Fragment("coalesce((lab_state.dx_bhb >= 3.0), false)"),
    "severity": Fragment("case when coalesce((lab_state.dx_ph < 7.0), false) then 'severe' else null end"),
    "resolution_screen": Fragment("coalesce((lab_state.rs_bhb < 0.6), false)"),
    "resolution": Fragment("coalesce(((case when resolution_points.rs_bhb_datetime > onsets.onset_datetime "
                           "then resolution_points.rs_bhb end) < 0.6), false)"),
    "episode_gap_hours": 72.0, "rebound_hours": 24.0, "min_age_years": 18.0, "max_age_years": 200.0,
}


@pytest.mark.parametrize("recipe", RECIPES)
def test_recipe_parses_and_transpiles(recipe):
    sql = render_recipe(recipe, SLOTS, dialect="postgres")
    [tree] = sqlglot.parse(sql, read="duckdb")
    assert not list(tree.find_all(exp.Lateral)), "LATERAL"
    assert not list(tree.find_all(exp.IgnoreNulls)), "IGNORE NULLS"
    assert not [join for join in tree.find_all(exp.Join) if "asof" in (join.args.get("kind") or "").lower()
                or "asof" in str(join.args.get("method") or "").lower()], "ASOF JOIN"
    assert not [group for group in tree.find_all(exp.Group) if group.args.get("all")], "GROUP BY ALL"
    assert not list(tree.find_all(exp.Qualify)), "QUALIFY"
    assert not [star for star in tree.find_all(exp.Star)
                if not isinstance(star.parent, exp.Count)], "select *"
    for dialect in ("postgres", "spark"):
        sqlglot.transpile(sql, read="duckdb", write=dialect, unsupported_level=ErrorLevel.RAISE)


def test_only_the_duckdb_rendering_of_the_lab_state_carries_ignore_nulls():
    duck = sqlglot.parse_one(render_recipe("31_lab_state.sql", SLOTS), read="duckdb")
    assert list(duck.find_all(exp.IgnoreNulls))
    sqlglot.transpile(render_recipe("31_lab_state.sql", SLOTS), read="duckdb", write="duckdb",
                      unsupported_level=ErrorLevel.RAISE)
