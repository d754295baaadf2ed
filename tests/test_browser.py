"""The demo notebook in a real JupyterLab, in Debian's Chromium driven by Playwright.

One session for the module: JupyterLab started from this environment (so the notebook's
``python3`` kernel is this environment's Python) on a free loopback port with a token and private
settings, ``notebooks/demo.ipynb`` opened and every cell run. The tests then check that the
kernel is this environment's; that pressing ArrowRight on the explorer's focused bit-width slider
changes the plot's pixels and the SQNR readout to what the kernel computed (asked of the kernel
directly, and recomputed there with the core functions); that the planner's measure button shows
the kernel's measurement; that rendering the widgets did not change the kernel's state; and that
the repo's notebook file was not written. Screenshots and the server log go to a new temporary
folder, or to ``$QWIDGETS_SCREENSHOT_DIR`` when set; a test run never writes into the
repository. ``make screenshots`` runs this module with that folder set and copies the explorer
and planner shots into ``docs/`` for the README.

The tests fail, never skip, when the server or the browser cannot start: the product lives in a
notebook, so a broken front end is a broken product. Server, kernel and browser are stopped
even when a step fails.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

REPO = Path(__file__).resolve().parents[1]
NOTEBOOK = "notebooks/demo.ipynb"
pytestmark = pytest.mark.browser
OUT = Path(os.environ.get("QWIDGETS_SCREENSHOT_DIR") or tempfile.mkdtemp(prefix="qwidgets-browser-"))
CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--no-first-run",
]
SERVER_START_S = 90
RUN_ALL_S = 300  # the notebook trains the model, scans and learns: about a minute on 2 busy cores
UPDATE_S = 30

# JupyterLab user settings for the test's private settings directory: no news toast over the
# widgets, no autosave (running the cells must not write outputs into the repo's notebook), and
# every cell kept in the DOM so that off-screen outputs can be found.
LAB_SETTINGS = {
    "@jupyterlab/apputils-extension/notification.jupyterlab-settings": {
        "fetchNews": "false",
        "checkForUpdates": False,
    },
    "@jupyterlab/docmanager-extension/plugin.jupyterlab-settings": {"autosave": False},
    "@jupyterlab/notebook-extension/tracker.jupyterlab-settings": {"windowingMode": "none"},
}


# ----------------------------------------------------------------------------- server
def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LabServer:
    """A JupyterLab server of our own, in a fresh process group, with private settings."""

    def __init__(self, root: Path, log_path: Path):
        self.root = root
        self.port = _free_port()
        self.token = secrets.token_hex(16)
        self.log_path = log_path
        self.home = Path(tempfile.mkdtemp(prefix="qwidgets-lab-"))
        self.proc: subprocess.Popen | None = None
        self._log = None

    def url(self, path: str) -> str:
        return f"http://127.0.0.1:{self.port}/{path.lstrip('/')}?token={self.token}"

    def start(self) -> None:
        lab = Path(sys.executable).with_name("jupyter-lab")
        if not lab.exists():
            pytest.fail(f"jupyter-lab not found next to {sys.executable}; run `make setup` first")
        settings = self.home / "settings"
        for rel, value in LAB_SETTINGS.items():
            f = settings / rel
            f.parent.mkdir(parents=True, exist_ok=True)
            f.write_text(json.dumps(value))
        env = dict(os.environ)
        env.update(
            JUPYTER_CONFIG_DIR=str(self.home / "config"),
            JUPYTER_RUNTIME_DIR=str(self.home / "runtime"),
            JUPYTERLAB_SETTINGS_DIR=str(settings),
            JUPYTERLAB_WORKSPACES_DIR=str(self.home / "workspaces"),
            IPYTHONDIR=str(self.home / "ipython"),
            PYTHONUNBUFFERED="1",
        )
        cmd = [
            str(lab),
            "--no-browser",
            "--ip=127.0.0.1",
            f"--port={self.port}",
            "--port-retries=0",
            f"--IdentityProvider.token={self.token}",
            f"--ServerApp.root_dir={self.root}",
            "--LabApp.expose_app_in_browser=True",  # lets the test ask the kernel what it holds
        ]
        if hasattr(os, "geteuid") and os.geteuid() == 0:
            cmd.append("--allow-root")
        self._log = open(self.log_path, "w")  # noqa: SIM115 (closed in stop)
        self.proc = subprocess.Popen(
            cmd, cwd=self.root, env=env, stdout=self._log, stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        deadline = time.monotonic() + SERVER_START_S
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                pytest.fail(f"JupyterLab exited with code {self.proc.returncode}:\n{self.log_tail()}")
            try:
                with urllib.request.urlopen(self.url("api/status"), timeout=2) as r:
                    if r.status == 200:
                        return
            except OSError:
                pass
            time.sleep(0.5)
        pytest.fail(f"JupyterLab did not answer within {SERVER_START_S} s:\n{self.log_tail()}")

    def log_tail(self, n: int = 40) -> str:
        try:
            return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-n:])
        except OSError:
            return "(no log)"

    def stop(self, extra_pids: tuple[int, ...] = ()) -> None:
        """SIGTERM lets the server shut its kernels down; whatever is left is killed by id."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)  # our own process group
                self.proc.wait(timeout=10)
        for pid in extra_pids:  # the kernel runs in its own session; make sure it is gone
            _kill_if_alive(pid)
        if self._log is not None:
            self._log.close()
        shutil.rmtree(self.home, ignore_errors=True)


