"""Run every benchmark in one go (``make bench``), each in its own process, and print their figures.

Generates (or reuses) a synthetic extract of ``--persons`` persons under ``--root``, then runs, in
order: the generator, the lab step, the episodes step (with the bare-scan floor), the feature
stage, validity against the truth, and the engines at a smaller size. Each benchmark prints its
own table; this script only sequences them, so that the figures come from one run on one machine.

    python benchmarks/run_all.py --persons 1000000 --root bench-output
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _run(label: str, *args: str) -> None:
    print(f"\n=== {label}: {' '.join(args)}", flush=True)
    started = time.perf_counter()
    done = subprocess.run([sys.executable, *args], check=False)
    print(f"=== {label}: exit {done.returncode} after {time.perf_counter() - started:.1f} s", flush=True)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--persons", type=int, default=100_000, help="extract size (default 100,000)")
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--root", default="bench-output", help="where the extract and results go")
    parser.add_argument("--memory-limit", default="3GB", help="DuckDB memory limit for the pipeline steps")
    parser.add_argument("--engine-persons", type=int, default=10_000, help="extract size for the engines")
    args = parser.parse_args()

    root = Path(args.root) / f"p{args.persons}"
    extract = root / "extract"
    if (extract / "measurement.parquet").is_file():
        print(f"reusing {extract}")
    else:
        _run("generator", str(HERE / "bench_synth.py"), "--persons", str(args.persons), "--seed", str(args.seed),
             "--out", str(root), "--keep")
    _run("lab step", str(HERE / "bench_labs.py"), "--extract", str(extract), "--threads", "2",
         "--memory-limit", args.memory_limit)
    _run("episodes step", str(HERE / "bench_episodes.py"), "--extract", str(extract), "--threads", "2",
         "--memory-limit", args.memory_limit)
    episodes = root / "episodes"
    if not (episodes / "episodes.parquet").is_file():
        subprocess.run(
            [sys.executable, "-m", "cohort.cli", "episodes", "--source", str(extract), "--definition", "consensus-2024",
             "--definition", "jbds-2023", "--out", str(episodes), "--threads", "2", "--memory-limit",
             args.memory_limit, "--quiet"],
            check=True,
        )
    _run("feature stage", str(HERE / "bench_features.py"), "--episodes", str(episodes), "--extract", str(extract),
         "--memory-limit", args.memory_limit)
    _run("validity", str(HERE / "validity.py"), "--root", str(root))
    _run("engines", str(HERE / "bench_engines.py"), "--persons", str(args.engine_persons), "--seed", str(args.seed))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
