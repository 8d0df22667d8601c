"""The tour notebook in a real JupyterLab, driven by Debian's Chromium (playwright).

JupyterLab runs on a free loopback port with a token; HOME, TMPDIR and every Jupyter
folder live under pytest's tmp dir, and a kernel spec of this interpreter is installed
there. The test runs all cells from the page, checks that the explorer's bokeh plots
are drawn inside the widget, moves the explorer's look-ahead slider with the keyboard
and reads the window band back from BokehJS, comparing it with
:func:`peekalign.streaming.token_windows` computed here. Screenshots go to pytest's
tmp dir and, when the env ``PEEKALIGN_SCREENSHOTS`` names a folder, are copied there.
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import pytest
from conftest import require, require_program

pytestmark = [pytest.mark.browser, pytest.mark.slow]

REPO = Path(__file__).resolve().parents[1]
TOUR = REPO / "notebooks" / "tour.ipynb"
KERNEL = "peekalign-test"
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-quic",
    "--no-first-run",
    "--disable-component-update",
    "--disable-sync",
]


def _keep(path: Path) -> None:
    dest = os.environ.get("PEEKALIGN_SCREENSHOTS")
    if dest:
        Path(dest).mkdir(parents=True, exist_ok=True)
        shutil.copy2(path, Path(dest) / path.name)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def lab_env(tmp: Path) -> dict:
    """Environment with every Jupyter/Chromium folder under ``tmp`` and a kernel spec
    of this interpreter named ``peekalign-test``."""
    env = dict(os.environ)
    for key, sub in [
        ("HOME", "home"),
        ("TMPDIR", "tmp"),
        ("JUPYTER_CONFIG_DIR", "config"),
        ("JUPYTER_DATA_DIR", "data"),
        ("JUPYTER_RUNTIME_DIR", "runtime"),
        ("JUPYTERLAB_SETTINGS_DIR", "lab-user-settings"),
        ("JUPYTERLAB_WORKSPACES_DIR", "lab-workspaces"),
        ("IPYTHONDIR", "ipython"),
        ("MPLCONFIGDIR", "mpl"),
    ]:
        (tmp / sub).mkdir(parents=True, exist_ok=True)
        env[key] = str(tmp / sub)
    env["JUPYTER_PLATFORM_DIRS"] = "1"
    env["NUMBA_NUM_THREADS"] = "1"
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    prefix = tmp / "kernel"
    subprocess.run(
        [sys.executable, "-m", "ipykernel", "install", "--prefix", str(prefix), "--name", KERNEL],
        env=env,
        check=True,
        capture_output=True,
    )
    env["JUPYTER_PATH"] = str(prefix / "share" / "jupyter")
    return env


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A running JupyterLab serving a copy of the tour notebook; yields its URL."""
    require("jupyterlab")
    require("ipykernel")
    tmp = tmp_path_factory.mktemp("lab")
    root = tmp / "root"
    root.mkdir()
    nb = json.loads(TOUR.read_text(encoding="utf-8"))
    nb["metadata"]["kernelspec"] = {"name": KERNEL, "display_name": KERNEL, "language": "python"}
    (root / "tour.ipynb").write_text(json.dumps(nb), encoding="utf-8")
    env = lab_env(tmp)
    settings = tmp / "lab-app-settings"
    settings.mkdir()
    # no news or update pop-ups over the notebook
    (settings / "overrides.json").write_text(
        json.dumps(
            {
                "@jupyterlab/apputils-extension:notification": {
                    "checkForUpdates": False,
                    "fetchNews": "false",
                }
            }
        )
    )
    port, token = _free_port(), secrets.token_hex(16)
    log = open(tmp / "lab.log", "w")  # noqa: SIM115 - closed below
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "jupyter",
            "lab",
            "--allow-root",
            "--no-browser",
            "--ip=127.0.0.1",
            f"--port={port}",
            f"--IdentityProvider.token={token}",
            f"--ServerApp.root_dir={root}",
            "--LabApp.news_url=None",
            "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
            "--LabApp.extension_manager=readonly",
            "--LabApp.expose_app_in_browser=True",
            f"--LabApp.app_settings_dir={settings}",
        ],
        env=env,
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    try:
        base = f"http://127.0.0.1:{port}"
        for _ in range(240):
            if proc.poll() is not None:
                pytest.fail(f"jupyter lab exited: {(tmp / 'lab.log').read_text()[-2000:]}")
            try:
                urllib.request.urlopen(f"{base}/api/status?token={token}", timeout=1)
                break
            except OSError:
                time.sleep(0.5)
        else:
            pytest.fail("jupyter lab did not start within 2 minutes")
        yield {"url": f"{base}/lab/tree/tour.ipynb?token={token}", "tmp": tmp, "env": env}
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


