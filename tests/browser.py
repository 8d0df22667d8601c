"""Shared helpers for the tests that drive a real browser or a Jupyter front end.

Chromium: Debian's ``/usr/bin/chromium`` through playwright (never a downloaded
browser), headless, a fresh profile, and HOME/TMPDIR under the test's tmp dir for
the browser and for playwright's driver, so nothing lands in the user's home.

Jupyter: a server (``jupyter lab`` or ``jupyter notebook``) on a free loopback port
with a token, every Jupyter folder under the tmp dir, a kernel spec of this
interpreter, and a copy of ``notebooks/tour.ipynb`` using it. The JavaScript probes
below work in both front ends: each exposes its application as ``window.jupyterapp``
whose ``shell.currentWidget`` is the open notebook panel.

Import as ``from browser import ...`` (the tests folder is on ``sys.path`` as for
``conftest``).
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pytest
from conftest import require, require_program

REPO = Path(__file__).resolve().parents[1]
TOUR = REPO / "notebooks" / "tour.ipynb"
KERNEL = "peekalign-test"
CHROMIUM = "/usr/bin/chromium"

#: Headless Chromium run as root in a container, with no network chatter.
CHROMIUM_ARGS = (
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-quic",
    "--no-first-run",
    "--disable-component-update",
    "--disable-sync",
)


# --------------------------------------------------------------------------- Chromium
def require_chromium() -> str:
    """Skip (locally) / fail (under CI) unless playwright and Debian's Chromium are
    there; return the browser's path."""
    require("playwright")
    return require_program(CHROMIUM)


def browser_env(tmp: Path) -> dict:
    """This process's environment with HOME and TMPDIR under ``tmp``."""
    env = dict(os.environ)
    for key, sub in [("HOME", "home"), ("TMPDIR", "tmp")]:
        (tmp / sub).mkdir(parents=True, exist_ok=True)
        env[key] = str(tmp / sub)
    return env


def isolate_home(monkeypatch, tmp: Path) -> None:
    """Point HOME, TMPDIR and :mod:`tempfile` into ``tmp`` for code that starts its own
    Chromium (the package's PNG/SVG export)."""
    env = browser_env(tmp)
    monkeypatch.setenv("HOME", env["HOME"])
    monkeypatch.setenv("TMPDIR", env["TMPDIR"])
    monkeypatch.setattr(tempfile, "tempdir", env["TMPDIR"])


@contextmanager
def _environ(**values: str) -> Iterator[None]:
    old = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


@contextmanager
def chromium(tmp: Path, *, env: dict | None = None, **options):
    """A persistent playwright context of headless Debian Chromium, profile in
    ``tmp/profile``; ``options`` go to ``launch_persistent_context`` (viewport, ...).

    ``env`` (default: :func:`browser_env`) is the browser's environment; its HOME and
    TMPDIR are also set for playwright's driver (it keeps its artifacts in TMPDIR).
    """
    exe = require_chromium()
    from playwright.sync_api import sync_playwright

    env = browser_env(tmp) if env is None else env
    with _environ(HOME=env["HOME"], TMPDIR=env["TMPDIR"]), sync_playwright() as pw:
        ctx = pw.chromium.launch_persistent_context(
            str(tmp / "profile"),
            executable_path=exe,
            headless=True,
            args=list(CHROMIUM_ARGS),
            env=env,
            **options,
        )
        try:
            yield ctx
        finally:
            ctx.close()


@contextmanager
def standalone_page(tmp: Path, path: Path, *, viewport: dict) -> Iterator[tuple]:
    """A saved HTML page opened from file:// in :func:`chromium` and rendered:
    ``(page, messages)``, the console messages and page errors as ``(type, text)``."""
    from peekalign.views._export import wait_until_rendered

    with chromium(tmp, viewport=viewport) as ctx:
        page = ctx.new_page()
        messages: list[tuple[str, str]] = []
        page.on("console", lambda m: messages.append((m.type, m.text)))
        page.on("pageerror", lambda e: messages.append(("pageerror", str(e))))
        page.goto(path.resolve().as_uri())
        wait_until_rendered(page)
        yield page, messages


