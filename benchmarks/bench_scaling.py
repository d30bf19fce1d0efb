"""How the episodes step grows with the extract: time at several sizes and the fitted exponent k.

For each size (persons) the extract ``ROOT/p<persons>/extract`` is reused or generated with the
same seed (``synthetic.generate_extract``), then the episodes step (``find_episodes`` for the
given definitions, DuckDB ``threads`` and ``memory_limit`` set) runs in a fresh child process.
The fit is ordinary least squares of log(seconds) on log(measurement rows): time ~ rows^k. Issue 8
asks for k close to 1 (linear growth; a join or sort that degrades shows as k well above 1).

Usage::

    .venv/bin/python benchmarks/bench_scaling.py --root /tmp/e2/bench --sizes 10000,100000,1000000 \
        [--seed 20261201] [--definition consensus-2024] [--threads 2] [--memory-limit 3GB]
        [--extract 1000000=/tmp/h4/s1m/extract]
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path

HERE = Path(__file__).resolve().parent
if str(HERE) not in sys.path:
    sys.path.insert(0, str(HERE))

from _measure import Measured, child_code, episodes_run, fit_power, load_line, parquet_rows, run_python  # noqa: E402

_GENERATE = """
import time
from pathlib import Path
from synthetic import generate_extract
started = time.perf_counter()
summary = generate_extract(persons={persons!r}, seed={seed!r}, out=Path({out!r}), force=True, progress=False)
report(seconds=time.perf_counter() - started, rows=summary.rows_per_table)
"""


def generate(persons: int, seed: int, out: Path, *, timeout_seconds: float | None = None) -> Measured:
    """Generate a synthetic extract under ``out`` (``out/extract``, ``out/truth``) in a child."""
    return run_python(child_code(_GENERATE.format(persons=persons, seed=seed, out=str(out))),
                      label=f"generator ({persons:,} persons)", timeout_seconds=timeout_seconds)


def ensure_extract(root: Path, persons: int, seed: int) -> tuple[Path, Measured | None]:
    """``root/p<persons>/extract``, generated when missing; returns it and the generator's run (or None)."""
    folder = Path(root) / f"p{persons}"
    extract = folder / "extract"
    if (extract / "measurement.parquet").exists() or (extract / "measurement").is_dir():
        return extract, None
    done = generate(persons, seed, folder)
    if not done.ok:
        msg = f"generating {persons:,} persons under {folder} failed: {done.error}"
        raise SystemExit(msg)
    return extract, done


def scaling(extracts: Mapping[int, Path], definitions: Sequence[str], *, threads: int, memory_limit: str | None,
            spill: Path | None = None, measured: Mapping[int, Measured] | None = None) -> list[dict[str, object]]:
    """Time the episodes step on each extract (reusing ``measured`` runs where given)."""
    rows = []
    for persons in sorted(extracts):
        extract = Path(extracts[persons])
        done = (measured or {}).get(persons) or episodes_run(extract, definitions, threads=threads,
                                                             memory_limit=memory_limit, spill=spill)
        rows.append({"persons": persons, "rows": parquet_rows(_measurement(extract)), "run": done})
    return rows


def _measurement(extract: Path) -> Path:
    file = extract / "measurement.parquet"
    return file if file.exists() else extract / "measurement"


def print_scaling(rows: Sequence[Mapping[str, object]], definitions: Sequence[str], settings: str) -> float | None:
    """Print the table and the fitted exponent; returns k (None when fewer than two sizes ran)."""
    print(f"scaling of the episodes step ({', '.join(definitions)}; {settings}); {load_line()}")
    print(f"{'persons':>10} {'measurement rows':>17} {'seconds':>9} {'peak GiB':>9} {'M rows/s':>9} {'episodes':>9}")
    good = []
    for row in rows:
        run: Measured = row["run"]  # type: ignore[assignment]
        if run.ok:
            good.append(row)
            print(f"{row['persons']:>10,} {row['rows']:>17,} {run.seconds:>9.2f} {run.peak_rss_gib:>9.2f} "
                  f"{row['rows'] / run.seconds / 1e6:>9.2f} {run.result.get('episodes', 0):>9,}")
        else:
            print(f"{row['persons']:>10,} {row['rows']:>17,}  failed: {run.error}")
    if len(good) < 2:
        print("fit: fewer than two sizes ran; no exponent")
        return None
    k, a = fit_power([row["rows"] for row in good], [row["run"].seconds for row in good])
    print(f"fit (least squares on log-log, {len(good)} sizes): seconds = {a:.3g} x rows^k, k = {k:.2f} "
          f"(issue 8: k close to 1)")
    return k


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--root", type=Path, default=Path("bench-output"), help="where p<persons>/extract live")
    parser.add_argument("--sizes", default="10000,100000,1000000", help="persons, comma-separated")
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--definition", action="append", dest="definitions",
                        help="definition(s) of the step (default consensus-2024)")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--memory-limit", default="3GB")
    parser.add_argument("--extract", action="append", default=[], metavar="PERSONS=DIR",
                        help="use this extract for that size instead of ROOT/p<persons>/extract")
    args = parser.parse_args(argv)
    definitions = args.definitions or ["consensus-2024"]
    given = {int(key): Path(value) for key, value in (item.split("=", 1) for item in args.extract)}
    extracts = {}
    for persons in (int(text) for text in args.sizes.split(",") if text.strip()):
        if persons in given:
            extracts[persons] = given[persons]
            continue
        extracts[persons], made = ensure_extract(args.root, persons, args.seed)
        if made is not None:
            print(f"generated {persons:,} persons in {made.seconds:.1f} s (peak {made.peak_rss_gib:.2f} GiB)")
    rows = scaling(extracts, definitions, threads=args.threads, memory_limit=args.memory_limit,
                   spill=args.root / "spill")
    print_scaling(rows, definitions, f"threads={args.threads}, memory_limit={args.memory_limit}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
