"""Shared pytest set-up."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def artefact_dir() -> Path:
    """A folder for test artefacts (screenshots, printed figures) kept after the run."""
    path = Path(os.environ.get("DKA_TEST_ARTEFACTS", ROOT / "test-artifacts"))
    path.mkdir(parents=True, exist_ok=True)
    return path
