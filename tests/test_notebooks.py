"""The example notebooks run end to end on the demo captures (nbclient, the venv's python3
kernel), and are committed without outputs."""

from __future__ import annotations

from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

HERE = Path(__file__).resolve().parent
NOTEBOOKS = sorted((HERE.parent / "notebooks_examples").glob("*.ipynb"))


def test_there_are_at_least_three_notebooks():
    names = [p.stem for p in NOTEBOOKS]
    assert len(names) >= 3, names


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.stem)
def test_notebook_is_committed_without_outputs(path):
    book = nbformat.read(path, as_version=4)
    for cell in book.cells:
        if cell.cell_type == "code":
            assert cell.outputs == [] and cell.execution_count is None, \
                f"{path.name}: strip outputs before committing"


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.stem)
def test_notebook_runs(path):
    from jupyter_client.kernelspec import NATIVE_KERNEL_NAME

    book = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(
        book, timeout=600, kernel_name=NATIVE_KERNEL_NAME,
        resources={"metadata": {"path": str(path.parent)}},
    )
    # The native python3 kernel runs the interpreter running the tests (the venv's).
    client.execute()
    errors = [o for c in book.cells if c.cell_type == "code" for o in c.outputs
              if o.output_type == "error"]
    assert errors == []
