"""Remove outputs from the notebooks before they are committed, or check that there are none.

The notebooks in this folder are stored without outputs and execution counts: the tests execute
them on a freshly generated extract (tests/test_notebooks.py), so stored outputs would only go
stale, bloat the repository and, run on a real extract, could carry figures that must not leave a
secure environment.

Usage::

    python notebooks/strip_outputs.py                 # strip every notebook in this folder
    python notebooks/strip_outputs.py --check         # exit 1 and list the notebooks with outputs
    python notebooks/strip_outputs.py path/to/a.ipynb # strip the notebooks named
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

import nbformat

HERE = Path(__file__).resolve().parent
#: Cell metadata written by an execution (nbclient's timings, Jupyter's collapsed/scrolled state).
EXECUTION_METADATA = ("execution", "collapsed", "scrolled", "ExecuteTime")


def cells_with_outputs(notebook: nbformat.NotebookNode) -> list[str]:
    """Ids (or positions) of the cells that carry outputs, an execution count or execution metadata.

    Examples
    --------
    >>> from nbformat.v4 import new_notebook, new_code_cell, new_output
    >>> nb = new_notebook(cells=[new_code_cell("1 + 1", id="a")])
    >>> cells_with_outputs(nb)
    []
    >>> nb.cells[0].outputs = [new_output("execute_result", data={"text/plain": "2"}, execution_count=1)]
    >>> cells_with_outputs(nb)
    ['a']
    """
    found = []
    for index, cell in enumerate(notebook.cells):
        dirty = any(key in cell.get("metadata", {}) for key in EXECUTION_METADATA)
        if cell.cell_type == "code":
            dirty = dirty or bool(cell.get("outputs")) or cell.get("execution_count") is not None
        if dirty:
            found.append(str(cell.get("id", index)))
    return found


def strip(notebook: nbformat.NotebookNode) -> bool:
    """Remove outputs, execution counts and execution metadata in place; True when anything changed.

    Examples
    --------
    >>> from nbformat.v4 import new_notebook, new_code_cell, new_output
    >>> nb = new_notebook(cells=[new_code_cell("1 + 1", id="a", execution_count=3)])
    >>> strip(nb), nb.cells[0].execution_count, strip(nb)
    (True, None, False)
    """
    changed = bool(cells_with_outputs(notebook))
    for cell in notebook.cells:
        for key in EXECUTION_METADATA:
            cell.get("metadata", {}).pop(key, None)
        if cell.cell_type == "code":
            cell.outputs = []
            cell.execution_count = None
    return changed


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Strip outputs from notebooks, or check that they have none.")
    parser.add_argument("paths", nargs="*", type=Path, help="notebooks (default: every .ipynb beside this file)")
    parser.add_argument("--check", action="store_true", help="change nothing; exit 1 if any notebook has outputs")
    args = parser.parse_args(argv)
    paths = args.paths or sorted(HERE.glob("*.ipynb"))
    dirty = []
    for path in paths:
        notebook = nbformat.read(path, as_version=4)
        cells = cells_with_outputs(notebook)
        if not cells:
            continue
        dirty.append(path)
        if args.check:
            print(f"{path}: outputs in cell(s) {', '.join(cells)}")
        else:
            strip(notebook)
            nbformat.write(notebook, path)
            print(f"{path}: stripped {len(cells)} cell(s)")
    if args.check and dirty:
        print(f"{len(dirty)} notebook(s) carry outputs; run `python notebooks/strip_outputs.py` to remove them",
              file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