def keep_screenshot(path: Path) -> Path:
    """Copy a screenshot to $PEEKALIGN_SCREENSHOTS when set."""
    dest = os.environ.get("PEEKALIGN_SCREENSHOTS")
    if dest:
        Path(dest).mkdir(parents=True, exist_ok=True)
        shutil.copy2(path, Path(dest) / path.name)
    return path


def screenshot(page, tmp: Path, name: str) -> Path:
    """Full-page screenshot into ``tmp`` (and $PEEKALIGN_SCREENSHOTS)."""
    path = tmp / name
    page.screenshot(path=str(path), full_page=True)
    return keep_screenshot(path)


# --------------------------------------------------------------------------- Jupyter
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def jupyter_env(tmp: Path) -> dict:
    """Environment with every Jupyter/Chromium folder under ``tmp`` and a kernel spec
    of this interpreter named ``peekalign-test``."""
    env = browser_env(tmp)
    for key, sub in [
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


def quiet_settings(tmp: Path) -> Path:
    """An app settings folder whose overrides switch off news and update pop-ups."""
    settings = tmp / "app-settings"
    settings.mkdir(parents=True, exist_ok=True)
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
    return settings


@contextmanager
def jupyter_server(tmp: Path, app: str, extra_args: list[str], *, path: str):
    """Run ``python -m jupyter <app>`` serving a copy of the tour notebook from
    ``tmp/root``; yield ``{"url", "tmp", "env"}`` with ``url`` = base + ``path``
    (``{name}`` in it is the notebook's name) + token."""
    require("ipykernel")
    root = tmp / "root"
    root.mkdir()
    nb = json.loads(TOUR.read_text(encoding="utf-8"))
    nb["metadata"]["kernelspec"] = {"name": KERNEL, "display_name": KERNEL, "language": "python"}
    (root / TOUR.name).write_text(json.dumps(nb), encoding="utf-8")
    env = jupyter_env(tmp)
    port, token = free_port(), secrets.token_hex(16)
    log_path = tmp / f"{app}.log"
    log = open(log_path, "w")  # noqa: SIM115 - closed below
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "jupyter",
            app,
            "--allow-root",
            "--no-browser",
            "--ip=127.0.0.1",
            f"--port={port}",
            f"--IdentityProvider.token={token}",
            f"--ServerApp.root_dir={root}",
            *extra_args,
        ],
        env=env,
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    try:
        base = f"http://127.0.0.1:{port}"
        for _ in range(240):
            if proc.poll() is not None:
                pytest.fail(f"jupyter {app} exited: {log_path.read_text()[-2000:]}")
            try:
                urllib.request.urlopen(f"{base}/api/status?token={token}", timeout=1)
                break
            except OSError:
                time.sleep(0.5)
        else:
            pytest.fail(f"jupyter {app} did not start within 2 minutes")
        url = f"{base}{path.format(name=TOUR.name)}?token={token}"
        yield {"url": url, "tmp": tmp, "env": env, "log": log_path}
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


# ------------------------------------------------------ probes run in a Jupyter page
KERNEL_IDLE = """() => {
  const w = window.jupyterapp.shell.currentWidget;
  const k = w && w.sessionContext && w.sessionContext.session && w.sessionContext.session.kernel;
  return k != null && k.status === 'idle';
}"""

ALL_RUN = """() => {
  const w = window.jupyterapp.shell.currentWidget;
  const cells = w.content.widgets.filter((c) => c.model.type === 'code');
  return cells.every((c) => c.model.executionCount !== null)
    && w.sessionContext.session.kernel.status === 'idle';
}"""

