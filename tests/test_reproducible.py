"""Reproducibility: content hashes of every output table, reruns, ``verify``; the source untouched (issue 9).

- A table's content hash (cohort._manifest.table_hash) is the SHA-256 of its rows in a canonical
  order, not of its file's bytes. It is checked against an independent computation with the
  Python standard library (``hashlib``, ``csv``: Python Software Foundation, *The Python
  Standard Library*, 3.11, sections "hashlib" and "csv"), and for invariance: row order,
  Parquet compression and row-group size change nothing; one changed value changes it.
- Two runs with the same inputs give identical hashes (episodes, features, analyse), and
  ``verify_results`` reruns from the manifest and reports ``same`` / ``different`` / ``missing``.
- A full run never writes to the extract: every file of the extract, as Parquet, CSV and a
  DuckDB file, hashes alike before and after, and no file is added (DESIGN.md: "The source is
  never written to").

Extracts are synthetic (the fictional Harrowmere Valley Health network): invented data for
exercising the pipeline, never reference values.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import shutil
from pathlib import Path

import duckdb
import polars as pl
import pytest

from cohort._errors import InputError
from cohort._manifest import table_hash, table_hashes
from cohort.analyse import run_analyses
from cohort.episodes import find_episodes
from cohort.features import run_features
from cohort.report import write_report
from cohort.verify import verify_results

DEFINITIONS = ["consensus-2024", "jbds-2023"]


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> Path:
    from synthetic import generate_extract

    root = tmp_path_factory.mktemp("repro")
    return Path(generate_extract(persons=400, seed=7, out=root / "s400", progress=False).extract_dir)


def _pipeline(source: Path, root: Path, *, overrides: dict | None = None, report: bool = False) -> Path:
    find_episodes(source, DEFINITIONS, out=root / "episodes", overrides=overrides, threads=1)
    run_features(root / "episodes", source, root / "features", threads=1)
    run_analyses(root / "features", root / "stats", definition="consensus-2024")
    if report:
        # threshold 1 shows every count: this run checks the source, not disclosure control
        write_report(root, root / "report.html", threshold=1)
    return root


@pytest.fixture(scope="module")
def first_run(extract, tmp_path_factory) -> Path:
    return _pipeline(extract, tmp_path_factory.mktemp("first"))


# --------------------------------------------------------------------------- the hash itself
def test_table_hash_matches_an_independent_stdlib_computation_9():
    # reference: sort the rows in Python, write them with the csv module (minimal quoting, \N for
    # null, "\n" line ends), prefix the header "name:dtype" joined by \x1f, SHA-256 with hashlib
    frame = pl.DataFrame({"person_id": [3, 1, 2, 1], "reason": ["unit_unknown", "no_time", None, "a,b"]})
    rows = sorted(frame.iter_rows(), key=lambda row: tuple((value is None, value) for value in row))
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    for row in rows:
        writer.writerow(["\\N" if value is None else value for value in row])
    expected = hashlib.sha256(("person_id:Int64\x1freason:String\n" + buffer.getvalue()).encode()).hexdigest()
    assert table_hash(frame) == {"sha256": expected, "rows": 4, "columns": ["person_id", "reason"]}


def test_table_hash_ignores_order_and_parquet_layout_but_not_values_9(tmp_path):
    frame = pl.DataFrame({
        "episode_id": [f"e{i}" for i in range(1000)],
        "hours_to_resolution": [i / 7 if i % 5 else None for i in range(1000)],
    })
    frame.write_parquet(tmp_path / "a.parquet", compression="zstd", row_group_size=1000)
    frame.sample(fraction=1.0, shuffle=True, seed=1).write_parquet(
        tmp_path / "b.parquet", compression="snappy", row_group_size=64, statistics=False)
    assert (tmp_path / "a.parquet").read_bytes() != (tmp_path / "b.parquet").read_bytes()
    assert table_hash(tmp_path / "a.parquet") == table_hash(tmp_path / "b.parquet")
    changed = frame.with_columns(pl.when(pl.col("episode_id") == "e3").then(0.5).otherwise(
        pl.col("hours_to_resolution")).alias("hours_to_resolution"))
    assert table_hash(changed)["sha256"] != table_hash(frame)["sha256"]
    renamed = frame.rename({"hours_to_resolution": "hours"})
    assert table_hash(renamed)["sha256"] != table_hash(frame)["sha256"]


# --------------------------------------------------------------------------- reruns
def test_manifests_record_every_table_hash_9(first_run):
    for stage, marker in (("episodes", "manifest.json"), ("features", "features_manifest.json"),
                          ("stats", "manifest.json")):
        recorded = json.loads((first_run / stage / marker).read_text())
        assert recorded["tables"] == table_hashes(first_run / stage), stage
        assert recorded["tables"], stage
    episodes = json.loads((first_run / "episodes" / "manifest.json").read_text())
    assert {"episodes.parquet", "quarantine.parquet", "attrition.csv"} <= set(episodes["tables"])
    assert [entry["content"]["name"] for entry in episodes["definitions"]] == DEFINITIONS
    assert set(episodes["codelists"]["files"]) >= {"labs.csv", "units.csv"}


@pytest.mark.slow  # verify_identical_run shows the same through verify; this checks it without verify
def test_two_runs_give_identical_tables_9(extract, first_run, tmp_path):
    second = _pipeline(extract, tmp_path / "second")
    for stage in ("episodes", "features", "stats"):
        one, two = table_hashes(first_run / stage), table_hashes(second / stage)
        assert one == two, f"{stage}: {sorted(k for k in one if one.get(k) != two.get(k))}"


def test_verify_identical_run_9(extract, first_run):
    report = verify_results(first_run, extract, threads=1)
    assert report.identical and report.exit_code == 0
    assert {check.stage for check in report.checks} == {"episodes", "features", "stats"}
    assert all(check.status == "same" for check in report.checks)
    print("\n".join(report.lines()[-1:]))


def test_verify_reports_a_changed_table_and_a_missing_one_9(extract, first_run, tmp_path):
    results = tmp_path / "results"
    shutil.copytree(first_run / "episodes", results)
    episodes = pl.read_parquet(results / "episodes.parquet")
    first_id = episodes.sort("episode_id")["episode_id"][0]
    tampered = episodes.with_columns(
        pl.when(pl.col("episode_id") == first_id).then(pl.lit("severe")).otherwise(pl.col("severity")).alias("severity")
    )
    if tampered.equals(episodes):  # the first episode was already severe: change another column
        tampered = episodes.with_columns(pl.when(pl.col("episode_id") == first_id).then(pl.lit(99.0))
                                         .otherwise(pl.col("ph")).alias("ph"))
    tampered.write_parquet(results / "episodes.parquet")
    (results / "agreement.csv").unlink()
    report = verify_results(results, extract, threads=1)
    assert not report.identical and report.exit_code == 1
    by_table = {check.table: check for check in report.checks}
    changed = by_table["episodes.parquet"]
    assert changed.status == "different" and changed.rows_recorded == changed.rows_rerun == episodes.height
    assert changed.first_difference["recorded"]["episode_id"] == first_id
    assert changed.first_difference["recorded"] != changed.first_difference["rerun"]
    assert "no longer matches the hash its manifest recorded" in changed.note
    assert by_table["agreement.csv"].status == "missing" and "not in the results folder" in by_table["agreement.csv"].note
    assert by_table["quarantine.parquet"].status == "same"
    text = str(report)
    assert "DIFFERENT" in text and "first difference" in text


def test_verify_reruns_with_the_recorded_overrides_9(extract, tmp_path):
    out = tmp_path / "episodes"
    find_episodes(extract, ["ada-2009"], out=out, overrides={"timing.episode_gap_hours": 24}, threads=1)
    report = verify_results(out, extract, threads=1)
    assert report.identical, str(report)
    entry = json.loads((out / "manifest.json").read_text())["definitions"][0]
    assert entry["content"]["timing"]["episode_gap_hours"] == 24.0


def test_verify_refuses_a_folder_without_manifest_9(extract, tmp_path):
    (tmp_path / "loose").mkdir()
    with pytest.raises(InputError, match="no results to verify"):
        verify_results(tmp_path / "loose", extract)


# --------------------------------------------------------------------------- the source untouched
def _snapshot(path: Path) -> dict[str, str]:
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    return {str(p.relative_to(path.parent)): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def _as_format(parquet_extract: Path, fmt: str, root: Path) -> Path:
    tables = sorted(p.stem for p in parquet_extract.glob("*.parquet"))
    con = duckdb.connect()
    if fmt == "parquet":
        target = root / "parquet"
        shutil.copytree(parquet_extract, target)
    elif fmt == "csv":
        target = root / "csv"
        target.mkdir()
        for table in tables:
            con.execute(f"copy (select * from read_parquet('{parquet_extract / table}.parquet')) "
                        f"to '{target / table}.csv' (header, delimiter ',')")
    else:
        target = root / "extract.duckdb"
        file_con = duckdb.connect(str(target))
        for table in tables:
            file_con.execute(f"create table {table} as select * from read_parquet('{parquet_extract / table}.parquet')")
        file_con.close()
    con.close()
    return target


@pytest.mark.parametrize("fmt", ["parquet", "csv", "duckdb"])
def test_source_is_never_modified_9(extract, tmp_path, fmt):
    source = _as_format(extract, fmt, tmp_path)
    neighbours_before = sorted(p.name for p in source.parent.iterdir())
    before = _snapshot(source)
    results = _pipeline(source, tmp_path / "results", report=True)
    assert (results / "report.html").is_file()
    assert _snapshot(source) == before  # same files, same bytes: nothing added, nothing rewritten
    # nothing written beside a DuckDB file either (no .wal), apart from the results folder
    assert sorted(p.name for p in source.parent.iterdir()) == sorted({*neighbours_before, "results"})


def _cli_has_verify() -> bool:
    from cohort.cli import build_parser

    parser = build_parser()
    commands = next(action for action in parser._actions if action.dest == "command")
    return "verify" in commands.choices


@pytest.mark.xfail(not _cli_has_verify(), strict=True,
                   reason="`dka-cohort verify` is not wired in cohort/cli.py yet (R2 gave the lead the function to call)")
def test_cli_verify_exit_codes_9(extract, tmp_path):
    from cohort.cli import main

    out = tmp_path / "episodes"
    find_episodes(extract, ["jbds-2023"], out=out, threads=1)
    assert main(["verify", str(out), "--source", str(extract)]) == 0
    episodes = pl.read_parquet(out / "episodes.parquet")
    episodes.head(max(episodes.height - 1, 0)).write_parquet(out / "episodes.parquet")  # one row lost
    assert main(["verify", str(out), "--source", str(extract)]) == 1
    assert main(["verify", str(tmp_path / "nowhere"), "--source", str(extract)]) == 2
