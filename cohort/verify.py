"""Rerun a results folder from its manifest and say, table by table, whether the rerun agrees.

:func:`verify_results` reads what a results folder recorded (``manifest.json`` of the episodes
and statistics stages, ``features_manifest.json`` of the features stage): the definitions' full
content after overrides, the code lists (with their hashes), the feature options, the engine
settings and the content hash of every input and output table. It reruns each stage into a
temporary folder with the extract given, then compares every table by content hash
(:func:`cohort._manifest.table_hash`: the rows in a canonical order, not the file's bytes) and
reports each as ``same``, ``different`` (with both row counts and the first differing row) or
``missing`` (written by one run only).

A results folder is one stage's folder (``episodes/``, ``features/``, ``stats/``) or a folder
holding them (the demo's). Each stage is rerun from the recorded inputs of that stage (features
from the recorded episodes, statistics from the recorded features), so a difference is pinned to
the stage that made it.
"""

from __future__ import annotations

import datetime as dt
import json
import shutil
import tempfile
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from cohort._errors import CohortError, InputError
from cohort._manifest import canonical_table, file_hashes, read_table, table_hash, table_hashes

__all__ = ["STAGES", "TableCheck", "VerifyReport", "verify_results"]

#: Stage folders of a results tree, in run order, with the file marking each.
STAGES: tuple[tuple[str, str], ...] = (
    ("episodes", "manifest.json"),
    ("features", "features_manifest.json"),
    ("stats", "manifest.json"),
)


@dataclass(frozen=True)
class TableCheck:
    """One table compared between the results folder and the rerun.

    Attributes
    ----------
    stage
        ``episodes``, ``features`` or ``stats``.
    table
        The file's path inside the stage folder (``episodes.parquet``, ``curves/...csv``).
    status
        ``same``, ``different`` or ``missing``.
    rows_recorded, rows_rerun
        Row counts in the results folder and in the rerun (None where the table is absent).
    first_difference
        For ``different``: ``{"row": i, "recorded": {...}, "rerun": {...}}`` (rows in canonical
        order), or ``{"columns": ...}`` when the columns differ; None otherwise.
    note
        Why a table is missing, or that the recorded file no longer matches its manifest.
    """

    stage: str
    table: str
    status: str
    rows_recorded: int | None
    rows_rerun: int | None
    first_difference: dict[str, Any] | None = None
    note: str = ""


@dataclass(frozen=True)
class VerifyReport:
    """What :func:`verify_results` found.

    Attributes
    ----------
    results, source
        The folder verified and the extract rerun on.
    checks
        One :class:`TableCheck` per table of every stage.
    notes
        Things worth knowing (a source that differs from the recorded one, a code list changed).
    seconds
        Wall time of the reruns and comparisons.
    rerun_dir
        Where the rerun was kept (``keep=``), else None.
    """

    results: Path
    source: Path
    checks: tuple[TableCheck, ...]
    notes: tuple[str, ...] = ()
    seconds: float = 0.0
    rerun_dir: Path | None = None
    stages: tuple[str, ...] = field(default=())

    @property
    def identical(self) -> bool:
        """True when every table of every stage is the same."""
        return bool(self.checks) and all(check.status == "same" for check in self.checks)

    @property
    def exit_code(self) -> int:
        """0 when identical, 1 otherwise (the ``dka-cohort verify`` exit code)."""
        return 0 if self.identical else 1

    def lines(self) -> list[str]:
        """The report as text lines, one per table, differences first-row shown."""
        out = [f"verify {self.results} against a rerun on {self.source} ({', '.join(self.stages)})"]
        out.extend(f"  note: {note}" for note in self.notes)
        for check in self.checks:
            recorded = check.rows_recorded if check.rows_recorded is not None else "-"
            rerun = check.rows_rerun if check.rows_rerun is not None else "-"
            line = f"  {check.status:<9} {check.stage}/{check.table} (rows: {recorded} recorded, {rerun} rerun)"
            if check.note:
                line += f": {check.note}"
            out.append(line)
            if check.first_difference:
                out.append(f"            first difference: {_short(check.first_difference)}")
        same = sum(check.status == "same" for check in self.checks)
        verdict = "identical" if self.identical else "DIFFERENT"
        out.append(f"{verdict}: {same} of {len(self.checks)} tables the same ({self.seconds:.1f} s)")
        return out

    def __str__(self) -> str:
        return "\n".join(self.lines())


