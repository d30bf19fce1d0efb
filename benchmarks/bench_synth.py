"""Scale benchmark of the synthetic-extract generator.

Runs :func:`synthetic.generate_extract` in a child process and prints the rows written per
table, wall-clock seconds, measurement rows per second and the child's peak resident memory
(``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss``).

Usage::

    .venv/bin/python benchmarks/bench_synth.py --persons 1000000 [--seed 1] [--out DIR] [--keep]
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

_CHILD = """
import json, sys
from pathlib import Path
from synthetic import generate_extract
s = generate_extract(persons=int(sys.argv[1]), seed=int(sys.argv[2]), out=Path(sys.argv[3]),
                     force=True, chunk_persons=int(sys.argv[4]), progress=False)
print(json.dumps({"rows": s.rows_per_table, "seconds": s.seconds}))
"""


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--persons", type=int, required=True)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--chunk-persons", type=int, default=50_000)
    ap.add_argument("--out", type=Path, default=None, help="output folder (default: a temporary folder)")
    ap.add_argument("--keep", action="store_true", help="keep the output folder")
    args = ap.parse_args(argv)
    out = args.out or Path(tempfile.mkdtemp(prefix="bench-synth-"))
    started = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-c", _CHILD, str(args.persons), str(args.seed), str(out), str(args.chunk_persons)],
        capture_output=True, text=True, check=False,
    )
    wall = time.perf_counter() - started
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr)
        return proc.returncode
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    peak_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss  # KiB on Linux
    size = sum(f.stat().st_size for f in (out / "extract").glob("*.parquet"))
    print(f"persons: {args.persons:,} (seed {args.seed}, chunk_persons {args.chunk_persons:,})")
    for table, n in result["rows"].items():
        print(f"  {table:<22} {n:>14,} rows")
    total = sum(result["rows"].values())
    meas = result["rows"]["measurement"]
    print(f"generator seconds: {result['seconds']:.1f} (wall incl. interpreter start {wall:.1f})")
    print(f"measurement rows/s: {meas / result['seconds']:,.0f}; all rows/s: {total / result['seconds']:,.0f}")
    print(f"peak RSS of the child: {peak_kib / 1024 / 1024:.2f} GiB")
    print(f"extract size on disk: {size / 1024**3:.2f} GiB")
    if not args.keep and args.out is None:
        shutil.rmtree(out, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
