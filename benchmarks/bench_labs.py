"""Speed and memory of the lab-events and quarantine step (recipes 10 .. 22), against a bare scan.

Each measurement runs in a fresh Python process with DuckDB ``threads`` and ``memory_limit`` set;
the parent reads the child's timings (printed by the child as JSON), its peak resident set size
and its CPU time (``os.wait4`` rusage: ``ru_maxrss``, ``ru_utime + ru_stime``; CPU time is the
steadier figure on a shared, loaded machine):

- ``scan``: a bare scan of the measurement columns the lab step reads, each aggregated (count,
  max, sum) so every value is decoded and nothing is materialised: the floor;
- ``labs``: :func:`cohort._labs.prepare_lab_events`, timed recipe by recipe through its
  ``on_step`` callback (``accounting`` is the reconciliation counts after the recipes);
- with ``--downstream``, the same child then reads ``dka_lab_events`` the way the episodes step
  does (the row and person counts of ``cohort.episodes``, recipe 30, and recipe 31 for one
  definition), so the choice of view or table for ``dka_lab_events`` is measured where it costs;
- with ``--floors``, the same child then times the floors of this design: one reading of the
  checked rows (``sql/20`` over every row, counted by reason) and that reading gathered by time
  point with counts of its rows and excluded rows only (the grouping ``sql/21`` does, without its
  value aggregates), each stored as a table;
- with ``--baseline REF``, the lab step is also run with its files (``cohort/_labs.py``,
  ``cohort/_codelists.py``, ``sql/1*``, ``sql/2*``) as committed at git revision REF (unpacked
  with ``git archive`` into a temporary copy of the package; the checkout is not touched), side by
  side with the working tree, and both results are checked to be identical
  (row counts, data quality, and an order-independent hash of ``dka_lab_events`` and
  ``dka_quarantine``).

Targets (brief H9, issue 3): the whole episodes step within 30-60 s and 3 times the bare scan
on 2 cores, under 4 GB peak, at 1,000,000 persons.

Usage::

    python benchmarks/bench_labs.py --extract DIR [--memory-limit 3GB] [--threads 2]
        [--downstream] [--floors] [--baseline HEAD] [--repeat 1]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tarfile
import tempfile
from collections.abc import Sequence
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: Measurement columns recipes 10 .. 22 read (sql/20).
LAB_COLUMNS = (
    "measurement_id", "person_id", "measurement_concept_id", "measurement_date",
    "measurement_datetime", "visit_occurrence_id", "value_as_number", "value_as_concept_id",
    "value_source_value", "unit_concept_id", "unit_source_value",
)

_SCAN = r"""
import json, sys, time
sys.path.insert(0, {root!r})
from cohort.source import open_extract
columns = {columns!r}
with open_extract({extract!r}, threads={threads!r}, memory_limit={memory!r}) as extract:
    extract.con.execute("set enable_progress_bar = false")
    aggregates = ", ".join(["count(*)", "sum(value_as_number)"] + [f"max({{name}})" for name in columns])
    started = time.perf_counter()
    extract.con.execute(f"select {{aggregates}} from measurement").fetchall()
    seconds = time.perf_counter() - started
    rows = extract.row_count("measurement")
print(json.dumps({{"seconds": seconds, "rows": rows}}))
"""

_LABS = r"""
import inspect, json, sys, time
sys.path.insert(0, {root!r})
import cohort._labs as labs
from cohort.source import open_extract
steps = {{}}
def on_step(name, seconds):
    steps[name] = steps.get(name, 0.0) + seconds
kwargs = {{}}
if "on_step" in inspect.signature(labs.prepare_lab_events).parameters:
    kwargs["on_step"] = on_step
else:  # an older revision: time its run_recipe calls
    original = labs.run_recipe
    def timed(con, name, target, values):
        started = time.perf_counter()
        original(con, name, target, values)
        on_step(name, time.perf_counter() - started)
    labs.run_recipe = timed
