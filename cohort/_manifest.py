"""The run manifest (``manifest.json``): what was run, on what, with which versions and settings.

A manifest lets a reader tell two runs apart and rerun one: every definition with its SHA-256
(of the canonical content after overrides, :meth:`cohort.definitions.Definition.sha256`), the
source fingerprint (:meth:`cohort.source.Extract.fingerprint`), the versions of Python and the
packages that shape results, the parameters given, and start and end times (UTC, ISO 8601).

What a rerun needs is recorded too: each definition's full content after overrides
(``definitions[i].content``), the SHA-256 of every code-list file used (``codelists``), and,
added by :func:`write_manifest` from the folder it writes into, a content hash of every table in
the output (``tables``): the SHA-256 of the table's rows in a canonical order (sorted on every
column) with its column names and types, not of the file's bytes, so writer metadata, row
groups and compression do not change it. :mod:`cohort.verify` reruns from this.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import platform
from collections.abc import Mapping, MutableMapping, Sequence
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

__all__ = [
    "MANIFEST_PACKAGES",
    "package_versions",
    "definition_entry",
    "build_manifest",
    "write_manifest",
    "utc_now",
    "table_hash",
    "table_hashes",
    "file_hashes",
    "canonical_table",
    "read_table",
]

#: File endings of the tables hashed in an output folder.
TABLE_SUFFIXES: tuple[str, ...] = (".parquet", ".csv")
_HASH_BATCH_ROWS = 250_000

#: Packages whose versions go into every manifest.
MANIFEST_PACKAGES: tuple[str, ...] = ("dka-cohort", "duckdb", "polars", "pyarrow", "pydantic", "pyyaml", "rich")


def utc_now() -> str:
    """Return the current UTC time as ISO 8601 with seconds (``2026-12-01T22:00:00+00:00``)."""
    return dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()


def package_versions(packages: Sequence[str] = MANIFEST_PACKAGES) -> dict[str, str | None]:
    """Return ``{"python": ..., package: version or None}`` for the packages given.

    Examples
    --------
    >>> "duckdb" in package_versions()
    True
    """
    found: dict[str, str | None] = {"python": platform.python_version()}
    for name in packages:
        try:
            found[name] = version(name)
        except PackageNotFoundError:
            found[name] = None
    return found


def definition_entry(definition: Any) -> dict[str, Any]:
    """Describe one loaded definition: name, origin, sha256, overrides, citation, timing, population."""
    content = definition.to_dict()
    return {
        "name": definition.name,
        "origin": definition.origin,
        "sha256": definition.sha256(),
        "overrides": {key: _jsonable(value) for key, value in definition.overrides.items()},
        "content": content,
        "citation": content.get("citation"),
        "population": content.get("population"),
        "timing": content.get("timing"),
    }


def _jsonable(value: Any) -> Any:
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, Mapping):
        return {str(key): _jsonable(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(item) for item in value]
    return str(value)


def build_manifest(
    *,
    command: str,
    definitions: Sequence[Any],
    source: Mapping[str, Any],
    parameters: Mapping[str, Any],
    started: str,
    finished: str,
    counts: Mapping[str, Any] | None = None,
    seconds: Mapping[str, float] | None = None,
    seed: int | None = None,
) -> dict[str, Any]:
    """Assemble the manifest as plain JSON-ready data.

    Parameters
    ----------
    command
        What ran (``"episodes"``).
    definitions
        The loaded :class:`cohort.definitions.Definition` objects.
    source
        The source fingerprint.
    parameters
        The options given (threads, memory limit, code lists, overrides...).
    started, finished
        ISO 8601 UTC times.
    counts, seconds
        Row counts and step wall times worth keeping.
    seed
        The random seed, when the run used one (episode finding uses none).
    """
    return {
        "tool": "dka-cohort",
        "command": command,
        "started": started,
        "finished": finished,
        "definitions": [definition_entry(definition) for definition in definitions],
        "source": _jsonable(dict(source)),
        "packages": package_versions(),
        "seed": seed,
        "parameters": _jsonable(dict(parameters)),
        "counts": _jsonable(dict(counts or {})),
        "seconds": {key: round(float(value), 3) for key, value in (seconds or {}).items()},
        "codelists": _codelist_entry(parameters.get("codelists")),
    }


def _codelist_entry(folder: object) -> dict[str, Any]:
    from cohort._paths import codelists_dir

    path = Path(str(folder)) if folder else codelists_dir()
    return {"folder": str(path) if folder else None, "bundled": not folder, "files": file_hashes(path, "*.csv")}


def file_hashes(folder: Path, pattern: str = "*") -> dict[str, str]:
    """Return ``{file name: SHA-256 of its bytes}`` for the files of ``folder`` matching ``pattern``.

    Used for inputs (code lists), whose bytes are what was read; outputs are hashed by content
    (:func:`table_hash`).
    """
    found: dict[str, str] = {}
    if not Path(folder).is_dir():
        return found
    for path in sorted(Path(folder).glob(pattern)):
        if path.is_file():
            found[path.name] = hashlib.sha256(path.read_bytes()).hexdigest()
    return found


def read_table(path: Path) -> Any:
    """Read an output table as polars: Parquet with its types, CSV as text cells (as written).

    Examples
    --------
    >>> import tempfile, pathlib, polars as pl
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "t.csv"
    >>> pl.DataFrame({"a": [1, 2]}).write_csv(path)
    >>> read_table(path)["a"].to_list()
    ['1', '2']
    """
    import polars as pl

    path = Path(path)
    if path.suffix == ".parquet":
        return pl.read_parquet(path)
    return pl.read_csv(path, infer_schema=False, raise_if_empty=False)


def canonical_table(frame: Any) -> Any:
    """Return ``frame`` in a canonical form: rows sorted on every column (nulls last).

    Nested columns become JSON text, categoricals their text, durations their count of the time
    unit and binary columns hex text, so that every column can be sorted and written as CSV.

    Two tables holding the same rows in any order give equal canonical tables.
    """
    import polars as pl

    columns = []
    for name, dtype in frame.schema.items():
        if dtype.is_nested():
            columns.append(pl.struct(pl.col(name)).struct.json_encode().alias(name))
        elif isinstance(dtype, (pl.Categorical, pl.Enum)):  # by value, not by dictionary order
            columns.append(pl.col(name).cast(pl.String))
        elif isinstance(dtype, pl.Duration):  # CSV has no durations: count of the time unit
            columns.append(pl.col(name).cast(pl.Int64))
        elif dtype == pl.Binary:
            columns.append(pl.col(name).bin.encode("hex"))
        else:
            columns.append(pl.col(name))
    canonical = frame.select(columns)
    if canonical.width and canonical.height > 1:
        canonical = canonical.sort(canonical.columns, nulls_last=True, maintain_order=True)
    return canonical


def table_hash(frame_or_path: Any) -> dict[str, Any]:
    """Content hash of one table: rows, columns with types, and the SHA-256 of its canonical rows.

    The hash covers the column names and types (in order) and every row, sorted on every column
    and written as CSV text with ``\\N`` for null; it ignores row order, Parquet row groups,
    compression and writer metadata.

    Parameters
    ----------
    frame_or_path
        A polars DataFrame, or the path of a ``.parquet`` or ``.csv`` file (read by :func:`read_table`).

    Returns
    -------
    dict
        ``{"sha256": ..., "rows": n, "columns": [...]}``.

    Examples
    --------
    >>> import polars as pl
    >>> one = table_hash(pl.DataFrame({"a": [1, 2], "b": ["x", None]}))
    >>> two = table_hash(pl.DataFrame({"a": [2, 1], "b": [None, "x"]}))
    >>> one == two, one["rows"]
    (True, 2)
    """
    import io

    frame = read_table(frame_or_path) if isinstance(frame_or_path, (str, Path)) else frame_or_path
    canonical = canonical_table(frame)
    digest = hashlib.sha256()
    header = [f"{name}:{dtype}" for name, dtype in frame.schema.items()]
    digest.update(("\x1f".join(header) + "\n").encode("utf-8"))
    for chunk in canonical.iter_slices(_HASH_BATCH_ROWS):
        buffer = io.BytesIO()
        chunk.write_csv(buffer, include_header=False, null_value="\\N", datetime_format="%Y-%m-%dT%H:%M:%S%.f")
        digest.update(buffer.getvalue())
    return {"sha256": digest.hexdigest(), "rows": int(frame.height), "columns": list(frame.columns)}


def table_hashes(folder: Path | str) -> dict[str, dict[str, Any]]:
    """Content hashes of every table (``*.parquet``, ``*.csv``) under ``folder``, by relative path.

    Hidden files and folders (a leading ``.``) are skipped.

    Examples
    --------
    >>> import tempfile, pathlib, polars as pl
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> pl.DataFrame({"a": [1]}).write_parquet(folder / "t.parquet")
    >>> list(table_hashes(folder))
    ['t.parquet']
    """
    root = Path(folder)
    found: dict[str, dict[str, Any]] = {}
    for path in sorted(root.rglob("*")):
        relative = path.relative_to(root)
        if any(part.startswith(".") for part in relative.parts):
            continue
        if path.is_file() and path.suffix in TABLE_SUFFIXES:
            found[relative.as_posix()] = table_hash(path)
    return found


def write_manifest(manifest: Mapping[str, Any], path: Path, *, hash_tables: bool = True) -> Path:
    """Write the manifest as indented, key-sorted JSON and return the path.

    With ``hash_tables`` (the default) the content hash of every table already in the manifest's
    folder (:func:`table_hashes`) is added under ``tables``, in the mapping given too when it can
    be changed. Write the manifest last: its presence marks the folder complete.
    """
    path = Path(path)
    if hash_tables:
        hashes = table_hashes(path.parent)
        if isinstance(manifest, MutableMapping):
            manifest["tables"] = hashes
        else:
            manifest = {**manifest, "tables": hashes}
    path.write_text(json.dumps(manifest, indent=2, sort_keys=True, allow_nan=False) + "\n", encoding="utf-8")
    return path
