"""Faults: runs killed mid-way, two runs at one output, stale locks (issue 9).

What must hold (issue 9, "Faults"; the write-then-rename pattern is common practice for atomic
output on POSIX file systems, where ``rename(2)`` within one file system is atomic):

- a run killed with SIGKILL at any moment leaves no partial result that looks complete: the
  output folder is absent or an earlier complete result, untouched; a manifest is present only
  in complete folders;
- the kill leaves a stale lock that does not block the next run, and the rerun gives the same
  content (table hashes) as an uninterrupted run;
- two runs at one output: the second refuses with a message naming the lock, or both finish
  with a correct result; files are never interleaved.

The extracts are synthetic (the fictional Harrowmere Valley Health network): invented data for
exercising the machinery, never reference values. The kill moments and what each showed are
printed (run with ``-s`` to see them).
"""

from __future__ import annotations

import inspect
import json
import os
import random
import signal
import socket
import subprocess
import sys
import time
import warnings
from pathlib import Path

import pytest

from cohort._errors import InputError
from cohort._manifest import table_hashes
from cohort._outputs import LockError, OutputLock, StaleLockWarning, lock_path, output_file, output_folder

import cohort

PYTHON = sys.executable
# the subprocesses import the same cohort package as this test process, from a neutral folder
PACKAGE_ROOT = Path(cohort.__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(PACKAGE_ROOT), os.environ.get("PYTHONPATH")]))}
CWD = Path(__file__).resolve().parent / "data"


def _episodes_use_helper() -> bool:
    import cohort.episodes

    return "output_folder" in inspect.getsource(cohort.episodes)


def _demo_uses_helper() -> bool:
    import cohort.cli

    return "output_folder" in inspect.getsource(cohort.cli._cmd_demo)


EPISODES_WIRED = pytest.mark.xfail(
    not _episodes_use_helper(), strict=True,
    reason="cohort/episodes.py does not write through cohort._outputs yet (change given to the lead by R2)",
)
DEMO_WIRED = pytest.mark.xfail(
    not _demo_uses_helper(), strict=False,
    reason="cohort/cli.py demo does not stage its top folder through cohort._outputs yet (change given to the lead by R2)",
)


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> Path:
    from synthetic import generate_extract

    root = tmp_path_factory.mktemp("faults")
    summary = generate_extract(persons=300, seed=11, out=root / "s300", progress=False)
    return Path(summary.extract_dir)


@pytest.fixture(scope="module")
def reference(extract, tmp_path_factory) -> dict[str, Path]:
    """Uninterrupted runs: episodes and features folders to compare reruns with."""
    root = tmp_path_factory.mktemp("reference")
    episodes, features = root / "episodes", root / "features"
    assert _run(_episodes_args(extract, episodes)).returncode == 0
    assert _run(_features_args(extract, episodes, features)).returncode == 0
    return {"episodes": episodes, "features": features}


def _cli(*args: str) -> list[str]:
    return [PYTHON, "-m", "cohort.cli", *args]


def _run(args: list[str], **kwargs) -> subprocess.CompletedProcess:
    return subprocess.run(args, cwd=CWD, env=ENV, capture_output=True, text=True, timeout=300, **kwargs)


def _episodes_args(extract: Path, out: Path) -> list[str]:
    return _cli("episodes", "--source", str(extract), "--definition", "consensus-2024", "--out", str(out),
                "--quiet", "--threads", "1")


def _features_args(extract: Path, episodes: Path, out: Path) -> list[str]:
    return _cli("features", "--episodes", str(episodes), "--source", str(extract), "--out", str(out), "--threads", "1")