def _kill_if_alive(pid: int, wait_s: float = 10.0) -> None:
    deadline = time.monotonic() + wait_s
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.2)
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass


# ----------------------------------------------------------------------------- page helpers
_KERNEL_EXEC_JS = """
async (code) => {
  const panel = window.jupyterapp.shell.currentWidget;
  const kernel = panel.sessionContext.session.kernel;
  const future = kernel.requestExecute({code, silent: false, store_history: false});
  let out = '';
  future.onIOPub = (msg) => {
    const t = msg.header.msg_type;
    if (t === 'stream') out += msg.content.text;
    if (t === 'error') out += 'KERNEL ERROR ' + msg.content.ename + ': ' + msg.content.evalue;
  };
  await future.done;
  return out;
}
"""


_CELL_STATE_JS = r"""
() => {
  const model = window.jupyterapp.shell.currentWidget.content.model;
  const state = {n: 0, done: 0, errors: []};
  for (let i = 0; i < model.cells.length; i++) {
    const cell = model.cells.get(i);
    if (cell.type !== 'code') continue;
    state.n += 1;
    if (cell.executionCount !== null && cell.executionCount !== undefined) state.done += 1;
    for (const out of cell.outputs.toJSON()) {
      if (out.output_type === 'error') {
        state.errors.push(`cell ${i}: ${out.ename}: ${out.evalue}\n` + (out.traceback || []).join('\n'));
      }
    }
  }
  return state;
}
"""


def ask_kernel(page, code: str) -> str:
    """Run ``code`` in the notebook's own kernel (not in a cell) and return what it printed."""
    out = page.evaluate(_KERNEL_EXEC_JS, code)
    assert "KERNEL ERROR" not in out, out
    return out


def cell_with_source(page, text: str):
    """The notebook cell whose source contains ``text`` (exactly one)."""
    cells = page.locator(".jp-Notebook .jp-CodeCell").filter(
        has=page.locator(".jp-InputArea-editor", has_text=text)
    )
    assert cells.count() == 1, f"expected one cell containing {text!r}, found {cells.count()}"
    return cells.first