def _short(value: object, limit: int = 400) -> str:
    text = json.dumps(value, default=str, sort_keys=False)
    return text if len(text) <= limit else text[: limit - 3] + "..."


# --------------------------------------------------------------------------- reading the results
def _read_json(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        msg = f"{path}: cannot be read as a manifest ({exc}); the folder is not a complete result"
        raise InputError(msg) from None
    if not isinstance(data, dict):
        msg = f"{path}: a manifest must be a JSON object, found {type(data).__name__}"
        raise InputError(msg)
    return data


def _stage_of(folder: Path) -> str | None:
    if (folder / "features_manifest.json").is_file():
        return "features"
    if (folder / "manifest.json").is_file():
        command = _read_json(folder / "manifest.json").get("command")
        if command in ("episodes", "analyse"):
            return "episodes" if command == "episodes" else "stats"
    return None


def _find_stages(results: Path) -> dict[str, Path]:
    own = _stage_of(results)
    if own is not None:
        return {own: results}
    found = {}
    for name, _marker in STAGES:
        sub = results / name
        if sub.is_dir():
            stage = _stage_of(sub)
            if stage is not None:
                found[stage] = sub
    if not found:
        msg = (
            f"{results}: no results to verify; give a folder written by `dka-cohort episodes`, "
            "`features` or `analyse` (holding manifest.json or features_manifest.json), or a folder "
            "holding episodes/, features/ and stats/ (the demo's)"
        )
        raise InputError(msg)
    return {stage: found[stage] for stage, _ in STAGES if stage in found}


# --------------------------------------------------------------------------- comparing
def _first_difference(recorded: pl.DataFrame, rerun: pl.DataFrame) -> dict[str, Any] | None:
    if recorded.columns != rerun.columns or recorded.dtypes != rerun.dtypes:
        return {
            "columns": {
                "recorded": [f"{name}:{dtype}" for name, dtype in recorded.schema.items()],
                "rerun": [f"{name}:{dtype}" for name, dtype in rerun.schema.items()],
            }
        }
    left, right = canonical_table(recorded), canonical_table(rerun)
    common = min(left.height, right.height)
    if common:
        unequal = pl.DataFrame({
            f"c{index}": left[name].head(common).ne_missing(right[name].head(common))
            for index, name in enumerate(left.columns)
        }).select(pl.any_horizontal(pl.all()).alias("unequal"))["unequal"]
        positions = unequal.arg_true()
        if positions.len():
            row = int(positions[0])
            return {"row": row, "recorded": left.row(row, named=True), "rerun": right.row(row, named=True)}
    if left.height != right.height:
        row = common
        return {
            "row": row,
            "recorded": left.row(row, named=True) if row < left.height else None,
            "rerun": right.row(row, named=True) if row < right.height else None,
        }
    return None


def _compare(stage: str, recorded_dir: Path, rerun_dir: Path, manifest_tables: Mapping[str, Any]) -> list[TableCheck]:
    recorded = table_hashes(recorded_dir)
    rerun = table_hashes(rerun_dir)
    checks: list[TableCheck] = []
    for name in sorted(set(recorded) | set(rerun) | set(manifest_tables)):
        mine, theirs = recorded.get(name), rerun.get(name)
        note = ""
        noted = manifest_tables.get(name)
        if mine is not None and isinstance(noted, Mapping) and noted.get("sha256") not in (None, mine["sha256"]):
            note = "the file in the results folder no longer matches the hash its manifest recorded"
        if mine is None or theirs is None:
            where = "the results folder" if mine is None else "the rerun"
            checks.append(TableCheck(stage, name, "missing", mine and mine["rows"], theirs and theirs["rows"],
                                     None, f"not in {where}" + (f"; {note}" if note else "")))
            continue
        if mine["sha256"] == theirs["sha256"]:
            checks.append(TableCheck(stage, name, "same", mine["rows"], theirs["rows"], None, note))
            continue
        difference = _first_difference(read_table(recorded_dir / name), read_table(rerun_dir / name))
        checks.append(TableCheck(stage, name, "different", mine["rows"], theirs["rows"], difference, note))
    return checks


# --------------------------------------------------------------------------- rerunning
def _definitions(manifest: Mapping[str, Any]) -> list[Any]:
    from cohort.definitions import load_definition, parse_definition

    loaded = []
    for entry in manifest.get("definitions") or []:
        content = entry.get("content")
        if isinstance(content, Mapping):
            definition = parse_definition(content, origin=str(entry.get("origin") or entry.get("name")))
        else:  # a manifest from before contents were recorded: reload by origin with the overrides
            definition = load_definition(str(entry.get("origin") or entry["name"]), overrides=entry.get("overrides") or {})
        if entry.get("sha256") and definition.sha256() != entry["sha256"]:
            msg = (
                f"definition `{entry.get('name')}`: its content now hashes to {definition.sha256()[:12]}..., "
                f"the manifest recorded {entry['sha256'][:12]}...; the definition file changed since the run"
            )
            raise InputError(msg)
        loaded.append(definition)
    if not loaded:
        msg = "the episodes manifest names no definitions; it cannot be rerun"
        raise InputError(msg)
    return loaded


def _codelists(manifest: Mapping[str, Any], notes: list[str]) -> Path | None:
    from cohort._paths import codelists_dir

    recorded = manifest.get("codelists") or {}
    folder = (manifest.get("parameters") or {}).get("codelists")
    path = Path(folder) if folder else None
    now = file_hashes(path or codelists_dir(), "*.csv")
    files = recorded.get("files") if isinstance(recorded, Mapping) else None
    if isinstance(files, Mapping):
        changed = sorted(name for name in set(files) | set(now) if files.get(name) != now.get(name))
        if changed:
            which = f"the code lists in {path}" if path else "the bundled code lists"
            notes.append(f"{which} changed since the run ({', '.join(changed)}); differences may come from them")
    elif not recorded:
        notes.append("the manifest records no code-list hashes (an older run); the code lists were not checked")
    if path is not None and not path.is_dir():
        msg = f"the run used the code lists in {path}, which is no longer a folder; restore it to verify"
        raise InputError(msg)
    return path


def _source_note(recorded: Mapping[str, Any] | None, source: Path, notes: list[str]) -> None:
    from cohort.source import open_extract

    if not isinstance(recorded, Mapping) or not recorded.get("tables"):
        return
    with open_extract(source) as extract:
        now = extract.fingerprint()
    rows_then = {name: info.get("rows") for name, info in recorded["tables"].items()}
    rows_now = {name: info.get("rows") for name, info in now["tables"].items()}
    if rows_then != rows_now:
        changed = sorted(name for name in set(rows_then) | set(rows_now) if rows_then.get(name) != rows_now.get(name))
        notes.append(f"the extract's row counts differ from the recorded source in: {', '.join(changed)}")


def _input_with_hash(candidates: Sequence[Path | None], wanted: Mapping[str, Any] | None) -> Path | None:
    """The first existing file among ``candidates`` whose content hash is ``wanted`` (any, if none is recorded)."""
    for candidate in candidates:
        if candidate is None or not candidate.is_file():
            continue
        if not wanted or table_hash(candidate)["sha256"] == wanted.get("sha256"):
            return candidate
    return None


def _rerun_episodes(folder: Path, source: Path, into: Path, notes: list[str], **engine: Any) -> Path:
    from cohort.episodes import find_episodes

    manifest = _read_json(folder / "manifest.json")
    parameters = manifest.get("parameters") or {}
    _source_note(manifest.get("source"), source, notes)
    find_episodes(
        source,
        _definitions(manifest),
        out=into,
        codelists=_codelists(manifest, notes),
        threads=engine.get("threads") or parameters.get("threads"),
        memory_limit=engine.get("memory_limit") or parameters.get("memory_limit"),
        as_of=dt.date.fromisoformat(parameters["as_of"]) if parameters.get("as_of") else None,
    )
    return into


def _rerun_features(folder: Path, source: Path, into: Path, notes: list[str], **engine: Any) -> Path:
    from cohort.features import FeatureOptions, run_features

    manifest = _read_json(folder / "features_manifest.json")
    recorded = manifest.get("episodes")
    candidates = [Path(recorded) if recorded else None, folder.parent / "episodes" / "episodes.parquet"]
    episodes = _input_with_hash(candidates, manifest.get("episodes_table"))
    if episodes is None:
        msg = (
            f"{folder}: the episodes it was made from ({recorded or 'passed in memory'}) were not found with the "
            "recorded content hash, nor beside it in ../episodes; rerun `dka-cohort episodes` into ../episodes"
        )
        raise InputError(msg)
    options = FeatureOptions(**(manifest.get("options") or {}))
    parameters = manifest.get("parameters") or {}
    run_features(
        episodes, source, into, options=options,
        threads=engine.get("threads") or parameters.get("threads"),
        memory_limit=engine.get("memory_limit") or parameters.get("memory_limit"),
    )
    return into


def _rerun_stats(folder: Path, source: Path, into: Path, notes: list[str], **engine: Any) -> Path:
    from cohort.analyse import run_analyses

    manifest = _read_json(folder / "manifest.json")
    recorded = manifest.get("features")
    wanted = manifest.get("features_tables") or {}
    for candidate in ([Path(recorded)] if recorded else []) + [folder.parent / "features"]:
        if candidate.is_dir() and all(
            info is None or _input_with_hash([candidate / f"{name}.parquet"], info) is not None
            for name, info in wanted.items()
        ):
            run_analyses(candidate, into, definition=str(manifest.get("definition")))
            return into
    msg = (
        f"{folder}: the feature tables it was made from ({recorded}) were not found with the recorded "
        "content hashes, nor beside it in ../features; rerun `dka-cohort features` first"
    )
    raise InputError(msg)


_RERUN = {"episodes": _rerun_episodes, "features": _rerun_features, "stats": _rerun_stats}
_MARKER = {"episodes": "manifest.json", "features": "features_manifest.json", "stats": "manifest.json"}


def verify_results(
    results: Path | str,
    source: Path | str,
    *,
    threads: int | None = None,
    memory_limit: str | None = None,
    keep: Path | str | None = None,
) -> VerifyReport:
    """Rerun a results folder from its manifest on ``source`` and compare every table.

    Parameters
    ----------
    results
        A folder written by ``dka-cohort episodes``, ``features`` or ``analyse``, or a folder
        holding ``episodes/``, ``features/`` and ``stats/`` (the demo's).
    source
        The extract the results were made from.
    threads, memory_limit
        DuckDB settings for the rerun (default: those recorded).
    keep
        A folder to keep the rerun in (new or empty); by default a temporary folder, removed.

    Returns
    -------
    VerifyReport
        Per table ``same`` / ``different`` (row counts, first differing row) / ``missing``;
        ``report.identical`` and ``report.exit_code`` (0 identical, 1 different).

    Raises
    ------
    InputError
        ``results`` holds no manifest, or an input it records (definition file, code lists,
        episodes, features) is gone or changed.

    Examples
    --------
    >>> report = verify_results("demo-output", "demo-output/extract")   # doctest: +SKIP
    >>> report.identical, report.exit_code                               # doctest: +SKIP
    (True, 0)
    """
    started = time.perf_counter()
    results = Path(results).expanduser().resolve()
    source = Path(source).expanduser().resolve()
    if not results.is_dir():
        msg = f"{results}: not a folder; give the results folder to verify"
        raise InputError(msg)
    if not source.exists():
        msg = f"--source {source}: not found; give the extract the results were made from"
        raise InputError(msg)
    stages = _find_stages(results)
    if keep is not None:
        root = Path(keep).expanduser().resolve()
        if root.exists() and any(root.iterdir()):
            msg = f"--keep {root}: not empty; give a new or empty folder for the rerun"
            raise InputError(msg)
        root.mkdir(parents=True, exist_ok=True)
    else:
        root = Path(tempfile.mkdtemp(prefix="dka-verify-"))
    notes: list[str] = []
    checks: list[TableCheck] = []
    try:
        for stage, folder in stages.items():
            manifest = _read_json(folder / _MARKER[stage])
            try:
                rerun = _RERUN[stage](folder, source, root / stage, notes, threads=threads, memory_limit=memory_limit)
            except CohortError as exc:
                raise type(exc)(f"verify {stage} ({folder}): {exc}") from None
            checks.extend(_compare(stage, folder, rerun, manifest.get("tables") or {}))
    finally:
        if keep is None:
            shutil.rmtree(root, ignore_errors=True)
    return VerifyReport(
        results=results, source=source, checks=tuple(checks), notes=tuple(notes),
        seconds=time.perf_counter() - started, rerun_dir=root if keep is not None else None,
        stages=tuple(stages),
    )
