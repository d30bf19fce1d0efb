"""Time and peak memory of the feature stage on an episodes folder and its extract.

Usage::

    .venv/bin/python benchmarks/bench_features.py --episodes OUT/episodes --extract OUT/extract \
        [--threads 2] [--memory-limit 8GB] [--out FEATURES_DIR] [--repeat 1]

Prints, per step (load_feature_inputs from DuckDB, build_features in polars, write_features), the
wall-clock seconds, the rows of each input frame and output table, and the peak resident set
size of the process (``resource.getrusage``: DuckDB and polars share the process). The issue's
target: feature building for the 1M-person extract within 30 seconds on 2 cores. Set
``POLARS_MAX_THREADS=2`` to hold polars to 2 threads as well (the script sets it when unset).
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path


def _peak_rss_mib() -> float:
    # ru_maxrss is KiB on Linux
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", required=True, type=Path, help="folder with episodes.parquet")
    parser.add_argument("--extract", required=True, type=Path, help="the CDM extract the episodes came from")
    parser.add_argument("--threads", type=int, default=2, help="DuckDB and polars threads (default 2)")
    parser.add_argument("--memory-limit", default=None, help="DuckDB memory limit, e.g. 8GB")
    parser.add_argument("--out", type=Path, default=None, help="where to write the tables (default: a temporary folder)")
    args = parser.parse_args(argv)

    os.environ.setdefault("POLARS_MAX_THREADS", str(args.threads))
    import polars as pl

    from cohort.features import build_features, load_feature_inputs, write_features
    from cohort.source import open_extract

    episodes_file = args.episodes / "episodes.parquet" if args.episodes.is_dir() else args.episodes
    if not episodes_file.is_file():
        sys.stderr.write(f"bench_features: no episodes.parquet at {args.episodes}; run `dka-cohort episodes` first\n")
        return 2
    episodes = pl.read_parquet(episodes_file)
    print(f"episodes: {episodes.height} rows, definitions {sorted(episodes['definition'].unique().to_list())}")
    print(f"polars threads: {pl.thread_pool_size()}, duckdb threads: {args.threads}")

    started = time.perf_counter()
    cpu_started = time.process_time()
    with open_extract(args.extract, threads=args.threads, memory_limit=args.memory_limit) as extract:
        opened = time.perf_counter()
        inputs = load_feature_inputs(extract, episodes)
        loaded = time.perf_counter()
        cpu_loaded = time.process_time()
    for name in inputs.__dataclass_fields__:
        print(f"  input {name}: {getattr(inputs, name).height} rows")
    tables = build_features(episodes, inputs)
    built = time.perf_counter()
    cpu_built = time.process_time()
    out = args.out or Path(tempfile.mkdtemp(prefix="bench-features-"))
    write_features(tables, out)
    written = time.perf_counter()
    for name in tables.__dataclass_fields__:
        print(f"  output {name}: {getattr(tables, name).height} rows")
    print(f"open extract:        {opened - started:8.2f} s")
    print(f"load_feature_inputs: {loaded - opened:8.2f} s (DuckDB; includes lab events if not yet in the session)")
    print(f"build_features:      {built - loaded:8.2f} s (polars; CPU time {cpu_built - cpu_loaded:.2f} s)")
    print(f"write_features:      {written - built:8.2f} s -> {out}")
    print(f"total:               {written - started:8.2f} s (CPU time {time.process_time() - cpu_started:.2f} s)")
    print(f"load average (1 min) at the end: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    print(f"peak RSS:            {_peak_rss_mib():8.0f} MiB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
