"""Where the bundled resources live, both in a source checkout and in an installed wheel."""

from __future__ import annotations

from pathlib import Path

_PACKAGE_DIR = Path(__file__).resolve().parent


def sql_dir() -> Path:
    """Return the folder of SQL recipes.

    In a wheel the recipes travel inside the package as ``cohort/_bundled_sql``; in a source
    checkout (editable install) they are the top-level ``sql/`` folder.
    """
    bundled = _PACKAGE_DIR / "_bundled_sql"
    if bundled.is_dir():
        return bundled
    return _PACKAGE_DIR.parent / "sql"


def definitions_dir() -> Path:
    """Return the folder of bundled definition files."""
    return _PACKAGE_DIR / "definitions"


def codelists_dir() -> Path:
    """Return the folder of bundled code lists."""
    return _PACKAGE_DIR / "codelists"
