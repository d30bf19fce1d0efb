"""Run every benchmark in one go (``make bench``) and print one side-by-side table of their figures.

Each measurement runs in its own child process (``_measure.run_python``), so its peak resident
set size is its own. Under ``--root`` the script reuses or generates ``p<persons>/extract`` with
``--seed``, then measures, each with DuckDB ``threads=2`` and ``memory_limit=--memory-limit`` and
again with ``memory_limit=--spill-limit`` (1 GB: DuckDB must spill to ``--root/spill``):

- the generator (time and peak RSS; "reused" with the extract's size when it was there);
- the bare scan of the measurement columns the episodes step reads (the floor);
- the floors of the recipe design (``_measure.FLOOR_QUERIES``, after a lab step that is not
  counted): one reading of the checked rows, and that reading gathered by time point with its
  two counts; the episodes step reads the checked rows twice and aggregates 25 values per time
  point on top of them;
- the episodes step for each bundled definition alone, and for all four in one run;
- the demo pipeline as ``dka-cohort demo`` runs it (episodes for all four definitions ->
  features -> analyse -> report, one DuckDB session), on the benchmark extract;
- the feature stage alone (``run_features`` on the demo's episodes folder);

each with wall seconds, peak RSS, measurement rows per second and the ratio to the bare scan.
Then the details: the pandas peer against the product at 10k, 100k and ``--persons`` (under an
address-space cap; ``bench_pandas_peer.py``), the scaling fit (``bench_scaling.py``), validity
against the truth at 100k (``validity.py``) and PostgreSQL / Spark at ``--engine-persons``
(``bench_engines.py``, load time apart).

    python benchmarks/run_all.py --persons 1000000 --root /tmp/e2/bench
    BENCH_ROOT=/tmp/e2/bench make bench

Options ``--skip NAME`` (repeatable: floors, peer, scaling, validity, engines, spill, demo,
features, episodes) leave parts out, and ``--extract DIR`` measures an existing extract instead of
``--root/p<persons>/extract`` (the generator row then says "reused").
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
if str(HERE) not in sys.path:
    sys.path.insert(0, str(HERE))

import bench_pandas_peer  # noqa: E402
import bench_scaling  # noqa: E402
from _measure import (  # noqa: E402
    Measured,
    child_code,
    episodes_run,
    floors_run,
    folder_bytes,
    load_line,
    parquet_rows,
    run_python,
    scan_run,
)

DEFINITIONS = ("consensus-2024", "ada-2009", "jbds-2023", "ispad-2022")
#: Print order of the table's rows (measurements run in another order: the targets' rows first).
ROW_ORDER = ("generator", "bare scan", "floor", "episodes consensus-2024", "episodes ada-2009", "episodes jbds-2023",
             "episodes ispad-2022", "episodes all four", "features", "demo pipeline", "pandas peer")
PARTS = ("floors", "episodes", "demo", "features", "spill", "peer", "scaling", "validity", "engines")

_DEMO = """
import time
from pathlib import Path
from cohort.analyse import run_analyses
from cohort.definitions import list_definitions
from cohort.episodes import find_episodes
from cohort.features import run_features
from cohort.report import write_report
from cohort.source import open_extract
out = Path({out!r})
laps = {{}}
started = time.perf_counter()
with open_extract({extract!r}, threads={threads!r}, memory_limit={memory!r}, temp_directory={spill!r}) as extract:
    result = find_episodes(extract, list_definitions(), out=out / "episodes")
    laps["episodes"] = time.perf_counter() - started
    tables = run_features(result.episodes, extract, out / "features")
    laps["features"] = time.perf_counter() - started - sum(laps.values())
analysed = run_analyses(out / "features", out / "stats", definition="consensus-2024")
laps["analyse"] = time.perf_counter() - started - sum(laps.values())
written = write_report(out, out / "report.html")
laps["report"] = time.perf_counter() - started - sum(laps.values())
report(seconds=time.perf_counter() - started, laps=laps, episodes=result.episodes.height,
       feature_rows=tables.episode_features.height, tables=len(analysed.written), skipped=sorted(analysed.skipped))