_KERNEL_IDLE = """() => {
  const w = window.jupyterapp.shell.currentWidget;
  const k = w && w.sessionContext && w.sessionContext.session && w.sessionContext.session.kernel;
  return k != null && k.status === 'idle';
}"""

_ALL_RUN = """() => {
  const w = window.jupyterapp.shell.currentWidget;
  const cells = w.content.widgets.filter((c) => c.model.type === 'code');
  return cells.every((c) => c.model.executionCount !== null)
    && w.sessionContext.session.kernel.status === 'idle';
}"""

_ERRORS = """() => {
  const w = window.jupyterapp.shell.currentWidget;
  const out = [];
  for (const c of w.content.widgets) {
    if (c.model.type !== 'code') continue;
    const o = c.model.outputs;
    for (let i = 0; i < o.length; i++) {
      const j = o.get(i).toJSON();
      if (j.output_type === 'error') out.push(j.ename + ': ' + j.evalue);
    }
  }
  return out;
}"""

# the explorer's bokeh document: the one holding the posterior-floor line it adds
_BAND = """() => {
  let doc = null;
  for (const d of Bokeh.documents) if (d.get_model_by_name('posterior_floor') != null) doc = d;
  if (doc == null) return null;
  const w = doc.get_model_by_name('window_band_tiers');
  const h = doc.get_model_by_name('horizon_band_tiers');
  const t = doc.get_model_by_name('trigger_line_tiers');
  return {left: w.left, right: w.right, horizon: h.right, trigger: t.location};
}"""

_PIXELS = """(canvases) => canvases.map((c) => {
  const ctx = c.getContext('2d');
  if (ctx == null || c.width == 0 || c.height == 0) return 0;
  const d = ctx.getImageData(0, 0, c.width, c.height).data;
  let n = 0;
  for (let i = 0; i < d.length; i += 4) if (d[i + 3] > 0 && (d[i] < 235 || d[i + 1] < 235 || d[i + 2] < 235)) n++;
  return n;
})"""


@pytest.fixture(scope="module")
def page(lab):
    require("playwright")
    exe = require_program("/usr/bin/chromium")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        ctx = pw.chromium.launch_persistent_context(
            str(lab["tmp"] / "profile"),
            executable_path=exe,
            headless=True,
            args=CHROMIUM_ARGS,
            viewport={"width": 1600, "height": 1400},
            env=lab["env"],
        )
        try:
            pg = ctx.new_page()
            messages: list[str] = []
            pg.on("console", lambda m: messages.append(f"{m.type}: {m.text}"))
            pg.on("pageerror", lambda e: messages.append(f"pageerror: {e}"))
            pg.goto(lab["url"])
            pg.wait_for_function(
                "window.jupyterapp !== undefined && document.querySelector('.jp-Notebook')",
                timeout=120_000,
            )
            pg.wait_for_function(_KERNEL_IDLE, timeout=120_000)
            # room for the figures: fold the file browser away
            pg.evaluate(
                "() => { const s = window.jupyterapp.shell; if (s.leftCollapsed === false) "
                "window.jupyterapp.commands.execute('application:toggle-left-area'); }"
            )
            pg.evaluate("window.jupyterapp.commands.execute('notebook:run-all-cells')")
            pg.wait_for_function(_ALL_RUN, timeout=900_000, polling=1000)
            pg.locator(".peekalign-explorer canvas").first.wait_for(timeout=60_000)
            pg.wait_for_function(f"({_BAND})() !== null", timeout=60_000)
            pg.wait_for_timeout(1500)  # let BokehJS paint
            yield {"page": pg, "messages": messages, "tmp": lab["tmp"]}
        finally:
            ctx.close()


