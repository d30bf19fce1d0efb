"""The recipes on PostgreSQL and Spark against DuckDB: load time and run time, and the same answers.

For one synthetic extract (generated, or reused with ``--extract``) and one definition, prints
side by side:

- DuckDB: the project's own path (recipes 10 .. 51 as :func:`cohort.engines.duckdb_reference`
  runs them), threads as given;
- PostgreSQL: a throwaway server from ``.ci/postgres.sh`` (or ``--dsn``), the load of every CDM
  table (:func:`cohort.engines.load_extract_postgres`) timed apart from the recipes;
- Spark: a local session (local[N], AQE on, UTC), the staging of the CDM tables as Parquet timed
  apart from the recipes;

each with wall seconds of the recipes (fetching the tables into polars for the comparison is
not counted), lab events per second, and whether every ``dka_*`` table agrees with
DuckDB (:func:`cohort.engines.compare_runs`). Issue 8 asks for these timings on a 100,000-person
extract.

Usage::

    .venv/bin/python benchmarks/bench_engines.py --persons 100000 [--extract DIR/extract]
        [--engines postgres,spark] [--definition consensus-2024] [--dsn DSN] [--cores 2]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _extract(args: argparse.Namespace, scratch: Path) -> tuple[Path, float | None]:
    if args.extract:
        return Path(args.extract), None
    from synthetic import generate_extract

    started = time.perf_counter()
    summary = generate_extract(persons=args.persons, seed=args.seed, out=scratch / "synth", progress=False)
    return summary.extract_dir, time.perf_counter() - started


def _row(name: str, load: float | None, run: float, events: int, agrees: str) -> str:
    load_text = "-" if load is None else f"{load:8.1f}"
    return f"{name:<11} {load_text:>8} {run:8.1f} {events / run if run else 0:14,.0f}  {agrees}"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--persons", type=int, default=100_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--extract", help="reuse this extract folder instead of generating one")
    parser.add_argument("--engines", default="postgres,spark")
    parser.add_argument("--definition", default="consensus-2024")
    parser.add_argument("--dsn", help="an existing PostgreSQL server (default: start one)")
    parser.add_argument("--cores", type=int, default=2)
    parser.add_argument("--threads", type=int, default=2, help="DuckDB threads")
    parser.add_argument("--spark-memory", default="4g",
                        help="Spark driver memory (default 4g; 2g lost a fetched result at 100,000 persons)")
    args = parser.parse_args(argv)
    engines = [name.strip() for name in args.engines.split(",") if name.strip()]

    from cohort.engines import compare_runs, duckdb_reference, run_recipes
    from cohort.source import open_extract

    with tempfile.TemporaryDirectory(prefix="dka-bench-engines-") as folder:
        scratch = Path(folder)
        extract, generated = _extract(args, scratch)
        if generated is not None:
            print(f"generated {args.persons:,} persons in {generated:.1f} s -> {extract}")
        duck: dict[str, float] = {}
        with open_extract(extract, threads=args.threads) as opened:
            reference = duckdb_reference(opened, args.definition, seconds=duck)
        duck_seconds = duck["run"]
        events = reference["dka_lab_events"].height
        lines = [_row("duckdb", None, duck_seconds, events, "reference")]

        if "postgres" in engines:
            from cohort.engines import PostgresSession, load_extract_postgres

            env = {**os.environ, "DKA_PG_DIR": str(scratch / "pg")}
            dsn = args.dsn
            if dsn is None:
                done = subprocess.run([str(ROOT / ".ci" / "postgres.sh")], env=env, capture_output=True,
                                      text=True, check=True)
                dsn = done.stdout.strip().splitlines()[-1]
            try:
                started = time.perf_counter()
                load_extract_postgres(extract, dsn, schema="bench_cdm")
                load = time.perf_counter() - started
                started = time.perf_counter()
                with PostgresSession(dsn, schema="bench_cdm") as session:
                    made = run_recipes(session, args.definition)
                    run = time.perf_counter() - started
                    tables = {table: session.fetch(table) for table in made}
                faults = compare_runs(reference, tables)
                lines.append(_row("postgres", load, run, events,
                                  "identical" if not faults else f"differs in {sorted(faults)}"))
            finally:
                if args.dsn is None:
                    subprocess.run([str(ROOT / ".ci" / "postgres.sh"), "stop"], env=env,
                                   capture_output=True, check=False)

        if "spark" in engines:
            from cohort.engines import SparkSession, local_spark

            started = time.perf_counter()
            spark = local_spark(cores=args.cores, memory=args.spark_memory, app="dka-cohort-bench")
            boot = time.perf_counter() - started
            try:
                started = time.perf_counter()
                with SparkSession(spark, extract, staging=scratch / "spark") as session:
                    load = time.perf_counter() - started
                    started = time.perf_counter()
                    made = run_recipes(session, args.definition)
                    run = time.perf_counter() - started
                    print(f"spark: staging {load:.1f} s, recipes {run:.1f} s; fetching {len(made)} tables to compare",
                          flush=True)
                    tables = {table: session.fetch(table) for table in made}
                faults = compare_runs(reference, tables)
                lines.append(_row("spark", load, run, events,
                                  "identical" if not faults else f"differs in {sorted(faults)}")
                             + f"  (session start {boot:.1f} s)")
            finally:
                spark.stop()

    one, five, fifteen = os.getloadavg()
    print(f"extract: {extract}  definition: {args.definition}  lab events: {events:,}  "
          f"(load average {one:.1f} / {five:.1f} / {fifteen:.1f} on {os.cpu_count()} cores)")
    print(f"{'engine':<11} {'load s':>8} {'run s':>8} {'events/s (run)':>14}  same tables as DuckDB")
    for line in lines:
        print(line)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