with open_extract({extract!r}, threads={threads!r}, memory_limit={memory!r}) as extract:
    con = extract.con
    con.execute("set enable_progress_bar = false")
    started = time.perf_counter()
    summary = labs.prepare_lab_events(extract, **kwargs)
    seconds = time.perf_counter() - started
    if "accounting" not in steps:
        steps["accounting"] = seconds - sum(steps.values())
    result = {{
        "seconds": seconds, "steps": steps, "rows_read": summary.rows_read,
        "rows_used": summary.rows_used, "rows_quarantined": summary.rows_quarantined,
        "rows_other": summary.rows_other,
        "data_quality": [list(row) for row in summary.data_quality.iter_rows()],
    }}
    if {check!r}:
        started = time.perf_counter()
        result["events_hash"] = con.execute(
            "select count(*), sum(hash(person_id, measurement_id, visit_occurrence_id, event_datetime, "
            "analyte, specimen, value)) from dka_lab_events").fetchall()[0][1]
        result["quarantine_hash"] = con.execute(
            "select sum(hash(source_table, source_row_id, person_id, reason, detail)) "
            "from dka_quarantine").fetchall()[0][0]
        result["events_types"] = [list(row[:2]) for row in con.execute("describe dka_lab_events").fetchall()]
        result["check_seconds"] = time.perf_counter() - started
    if {downstream!r}:
        from cohort._sql import run_recipe
        from cohort.definitions import load_definition
        from cohort.episodes import build_lab_state
        down = {{}}
        started = time.perf_counter()
        # the counts cohort.episodes takes (from the time points; older revisions read the rows)
        counts_sql = getattr(labs, "LAB_COUNTS_SQL",
                             "select count(distinct person_id), count(*) from dka_lab_events")
        con.execute(counts_sql).fetchall()
        down["event_counts"] = time.perf_counter() - started
        started = time.perf_counter()
        run_recipe(con, "30_person_diabetes.sql", "dka_person_diabetes", {{}})
        down["30_person_diabetes.sql"] = time.perf_counter() - started
        started = time.perf_counter()
        build_lab_state(con, [load_definition("consensus-2024")])
        down["31_lab_state.sql"] = time.perf_counter() - started
        result["downstream"] = down
    if {floors!r}:
        # the floors of this design (benchmarks/_measure.py, FLOOR_QUERIES)
        sys.path.insert(0, {here!r})
        from _measure import time_floors
        result["floors"] = time_floors(con)