ERRORS = """() => {
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

# the peek widget's bokeh document: the one holding the posterior-floor line it adds
MARKER = """() => {
  let doc = null;
  for (const d of Bokeh.documents) if (d.get_model_by_name('posterior_floor') != null) doc = d;
  if (doc == null) return null;
  const w = doc.get_model_by_name('window_strip_lanes');
  const c = doc.get_model_by_name('context_strip_lanes');
  const e = doc.get_model_by_name('window_end_lanes');
  const t = doc.get_model_by_name('trigger_line_lanes');
  return {left: w.left, right: w.right, heard_until: c.right, end: e.location, trigger: t.location};
}"""

# per canvas: how many pixels carry ink (not transparent, not near-white)
PIXELS = """(canvases) => canvases.map((c) => {
  const ctx = c.getContext('2d');
  if (ctx == null || c.width == 0 || c.height == 0) return 0;
  const d = ctx.getImageData(0, 0, c.width, c.height).data;
  let n = 0;
  for (let i = 0; i < d.length; i += 4) if (d[i + 3] > 0 && (d[i] < 235 || d[i + 1] < 235 || d[i + 2] < 235)) n++;
  return n;
})"""


def scroll_to(page, selector: str) -> None:
    """Bring the element's top to the top of the notebook panel."""
    page.locator(selector).first.evaluate("(el) => el.scrollIntoView({block: 'start'})")
    page.wait_for_timeout(800)


def run_tour(page, url: str, *, before_run=None) -> None:
    """Open the tour at ``url``, wait for its kernel, run all cells from the page and
    wait until the peek widget's plots are drawn. ``before_run(page)`` is called first."""
    page.goto(url)
    page.wait_for_function(
        "window.jupyterapp !== undefined && document.querySelector('.jp-Notebook')",
        timeout=120_000,
    )
    page.wait_for_function(KERNEL_IDLE, timeout=120_000)
    if before_run is not None:
        before_run(page)
    page.evaluate("window.jupyterapp.commands.execute('notebook:run-all-cells')")
    page.wait_for_function(ALL_RUN, timeout=900_000, polling=1000)
    page.locator(".peekalign-peek canvas").first.wait_for(timeout=60_000)
    page.wait_for_function(f"({MARKER})() !== null", timeout=60_000)
    page.wait_for_timeout(1500)  # let BokehJS paint


def press_lookahead(page, steps: int) -> tuple[int, int]:
    """Focus the peek widget's look-ahead slider handle and press ArrowRight ``steps``
    times; return its readout (before, after)."""
    slider = page.locator(".peekalign-peek .peekalign-lookahead")
    readout = slider.locator(".widget-readout")
    eps0 = int(readout.inner_text())
    handle = slider.locator(".noUi-handle")
    handle.scroll_into_view_if_needed()
    handle.focus()
    for _ in range(steps):
        handle.press("ArrowRight")
    return eps0, int(readout.inner_text())


def click_lookahead(page, value: int) -> tuple[int, int]:
    """Click the peek widget's look-ahead slider track where ``value`` sits; return its
    readout (before, after)."""
    slider = page.locator(".peekalign-peek .peekalign-lookahead")
    readout = slider.locator(".widget-readout")
    eps0 = int(readout.inner_text())
    handle = slider.locator(".noUi-handle")
    lo = float(handle.get_attribute("aria-valuemin"))
    hi = float(handle.get_attribute("aria-valuemax"))
    slider.scroll_into_view_if_needed()
    box = slider.locator(".noUi-base").bounding_box()
    x = box["x"] + box["width"] * (value - lo) / (hi - lo)
    page.mouse.click(x, box["y"] + box["height"] / 2)
    page.wait_for_function(
        "([el, v]) => el.textContent.trim() === String(v)",
        arg=[readout.element_handle(), value],
        timeout=10_000,
    )
    return eps0, int(readout.inner_text())


