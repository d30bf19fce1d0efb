"""The notebooks in notebooks/ (issue 7): stored without outputs, and each runs top to bottom.

Every notebook is executed with nbclient on a synthetic extract generated afresh in a temporary
folder (``DKA_NOTEBOOK_DIR``), with a ``python3`` kernel that is this interpreter (the project's
venv), so the test works on a fresh machine where ``make test`` created ``.venv``. A cell error
fails the test with the notebook and cell named. Each notebook carries its own visible checks
(``assert`` cells) against the synthetic truth or a published value: Kleinbaum & Klein's
Kaplan-Meier values for the 6-MP data (notebook 2), Hanley & McNeil's AUROC 0.893 (notebook 3),
the planted premature-closure share and arrival-to-insulin medians (notebook 4), sensitivity and
PPV against the truth (notebooks 1 and 5), the planted severity hazard ratios (notebook 2); a
failing check is a cell error here.

The five notebooks together take about a minute on a quiet 2-core machine, so they stay in the
fast suite.
"""

from __future__ import annotations

import doctest
import importlib.util
import json
import os
import re
import sys
import time
from pathlib import Path

import nbformat
import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOKS = ROOT / "notebooks"
EXPECTED = (
    "01_defining_the_cohort.ipynb",
    "02_time_to_resolution.ipynb",
    "03_recurrence.ipynb",
    "04_infusion_audit.ipynb",
    "05_your_own_extract.ipynb",
)
#: Seconds allowed per cell; the slowest cell (notebook 5 on a CSV export) takes well under a minute.
CELL_TIMEOUT = 600


def _strip_tool():
    spec = importlib.util.spec_from_file_location("strip_outputs", NOTEBOOKS / "strip_outputs.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_five_notebooks_of_issue_7_are_there():
    assert tuple(sorted(p.name for p in NOTEBOOKS.glob("*.ipynb"))) == EXPECTED


@pytest.mark.parametrize("name", EXPECTED)
def test_notebook_is_stored_without_outputs(name):
    notebook = nbformat.read(NOTEBOOKS / name, as_version=4)
    nbformat.validate(notebook)
    assert _strip_tool().cells_with_outputs(notebook) == []
    for cell in notebook.cells:
        if cell.cell_type == "code":
            assert cell.outputs == [] and cell.execution_count is None, cell.get("id")
    assert notebook.metadata["kernelspec"]["name"] == "python3"


@pytest.mark.parametrize("name", EXPECTED)
def test_notebook_has_a_visible_check_and_cites_its_sources(name):
    """Issue 7: each notebook checks a result in a visible cell; the brief: methods are cited."""
    notebook = nbformat.read(NOTEBOOKS / name, as_version=4)
    code = "\n".join(cell.source for cell in notebook.cells if cell.cell_type == "code")
    text = "\n".join(cell.source for cell in notebook.cells if cell.cell_type == "markdown")
    assert re.search(r"^\s*assert\b", code, flags=re.MULTILINE), f"{name} has no assert cell"
    assert "synthetic" in text.lower() and "invented" in text.lower()
    assert re.search(r"\b(19|20)\d\d\b", text), f"{name} cites no dated source"


def test_strip_tool_removes_outputs_and_keeps_sources(tmp_path):
    tool = _strip_tool()
    failures, _ = doctest.testmod(tool)
    assert failures == 0
    source = nbformat.read(NOTEBOOKS / EXPECTED[0], as_version=4)
    dirty = nbformat.from_dict(json.loads(json.dumps(source)))
    code = next(cell for cell in dirty.cells if cell.cell_type == "code")
    code.outputs = [nbformat.v4.new_output("stream", name="stdout", text="a small count\n")]
    code.execution_count = 4
    code.metadata["execution"] = {"iopub.status.busy": "2026-01-01T00:00:00Z"}
    path = tmp_path / "dirty.ipynb"
    nbformat.write(dirty, path)
    assert tool.main(["--check", str(path)]) == 1
    assert tool.main([str(path)]) == 0
    cleaned = nbformat.read(path, as_version=4)
    assert tool.cells_with_outputs(cleaned) == []
    assert [c.source for c in cleaned.cells] == [c.source for c in source.cells]
    assert tool.main(["--check", str(path)]) == 0


# --------------------------------------------------------------------------- execution


@pytest.fixture(scope="module")
def kernel_env(tmp_path_factory):
    """A work folder for the notebooks and a ``python3`` kernelspec that runs this interpreter."""
    work = tmp_path_factory.mktemp("notebooks")
    spec_dir = work / "kernels" / "python3"
    spec_dir.mkdir(parents=True)
    (spec_dir / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "Python 3 (dka-cohort venv)",
        "language": "python",
    }))
    env = {
        "DKA_NOTEBOOK_DIR": str(work / "run"),
        # the checkout's code, whether or not it is installed in the venv
        "PYTHONPATH": os.pathsep.join([str(ROOT), *filter(None, [os.environ.get("PYTHONPATH")])]),
        "PYDEVD_DISABLE_FILE_VALIDATION": "1",
    }
    env.pop("DKA_MY_EXTRACT", None)
    return {"kernels": work / "kernels", "env": env, "seconds": {}}


@pytest.mark.parametrize("name", EXPECTED)
def test_notebook_runs_top_to_bottom(name, kernel_env, monkeypatch):
    from jupyter_client.kernelspec import KernelSpecManager
    from jupyter_client.manager import KernelManager
    from nbclient import NotebookClient
    from nbclient.exceptions import CellExecutionError

    for key, value in kernel_env["env"].items():
        monkeypatch.setenv(key, value)
    monkeypatch.delenv("DKA_MY_EXTRACT", raising=False)
    notebook = nbformat.read(NOTEBOOKS / name, as_version=4)
    manager = KernelManager(kernel_name="python3",
                            kernel_spec_manager=KernelSpecManager(kernel_dirs=[str(kernel_env["kernels"])]))
    client = NotebookClient(notebook, km=manager, kernel_name="python3", timeout=CELL_TIMEOUT,
                            resources={"metadata": {"path": str(NOTEBOOKS)}})
    started = time.perf_counter()
    try:
        client.execute()
    except CellExecutionError as error:
        pytest.fail(f"{name}: a cell failed\n{error}")
    finally:  # the client does not shut down a kernel manager it was handed
        if manager.has_kernel:
            manager.shutdown_kernel(now=True)
    kernel_env["seconds"][name] = time.perf_counter() - started
    print(f"{name}: executed in {kernel_env['seconds'][name]:.1f} s")
    # the executed copy has the outputs; the stored notebook stays clean
    assert _strip_tool().cells_with_outputs(nbformat.read(NOTEBOOKS / name, as_version=4)) == []
    errors = [o for c in notebook.cells if c.cell_type == "code" for o in c.outputs if o.output_type == "error"]
    assert not errors
