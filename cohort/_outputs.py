"""One way to write an output: a lock, a staging folder, a move into place when complete.

Every command that writes results (episodes, features, analyse, report, the demo) goes through
:func:`output_folder` (a results folder) or :func:`output_file` (one file, with sibling files or
folders written beside it, as the report's ``<stem>-tables/``):

1. **Lock.** ``<out>.lock`` is created beside the output with ``O_EXCL`` semantics (written to a
   temporary name, then hard-linked into place, so a lock file is never half-written). It holds
   the pid, the host, the process start time and the command. A second run finding it refuses
   with a message naming the lock file, the other run's pid and start time, and what to do. A
   lock whose process is gone (same host; pid dead, or alive but started at another time, so a
   reused pid is not mistaken for the owner) is stale: it is taken over, with a
   :class:`StaleLockWarning` saying so.
2. **Staging.** The results are written into ``.<name>.staging-<pid>-<random>`` in the same
   parent folder (same file system, so the final rename is atomic).
3. **Commit.** Only when the ``with`` block ends without an exception: an earlier result is
   renamed aside (``.<name>.previous-...``), the staging folder renamed into place, the earlier
   result removed. On any exception (``KeyboardInterrupt`` included) the staging folder is
   removed and an earlier result is left untouched.
4. **Recovery.** A run killed with ``SIGKILL`` cannot clean up. The next run, once it holds the
   lock, removes the dead runs' staging folders and, if the kill fell between the two renames of
   a commit (no output, one earlier result aside), puts the earlier result back.

Whoever reads an output folder sees either nothing, an earlier complete result, or the new
complete result; a folder's completeness marker (``manifest.json`` for episodes and analyse,
``features_manifest.json`` for features) is written last, inside the staging folder.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import secrets
import shutil
import socket
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cohort._errors import InputError

__all__ = [
    "LockError",
    "StaleLockWarning",
    "OutputLock",
    "output_folder",
    "output_file",
    "check_output_folder",
    "lock_path",
]


class LockError(InputError):
    """Another live run holds the lock of the output asked for."""


class StaleLockWarning(UserWarning):
    """A lock left by a run that is gone was taken over."""


def lock_path(out: Path | str) -> Path:
    """Return the lock file of an output: ``<out>.lock`` beside it.

    Examples
    --------
    >>> lock_path("/tmp/results/episodes").name
    'episodes.lock'
    """
    out = Path(out)
    return out.parent / f"{out.name}.lock"


def _process_start(pid: int) -> float | None:
    """Start time (epoch seconds, 2 decimals) of a live process, or None if there is none."""
    import psutil

    try:
        process = psutil.Process(pid)
        if process.status() == psutil.STATUS_ZOMBIE:
            return None
        return round(process.create_time(), 2)
    except psutil.NoSuchProcess:
        return None
    except psutil.Error:  # access denied: it exists, its start time is unknown
        return -1.0


@dataclass
class OutputLock:
    """An exclusive lock on one output path (``<out>.lock``); use as a context manager.

    Parameters
    ----------
    out
        The output folder or file the lock guards.
    command
        What is running, recorded in the lock (``"episodes"``).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "episodes"
    >>> with OutputLock(out, command="episodes") as lock:
    ...     lock.path.exists()
    True
    >>> lock.path.exists()
    False
    """

    out: Path
    command: str = "dka-cohort"
    notes: tuple[str, ...] = ()
    _token: str = ""

    def __post_init__(self) -> None:
        self.out = Path(self.out).expanduser().absolute()

    @property
    def path(self) -> Path:
        """The lock file."""
        return lock_path(self.out)

    def _content(self) -> dict[str, Any]:
        pid = os.getpid()
        return {
            "pid": pid,
            "host": socket.gethostname(),
            "process_start": _process_start(pid),
            "started": dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat(),
            "command": self.command,
            "output": str(self.out),
            "token": self._token,
        }

    def acquire(self) -> OutputLock:
        """Take the lock, taking over a stale one; raise :class:`LockError` if a live run holds it."""
        self._token = secrets.token_hex(8)
        parent = self.path.parent
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            msg = f"output {self.out}: cannot create its parent folder ({exc.strerror or exc}); give a writable path"
            raise InputError(msg) from None
        if not os.access(parent, os.W_OK):
            msg = f"output {self.out}: the folder {parent} is not writable; give a writable path"
            raise InputError(msg)
        content = json.dumps(self._content(), sort_keys=True) + "\n"
        for _attempt in range(5):
            temporary = parent / f".{self.path.name}.{os.getpid()}.{secrets.token_hex(4)}"
            temporary.write_text(content, encoding="utf-8")
            try:
                os.link(temporary, self.path)  # atomic; fails if the lock exists
                return self
            except FileExistsError:
                holder = _read_lock(self.path)
                stale = _stale_reason(holder)
                if stale is None:
                    raise LockError(_held_message(self.path, holder)) from None
                note = f"took over the stale lock {self.path} ({stale})"
                self.notes = (*self.notes, note)
                warnings.warn(note, StaleLockWarning, stacklevel=3)
                with contextlib.suppress(FileNotFoundError):
                    # remove only the lock we judged stale (another run may have taken it over meanwhile)
                    if _read_lock(self.path) == holder:
                        self.path.unlink()
            except OSError as exc:  # a file system without hard links
                if exc.errno not in (1, 38, 95):  # EPERM, ENOSYS, EOPNOTSUPP
                    raise
                try:
                    descriptor = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
                except FileExistsError:
                    continue
                with os.fdopen(descriptor, "w", encoding="utf-8") as handle:
                    handle.write(content)
                return self
            finally:
                with contextlib.suppress(FileNotFoundError):
                    temporary.unlink()
        msg = f"output {self.out}: could not take the lock {self.path} after 5 attempts; remove it if no run is writing"
        raise LockError(msg)

    def release(self) -> None:
        """Remove the lock file if it is still this run's."""
        holder = _read_lock(self.path)
        if holder is not None and holder.get("token") == self._token:
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()

    def __enter__(self) -> OutputLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def _read_lock(path: Path) -> dict[str, Any] | None:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _stale_reason(holder: dict[str, Any] | None) -> str | None:
    """Why a lock is stale, or None when its owner may still be running."""
    if holder is None:
        return "it was removed meanwhile"
    if not holder:
        return "it could not be read"
    if holder.get("host") != socket.gethostname():
        return None  # another machine: its processes cannot be checked from here
    pid = holder.get("pid")
    if not isinstance(pid, int):
        return "it names no process"
    start = _process_start(pid)
    if start is None:
        return f"process {pid} that took it at {holder.get('started')} is no longer running"
    recorded = holder.get("process_start")
    if isinstance(recorded, (int, float)) and recorded > 0 and start > 0 and abs(start - recorded) > 1.0:
        return f"process {pid} that took it at {holder.get('started')} has ended (the pid now belongs to another process)"
    return None