def png_pixels(png: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB"), dtype=np.int16)


def changed_fraction(a: bytes, b: bytes) -> float:
    """Share of pixels that differ between two screenshots (1.0 if their sizes differ)."""
    pa, pb = png_pixels(a), png_pixels(b)
    if pa.shape != pb.shape:
        return 1.0
    return float((np.abs(pa - pb).sum(axis=-1) > 24).mean())


_DB_RE = re.compile(r"^\s*([+\-\u2212]?(?:\d+(?:\.\d+)?|inf))\s*dB\s*$")


def readout_sqnr(text: str) -> float:
    """The number in an SQNR readout such as '20.79 dB'."""
    m = _DB_RE.match(text)
    assert m, f"not an SQNR readout: {text!r}"
    return float(m.group(1).replace("\u2212", "-"))


def wait_until(predicate, timeout_s: float, what: str, interval_s: float = 0.25):
    deadline = time.monotonic() + timeout_s
    last = None
    while time.monotonic() < deadline:
        last = predicate()
        if last:
            return last
        time.sleep(interval_s)
    pytest.fail(f"timed out after {timeout_s:.0f} s waiting for {what} (last: {last!r})")


# ----------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def lab():
    OUT.mkdir(parents=True, exist_ok=True)
    server = LabServer(REPO, OUT / "jupyterlab.log")
    server.pids = []  # the session records the kernel's pid here
    try:
        server.start()
        yield server
    finally:
        server.stop(tuple(server.pids))


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import Error as PlaywrightError
    from playwright.sync_api import sync_playwright

    if not Path(CHROMIUM).exists():
        pytest.fail(
            f"the browser test needs Debian's Chromium at {CHROMIUM}; install it with "
            "`sudo apt-get install -y chromium` (make test does this when run as root)"
        )
    with sync_playwright() as pw:
        try:
            b = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
        except PlaywrightError as e:
            pytest.fail(f"Chromium at {CHROMIUM} did not start: {e}")
        try:
            yield b
        finally:
            b.close()


class Session:
    """The demo notebook open in JupyterLab with every cell run."""

    def __init__(self, page, nb_hash: str):
        self.page = page
        self.nb_hash = nb_hash
        self.page_errors: list[str] = []
        self.timings: dict[str, float] = {}
        self.after_run: dict = {}


_KERNEL_READY_JS = (
    "() => { const w = window.jupyterapp && window.jupyterapp.shell.currentWidget;"
    " const k = w && w.sessionContext && w.sessionContext.session && w.sessionContext.session.kernel;"
    " return !!k && k.connectionStatus === 'connected'; }"
)

# What the kernel holds right after the run: the explorer's grid and noise as learned, and the
# planner's measurement. Rendering the widgets in a browser must not change them.
_STATE_AFTER_RUN = (
    "import json\n"
    "print(json.dumps({\n"
    "  'grid': repr(explorer.grid), 'learned_grid': repr(result.grid),\n"
    "  'noise': explorer.noise_steps, 'learned_noise': result.noise_steps,\n"
    "  'measured': planner.report is not None,\n"
    "}))"
)


@pytest.fixture(scope="module")
def session(lab, browser):
    nb_hash = hashlib.sha256((REPO / NOTEBOOK).read_bytes()).hexdigest()
    # tall enough that the explorer and the planner each fit on screen for their screenshots
    page = browser.new_page(viewport={"width": 1400, "height": 1800}, device_scale_factor=1)
    s = Session(page, nb_hash)
    page.on("pageerror", lambda e: s.page_errors.append(str(e)))
    t0 = time.monotonic()
    page.goto(lab.url(f"lab/tree/{NOTEBOOK}"))
    page.wait_for_function(_KERNEL_READY_JS, timeout=120_000)
    s.timings["open notebook, kernel up"] = time.monotonic() - t0
    page.evaluate(  # more room for the notebook in the screenshots
        "() => { const c = window.jupyterapp.commands;"
        " if (c.hasCommand('application:toggle-left-area')) c.execute('application:toggle-left-area'); }"
    )
    info = json.loads(ask_kernel(
        page,
        "import json, os, sys, qwidgets\n"
        "print(json.dumps({'exe': sys.executable, 'prefix': sys.prefix, 'pid': os.getpid()}))",
    ))
    lab.pids.append(int(info["pid"]))
    s.kernel = info

    # Run all cells with the notebook's own command, as the Run menu does.
    t1 = time.monotonic()
    page.evaluate("() => window.jupyterapp.commands.execute('notebook:run-all-cells')")

    def all_ran():
        state = page.evaluate(_CELL_STATE_JS)
        if state["errors"]:
            text = re.sub(r"\x1b\[[0-9;]*m", "", "\n".join(state["errors"]))  # no ANSI colours
            pytest.fail("a notebook cell raised:\n" + text)
        busy = page.locator(".jp-Notebook .jp-CodeCell .jp-InputArea-prompt", has_text="*").count()
        return state["n"] >= 5 and state["done"] == state["n"] and busy == 0

    wait_until(all_ran, RUN_ALL_S, "every cell to run")
    s.timings["run all cells"] = time.monotonic() - t1
    page.wait_for_timeout(3000)  # let the front end's first messages from the widgets arrive
    s.after_run = json.loads(ask_kernel(page, _STATE_AFTER_RUN))
    page.screenshot(path=str(OUT / "notebook.png"))
    scanview = cell_with_source(page, "ScanView(").locator(".qw-scanview").first
    scanview.scroll_into_view_if_needed()
    scanview.screenshot(path=str(OUT / "scanview.png"))
    yield s
    s.timings["total"] = time.monotonic() - t0
    (OUT / "timings.json").write_text(json.dumps(s.timings, indent=1))
    page.close()


# ----------------------------------------------------------------------------- tests
def test_kernel_is_this_environment(session):
    # JupyterLab was started from this environment, so its python3 kernel is this Python.
    assert Path(session.kernel["prefix"]).resolve() == Path(sys.prefix).resolve(), session.kernel


def test_explorer_bits_slider_moves_plot_and_readout(session):
    page = session.page
    # The explorer: the output of the cell that builds it. Its bit-width control is a row of
    # toggle buttons labelled "bits" (class qw-bits), one per width; the chosen one carries the
    # class mod-active. The plot is the explorer's Image (qw-plot), the tensor SQNR the readout
    # cell qw-r-tensor-sqnr.
    cell = cell_with_source(page, "GridExplorer(")
    explorer = cell.locator(".qw-explorer").first
    explorer.wait_for(state="visible", timeout=60_000)
    explorer.scroll_into_view_if_needed()
    bits_row = explorer.locator(".qw-bits")
    assert bits_row.locator(".widget-label").first.inner_text().strip() == "bits"
    plot = explorer.locator("img.qw-plot, .qw-plot img").first
    readout = explorer.locator(".qw-readout .qw-r-tensor-sqnr").first
    plot.wait_for(state="visible", timeout=30_000)

    bits_before = active_bits(explorer)
    before_png = plot.screenshot(path=str(OUT / "explorer-plot-before.png"))
    explorer.screenshot(path=str(OUT / "explorer-before.png"))
    text_before = readout.inner_text()
    sqnr_before = readout_sqnr(text_before)

    # A click on the next width's button (one more bit).
    t0 = time.monotonic()
    bits_button(explorer, bits_before + 1).click()
    wait_until(lambda: active_bits(explorer) == bits_before + 1, UPDATE_S, "the bit button to move")
    wait_until(lambda: readout.inner_text() != text_before, UPDATE_S, "the readout to update")
    wait_until(
        lambda: changed_fraction(before_png, plot.screenshot()) > 0.002, UPDATE_S,
        "the plot image to change",
    )
    session.timings["slider -> new plot and readout"] = time.monotonic() - t0
    page.wait_for_timeout(500)  # let a coalesced final render land before the after-shots
    after_png = plot.screenshot(path=str(OUT / "explorer-plot-after.png"))
    explorer.screenshot(path=str(OUT / "explorer.png"))

    # What the kernel holds: the explorer's grid has the new bit width, the page shows the
    # explorer's own readout text, and that number is what the core functions give for the
    # grid on the layer's weights. (Polled: the page may still be catching up with the kernel.)
    query = (
        "import json\n"
        "from qwidgets import error_stats, quantize\n"
        "_w = model.get_submodule(most_sensitive).weight.detach()\n"
        "print(json.dumps({'bits': explorer.grid.bits, 'sqnr': explorer.stats.sqnr_db,\n"
        "                  'shown': explorer.readouts['tensor SQNR'],\n"
        "                  'core': error_stats(_w, quantize(_w, explorer.grid)).sqnr_db}))"
    )
    snapshot: dict = {}

    def page_matches_kernel():
        snapshot.update(json.loads(ask_kernel(page, query)), page_text=readout.inner_text().strip())
        return snapshot["page_text"] == snapshot["shown"]

    wait_until(page_matches_kernel, UPDATE_S, "the readout to show the kernel's SQNR", interval_s=0.5)
    sqnr_after = readout_sqnr(snapshot["page_text"])
    assert snapshot["bits"] == bits_before + 1
    assert sqnr_after == pytest.approx(snapshot["sqnr"], abs=0.0051)  # shown to 0.01 dB
    assert snapshot["sqnr"] == pytest.approx(snapshot["core"], abs=1e-6)
    assert sqnr_after != pytest.approx(sqnr_before, abs=0.005)
    assert changed_fraction(before_png, after_png) > 0.002


def active_bits(explorer) -> int:
    return int(explorer.locator(".qw-bits button.mod-active").first.inner_text().strip())


def bits_button(explorer, bits: int):
    return explorer.locator(".qw-bits button").filter(has_text=re.compile(rf"^\s*{bits}\s*$")).first


def _explorer(page):
    explorer = cell_with_source(page, "GridExplorer(").locator(".qw-explorer").first
    explorer.wait_for(state="visible", timeout=60_000)
    explorer.scroll_into_view_if_needed()
    return explorer


def test_explorer_layer_input_shows_no_failure(session):
    page = session.page
    explorer = _explorer(page)
    explorer.locator(".qw-source button", has_text="layer input").first.click()
    wait_until(lambda: ask_kernel(page, "print(explorer.source)").strip() == "input", UPDATE_S,
               "the kernel to switch to the layer input")
    page.wait_for_timeout(1500)  # the coalesced redraw and its messages
    message = explorer.locator(".qw-message").first.inner_text()
    assert "failed" not in message, message
    assert ask_kernel(page, "print(explorer.message.is_error)").strip() == "False"
    explorer.screenshot(path=str(OUT / "explorer-input.png"))
    explorer.locator(".qw-source button", has_text="weights").first.click()
    wait_until(lambda: ask_kernel(page, "print(explorer.source)").strip() == "weight", UPDATE_S,
               "the kernel to switch back to the weights")


def test_explorer_step_slider_drag_of_20_px_is_a_fine_move(session):
    page = session.page
    explorer = _explorer(page)
    handle = explorer.locator(".qw-scale [role=slider]").first
    before = float(ask_kernel(page, "print(float(explorer.state.shown_grid().scale))"))
    box = handle.bounding_box()
    x, y = box["x"] + box["width"] / 2, box["y"] + box["height"] / 2
    page.mouse.move(x, y)
    page.mouse.down()
    for dx in range(2, 21, 2):  # a person's drag: several small moves
        page.mouse.move(x + dx, y)
    page.mouse.up()
    after = {}

    def moved():
        after["step"] = float(ask_kernel(page, "print(float(explorer.state.shown_grid().scale))"))
        return after["step"] != before

    wait_until(moved, UPDATE_S, "the step to change after the drag", interval_s=0.5)
    ratio = after["step"] / before
    assert 1.0 < ratio < 2.0, (before, after["step"])
    page.wait_for_timeout(1000)
    shown = explorer.locator(".qw-scale input").first.input_value().strip()
    readout = explorer.locator(".qw-readout .qw-r-step").first.inner_text().strip()
    assert shown == readout, (shown, readout)  # control's box and readout: same value, same digits


def test_explorer_learn_button_offers_to_stop(session):
    page = session.page
    explorer = _explorer(page)
    button = explorer.locator("button.qw-learn").first
    ask_kernel(page, "explorer.controls['steps'].value = 100000")  # long enough to stop it
    button.click()
    wait_until(lambda: "stop" in button.inner_text(), UPDATE_S, "the learn button to offer to stop")
    assert explorer.locator(".qw-bits button").count() >= 1
    button.click()  # stop: the best grid so far is kept
    wait_until(lambda: button.inner_text().strip() == "learn", UPDATE_S * 2,
               "the learning run to stop")
    message = explorer.locator(".qw-message").first
    wait_until(lambda: "stopped after" in message.inner_text(), UPDATE_S, "the note on the stopped run")
    assert "failed" not in message.inner_text(), message.inner_text()


def test_planner_measure_button_shows_kernel_measurement(session):
    page = session.page
    planner = cell_with_source(page, "BudgetPlanner(").locator(".qw-planner").first
    planner.wait_for(state="visible", timeout=30_000)
    planner.scroll_into_view_if_needed()
    planner.locator(".qw-planner-measure").click()
    readout = planner.locator(".qw-planner-readout")
    wait_until(lambda: "press measure" not in readout.inner_text(), UPDATE_S * 2,
               "the planner's measurement")
    page.wait_for_timeout(500)
    planner.screenshot(path=str(OUT / "planner.png"))
    report = json.loads(ask_kernel(page, (
        "import json\n"
        "print(json.dumps({'sqnr': planner.report.measured_sqnr_db,\n"
        "                  'acc': planner.report.metric_planned}))"
    )))
    text = readout.inner_text()
    assert f"{report['sqnr']:.2f} dB" in text, text
    assert f"planned {report['acc']:.4g}" in text, text


def test_a_person_moving_bits_back_to_a_width_the_kernel_set_is_kept(session):
    page = session.page
    explorer = _explorer(page)
    ask_kernel(page, "explorer.state.bits = 6\nexplorer.state.bits = 2")  # a script: 6, then 2
    wait_until(lambda: active_bits(explorer) == 2, UPDATE_S, "the buttons to show 2 bits")
    bits_button(explorer, 6).click()  # the person goes back to 6
    wait_until(lambda: ask_kernel(page, "print(explorer.grid.bits)").strip() == "6", UPDATE_S,
               "the kernel to take 6 bits")
    page.wait_for_timeout(1500)  # anything the browser might still send back
    assert ask_kernel(page, "print(explorer.grid.bits)").strip() == "6"
    assert active_bits(explorer) == 6


def test_a_person_unticking_signed_codes_after_two_source_switches_is_kept(session):
    page = session.page
    explorer = _explorer(page)
    for label, source in (("layer input", "input"), ("weights", "weight")):  # switch sources twice
        explorer.locator(".qw-source button", has_text=label).first.click()
        wait_until(lambda s=source: ask_kernel(page, "print(explorer.source)").strip() == s, UPDATE_S,
                   f"the kernel to show {source}")
    ask_kernel(page, "explorer.state.signed = False\nexplorer.state.signed = True")  # the kernel: off, on
    box = explorer.locator(".qw-signed input[type=checkbox]").first
    wait_until(lambda: box.is_checked(), UPDATE_S, "the box to show signed codes")
    box.click()  # the person unticks it
    wait_until(lambda: ask_kernel(page, "print(explorer.grid.signed)").strip() == "False", UPDATE_S,
               "the kernel to take unsigned codes")
    page.wait_for_timeout(1500)
    assert ask_kernel(page, "print(explorer.grid.signed)").strip() == "False"
    assert not box.is_checked()
    message = explorer.locator(".qw-message").first.inner_text()
    assert "failed" not in message, message


def test_switching_the_budget_unit_in_the_browser_keeps_the_plan(session):
    page = session.page
    planner = cell_with_source(page, "BudgetPlanner(").locator(".qw-planner").first
    planner.scroll_into_view_if_needed()
    before = json.loads(ask_kernel(page, (  # (use_grid's note may print too: the last line)
        "import json\n"
        "planner.use_grid(explorer)  # a learned grid in the plan\n"
        "_plan = planner.plan\n"
        "print(json.dumps({'bits': _plan.bits, 'mean': _plan.mean_bits}))")).strip().splitlines()[-1])
    for label in ("bops", "mean_bits", "planned_kib", "model_kib"):
        planner.locator(".qw-planner-kind button", has_text=label).first.click()
        wait_until(lambda: "kept the plan" in planner.locator(".qw-message").first.inner_text(),
                   UPDATE_S, f"the note on the switch to {label}")
        page.wait_for_timeout(1500)  # anything the browser might send back meanwhile
        now = json.loads(ask_kernel(page, (
            "import json\n"
            "print(json.dumps({'same': planner.plan is _plan, 'taken': bool(planner._edited()),\n"
            "                  'box': planner.controls['budget'].box.value,\n"
            "                  'cost': planner.state.budget}))")))
        assert now["same"] and now["taken"], (label, now, before)
        shown = planner.locator(".qw-planner-budget input").first.input_value().strip()
        assert shown == now["box"], (label, shown, now)  # the page shows the plan's exact cost


def test_rendering_leaves_widget_state_alone(session):
    # Showing a widget in a browser must not change what the kernel computed: the explorer
    # keeps the learned grid and noise, the planner its measurement.
    st = session.after_run
    echo = ("the browser sends each float slider's value back, snapped to its step, when it "
            "renders or updates the slider, sometimes after the kernel has moved on; a widget "
            "must not take those echoes for a user's change")
    assert st["grid"] == st["learned_grid"], f"explorer grid changed by rendering ({echo}): {st}"
    assert st["noise"] == st["learned_noise"], f"explorer noise changed by rendering ({echo}): {st}"
    assert st["measured"], f"planner measurement dropped by rendering ({echo}): {st}"


def test_page_clean_and_notebook_file_untouched(session):
    assert not session.page_errors, session.page_errors
    # Running the cells must not have written into the repo's notebook (autosave is off).
    assert hashlib.sha256((REPO / NOTEBOOK).read_bytes()).hexdigest() == session.nb_hash