print(json.dumps(result, default=str))
"""


def _run(code: str) -> tuple[dict, float]:
    """Run ``code`` in a fresh interpreter; return its JSON output and peak RSS in GiB."""
    with tempfile.TemporaryFile("w+") as stdout, tempfile.TemporaryFile("w+") as stderr:
        process = subprocess.Popen([sys.executable, "-c", code], stdout=stdout, stderr=stderr,
                                   text=True, cwd=ROOT)
        _, status, usage = os.wait4(process.pid, 0)
        stdout.seek(0)
        stderr.seek(0)
        out, err = stdout.read(), stderr.read()
    code_ = os.waitstatus_to_exitcode(status)
    if code_ != 0:
        raise SystemExit(f"child failed ({code_}):\n{err[-4000:]}")
    lines = [line for line in out.splitlines() if line.startswith("{")]
    if not lines:
        raise SystemExit(f"child printed no result:\n{out[-2000:]}\n{err[-2000:]}")
    result = json.loads(lines[-1])
    result["cpu_seconds"] = usage.ru_utime + usage.ru_stime  # the whole child, start-up included
    return result, usage.ru_maxrss * 1024 / 2**30  # KiB on Linux


def _unpack(revision: str, into: Path) -> Path:
    """The working tree's ``cohort/`` and ``sql/`` with the lab step's files of git ``revision``.

    The lab step's files (``cohort/_labs.py``, ``cohort/_codelists.py``, ``sql/1*.sql``,
    ``sql/2*.sql``) come from ``git archive`` (read-only; the checkout is not touched); every other
    file is the working tree's, so only the lab step differs between the variants.
    """
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc")
    shutil.copytree(ROOT / "cohort", into / "cohort", ignore=ignore)
    shutil.copytree(ROOT / "sql", into / "sql", ignore=ignore)
    for recipe in [*(into / "sql").glob("1*.sql"), *(into / "sql").glob("2*.sql")]:
        recipe.unlink()
    archive = into / "revision.tar"
    with archive.open("wb") as handle:
        subprocess.run(["git", "-C", str(ROOT), "archive", "--format=tar", revision, "cohort", "sql"],
                       stdout=handle, check=True)
    with tarfile.open(archive) as tar:
        members = [member for member in tar.getmembers() if member.isfile() and _lab_file(member.name)]
        tar.extractall(into, members=members, filter="data")
    return into


def _lab_file(name: str) -> bool:
    """True for the files of the lab step (brief H9)."""
    path = Path(name)
    if path.parent.name == "sql":
        return path.suffix == ".sql" and path.name[:1] in ("1", "2")
    return name in ("cohort/_labs.py", "cohort/_codelists.py")


def _runs(runs: list[tuple[dict, float]], digits: int) -> str:
    return ", ".join(f"{result['seconds']:.{digits}f}" for result, _ in runs)


def _labs(root: Path, args: argparse.Namespace, *, downstream: bool, check: bool) -> tuple[dict, float]:
    return _run(_LABS.format(root=str(root), extract=str(args.extract), threads=args.threads,
                             memory=args.memory_limit, downstream=downstream, check=check,
                             floors=args.floors, here=str(Path(__file__).resolve().parent)))


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--extract", type=Path, required=True, help="the extract folder")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--memory-limit", default="3GB")
    parser.add_argument("--downstream", action="store_true",
                        help="also time the episodes step's reads of dka_lab_events (recipes 30, 31)")
    parser.add_argument("--floors", action="store_true",
                        help="also time one reading of the checked rows, and that reading grouped "
                             "by time point with two counts (the floors of this design)")
    parser.add_argument("--baseline", metavar="REV", help="also run the lab step of git revision REV")
    parser.add_argument("--repeat", type=int, default=1, help="runs of each variant (best and all shown)")
    args = parser.parse_args(argv)
    args.extract = args.extract.resolve()
    check = args.baseline is not None

    variants: list[tuple[str, Path]] = [("working tree", ROOT)]
    holder = tempfile.TemporaryDirectory(prefix="bench-labs-") if args.baseline else None
    if holder is not None:
        variants.insert(0, (f"revision {args.baseline}", _unpack(args.baseline, Path(holder.name))))

    print(f"extract {args.extract}  threads={args.threads}  memory_limit={args.memory_limit}")
    results: dict[str, list[tuple[dict, float]]] = {name: [] for name, _ in variants}
    scans: list[tuple[dict, float]] = []
    try:
        for _ in range(max(1, args.repeat)):  # interleaved, so load changes hit every variant
            scans.append(_run(_SCAN.format(root=str(ROOT), extract=str(args.extract), threads=args.threads,
                                           memory=args.memory_limit, columns=LAB_COLUMNS)))
            for name, root in variants:
                results[name].append(_labs(root, args, downstream=args.downstream, check=check))
    finally:
        if holder is not None:
            holder.cleanup()

    scan = min(result["seconds"] for result, _ in scans)
    rows = scans[0][0]["rows"]
    print(f"measurement rows {rows:,}")
    print(f"bare scan of {len(LAB_COLUMNS)} columns: {scan:7.2f} s  (runs: "
          f"{_runs(scans, 2)}; peak RSS "
          f"{max(peak for _, peak in scans):.2f} GiB; child CPU {scans[0][0]['cpu_seconds']:.1f} s)")
    names = [name for name, _ in variants]
    best = {name: min(results[name], key=lambda item: item[0]["seconds"]) for name in names}
    steps = list(dict.fromkeys(step for name in names for step in best[name][0]["steps"]))
    floor_labels = [f"floor: {step}" for step in best[names[-1]][0].get("floors", {})]
    width = max(len(step) for step in [*steps, *floor_labels, "downstream total"]) + 2
    print("\n" + "step".ljust(width) + "".join(f"{name:>22}" for name in names))
    for step in steps:
        cells = [best[name][0]["steps"].get(step) for name in names]
        print(step.ljust(width) + "".join(f"{cell:>20.2f} s" if cell is not None else f"{'-':>22}"
                                         for cell in cells))
    print("lab step total".ljust(width) + "".join(f"{best[name][0]['seconds']:>20.2f} s" for name in names))
    print("  all runs".ljust(width) + "".join(
        f"{_runs(results[name], 1):>22}" for name in names))
    print("  ratio to bare scan".ljust(width) + "".join(
        f"{best[name][0]['seconds'] / scan:>21.1f}x" for name in names))
    print("  rows per second".ljust(width) + "".join(
        f"{rows / best[name][0]['seconds'] / 1e6:>19.1f} M/s" for name in names))
    print("  child CPU (user+sys)".ljust(width) + "".join(
        f"{best[name][0]['cpu_seconds']:>20.1f} s" for name in names))
    print("  peak RSS".ljust(width) + "".join(
        f"{max(peak for _, peak in results[name]):>18.2f} GiB" for name in names))
    if args.downstream:
        down_steps = list(best[names[-1]][0]["downstream"])
        for step in down_steps:
            print(f"then {step}".ljust(width) + "".join(
                f"{best[name][0]['downstream'][step]:>20.2f} s" for name in names))
        totals = {name: best[name][0]["seconds"] + sum(best[name][0]["downstream"].values()) for name in names}
        print("labs + 30 + 31".ljust(width) + "".join(f"{totals[name]:>20.2f} s" for name in names))
        print("  ratio to bare scan".ljust(width) + "".join(f"{totals[name] / scan:>21.1f}x" for name in names))
    if args.floors:
        for step in best[names[-1]][0]["floors"]:
            print(f"floor: {step}".ljust(width) + "".join(
                f"{best[name][0]['floors'][step]:>20.2f} s" for name in names))
            print("  ratio to bare scan".ljust(width) + "".join(
                f"{best[name][0]['floors'][step] / scan:>21.1f}x" for name in names))
    last = best[names[-1]][0]
    print(f"\nrows read {last['rows_read']:,} = used {last['rows_used']:,} + quarantined "
          f"{last['rows_quarantined']:,} + other analytes {last['rows_other']:,}")
    if check:
        keys = ("rows_read", "rows_used", "rows_quarantined", "rows_other", "data_quality",
                "events_hash", "quarantine_hash", "events_types")
        same = {key: len({json.dumps(best[name][0][key]) for name in names}) == 1 for key in keys}
        print("identical results: " + ", ".join(f"{key} {'yes' if ok else 'NO'}" for key, ok in same.items()))
        if not all(same.values()):
            return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
