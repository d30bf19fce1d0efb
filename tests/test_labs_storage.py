"""Where prepare_lab_events keeps its large results, and its timing callback (brief H9).

``dka_measurement_checked`` (every measurement row of a DKA analyte) and ``dka_lab_events`` are
temporary views, never written; ``dka_lab_points`` (the usable results by time point) is stored in
a scratch DuckDB database file, compressed, behind a temporary view of the same name; the folder
goes when the extract handle does. These are engineering checks of the toolkit's own design (no clinical
reference applies); the clinical content of the same tables is checked in test_labs.py and
test_labs_reference.py.
"""

from __future__ import annotations

import gc
from pathlib import Path

from cohort._labs import LAB_RECIPES, prepare_lab_events
from cohort.source import open_extract
from tests.cdmkit import MiniCdm


def _extract(tmp_path: Path) -> Path:
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01")
    cdm.lab(1, "2345-7", 250.0, unit="mg/dL", at="2024-03-01 09:00")
    cdm.lab(1, "2345-7", 250.0, unit="mg/dL", at="2024-03-01 09:00")  # a duplicate posting
    cdm.lab(1, "2345-7", 251.0, unit="mg/dL", at="2024-03-01 09:00")  # same time, other value
    cdm.lab(1, "1963-8", 12.0, unit="mmol/L", at=None, date="2024-03-01")  # date only
    return cdm.write(tmp_path / "x", fmt="parquet")


def test_checked_rows_are_views_and_time_points_live_in_the_scratch_database(tmp_path: Path) -> None:
    with open_extract(_extract(tmp_path)) as extract:
        prepare_lab_events(extract)
        con = extract.con
        stored = con.execute(
            "select table_name, database_name from duckdb_tables() where table_name in "
            "('dka_measurement_checked', 'dka_lab_events', 'dka_lab_points') order by table_name"
        ).fetchall()
        assert stored == [("dka_lab_points", "dka_work")]
        # the rows kept for sql/22 and sql/24 (cohort._labs._kept_in_scope) are gone after the run
        assert con.execute("select count(*) from duckdb_tables() "
                           "where table_name = 'dka_measurement_scoped'").fetchall() == [(0,)]
        views = con.execute(
            "select view_name from duckdb_views() where view_name in ('dka_measurement_checked', "
            "'dka_lab_events', 'dka_lab_points') and temporary order by view_name"
        ).fetchall()
        assert views == [("dka_lab_events",), ("dka_lab_points",), ("dka_measurement_checked",)]
        # the glucose rows (250, its copy and 251 mg/dL) at 09:00 make one time point; results counts
        # the copy too (the reconciliation subtracts the quarantined copies), the value does not
        points = con.execute("select point_datetime, results, glucose from dka_lab_points").fetchall()
        assert len(points) == 1 and points[0][1] == 3
        # the highest glucose, in mmol/L: mg/dL / 18.016 (molar mass of glucose 180.16 g/mol;
        # CLINICAL.md formulas, the factor of units.csv)
        assert abs(points[0][2] - 251.0 / 18.016) < 0.01
        reasons = con.execute(
            "select reason, count(*) from dka_measurement_checked group by reason order by reason").fetchall()
        assert reasons == [("no_time", 1), (None, 3)]  # the repeated copy is found by sql/22
        quarantined = con.execute(
            "select reason, count(*) from dka_quarantine group by reason order by reason").fetchall()
        assert quarantined == [("duplicate", 1), ("no_time", 1)]
        assert con.execute("select count(*) from dka_lab_events").fetchall()[0][0] == 2
        folder = Path(con.execute(
            "select path from duckdb_databases() where database_name = 'dka_work'").fetchall()[0][0]).parent
        assert folder.is_dir()
        # a second run in the same session replaces the tables and reuses the scratch database
        prepare_lab_events(extract)
        assert con.execute("select count(*) from dka_measurement_checked").fetchall()[0][0] == 4
        assert con.execute("select sum(results) from dka_lab_points").fetchall()[0][0] == 3
    del extract
    gc.collect()
    assert not folder.exists()


