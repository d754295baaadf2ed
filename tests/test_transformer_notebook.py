"""The transformer walkthrough (notebooks/transformer.ipynb) runs top to bottom in a fresh kernel.

Outside checks inside the notebook: the exported file is run by check_onnx in the ONNX
reference evaluator and ONNX Runtime; here, that every cell ran without error, that the file
was written, and that the notebook is committed clean (outputs stripped, python3 kernelspec).
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

REPO = Path(__file__).resolve().parents[1]
NOTEBOOK = REPO / "notebooks" / "transformer.ipynb"
pytestmark = pytest.mark.slow  # a fresh kernel trains, scans, refines and exports


def test_transformer_notebook_is_committed_clean():
    try:
        text = subprocess.run(["git", "-C", str(REPO), "show", "HEAD:notebooks/transformer.ipynb"],
                              capture_output=True, text=True, check=True, timeout=30).stdout
    except (OSError, subprocess.SubprocessError):
        text = NOTEBOOK.read_text()
    nb = nbformat.reads(text, as_version=4)
    nbformat.validate(nb)
    assert nb.metadata["kernelspec"]["name"] == "python3"
    for i, cell in enumerate(nb.cells):
        if cell.cell_type == "code":
            assert cell.outputs == [] and cell.execution_count is None, f"cell {i} has stored outputs"


def test_transformer_notebook_executes_and_checks_its_file():
    nb = nbformat.read(NOTEBOOK, as_version=4)
    NotebookClient(nb, kernel_name="python3", timeout=900,
                   resources={"metadata": {"path": str(NOTEBOOK.parent)}}).execute()
    errors = [o for c in nb.cells for o in c.get("outputs", []) if o.get("output_type") == "error"]
    assert not errors
    text = "".join(o.get("text", "") for c in nb.cells for o in c.get("outputs", [])
                   if o.get("output_type") == "stream")
    assert "ONNX reference evaluator" in text and "ONNX Runtime, optimizations off" in text
    assert (REPO / "build" / "transformer" / "routing.onnx").is_file()
    # the ScanView's static snapshot travels with the notebook (the exported HTML shows it)
    assert any("image/png" in o.get("data", {}) for c in nb.cells for o in c.get("outputs", []))
