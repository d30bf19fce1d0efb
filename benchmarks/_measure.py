"""Shared measuring helper of the benchmarks: run a piece of Python in a fresh child process.

Each measurement runs in its own interpreter so its peak resident set size is its own: the parent
waits with :func:`os.wait4` and reads the child's ``ru_maxrss`` (KiB on Linux) and CPU time. The
child reports its own figures (at least ``seconds``, the time of the work itself, without the
interpreter's start) as one JSON line starting with :data:`MARK` on standard output; everything
else it prints is kept for the failure message. An optional address-space cap
(``RLIMIT_AS``) is set in the child before it starts, so a peer that runs out of memory fails
alone instead of taking the machine down; a time limit kills the child.

Example
-------
>>> from _measure import run_python, child_code       # benchmarks/ on sys.path
>>> done = run_python(child_code("import time", "started = time.perf_counter()",
...                              "report(seconds=time.perf_counter() - started)"), label="nothing")
>>> done.ok, done.result["seconds"] >= 0                                  # doctest: +SKIP
(True, True)
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]

#: Prefix of the child's one result line on standard output.
MARK = "@@bench-result "

#: Prepended to every child: ``report(**figures)`` prints the result line; a MemoryError or an
#: engine's out-of-memory error is turned into a result with ``error`` set and exit code 3.
PRELUDE = f"""
import json as _json, sys as _sys
_sys.path.insert(0, {str(ROOT)!r})
def report(**figures):
    print({MARK!r} + _json.dumps(figures, default=str), flush=True)