"""

_FEATURES = """
import os, time
os.environ.setdefault("POLARS_MAX_THREADS", str({threads!r}))
from pathlib import Path
from cohort.features import run_features
started = time.perf_counter()
tables = run_features(Path({episodes!r}), Path({extract!r}), Path({out!r}), threads={threads!r}, memory_limit={memory!r})
report(seconds=time.perf_counter() - started, episode_rows=tables.episode_features.height)
"""


def _log(text: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {text}", flush=True)


class Table:
    """The side-by-side table: one row per benchmark, one block of columns per DuckDB setting."""

    def __init__(self, settings: Sequence[str], rows: int) -> None:
        self.settings = list(settings)
        self.rows = rows
        self.lines: list[tuple[str, list[Measured | str | None], bool]] = []
        self.scan: dict[str, float] = {}

    def add(self, label: str, cells: Sequence[Measured | str | None], *, scan_ratio: bool = True) -> None:
        self.lines.append((label, list(cells), scan_ratio))
        order = {name: position for position, name in enumerate(ROW_ORDER)}
        self.lines.sort(key=lambda line: next((order[name] for name in order if line[0].startswith(name)),
                                              len(order)))

    def _cell(self, cell: Measured | str | None, setting: str, scan_ratio: bool) -> str:
        if cell is None:
            return f"{'-':>8} {'':>6} {'':>8} {'':>6}"
        if isinstance(cell, str):
            return f"{cell:<31}"[:31]
        if not cell.ok:
            return f"{'FAILED':>8} {cell.peak_rss_gib:>6.2f} {'':>8} {'':>6}"
        seconds = cell.seconds
        scan = self.scan.get(setting) if scan_ratio else None
        ratio = f"{seconds / scan:>6.1f}" if scan else f"{'-':>6}"
        return f"{seconds:>8.1f} {cell.peak_rss_gib:>6.2f} {self.rows / seconds / 1e6:>8.2f} {ratio}"

    def print(self) -> None:
        width = max(len(label) for label, _, _ in self.lines) + 2
        head = "".join(f" | {setting:<31}" for setting in self.settings)
        sub = "".join(f" | {'seconds':>8} {'GiB':>6} {'Mrows/s':>8} {'x scan':>6}" for _ in self.settings)
        print("benchmark".ljust(width) + head)
        print("".ljust(width) + sub)
        for label, cells, scan_ratio in self.lines:
            print(label.ljust(width) + "".join(" | " + self._cell(cell, setting, scan_ratio)
                                              for cell, setting in zip(cells, self.settings, strict=True)))
        failures = [(label, setting, cell) for label, cells, _ in self.lines
                    for cell, setting in zip(cells, self.settings, strict=True)
                    if isinstance(cell, Measured) and not cell.ok]
        for label, setting, cell in failures:
            print(f"FAILED: {label.strip()} with {setting}: {cell.error}")


def _settings(args: argparse.Namespace) -> list[tuple[str, str | None]]:
    chosen = [(f"threads={args.threads}, memory_limit={args.memory_limit}", args.memory_limit)]
    if "spill" not in args.skip:
        chosen.append((f"threads={args.threads}, memory_limit={args.spill_limit}", args.spill_limit))
    return chosen


def _generator_cell(extract: Path, made: Measured | None) -> str | Measured:
    if made is None:
        return f"reused, {folder_bytes(extract) / 2**30:.2f} GiB on disk"
    return made


def _run_detail(label: str, argv: Sequence[str], timeout: float) -> int:
    print(f"\n=== {label}: {' '.join(argv)}", flush=True)
    started = time.perf_counter()
    try:
        done = subprocess.run([sys.executable, *argv], check=False, cwd=ROOT, timeout=timeout)
        code = done.returncode
    except subprocess.TimeoutExpired:
        code = -1
        print(f"=== {label}: stopped after the time limit of {timeout:.0f} s")
    print(f"=== {label}: exit {code} after {time.perf_counter() - started:.1f} s", flush=True)
    return code


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--persons", type=int, default=100_000, help="extract size (default 100,000)")
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--root", type=Path, default=Path(os.environ.get("BENCH_ROOT", "bench-output")),
                        help="where extracts, spill files and outputs go (default $BENCH_ROOT or bench-output)")
    parser.add_argument("--extract", type=Path, help="measure this existing extract instead of ROOT/p<persons>")
    parser.add_argument("--threads", type=int, default=2, help="DuckDB threads (default 2)")
    parser.add_argument("--memory-limit", default="3GB", help="DuckDB memory limit of the first setting")
    parser.add_argument("--spill-limit", default="1GB", help="DuckDB memory limit of the second setting")
    parser.add_argument("--peer-cap-gib", type=float, default=8.0, help="address-space cap of the pandas peer")
    parser.add_argument("--small-sizes", default="10000,100000",
                        help="smaller sizes for the scaling fit and the pandas peer (comma-separated)")
    parser.add_argument("--engine-persons", type=int, default=100_000, help="extract size for PostgreSQL / Spark")
    parser.add_argument("--timeout", type=float, default=1800.0, help="seconds before one measurement is stopped")
    parser.add_argument("--engine-timeout", type=float, default=3600.0,
                        help="seconds before one engine's benchmark is stopped (default 3600)")
    parser.add_argument("--skip", action="append", default=[], choices=PARTS, help="leave a part out")
    parser.add_argument("--json", type=Path, help="also write every figure to this JSON file")
    args = parser.parse_args(argv)
    root = args.root.resolve()
    root.mkdir(parents=True, exist_ok=True)
    spill = root / "spill"
    started = time.perf_counter()
    _log(f"benchmarks under {root}; {load_line()}")

    if args.extract is not None:
        extract, made = args.extract.resolve(), None
    else:
        _log(f"extract of {args.persons:,} persons (seed {args.seed})")
        extract, made = bench_scaling.ensure_extract(root, args.persons, args.seed)
    rows = parquet_rows(bench_scaling._measurement(extract))
    settings = _settings(args)
    table = Table([name for name, _ in settings], rows)
    table.add(f"generator ({args.persons:,} persons)", [_generator_cell(extract, made)] + [None] * (len(settings) - 1),
              scan_ratio=False)
    everything: dict[str, object] = {"extract": str(extract), "rows": rows, "settings": [name for name, _ in settings]}

    state: dict[str, object] = {"episodes": {}, "peer_rows": [], "scaling_rows": [], "small": {}}
    try:
        _measure_all(args, extract, settings, table, everything, spill, root, state)
    except KeyboardInterrupt:
        print("\n*** interrupted: the table below holds what was measured so far", flush=True)
        _print_main(args, table, everything, rows, extract, settings, state)
        return 130
    _print_main(args, table, everything, rows, extract, settings, state)
    _details(args, extract, state)
    if args.json:
        args.json.write_text(json.dumps(everything, indent=1, default=str))
    print(f"\nrun_all finished in {time.perf_counter() - started:.0f} s; {load_line()}")
    return 0


def _measure_all(args, extract, settings, table, everything, spill, root, state):  # noqa: ANN001, ANN202, PLR0913
    """The side-by-side part: fills ``table``, ``everything`` (figures for JSON) and ``state``."""

    def cells(label: str, run) -> list[Measured]:  # noqa: ANN001 - run(memory) -> Measured
        out = []
        for name, memory in settings:
            _log(f"{label} with {name}")
            done = run(memory)
            _log(f"  {'ok' if done.ok else 'FAILED: ' + str(done.error)} in {done.seconds:.1f} s, "
                 f"peak {done.peak_rss_gib:.2f} GiB")
            out.append(done)
        everything[label] = [vars(cell) for cell in out]
        return out

    scans = cells("bare scan", lambda memory: scan_run(extract, threads=args.threads, memory_limit=memory,
                                                       spill=spill, timeout_seconds=args.timeout))
    for (name, _), scan in zip(settings, scans, strict=True):
        if scan.ok:
            table.scan[name] = scan.seconds
    columns = next((scan.result.get("columns") for scan in scans if scan.ok), None)
    table.add(f"bare scan ({len(columns) if columns else '?'} measurement columns)", scans)

    if "floors" not in args.skip:
        runs = cells("floors", lambda memory: floors_run(extract, threads=args.threads, memory_limit=memory,
                                                         spill=spill, timeout_seconds=args.timeout))
        labels = next((list(run.result.get("floors", {})) for run in runs if run.ok), [])
        for label in labels:  # one child gives every floor; the peak RSS is that child's
            table.add(f"floor: {label}", [
                replace(run, result={**run.result, "seconds": run.result["floors"][label]}) if run.ok else run
                for run in runs])

    episodes: dict[str, list[Measured]] = state["episodes"]
    written: dict[str | None, Path] = {}

    def episode_runs(names: list[str], *, save: Path | None = None) -> None:
        everyone = len(names) > 1
        label = "episodes " + (names[0] if not everyone else "all four in one run (writes the output folder)")

        def run(memory: str | None) -> Measured:
            out = root / "episodes" / (memory or "default") if everyone else None
            if out is not None:
                written[memory] = out
            return episodes_run(extract, names, threads=args.threads, memory_limit=memory, spill=spill, save=save,
                                out=out, timeout_seconds=args.timeout)

        episodes[label.split(" (")[0]] = cells(label, run)
        table.add(label, episodes[label.split(" (")[0]])

    if "episodes" not in args.skip:
        product_file = root / "peer" / str(args.persons) / "product.parquet"
        product_file.parent.mkdir(parents=True, exist_ok=True)
        episode_runs(["consensus-2024"], save=product_file)  # saved after the clock stops
        episode_runs(list(DEFINITIONS))

    if "features" not in args.skip:
        source = next((folder for folder in written.values() if (folder / "episodes.parquet").exists()), None)
        if source is None:
            _log("features: no episodes folder (the all-four run did not write one); writing one")
            source = root / "episodes"
            done = episodes_run(extract, list(DEFINITIONS), threads=args.threads, memory_limit=args.memory_limit,
                                spill=spill, out=source, timeout_seconds=args.timeout)
            if not done.ok:
                source = None
        if source is not None:
            def features(memory: str | None) -> Measured:
                code = child_code(_FEATURES.format(episodes=str(source), extract=str(extract), threads=args.threads,
                                                   memory=memory, out=tempfile.mkdtemp(prefix="features-", dir=root)))
                return run_python(code, label="features", timeout_seconds=args.timeout)

            table.add("features (all four definitions)", cells("features", features))

    peer_rows = state["peer_rows"]
    small = state["small"]
    if "peer" not in args.skip or "scaling" not in args.skip:
        for persons in (int(text) for text in args.small_sizes.split(",") if text.strip()):
            if persons == args.persons:
                continue
            _log(f"extract of {persons:,} persons (seed {args.seed})")
            small[persons], _ = bench_scaling.ensure_extract(root, persons, args.seed)
    consensus = episodes.get("episodes consensus-2024", [None])[0]
    if "peer" not in args.skip:
        sizes = {**small, args.persons: extract}
        for persons in sorted(sizes):
            _log(f"pandas peer at {persons:,} persons")
            reuse = consensus if persons == args.persons and consensus is not None and consensus.ok else None
            save = root / "peer" / str(persons)
            save.mkdir(parents=True, exist_ok=True)
            row = bench_pandas_peer.measure(
                sizes[persons], cap_gib=args.peer_cap_gib, threads=args.threads, memory_limit=args.memory_limit,
                save_dir=save, timeout_seconds=args.timeout, product=reuse, spill=spill)
            if reuse is not None and (save / "product.parquet").exists():
                row["product_file"] = str(save / "product.parquet")
            peer_rows.append(row)
        peer_run = peer_rows[-1]["peer"]
        table.add(f"pandas peer consensus-2024 ({args.peer_cap_gib:g} GiB cap)", [peer_run] + [None] * (len(settings) - 1))
    if "scaling" not in args.skip:
        measured = {persons: row["product"] for persons, row in zip(sorted({**small, args.persons: extract}),
                                                                    peer_rows, strict=False)}
        if consensus is not None:
            measured[args.persons] = consensus
        _log("scaling")
        state["scaling_rows"] = bench_scaling.scaling({**small, args.persons: extract}, ["consensus-2024"],
                                                      threads=args.threads, memory_limit=args.memory_limit,
                                                      spill=spill, measured=measured)

    if "episodes" not in args.skip:
        for name in DEFINITIONS[1:]:
            episode_runs([name])

    demo_dirs = {}
    if "demo" not in args.skip:
        def demo(memory: str | None) -> Measured:
            out = root / "demo" / (memory or "default")
            demo_dirs[memory] = out
            code = child_code(_DEMO.format(out=str(out), extract=str(extract), threads=args.threads, memory=memory,
                                           spill=str(spill)))
            if out.exists():
                import shutil

                shutil.rmtree(out)
            return run_python(code, label="demo pipeline", timeout_seconds=args.timeout)

        demos = cells("demo pipeline", demo)
        table.add("demo pipeline (episodes > features > analyse > report)", demos)
        for (name, _), done in zip(settings, demos, strict=True):
            if done.ok:
                everything.setdefault("demo laps", {})[name] = done.result["laps"]


def _print_main(args, table, everything, rows, extract, settings, state) -> None:  # noqa: ANN001, PLR0913
    """The side-by-side table, the targets, the peer and scaling tables."""
    episodes, peer_rows, scaling_rows = state["episodes"], state["peer_rows"], state["scaling_rows"]
    print()
    print(f"=== side by side: {rows:,} measurement rows in {extract}; {load_line()}")
    table.print()
    for name, laps in everything.get("demo laps", {}).items():
        print(f"demo pipeline with {name}: " + ", ".join(f"{key} {value:.1f} s" for key, value in laps.items()))
    print("Mrows/s: measurement rows of the extract per second of the step; x scan: seconds / bare-scan seconds "
          "with the same setting; GiB: peak RSS of the step's own process.")
    _targets(episodes, table, settings)

    if peer_rows:
        print()
        bench_pandas_peer.print_table(peer_rows, args.peer_cap_gib)
        everything["peer"] = []
        for row in peer_rows:
            checked = bench_pandas_peer.check(row, 1.0)
            everything["peer"].append({"rows": row["rows"], "peer": vars(row["peer"]), "product": vars(row["product"]),
                                       "agreement": checked})
        failed = [row for row in peer_rows if not row["peer"].ok]
        if failed:
            print(f"the pandas peer runs out at {failed[0]['rows']:,} measurement rows: {failed[0]['peer'].error}")
    if scaling_rows:
        print()
        k = bench_scaling.print_scaling(scaling_rows, ["consensus-2024"],
                                        f"threads={args.threads}, memory_limit={args.memory_limit}")
        everything["scaling"] = {"k": k, "rows": [{"persons": row["persons"], "rows": row["rows"],
                                                    "seconds": row["run"].seconds} for row in scaling_rows]}



def _details(args, extract, state) -> None:  # noqa: ANN001
    """Validity at 100k and the engines, each a script of its own."""
    small = state["small"]
    if "validity" not in args.skip:
        persons = 100_000 if 100_000 in small else args.persons
        folder = (small.get(persons) or extract).parent
        if (folder / "truth" / "episodes.parquet").exists():
            _run_detail(f"validity ({persons:,} persons)", [str(HERE / "validity.py"), "--root", str(folder),
                                                             "--threads", str(args.threads)], args.timeout)
    if "engines" not in args.skip:
        engine_extract = small.get(args.engine_persons) or (extract if args.engine_persons == args.persons else None)
        if engine_extract is None:
            engine_extract, _ = bench_scaling.ensure_extract(args.root.resolve(), args.engine_persons, args.seed)
        for engine in ("postgres", "spark"):  # apart, so one engine's figures print even if the other stalls
            _run_detail(f"engines: {engine} ({args.engine_persons:,} persons)",
                        [str(HERE / "bench_engines.py"), "--extract", str(engine_extract), "--engines", engine,
                         "--threads", str(args.threads), "--cores", str(args.threads)], args.engine_timeout)


def _targets(episodes: dict[str, list[Measured]], table: Table, settings: Sequence[tuple[str, str | None]]) -> None:
    """Issue 3 / 8 targets against the consensus-2024 row of the first setting."""
    runs = episodes.get("episodes consensus-2024")
    if not runs:
        return
    for (name, _), run in zip(settings, runs, strict=True):
        if not run.ok:
            print(f"targets ({name}): episodes step FAILED: {run.error}")
            continue
        scan = table.scan.get(name)
        ratio = f"{run.seconds / scan:.1f}x" if scan else "?"
        print(f"targets ({name}), episodes consensus-2024: {run.seconds:.1f} s (issue 8: <= 30 s; issue 3: <= 60 s), "
              f"peak {run.peak_rss_gib:.2f} GiB (<= 4 GB), {ratio} the bare scan (<= 3x)")


if __name__ == "__main__":
    raise SystemExit(main())