def _scroll_to(pg, selector: str) -> None:
    """Bring the element's top to the top of the notebook panel."""
    pg.locator(selector).first.evaluate("(el) => el.scrollIntoView({block: 'start'})")
    pg.wait_for_timeout(800)


def _screenshot(page, tmp: Path, name: str) -> Path:
    path = tmp / name
    page.screenshot(path=str(path), full_page=True)
    _keep(path)
    return path


def test_all_cells_run_without_errors(page):
    errors = page["page"].evaluate(_ERRORS)
    assert errors == []
    bad = [m for m in page["messages"] if "Failed to create view" in m or "pageerror" in m]
    assert bad == []


def test_explorer_plots_render_inside_the_widget(page):
    pg = page["page"]
    _scroll_to(pg, ".peekalign-explorer")
    canvases = pg.locator(".peekalign-explorer canvas")
    assert canvases.count() >= 4  # spectrogram, posteriors, tiers, soft alignment, ...
    drawn = canvases.evaluate_all(_PIXELS)
    # every panel has ink on it (a blank canvas has none)
    assert sum(1 for n in drawn if n > 500) >= 4, drawn
    shot = _screenshot(pg, page["tmp"], "lab-explorer.png")
    assert shot.stat().st_size > 50_000


def test_moving_the_lookahead_slider_in_the_page_moves_the_band(page):
    import peekalign
    from peekalign.data import demo_path
    from peekalign.streaming import token_windows

    pg = page["page"]
    before = pg.evaluate(_BAND)
    slider = pg.locator(".peekalign-explorer .peekalign-lookahead")
    readout = slider.locator(".widget-readout")
    eps0 = int(readout.inner_text())
    handle = slider.locator(".noUi-handle")
    handle.scroll_into_view_if_needed()
    handle.focus()
    for _ in range(3):
        handle.press("ArrowRight")
    eps = int(readout.inner_text())
    assert eps == eps0 + 3

    # reference: token_windows for the selected token of the shown utterance
    label = pg.locator(".peekalign-explorer .peekalign-utt select").evaluate(
        "(s) => s.options[s.selectedIndex].text"
    )
    uid = label.split()[0]  # "id · WER ..." (the page shows the spaces as no-break spaces)
    utt = peekalign.open_bundle(demo_path("full"))[uid]
    clock = utt.clock
    n = int(round((before["trigger"] - clock.frame_offset_s) / clock.frame_shift_s))
    w = token_windows(
        np.array([n]),
        num_frames=utt.num_frames,
        clock=clock,
        lookahead=eps,
        encoder_lookahead=utt.encoder_lookahead,
    )
    want = float(clock.end(w.end[0]))
    assert want > before["right"]
    # the kernel handles the three key presses in turn; wait for the last one
    pg.wait_for_function(f"Math.abs((({_BAND})() || {{}}).right - {want}) < 1e-9", timeout=30_000)
    after = pg.evaluate(_BAND)
    assert after["trigger"] == pytest.approx(before["trigger"])  # same token
    assert after["right"] == pytest.approx(want, abs=1e-9)
    assert after["left"] == pytest.approx(float(clock.start(w.start[0])), abs=1e-9)
    assert after["horizon"] == pytest.approx(max(float(w.horizon_s[0]), want), abs=1e-9)
    _scroll_to(pg, ".peekalign-explorer")
    _screenshot(pg, page["tmp"], "lab-explorer-lookahead.png")


def test_clicking_a_word_in_the_page_selects_it(page):
    pg = page["page"]
    before = pg.evaluate(_BAND)
    buttons = pg.locator(".peekalign-explorer .widget-gridbox button")
    assert buttons.count() >= 2
    # a word whose button is not the selected one
    for i in range(buttons.count()):
        b = buttons.nth(i)
        if "mod-info" not in (b.get_attribute("class") or ""):
            b.scroll_into_view_if_needed()
            b.click()
            break
    pg.wait_for_function(
        f"Math.abs((({_BAND})() || {{}}).trigger - {before['trigger']}) > 1e-9", timeout=30_000
    )
    assert pg.locator(".peekalign-explorer .widget-gridbox button.mod-info").count() == 1
    _screenshot(pg, page["tmp"], "lab-explorer-word.png")
