"""The built wheel carries the recipes, definitions and code lists and runs outside the checkout.

Issue 2: "a test installs the built wheel into a fresh virtual environment (not editable) and runs
`dka-cohort --help` and `dka-cohort synth` from a temporary folder".

The fresh environment takes its third-party dependencies from the project's own environment
through a ``.pth`` line (so the test needs no network), but dka-cohort itself only from the wheel:
the test checks that the imported package lives in the fresh environment, not in the checkout.
"""

from __future__ import annotations

import os
import subprocess
import sys
import sysconfig
import venv
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    dist = tmp_path_factory.mktemp("dist")
    # --no-build-isolation: the build backend (hatchling, in the test extra) comes from this
    # environment, so the test needs no network
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-w", str(dist), str(ROOT)],
        check=False,
        capture_output=True,
        text=True,
    )
    assert built.returncode == 0, built.stdout[-2000:] + built.stderr[-2000:]
    (found,) = dist.glob("dka_cohort-*.whl")
    return found


def test_wheel_carries_recipes_definitions_and_code_lists(wheel: Path) -> None:
    names = set(zipfile.ZipFile(wheel).namelist())
    recipes = sorted(path.name for path in (ROOT / "sql").glob("*.sql"))
    definitions = sorted(path.name for path in (ROOT / "cohort" / "definitions").glob("*.yaml"))
    codelists = sorted(path.name for path in (ROOT / "cohort" / "codelists").glob("*.csv"))
    assert codelists, "no code lists in the checkout"
    for name in recipes:
        assert f"cohort/_bundled_sql/{name}" in names
    for name in definitions:
        assert f"cohort/definitions/{name}" in names
    for name in codelists:
        assert f"cohort/codelists/{name}" in names
    assert "synthetic/__init__.py" in names


def test_wheel_installs_and_runs_from_a_temporary_folder(wheel: Path, tmp_path: Path) -> None:
    env_dir = tmp_path / "fresh-venv"
    venv.EnvBuilder(with_pip=True).create(env_dir)
    fresh_python = env_dir / "bin" / "python"
    fresh_site = Path(
        subprocess.run(
            [str(fresh_python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
            check=True,
            capture_output=True,
            text=True,
        ).stdout.strip()
    )
    # third-party dependencies from the project environment, appended after the fresh site-packages
    (fresh_site / "_project_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    subprocess.run(
        [str(fresh_python), "-m", "pip", "install", "--quiet", "--no-deps", "--no-index", str(wheel)],
        check=True,
        capture_output=True,
        text=True,
    )
    work = tmp_path / "elsewhere"
    work.mkdir()
    env = {key: value for key, value in os.environ.items() if key not in {"PYTHONPATH", "VIRTUAL_ENV"}}

    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [str(env_dir / "bin" / "dka-cohort"), *args],
            cwd=work,
            env=env,
            capture_output=True,
            text=True,
            check=False,
        )

    where = subprocess.run(
        [str(fresh_python), "-c", "import cohort, cohort._paths as p; print(cohort.__file__); print(p.sql_dir())"],
        cwd=work,
        env=env,
        capture_output=True,
        text=True,
        check=True,
    ).stdout.splitlines()
    assert where[0].startswith(str(fresh_site)), where
    assert where[1] == str(fresh_site / "cohort" / "_bundled_sql")

    helped = run("--help")
    assert helped.returncode == 0, helped.stderr
    assert "usage: dka-cohort" in helped.stdout

    made = run("synth", "--persons", "200", "--seed", "7", "--out", "synth-out", "--quiet")
    assert made.returncode == 0, made.stderr
    assert (work / "synth-out" / "extract" / "person.parquet").is_file()
    assert (work / "synth-out" / "truth").is_dir()
