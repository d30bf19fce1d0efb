"""Speed and memory of the episodes step, against a bare scan of the measurement columns it reads.

For each definition (and all four together) a fresh Python process runs
:func:`cohort.episodes.find_episodes` on the extract with DuckDB ``threads`` and ``memory_limit``
set; the parent reads the child's wall time (printed by the child) and its peak resident set size
(``os.wait4`` rusage, ``ru_maxrss``). The bare scan reads the measurement columns the pipeline
reads (``cohort._cdm.used_columns("measurement")``) once with the same settings, aggregating each
so nothing is skipped; the ratio step / scan is printed.

Targets (issue 3): on the 1,000,000-person extract, 60 s and 4 GB on 2 cores, and within 3 times
the bare scan.

With ``--before DIR`` (a copy of an earlier source tree) each run is made twice, first with the
earlier tree and then with this one, and printed side by side (one line each, same settings, the
same bare scan), so a change is measured in one run of the benchmark.

Usage::

    python benchmarks/bench_episodes.py --extract DIR/extract [--threads 2] [--memory-limit 4GB]
        [--definition consensus-2024 ...] [--no-all] [--before OLD_TREE]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent
if str(HERE) not in sys.path:
    sys.path.insert(0, str(HERE))

from _measure import scan_run  # noqa: E402  (the one bare-scan query every benchmark prints)
DEFINITIONS = ("consensus-2024", "ada-2009", "jbds-2023", "ispad-2022")

_CHILD = r"""
import json, sys, time
sys.path.insert(0, {root!r})
from cohort.episodes import find_episodes
started, cpu = time.perf_counter(), time.process_time()
result = find_episodes({extract!r}, {definitions!r}, threads={threads!r}, memory_limit={memory!r})
seconds, cpu = time.perf_counter() - started, time.process_time() - cpu
print(json.dumps({{"seconds": seconds, "cpu": cpu, "episodes": result.episodes.height,
                  "steps": result.manifest["seconds"]}}))
"""

def _run(code: str) -> tuple[dict, float]:
    """Run ``code`` in a fresh interpreter; return its JSON output and peak RSS in GiB."""
    with tempfile.TemporaryFile("w+") as stdout, tempfile.TemporaryFile("w+") as stderr:
        process = subprocess.Popen([sys.executable, "-c", code], stdout=stdout, stderr=stderr, text=True)
        _, status, usage = os.wait4(process.pid, 0)
        stdout.seek(0)
        stderr.seek(0)
        out, err = stdout.read(), stderr.read()
    process.returncode = os.waitstatus_to_exitcode(status)
    if process.returncode != 0:
        raise SystemExit(f"child failed ({process.returncode}):\n{err[-4000:]}")
    peak_gib = usage.ru_maxrss * 1024 / 2**30  # Linux reports KiB
    lines = [line for line in out.splitlines() if line.startswith("{")]
    return json.loads(lines[-1]), peak_gib


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--extract", type=Path, required=True, help="the extract folder")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--memory-limit", default="4GB")
    parser.add_argument("--definition", action="append", dest="definitions",
                        help="definition to time alone (repeatable; default all four)")
    parser.add_argument("--no-all", action="store_true", help="skip the run with all definitions together")
    parser.add_argument("--before", type=Path, default=None,
                        help="an earlier source tree to run first, for a before/after comparison")
    args = parser.parse_args(argv)
    extract = str(args.extract.resolve())
    settings = {"root": str(ROOT), "extract": extract, "threads": args.threads, "memory": args.memory_limit}

    measured = scan_run(args.extract.resolve(), threads=args.threads, memory_limit=args.memory_limit)
    if not measured.ok:
        raise SystemExit(f"bare scan failed: {measured.error}")
    scan, scan_rss = measured.result, measured.peak_rss_gib
    print(f"extract {extract}: {scan['rows']:,} measurement rows; threads={args.threads}, "
          f"memory_limit={args.memory_limit}")
    print(f"bare scan of measurement ({', '.join(scan['columns'])}): {scan['seconds']:.2f} s, "
          f"peak RSS {scan_rss:.2f} GiB")
    runs = [[name] for name in (args.definitions or DEFINITIONS)]
    if not args.no_all:
        runs.append(list(DEFINITIONS))
    trees = [("", str(ROOT))]
    if args.before is not None:
        trees = [("before: ", str(args.before.resolve())), ("after:  ", str(ROOT))]
    print(f"load average before the runs: {os.getloadavg()[0]:.1f} (cpu s: CPU time of the child, all threads)")
    print(f"{'definitions':<58}{'seconds':>9}{'cpu s':>8}{'peak GiB':>10}{'x scan':>8}{'episodes':>10}")
    for names in runs:
        for prefix, root in trees:
            found, rss = _run(_CHILD.format(definitions=names, **{**settings, "root": root}))
            label = prefix + ", ".join(names)
            print(f"{label:<58}{found['seconds']:>9.2f}{found['cpu']:>8.1f}{rss:>10.2f}"
                  f"{found['seconds'] / scan['seconds']:>8.1f}"
                  f"{found['episodes']:>10,}")
            steps = ", ".join(f"{key} {value:.0f}" if key.endswith("_steps") else f"{key} {value:.1f}"
                              for key, value in found["steps"].items() if value >= 0.05)
            print(f"    steps (s; 44_steps is a count of loop steps): {steps}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