def _partials(out: Path) -> list[Path]:
    return sorted(p for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


def _kill(args: list[str], out: Path, *, when: str, delay: float = 0.0, timeout: float = 120.0) -> str:
    """Start ``args``, SIGKILL it at a moment, reap it; return what was seen at the kill.

    ``when="staging"``: poll (1 ms) until a staging folder of ``out`` appears, then kill.
    ``when="delay"``: kill after ``delay`` seconds.
    """
    process = subprocess.Popen(args, cwd=CWD, env=ENV, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    started = time.perf_counter()
    seen = "finished before the kill"
    try:
        while process.poll() is None and time.perf_counter() - started < timeout:
            if when == "staging" and any(".staging-" in p.name or ".partial-" in p.name for p in _partials(out)):
                seen = "killed with the staging folder present"
                break
            if when == "delay" and time.perf_counter() - started >= delay:
                seen = f"killed after {delay:.2f} s"
                break
            time.sleep(0.001)
        if process.poll() is None:
            process.send_signal(signal.SIGKILL)
        elif seen.startswith("killed"):
            seen = "finished before the kill"
    finally:
        process.wait(timeout=30)
    return seen


def _assert_nothing_half_done(out: Path, previous: dict | None) -> None:
    """No output that looks complete unless it is complete; an earlier result untouched."""
    for partial in _partials(out):
        if partial.is_dir():
            # a killed run's staging folder may remain (hidden, removed by the next run); it is never
            # the output, and a run that was killed never finished writing its manifest last
            assert partial.name.startswith(f".{out.name}.")
    if out.exists():
        manifest = out / "manifest.json" if (out / "manifest.json").exists() else out / "features_manifest.json"
        assert manifest.is_file(), f"{out} exists without its manifest: a partial result in place"
        recorded = json.loads(manifest.read_text())
        if "tables" in recorded:
            assert table_hashes(out) == recorded["tables"], "the folder's tables differ from its manifest"
        if previous is not None:
            assert table_hashes(out) == previous


def _hashes(out: Path) -> dict:
    return table_hashes(out)


# --------------------------------------------------------------------------- the helper itself
def test_staging_removed_and_earlier_result_kept_on_error_9(tmp_path):
    out = tmp_path / "episodes"
    with output_folder(out, command="test") as staging:
        (staging / "a.csv").write_text("x\n1\n")
        (staging / "manifest.json").write_text("{}")
    with pytest.raises(RuntimeError), output_folder(out, command="test") as staging:
        (staging / "a.csv").write_text("x\n2\n")
        raise RuntimeError("boom in the middle")
    assert (out / "a.csv").read_text() == "x\n1\n"  # earlier complete result untouched
    assert _partials(out) == []  # staging removed
    assert not lock_path(out).exists()  # lock released


def test_refuses_a_folder_of_other_files_9(tmp_path):
    out = tmp_path / "mine"
    out.mkdir()
    (out / "thesis.docx").write_text("not a result")
    with pytest.raises(InputError, match=r"holds 1 other file\(s\) \(thesis.docx\) and no manifest.json"):
        with output_folder(out, command="test"):
            pass
    assert (out / "thesis.docx").exists()


def test_live_lock_refused_with_pid_start_and_advice_9(tmp_path):
    out = tmp_path / "episodes"
    with OutputLock(out, command="episodes"):
        with pytest.raises(LockError) as caught:
            with output_folder(out, command="episodes"):
                pass
    message = str(caught.value)
    assert str(lock_path(out)) in message
    assert f"pid {os.getpid()}" in message and "started 20" in message
    assert "Wait for it to finish" in message and "delete" in message


def test_stale_lock_of_dead_process_taken_over_with_a_note_9(tmp_path):
    out = tmp_path / "episodes"
    dead = subprocess.Popen([PYTHON, "-c", "pass"])
    dead.wait()  # reaped: the pid names no process
    lock_path(out).write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "started": "earlier",
                                          "process_start": 1.0, "token": "x"}))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with output_folder(out, command="test") as staging:
            (staging / "manifest.json").write_text("{}")
    assert any(issubclass(w.category, StaleLockWarning) and "no longer running" in str(w.message) for w in caught)
    assert (out / "manifest.json").is_file() and not lock_path(out).exists()


def test_lock_of_a_reused_pid_is_stale_9(tmp_path):
    # the pid is alive (this process) but the recorded start time is another process's
    out = tmp_path / "episodes"
    lock_path(out).write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "started": "earlier",
                                          "process_start": 12345.0, "token": "x"}))
    with pytest.warns(StaleLockWarning, match="pid now belongs to another process"):
        with output_folder(out, command="test") as staging:
            (staging / "manifest.json").write_text("{}")


def test_lock_from_another_host_is_respected_9(tmp_path):
    out = tmp_path / "episodes"
    lock_path(out).write_text(json.dumps({"pid": 1, "host": "another-machine.invalid", "started": "2026-12-01T00:00:00+00:00"}))
    with pytest.raises(LockError, match="another-machine.invalid"):
        with output_folder(out, command="test"):
            pass


