"""The run manifest (``manifest.json``): what was run, on what, with which versions and settings.

A manifest lets a reader tell two runs apart and rerun one: every definition with its SHA-256
(of the canonical content after overrides, :meth:`cohort.definitions.Definition.sha256`), the
source fingerprint (:meth:`cohort.source.Extract.fingerprint`), the versions of Python and the
packages that shape results, the parameters given, and start and end times (UTC, ISO 8601).
"""

from __future__ import annotations

import datetime as dt
import json
import platform
from collections.abc import Mapping, Sequence
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

__all__ = ["MANIFEST_PACKAGES", "package_versions", "definition_entry", "build_manifest", "write_manifest", "utc_now"]

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
    }


def write_manifest(manifest: Mapping[str, Any], path: Path) -> Path:
    """Write the manifest as indented, key-sorted JSON and return the path."""
    path.write_text(json.dumps(manifest, indent=2, sort_keys=True, allow_nan=False) + "\n", encoding="utf-8")
    return path