"""


def child_code(*lines: str) -> str:
    """Join ``lines`` into a child program with :data:`PRELUDE` and out-of-memory handling.

    Parameters
    ----------
    lines
        Python statements of the child, at top level; the last should call ``report(...)``.

    Returns
    -------
    str
        The program text for :func:`run_python`.

    Examples
    --------
    >>> "report(seconds=0)" in child_code("report(seconds=0)")
    True
    """
    body = "\n".join("    " + line for text in lines for line in text.splitlines())
    return (PRELUDE + "try:\n" + body + "\n"
            "except MemoryError as _error:\n"
            "    report(error='out of memory (MemoryError): ' + str(_error)[:300])\n"
            "    _sys.exit(3)\n"
            "except Exception as _error:\n"
            "    _text = f'{type(_error).__name__}: {_error}'\n"
            "    if 'memory' in _text.lower() or 'malloc' in _text.lower() or 'bad_alloc' in _text.lower():\n"
            "        report(error='out of memory: ' + _text[:300])\n"
            "        _sys.exit(3)\n"
            "    raise\n")


@dataclass
class Measured:
    """One child run: its own figures and what the parent measured around it.

    Attributes
    ----------
    label
        What was measured.
    ok
        The child exited 0 and printed a result.
    wall_seconds
        Wall time of the whole child, interpreter start included (parent's clock).
    peak_rss_gib
        Peak resident set size of the child (``ru_maxrss``), GiB.
    cpu_seconds
        User + system CPU time of the child.
    result
        The child's JSON result (empty when it printed none).
    error
        Why it failed, in one line (None when ok).
    returncode
        The child's exit code (negative: killed by that signal).
    """

    label: str
    ok: bool
    wall_seconds: float
    peak_rss_gib: float
    cpu_seconds: float
    result: dict[str, Any] = field(default_factory=dict)
    error: str | None = None
    returncode: int = 0

    @property
    def seconds(self) -> float:
        """The child's own time of the work when it gave one, else the wall time."""
        value = self.result.get("seconds")
        return float(value) if isinstance(value, int | float) else self.wall_seconds


def _limit(address_space_bytes: int | None):  # -> callable for preexec_fn
    def apply() -> None:
        if address_space_bytes is not None:
            resource.setrlimit(resource.RLIMIT_AS, (address_space_bytes, address_space_bytes))
    return apply


def run_python(code: str, *, label: str, cwd: Path | None = None, env: Mapping[str, str] | None = None,
               address_space_bytes: int | None = None, timeout_seconds: float | None = None,
               argv: Sequence[str] = ()) -> Measured:
    """Run ``code`` in a fresh ``sys.executable`` and measure it.

    Parameters
    ----------
    code
        The child program (see :func:`child_code`); it reports with one :data:`MARK` line.
    label
        What is measured, for messages.
    cwd
        Working folder of the child (DuckDB spills under it when no temp_directory is set).
    env
        Extra environment variables of the child.
    address_space_bytes
        ``RLIMIT_AS`` of the child (None: no cap).
    timeout_seconds
        Kill the child after this long (None: no limit).
    argv
        Arguments after ``-c code``.

    Returns
    -------
    Measured
        Never raises for a failing child: ``ok`` is False and ``error`` says why.
    """
    child_env = {**os.environ, **(env or {})}
    killed = threading.Event()
    started = time.perf_counter()
    with tempfile.TemporaryFile("w+") as stdout, tempfile.TemporaryFile("w+") as stderr:
        process = subprocess.Popen([sys.executable, "-c", code, *argv], stdout=stdout, stderr=stderr, text=True,
                                   cwd=cwd or ROOT, env=child_env, preexec_fn=_limit(address_space_bytes))
        timer = None
        if timeout_seconds is not None:
            def kill() -> None:
                killed.set()
                process.kill()
            timer = threading.Timer(timeout_seconds, kill)
            timer.start()
        try:
            _, status, usage = os.wait4(process.pid, 0)
        except KeyboardInterrupt:  # the parent is being stopped: stop the child too
            process.kill()
            os.wait4(process.pid, 0)
            raise
        finally:
            if timer is not None:
                timer.cancel()
        process.returncode = os.waitstatus_to_exitcode(status)
        wall = time.perf_counter() - started
        stdout.seek(0)
        stderr.seek(0)
        out, err = stdout.read(), stderr.read()
    lines = [line[len(MARK):] for line in out.splitlines() if line.startswith(MARK)]
    result = json.loads(lines[-1]) if lines else {}
    peak = usage.ru_maxrss * 1024 / 2**30
    cpu = usage.ru_utime + usage.ru_stime
    code_ = process.returncode
    error = None
    if killed.is_set():
        error = f"stopped after the time limit of {timeout_seconds:.0f} s"
    elif code_ != 0 or not lines or "error" in result:
        if "error" in result:
            error = str(result["error"])
        elif code_ == -9:
            error = "killed (signal 9; the kernel's out-of-memory killer or a limit)"
        elif code_ < 0:
            error = f"killed by signal {-code_}"
        else:
            tail = [line.strip() for line in err.strip().splitlines() if line.strip()]
            named = [line for line in tail if "Error" in line or "Exception" in line]
            error = f"exit {code_}: " + ((named or tail)[-1][:300] if tail else "no message")
            if address_space_bytes is not None and any(word in err for word in ("MemoryError", "bad_alloc",
                                                                                "Cannot allocate", "malloc")):
                error = f"out of memory under the {address_space_bytes / 2**30:.0f} GiB cap: " + error
    ok = error is None
    return Measured(label=label, ok=ok, wall_seconds=wall, peak_rss_gib=peak, cpu_seconds=cpu, result=result,
                    error=error, returncode=code_)


def parquet_rows(path: Path) -> int:
    """Rows of a Parquet file or a folder of Parquet parts, from the footers (no data read).

    Examples
    --------
    >>> parquet_rows(Path("demo-output/extract/measurement.parquet"))   # doctest: +SKIP
    575123
    """
    import pyarrow.parquet as pq

    files = sorted(path.glob("*.parquet")) if path.is_dir() else [path]
    return sum(pq.ParquetFile(file).metadata.num_rows for file in files)


def folder_bytes(path: Path) -> int:
    """Bytes of every file under ``path``."""
    return sum(file.stat().st_size for file in Path(path).rglob("*") if file.is_file())


def fit_power(sizes: Sequence[float], seconds: Sequence[float]) -> tuple[float, float]:
    """Least-squares fit of ``seconds = a * sizes ** k`` on log-log axes; returns ``(k, a)``.

    Examples
    --------
    >>> k, a = fit_power([1e4, 1e5, 1e6], [0.5, 5.0, 50.0])
    >>> round(k, 6), round(a, 9)
    (1.0, 5e-05)
    """
    import numpy as np

    if len(sizes) < 2:
        msg = f"fit_power needs at least 2 sizes, got {len(sizes)}"
        raise ValueError(msg)
    x = np.log(np.asarray(sizes, dtype=float))
    y = np.log(np.asarray(seconds, dtype=float))
    k, log_a = np.polyfit(x, y, 1)
    return float(k), float(np.exp(log_a))


def load_line() -> str:
    """The machine's load averages and core count, for the tables' headers."""
    one, five, fifteen = os.getloadavg()
    return f"load average {one:.2f} / {five:.2f} / {fifteen:.2f} (1/5/15 min) on {os.cpu_count()} cores"


_EPISODES = """
import time
from pathlib import Path
from cohort.episodes import find_episodes
from cohort.source import open_extract
started = time.perf_counter()
with open_extract({extract!r}, threads={threads!r}, memory_limit={memory!r}, temp_directory={spill!r}) as extract:
    result = find_episodes(extract, {definitions!r}, out=Path({out!r}) if {out!r} else None)
seconds = time.perf_counter() - started
if {save!r}:
    result.episodes.select("person_id", "onset_datetime", "resolution_datetime").write_parquet({save!r})
report(seconds=seconds, episodes=result.episodes.height,
       steps={{key: value for key, value in result.manifest.get("seconds", {{}}).items()}})
"""

_SCAN = """
import time
from cohort._cdm import used_columns
from cohort.source import open_extract
with open_extract({extract!r}, threads={threads!r}, memory_limit={memory!r}, temp_directory={spill!r}) as extract:
    extract.con.execute("set enable_progress_bar = false")
    columns = [column.name for column in used_columns("measurement")]
    aggregates = ", ".join(f"sum(hash({{name}}))" for name in columns)
    started = time.perf_counter()
    extract.con.execute(f"select {{aggregates}} from measurement").fetchall()
    seconds = time.perf_counter() - started
    rows = extract.row_count("measurement")
report(seconds=seconds, rows=rows, columns=columns)
"""


#: The floors of the recipe design, each a query over the checked rows (``sql/20`` as the lab
#: step leaves it) stored as a table, so that DuckDB cannot drop the work (it drops aggregates
#: nobody reads): one reading of every row with every check made, and that reading gathered by
#: time point with only the counts of rows and excluded rows (the grouping ``sql/21`` does,
#: without its 25 value aggregates). ``bench_labs.py --floors`` and ``run_all.py`` time them.
FLOOR_QUERIES: tuple[tuple[str, str], ...] = (
    ("one checked reading",
     "create or replace temp table bench_floor as select reason, count(*) as n "
     "from dka_measurement_checked group by reason"),
    ("reading + time points (two counts)",
     "create or replace temp table bench_floor as select person_id, event_datetime, "
     "count(*) as n, count(reason) as excluded from dka_measurement_checked "
     "where person_id is not null and event_datetime is not null "
     "group by person_id, event_datetime"),
)

def time_floors(con: Any) -> dict[str, float]:
    """Run the :data:`FLOOR_QUERIES` on a session the lab step has prepared; seconds of each.

    The scratch table they write is dropped after.
    """
    floors = {}
    for label, sql in FLOOR_QUERIES:
        started = time.perf_counter()
        con.execute(sql)
        floors[label] = time.perf_counter() - started
    con.execute("drop table if exists bench_floor")
    return floors


_FLOORS = """
import sys
sys.path.insert(0, {here!r})
import cohort._labs as labs
from _measure import time_floors
from cohort.source import open_extract
with open_extract({extract!r}, threads={threads!r}, memory_limit={memory!r}, temp_directory={spill!r}) as extract:
    extract.con.execute("set enable_progress_bar = false")
    labs.prepare_lab_events(extract)
    floors = time_floors(extract.con)
report(seconds=next(iter(floors.values())), floors=floors)
"""


def floors_run(extract: Path, *, threads: int | None, memory_limit: str | None, spill: Path | None = None,
               timeout_seconds: float | None = None) -> Measured:
    """Time the :data:`FLOOR_QUERIES` in a fresh child, after the lab step they read.

    ``result["floors"]`` maps each floor to its seconds (the lab step before them is not
    counted); ``seconds`` is the first. The peak RSS is the child's, lab step included.
    """
    code = child_code(_FLOORS.format(extract=str(extract), threads=threads, memory=memory_limit,
                                     spill=str(spill) if spill else None, here=str(Path(__file__).resolve().parent)))
    return run_python(code, label="floors", timeout_seconds=timeout_seconds)


def episodes_run(extract: Path, definitions: Sequence[str], *, threads: int | None, memory_limit: str | None,
                 spill: Path | None = None, out: Path | None = None, save: Path | None = None,
                 label: str | None = None, timeout_seconds: float | None = None) -> Measured:
    """Time :func:`cohort.episodes.find_episodes` on ``extract`` in a fresh child.

    The extract is opened with :func:`cohort.source.open_extract` (``threads``, ``memory_limit``,
    ``temp_directory=spill``) and the step runs in that session; ``seconds`` covers the opening
    and the step (not the interpreter start). ``out`` writes the output folder (counted);
    ``save`` writes person_id, onset_datetime, resolution_datetime after the clock stops.
    """
    code = child_code(_EPISODES.format(extract=str(extract), threads=threads, memory=memory_limit,
                                       spill=str(spill) if spill else None, definitions=list(definitions),
                                       out=str(out) if out else None, save=str(save) if save else None))
    return run_python(code, label=label or ("episodes " + ", ".join(definitions)), timeout_seconds=timeout_seconds)


def scan_run(extract: Path, *, threads: int | None, memory_limit: str | None, spill: Path | None = None,
             timeout_seconds: float | None = None) -> Measured:
    """The floor: one aggregate over every measurement column the pipeline reads (``used_columns``).

    Each column goes through ``sum(hash(column))`` so every value is decoded and nothing is kept.
    """
    code = child_code(_SCAN.format(extract=str(extract), threads=threads, memory=memory_limit,
                                   spill=str(spill) if spill else None))
    return run_python(code, label="bare scan", timeout_seconds=timeout_seconds)