def test_output_file_replaces_page_and_tables_whole_9(tmp_path):
    out = tmp_path / "report.html"
    for text in ("one", "two"):
        with output_file(out, command="report", beside=("report-tables",)) as staging:
            (staging / "report-tables").mkdir()
            (staging / "report-tables" / f"{text}.csv").write_text("a\n1\n")
            (staging / "report.html").write_text(text)
    assert out.read_text() == "two"
    assert [p.name for p in (tmp_path / "report-tables").iterdir()] == ["two.csv"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report-tables", "report.html"]


def test_killed_between_the_two_renames_restores_the_earlier_result_9(tmp_path):
    # the one moment a kill leaves no output: the earlier result renamed aside, the new one not
    # yet in place; the next run puts the earlier one back before it starts
    out = tmp_path / "episodes"
    with output_folder(out, command="test") as staging:
        (staging / "manifest.json").write_text('{"run": 1}')
    out.rename(tmp_path / ".episodes.previous-99999-dead")
    (tmp_path / ".episodes.staging-99999-dead").mkdir()
    with pytest.raises(RuntimeError), output_folder(out, command="test"):
        assert (out / "manifest.json").read_text() == '{"run": 1}'
        raise RuntimeError("stop")
    assert (out / "manifest.json").read_text() == '{"run": 1}'
    assert _partials(out) == []


# --------------------------------------------------------------------------- killing real runs
KILL_MOMENTS = [pytest.param("staging", id="staging"), pytest.param("delay", id="delay", marks=pytest.mark.slow)]


@pytest.mark.parametrize("when", KILL_MOMENTS)
def test_features_killed_then_rerun_9(extract, reference, tmp_path, when):
    episodes = reference["episodes"]
    expected = _hashes(reference["features"])
    out = tmp_path / "features"
    moments = []
    previous = None
    rng = random.Random(9)
    for _attempt in range(2 if when == "staging" else 4):
        moments.append(_kill(_features_args(extract, episodes, out), out, when=when, delay=rng.uniform(0.3, 2.5)))
        _assert_nothing_half_done(out, previous)
        if out.exists():
            previous = _hashes(out)
    print(f"features kills ({when}): {moments}")
    # the kill leaves a stale lock (or none, if the run finished); the rerun takes it over
    rerun = _run(_features_args(extract, episodes, out))
    assert rerun.returncode == 0, rerun.stderr
    assert _hashes(out) == expected
    assert not lock_path(out).exists()
    assert _partials(out) == []  # the killed runs' staging folders were removed


@pytest.mark.parametrize("when", KILL_MOMENTS)
def test_episodes_killed_then_rerun_9(extract, reference, tmp_path, when):
    expected = _hashes(reference["episodes"])
    out = tmp_path / "episodes"
    moments = []
    rng = random.Random(17)
    for _attempt in range(2 if when == "staging" else 4):
        moments.append(_kill(_episodes_args(extract, out), out, when=when, delay=rng.uniform(0.5, 3.0)))
        _assert_nothing_half_done(out, None)
    print(f"episodes kills ({when}): {moments}")
    rerun = _run(_episodes_args(extract, out))
    assert rerun.returncode == 0, rerun.stderr
    assert _hashes(out) == expected


@EPISODES_WIRED
def test_episodes_rerun_cleans_killed_staging_9(extract, tmp_path):
    out = tmp_path / "episodes"
    seen = _kill(_episodes_args(extract, out), out, when="staging")
    print(f"episodes kill: {seen}")
    assert _run(_episodes_args(extract, out)).returncode == 0
    assert _partials(out) == [] and not lock_path(out).exists()


@EPISODES_WIRED
def test_two_episode_runs_at_one_output_9(extract, reference, tmp_path):
    out = tmp_path / "episodes"
    # one run holds the lock (as a live run does while writing): the other refuses, clearly
    holder = subprocess.Popen([PYTHON, "-c", (
        "import sys, time; from cohort._outputs import OutputLock; "
        f"lock = OutputLock({str(out)!r}, command='episodes').acquire(); print('locked', flush=True); time.sleep(60)"
    )], cwd=CWD, env=ENV, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        refused = _run(_episodes_args(extract, out))
        assert refused.returncode == 2
        assert f"pid {holder.pid}" in refused.stderr and str(lock_path(out)) in refused.stderr
        assert "\n" == refused.stderr[-1] and refused.stderr.count("\n") == 1  # one line, no traceback
    finally:
        holder.kill()
        holder.wait()
    # two real runs at once: each refuses or finishes; the folder is one run's complete result
    runs = [subprocess.Popen(_episodes_args(extract, out), cwd=CWD, env=ENV, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    outcomes = [(run.wait(timeout=300), run.stderr.read()) for run in runs]
    for code, stderr in outcomes:
        assert code == 0 or (code == 2 and "its lock is" in stderr), stderr
    assert any(code == 0 for code, _ in outcomes)
    assert _hashes(out) == _hashes(reference["episodes"])


def test_two_feature_runs_at_one_output_9(extract, reference, tmp_path):
    episodes = reference["episodes"]
    out = tmp_path / "features"
    runs = [subprocess.Popen(_features_args(extract, episodes, out), cwd=CWD, env=ENV, stdout=subprocess.DEVNULL,
                             stderr=subprocess.PIPE, text=True) for _ in range(3)]
    outcomes = [(run.wait(timeout=300), run.stderr.read()) for run in runs]
    print("three feature runs at once:", [code for code, _ in outcomes])
    for code, stderr in outcomes:
        assert code == 0 or (code == 2 and "its lock is" in stderr and "Traceback" not in stderr), stderr
    expected = _hashes(reference["features"])
    assert _hashes(out) == expected  # never interleaved: exactly one run's tables
    assert json.loads((out / "features_manifest.json").read_text())["tables"] == expected


@pytest.mark.slow
@DEMO_WIRED
def test_demo_killed_then_rerun_9(tmp_path):
    out = tmp_path / "demo"
    args = _cli("demo", "--persons", "5000", "--seed", "5", "--out", str(out), "--quiet")
    seen = _kill(args, out, when="delay", delay=6.0)
    print(f"demo kill: {seen}")
    if out.exists():
        assert (out / "report.html").is_file(), "a demo folder in place without its report: partial"
    rerun = _run(args)
    assert rerun.returncode == 0, rerun.stderr
    assert (out / "report.html").is_file() and (out / "episodes" / "manifest.json").is_file()
    assert _partials(out) == [] and not lock_path(out).exists()
