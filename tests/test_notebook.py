"""The demo notebook runs top to bottom in a fresh kernel, and its saved files are sound."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import nbformat
import pytest
import torch
from nbclient import NotebookClient

REPO = Path(__file__).resolve().parents[1]
NOTEBOOK = REPO / "notebooks" / "demo.ipynb"
pytestmark = pytest.mark.slow  # a fresh kernel runs the whole notebook
OUT = REPO / "build" / "demo"


def _committed_notebook() -> nbformat.NotebookNode:
    """The notebook as git has it at HEAD; the working copy when it is not committed yet.

    Running the demo in JupyterLab (``make demo``) autosaves outputs into the working copy;
    that is the user's business, what must be clean is what the repository ships.
    """
    try:
        text = subprocess.run(
            ["git", "-C", str(REPO), "show", "HEAD:notebooks/demo.ipynb"],
            capture_output=True, text=True, check=True, timeout=30,
        ).stdout
    except (OSError, subprocess.SubprocessError):
        text = NOTEBOOK.read_text()
    return nbformat.reads(text, as_version=4)


def test_notebook_is_committed_clean():
    """Outputs stripped, a python3 kernelspec (JupyterLab then opens it without asking)."""
    nb = _committed_notebook()
    nbformat.validate(nb)
    assert nb.metadata["kernelspec"]["name"] == "python3"
    for i, cell in enumerate(nb.cells):
        if cell.cell_type == "code":
            assert cell.outputs == [], f"cell {i} has stored outputs; strip them before committing"
            assert cell.execution_count is None, f"cell {i} has an execution count"
    kinds = [c.cell_type for c in nb.cells]
    assert kinds.count("markdown") >= 5, "the notebook should explain each step in markdown"


@pytest.fixture(scope="module")
def executed() -> nbformat.NotebookNode:
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = NotebookClient(
        nb,
        kernel_name="python3",  # the native kernel: this interpreter (the project's .venv)
        timeout=600,
        resources={"metadata": {"path": str(NOTEBOOK.parent)}},  # cwd = notebooks/, as in Lab
    )
    client.execute()  # raises CellExecutionError, with the cell and traceback, on any error
    return nb


def _stream_text(nb) -> str:
    parts = []
    for cell in nb.cells:
        for out in cell.get("outputs", []):
            if out.get("output_type") == "stream" and out.get("name") == "stdout":
                parts.append(out["text"])
    return "".join(parts)


def test_notebook_executes_without_error(executed):
    errors = [o for c in executed.cells for o in c.get("outputs", []) if o.get("output_type") == "error"]
    assert not errors
    # every code cell ran, in order
    counts = [c.execution_count for c in executed.cells if c.cell_type == "code"]
    assert counts == list(range(1, len(counts) + 1))


def test_notebook_uses_this_environment(executed):
    text = _stream_text(executed)
    assert f"kernel: {sys.prefix}" in text or f"kernel: {Path(sys.prefix).resolve()}" in text


def test_notebook_saves_plan_and_codes_that_reload(executed):
    from qwidgets import Plan, apply_plan, fold_batchnorm, from_codes
    from qwidgets.demo import BOARD_WEIGHT_BUDGET_KIB, load_demo

    plan = Plan.load(OUT / "plan.json")
    assert json.loads((OUT / "plan.json").read_text())  # plain JSON
    assert plan.model_kib <= BOARD_WEIGHT_BUDGET_KIB
    codes = torch.load(OUT / "codes.pt", weights_only=True)  # tensors and plain values only
    assert set(codes) == set(plan.layers)
    # the integer codes rebuild exactly the weights of the planned model
    model = fold_batchnorm(load_demo().model)  # the notebook plans the folded model
    planned = apply_plan(model, plan)
    for name, entry in codes.items():
        grid = plan.layers[name].weight
        w = from_codes(entry["codes"].to(torch.int64), grid)
        assert torch.equal(w, planned.get_submodule(name).weight.detach()), name


def test_notebook_reports_held_out_accuracy(executed):
    text = _stream_text(executed)
    assert "held-out accuracy" in text


def test_notebook_learning_does_not_lose_to_the_fitted_range(executed):
    # learn keeps the best grid by the hard quantizer's layer-output error, so the learned
    # SQNR the notebook prints is never below the MSE-fitted one it started from
    m = re.search(r"MSE range ([\d.]+) dB -> learned ([\d.]+) dB", _stream_text(executed))
    assert m, "the notebook should print the fitted and learned layer-output SQNR"
    assert float(m.group(2)) >= float(m.group(1))


def _widget_snapshots(nb, widget: str) -> list[dict]:
    return [o["data"] for c in nb.cells for o in c.get("outputs", [])
            if "text/html" in o.get("data", {}) and f"data-widget='{widget}'" in o["data"]["text/html"]]


def test_scan_view_and_planner_outputs_carry_static_snapshots(executed):
    # what an exported notebook shows without a kernel: the figure and the readout
    for widget in ("ScanView", "BudgetPlanner"):
        (data,) = _widget_snapshots(executed, widget)
        assert data["image/png"] and "<img src='data:image/png;base64," in data["text/html"], widget
    (planner,) = _widget_snapshots(executed, "BudgetPlanner")
    # the planner's metric was measured on the held-out snippets, not the calibration batch
    assert "on the held-out data" in planner["text/html"] and "planned" in planner["text/html"]


def _exported_html(nb) -> str:
    """The executed notebook as HTML, exported as ``HEADLESS=1 make demo`` does (.ci/demo,
    with the configuration in .ci/demo_html.py)."""
    from nbconvert import HTMLExporter
    from traitlets.config.loader import PyFileConfigLoader

    config = PyFileConfigLoader("demo_html.py", path=str(REPO / ".ci")).load_config()
    body, _ = HTMLExporter(config=config).from_notebook_node(nb)
    return body


def _snapshots(page: str, widget: str) -> list:
    """The static snapshots of one widget class in an exported page: the text from each
    snapshot's outer ``<div class="qw-snapshot" data-widget=...>`` to the next output (the
    exporter rewrites attribute quotes and order, so the tag is matched loosely)."""
    parts = re.split(r"<div[^>]*\bqw-snapshot\b", page)[1:]
    mine = [p for p in parts if re.match(rf"[^>]*data-widget=[\"']{widget}[\"']", p)]
    return [p.split("jp-OutputArea-output", 1)[0] for p in mine]


def test_exported_html_shows_the_widgets_plots(executed):
    """Without a kernel the live widgets cannot draw: the page shows their static snapshots."""
    import base64
    import io

    from PIL import Image

    page = _exported_html(executed)
    for widget in ("ScanView", "BudgetPlanner"):
        (shot,) = _snapshots(page, widget)
        assert "data:image/png;base64," in shot, widget
    shots = _snapshots(page, "GridExplorer")
    assert len(shots) == 1, "the demo displays one explorer"
    shot = shots[0]
    assert re.search(r"class=[\"']qw-r-layer-output-sqnr", shot)  # the readout table is in it
    assert "layer-output SQNR" in shot
    encoded = re.search(r"data:image/png;base64,([A-Za-z0-9+/=]+)", shot).group(1)
    with Image.open(io.BytesIO(base64.b64decode(encoded))) as im:  # decoded by Pillow
        assert im.size[0] >= 400 and im.size[1] >= 300
        assert len(im.convert("L").getcolors(1 << 16)) > 8  # a drawn plot, not a blank image
