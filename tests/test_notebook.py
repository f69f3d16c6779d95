"""The analyst's notebook, notebooks/lorran_valley.ipynb, runs from top to bottom.

It is executed with nbclient in a ``python3`` kernel of this environment's ipykernel, with
the non-interactive Agg backend (MPLBACKEND), so that it never goes stale; the committed
file carries no outputs. Nothing here computes: the notebook's own numbers are checked
elsewhere (tests/test_cli.py checks the same demo analysis against the generator's truth).
"""

from __future__ import annotations

import sys
from pathlib import Path

import nbformat
import pytest
from jupyter_client.kernelspec import KernelSpecManager
from nbclient import NotebookClient

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "lorran_valley.ipynb"
TIMEOUT = 300  # seconds per cell; the slowest (fitting the reference model) takes seconds


def _code_cells(nb) -> list:
    return [cell for cell in nb.cells if cell.cell_type == "code"]


def test_committed_notebook_has_no_outputs():
    nb = nbformat.read(NOTEBOOK, as_version=4)
    nbformat.validate(nb)
    assert nb.nbformat == 4
    assert nb.metadata.kernelspec.name == "python3"
    cells = _code_cells(nb)
    assert cells
    for cell in cells:
        assert cell.outputs == [], cell.source[:60]
        assert cell.execution_count is None, cell.source[:60]


@pytest.mark.slow
def test_notebook_runs_without_errors_or_warnings(tmp_path, monkeypatch):
    monkeypatch.setenv("MPLBACKEND", "Agg")
    monkeypatch.setenv("TMPDIR", str(tmp_path))  # the notebook's temporary folder lands here
    nb = nbformat.read(NOTEBOOK, as_version=4)
    spec = KernelSpecManager().get_kernel_spec("python3")
    # jupyter_client starts a kernel whose argv[0] is a bare "python" with sys.executable,
    # so the kernel runs in this environment (with this casemix); anything else is not ours.
    assert spec.argv[0] in {"python", "python3", sys.executable}, spec.argv
    client = NotebookClient(
        nb, kernel_name="python3", timeout=TIMEOUT,
        resources={"metadata": {"path": str(tmp_path)}},
    )
    client.execute()  # raises CellExecutionError, naming the cell, on any error
    cells = _code_cells(nb)
    stderr = [out.text for cell in cells for out in cell.outputs
              if out.output_type == "stream" and out.name == "stderr"]
    assert not stderr, stderr  # warnings show on stderr
    for cell in cells:
        if "show(" in cell.source and "def show(" not in cell.source:
            kinds = {kind for out in cell.outputs for kind in out.get("data", {})}
            assert "image/svg+xml" in kinds, cell.source[:60]