def expected_marker(page, trigger_s: float, lookahead: int) -> dict:
    """The window marker :func:`peekalign.streaming.token_windows` gives for the token
    whose trigger line is at ``trigger_s`` in the utterance the peek widget shows."""
    import peekalign
    from peekalign.data import demo_path
    from peekalign.streaming import token_windows

    label = page.locator(".peekalign-peek .peekalign-utt select").evaluate(
        "(s) => s.options[s.selectedIndex].text"
    )
    uid = label.split()[0]  # "id · WER ..." (the page shows the spaces as no-break spaces)
    utt = peekalign.open_bundle(demo_path("full"))[uid]
    clock = utt.clock
    n = int(round((trigger_s - clock.frame_offset_s) / clock.frame_shift_s))
    w = token_windows(
        np.array([n]),
        num_frames=utt.num_frames,
        clock=clock,
        lookahead=lookahead,
        encoder_lookahead=utt.encoder_lookahead,
    )
    right = float(clock.end(w.end[0]))
    return {
        "left": float(clock.start(w.start[0])),
        "right": right,
        "heard_until": max(float(w.heard_until_s[0]), right),
        "end": right,
    }


def check_peek_drawn(page, tmp: Path, shot: str) -> None:
    """The peek widget's bokeh panels are drawn inside the widget: at least four canvases
    with ink on them (a blank canvas has none); saves screenshot ``shot``."""
    scroll_to(page, ".peekalign-peek")
    canvases = page.locator(".peekalign-peek canvas")
    assert canvases.count() >= 4  # spectrogram, posteriors, lanes, CTC state occupancy, ...
    drawn = canvases.evaluate_all(PIXELS)
    assert sum(1 for n in drawn if n > 500) >= 4, drawn
    assert screenshot(page, tmp, shot).stat().st_size > 50_000


def check_marker_moved(page, before: dict, lookahead: int) -> dict:
    """Wait until BokehJS draws the window marker of the token selected ``before`` where
    :func:`peekalign.streaming.token_windows` puts it at ``lookahead`` (the reference),
    then compare every edge to 1e-9; returns the marker drawn."""
    want = expected_marker(page, before["trigger"], lookahead)
    assert want["right"] > before["right"]
    # the kernel handles the slider's steps in turn; wait for the last one
    page.wait_for_function(
        f"Math.abs((({MARKER})() || {{}}).right - {want['right']}) < 1e-9", timeout=30_000
    )
    after = page.evaluate(MARKER)
    assert after["trigger"] == pytest.approx(before["trigger"])  # same token
    for edge in ("right", "left", "heard_until", "end"):
        assert after[edge] == pytest.approx(want[edge], abs=1e-9), edge
    return after


@contextmanager
def tour_page(server: dict, *, before_run=None) -> Iterator[dict]:
    """Chromium on the server's tour with every cell run (:func:`run_tour`).

    Yields ``page``, ``messages`` (console lines, and page errors with their stacks),
    ``loaded`` (how many messages came before any cell ran) and ``tmp``.
    ``before_run(page)`` is called once the kernel is idle, before the cells run.
    """
    viewport = {"width": 1600, "height": 1400}
    with chromium(server["tmp"], env=server["env"], viewport=viewport) as ctx:
        pg = ctx.new_page()
        messages: list[str] = []
        pg.on("console", lambda m: messages.append(f"{m.type}: {m.text}"))
        pg.on("pageerror", lambda e: messages.append(f"pageerror: {e}\n{e.stack}"))
        loaded: list[int] = []

        def before(p) -> None:
            loaded.append(len(messages))
            if before_run is not None:
                before_run(p)

        try:
            run_tour(pg, server["url"], before_run=before)
        except Exception:  # say what the page said before it timed out
            print("\n".join(messages[-40:]))
            raise
        yield {"page": pg, "messages": messages, "loaded": loaded[0], "tmp": server["tmp"]}