def _held_message(path: Path, holder: dict[str, Any] | None) -> str:
    holder = holder or {}
    who = f"pid {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}"
    command = holder.get("command")
    return (
        f"another run ({command}, {who}) is writing {holder.get('output', path.with_suffix(''))}: "
        f"its lock is {path}. Wait for it to finish, give another --out, or, if that run is gone "
        f"(for example on another machine), delete {path} and run again"
    )


# --------------------------------------------------------------------------- staging
def _siblings(out: Path, kind: str) -> list[Path]:
    return sorted(out.parent.glob(f".{out.name}.{kind}-*"))


def _recover(out: Path) -> list[str]:
    """With the lock held: remove dead runs' staging folders; restore an earlier result left aside."""
    notes: list[str] = []
    for leftover in _siblings(out, "staging"):
        shutil.rmtree(leftover, ignore_errors=True)
        notes.append(f"removed {leftover.name}, left by an interrupted run")
    previous = _siblings(out, "previous")
    if previous and not out.exists():
        newest = max(previous, key=lambda path: path.stat().st_mtime)
        newest.rename(out)
        notes.append(f"restored the earlier result of {out.name} (a run was killed while replacing it)")
        previous.remove(newest)
    for leftover in previous:
        _remove(leftover)
    return notes


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()


def _check_folder(out: Path, markers: Sequence[str]) -> None:
    if not out.exists():
        return
    if not out.is_dir():
        msg = f"--out {out} is a file; give a folder (new, empty, or an earlier run's)"
        raise InputError(msg)
    entries = [entry.name for entry in out.iterdir()]
    if entries and not any((out / marker).is_file() for marker in markers):
        shown = ", ".join(sorted(entries)[:5]) + (", ..." if len(entries) > 5 else "")
        msg = (
            f"--out {out} holds {len(entries)} other file(s) ({shown}) and no {' or '.join(markers)} of an "
            "earlier run; give an empty or new folder (an earlier run's folder is replaced)"
        )
        raise InputError(msg)