def test_on_step_reports_every_recipe_then_the_accounting(tmp_path: Path) -> None:
    steps: list[tuple[str, float]] = []
    with open_extract(_extract(tmp_path)) as extract:
        prepare_lab_events(extract, on_step=lambda name, seconds: steps.append((name, seconds)))
    assert [name for name, _ in steps] == [recipe for recipe, _ in LAB_RECIPES] + ["accounting"]
    assert all(seconds >= 0 for _, seconds in steps)


def test_the_scoped_quarantine_reading_finds_every_row_a_full_reading_finds(tmp_path: Path) -> None:
    """sql/22 and sql/24 read sql/20 only at time points holding an excluded row or a repeated
    concept, checked once and kept for both (cohort._labs): exact by construction; checked here
    on rows of several reasons, and on the repeats, against the full reading."""
    cdm = MiniCdm()
    cdm.person(1, birth="1980-05-01")
    cdm.person(2, birth="1990-01-01")
    cdm.lab(1, "2345-7", 250.0, unit="mg/dL", at="2024-03-01 09:00")
    cdm.lab(1, "2345-7", 250.0, unit="mg/dL", at="2024-03-01 09:00")  # duplicate
    cdm.lab(1, "2345-7", 9999.0, unit="mg/dL", at="2024-03-01 10:00")  # implausible
    cdm.lab(1, "2345-7", 120.0, unit="mg/dL", at="2024-03-01 10:00")  # usable, same point
    cdm.lab(1, "1963-8", 12.0, unit="mmol/L", at=None, date="2024-03-01")  # no time
    cdm.lab(2, "2345-7", 100.0, unit="mg/dL", at="1985-01-01 10:00")  # before birth
    cdm.lab(3, "2345-7", 100.0, unit="mg/dL", at="2024-01-01 10:00")  # unknown person
    cdm.lab(2, "2345-7", 100.0, unit="mg/dL", at="2024-01-01 11:00")  # usable
    with open_extract(cdm.write(tmp_path / "y", fmt="parquet")) as extract:
        summary = prepare_lab_events(extract)
        con = extract.con
        scoped = con.execute("select source_row_id, reason from dka_quarantine "
                             "where source_table = 'measurement' order by 1").fetchall()
        full = con.execute(
            "select measurement_id, reason from dka_measurement_checked where reason is not null "
            "union all select duplicates.measurement_id, 'duplicate' from dka_measurement_duplicates as duplicates "
            "where not duplicates.kept order by 1").fetchall()
        assert scoped == full
        # sql/22 over every checked row finds the same repeats as over the kept rows
        from cohort._labs import lab_slots
        from cohort._sql import render_recipe
        every = con.execute(render_recipe("22_measurement_duplicates.sql", lab_slots())).fetchall()
        kept = con.execute("select * from dka_measurement_duplicates").fetchall()
        assert sorted(every) == sorted(kept) and len(kept) == 1
        assert sorted(reason for _, reason in scoped) == [
            "before_birth", "duplicate", "implausible", "no_time", "person_unknown"]
        assert summary.reconciles and summary.rows_used == 3


def test_checked_in_scope_narrows_the_checked_rows_for_the_block_only(tmp_path: Path) -> None:
    from cohort._labs import checked_in_scope
    from cohort._sql import Fragment

    with open_extract(_extract(tmp_path)) as extract:
        prepare_lab_events(extract)
        con = extract.con
        assert con.execute("select count(*) from dka_measurement_checked").fetchall()[0][0] == 4
        with checked_in_scope(con, Fragment("measurement.measurement_datetime is null")):
            assert con.execute("select count(*), min(reason) from dka_measurement_checked").fetchall() == [
                (1, "no_time")]
            assert con.execute("select count(*) from dka_lab_events").fetchall()[0][0] == 0
        assert con.execute("select count(*) from dka_measurement_checked").fetchall()[0][0] == 4
        assert con.execute("select count(*) from dka_lab_events").fetchall()[0][0] == 2