def check_output_folder(out: Path | str, *, markers: Sequence[str] = ("manifest.json",)) -> Path:
    """Check, before any heavy work, that ``out`` can take a results folder; return it absolute.

    ``out`` must be new, empty, or an earlier run's folder (holding one of ``markers``), and its
    parent creatable and writable. :func:`output_folder` checks again when it takes the lock.

    Raises
    ------
    InputError
        Naming the folder, what was found in it, and what to give instead.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> check_output_folder(pathlib.Path(tempfile.mkdtemp()) / "new").name
    'new'
    """
    target = Path(out).expanduser().absolute()
    _check_folder(target, markers)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        msg = f"--out {target}: cannot create its parent folder ({exc.strerror or exc}); give a writable path"
        raise InputError(msg) from None
    if not os.access(target.parent, os.W_OK):
        msg = f"--out {target}: the folder {target.parent} is not writable; give a writable path"
        raise InputError(msg)
    return target


def _new_staging(out: Path) -> Path:
    staging = out.parent / f".{out.name}.staging-{os.getpid()}-{secrets.token_hex(4)}"
    staging.mkdir()
    return staging


def _replace(staging: Path, out: Path) -> None:
    """Rename ``staging`` to ``out``; an earlier ``out`` is renamed aside first, then removed."""
    previous = None
    if out.exists() or out.is_symlink():
        previous = out.parent / f".{out.name}.previous-{os.getpid()}-{secrets.token_hex(4)}"
        out.rename(previous)
    staging.rename(out)
    if previous is not None:
        _remove(previous)


@contextlib.contextmanager
def output_folder(
    out: Path | str,
    *,
    command: str,
    markers: Sequence[str] = ("manifest.json",),
) -> Iterator[Path]:
    """Lock ``out``, yield a staging folder to write into, and move it into place when complete.

    Parameters
    ----------
    out
        The results folder. It must be new, empty, or an earlier run's (holding one of
        ``markers``); an earlier run's folder is replaced only when the new one is complete.
    command
        What is running (recorded in the lock).
    markers
        File names that mark a complete earlier result.

    Yields
    ------
    pathlib.Path
        The staging folder (beside ``out``, same file system).

    Raises
    ------
    LockError
        Another live run holds ``<out>.lock``.
    InputError
        ``out`` is a file, or a folder holding files of something else, or not writable.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "episodes"
    >>> with output_folder(out, command="episodes") as staging:
    ...     _ = (staging / "manifest.json").write_text("{}")
    ...     out.exists()
    False
    >>> sorted(path.name for path in out.iterdir())
    ['manifest.json']
    """
    target = Path(out).expanduser().absolute()
    with OutputLock(target, command=command) as lock:
        for note in _recover(target):
            lock.notes = (*lock.notes, note)
        _check_folder(target, markers)
        staging = _new_staging(target)
        try:
            yield staging
            _replace(staging, target)
        except BaseException:
            shutil.rmtree(staging, ignore_errors=True)
            raise


@contextlib.contextmanager
def output_file(out: Path | str, *, command: str, beside: Sequence[str] = ()) -> Iterator[Path]:
    """Lock the file ``out``, yield a staging folder, then move ``out`` (and its companions) into place.

    Write the file as ``staging / out.name`` and each companion (a file or folder named in
    ``beside``, for example the report's ``report-tables``) as ``staging / name``. On success the
    companions are moved into place first and the file last, each replacing an earlier one
    whole, so a present file implies complete companions.

    Parameters
    ----------
    out
        The file to write.
    command
        What is running (recorded in the lock).
    beside
        Names of companions written beside ``out``.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "report.html"
    >>> with output_file(out, command="report", beside=("report-tables",)) as staging:
    ...     (staging / "report-tables").mkdir()
    ...     _ = (staging / "report.html").write_text("<html></html>")
    >>> out.read_text()
    '<html></html>'
    """
    target = Path(out).expanduser().absolute()
    if target.is_dir():
        msg = f"--out {target} is a folder; give the path of the file to write"
        raise InputError(msg)
    with OutputLock(target, command=command) as lock:
        for name in (*beside, target.name):
            for note in _recover(target.parent / name):
                lock.notes = (*lock.notes, note)
        staging = _new_staging(target)
        try:
            yield staging
            for name in (*beside, target.name):
                written = staging / name
                if not written.exists():
                    msg = f"output {target}: nothing was written as {name} (a bug: report it)"
                    raise InputError(msg)
            for name in (*beside, target.name):
                _replace(staging / name, target.parent / name)
            staging.rmdir()
        except BaseException:
            shutil.rmtree(staging, ignore_errors=True)
            raise
