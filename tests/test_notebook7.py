"""The tour notebook in Jupyter Notebook 7 (the ``notebook`` package), driven by Debian's
Chromium through playwright.

Notebook 7 is built from JupyterLab's components but has its own page and shell (one
document per tab, no side panels, a narrower notebook column). The server runs on a
free loopback port with a token; HOME, TMPDIR and every Jupyter folder live under
pytest's tmp dir, with a kernel spec of this interpreter (helpers in
``tests/browser.py``). The test runs all cells from the page and checks what
``test_jupyterlab.py`` checks: no error outputs, the peek widget's bokeh plots drawn
inside the widget, and the look-ahead slider, moved with the mouse (Notebook 7 takes
the arrow keys for its own shortcuts), moving the window marker read back from BokehJS,
compared with
:func:`peekalign.streaming.token_windows` computed here. Screenshots go to pytest's
tmp dir and, when the env ``PEEKALIGN_SCREENSHOTS`` names a folder, are copied there.
"""

from __future__ import annotations

import os

import pytest
from browser import (
    ERRORS,
    MARKER,
    check_marker_moved,
    check_peek_drawn,
    click_lookahead,
    jupyter_server,
    quiet_settings,
    screenshot,
    scroll_to,
    tour_page,
)
from conftest import require

pytestmark = [pytest.mark.browser, pytest.mark.slow]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    """A running Notebook 7 serving a copy of the tour notebook; yields its URL."""
    notebook = require("notebook")
    major = int(notebook.__version__.split(".")[0])
    if major != 7:
        # the test extra pins notebook 7; elsewhere another major version is no failure
        why = f"this test is for Notebook 7; found notebook {notebook.__version__}"
        if os.environ.get("CI"):
            pytest.fail(why)
        pytest.skip(why)  # intended: CI fails instead (above)
    tmp = tmp_path_factory.mktemp("nb7")
    args = [
        "--JupyterNotebookApp.expose_app_in_browser=True",
        # no news or update pop-ups over the notebook
        f"--JupyterNotebookApp.app_settings_dir={quiet_settings(tmp)}",
    ]
    with jupyter_server(tmp, "notebook", args, path="/notebooks/{name}") as srv:
        yield srv


@pytest.fixture(scope="module")
def page(server):
    with tour_page(server) as page:
        yield page


def test_the_page_is_notebook_7(page):
    # the notebook page of Notebook 7, not JupyterLab's: its own shell and app name
    pg = page["page"]
    assert pg.evaluate("window.jupyterapp.name") == "Jupyter Notebook"
    assert pg.locator("#main-panel .jp-Notebook").count() == 1


def _bad(messages: list[str]) -> list[str]:
    return [m for m in messages if "Failed to create view" in m or "pageerror" in m]


def test_all_cells_run_without_errors(page):
    errors = page["page"].evaluate(ERRORS)
    assert errors == []
    # nothing goes wrong in the page once the cells run
    assert _bad(page["messages"][page["loaded"] :]) == []


def test_the_page_loads_with_no_script_error_but_notebook_7s_own(page):
    # Notebook 7.6 itself throws one TypeError while it loads its settings (reading
    # 'schema' in its keyboard-shortcut settings handler), on its file-browser page too,
    # before any notebook or kernel is involved. Tolerate exactly that: a script error
    # raised from the application's own bundle; anything else fails.
    for m in _bad(page["messages"][: page["loaded"]]):
        frames = [line.strip() for line in m.splitlines() if line.strip().startswith("at ")]
        assert "reading 'schema'" in m and frames, m
        assert "/static/notebook/notebook_core." in frames[0], m


def test_peek_plots_render_inside_the_widget(page):
    check_peek_drawn(page["page"], page["tmp"], "nb7-peek.png")


def test_moving_the_lookahead_slider_in_the_page_moves_the_window_marker(page):
    # By mouse: in Notebook 7.6 the arrow keys on the focused slider handle go to the
    # notebook's command mode instead (ArrowRight = jump to the next heading cell), so
    # the keyboard route test_jupyterlab.py takes does not reach the slider here.
    pg = page["page"]
    before = pg.evaluate(MARKER)
    handle = pg.locator(".peekalign-peek .peekalign-lookahead .noUi-handle")
    eps0, eps = click_lookahead(pg, int(float(handle.get_attribute("aria-valuenow"))) + 3)
    assert eps == eps0 + 3

    # reference: token_windows for the selected token of the shown utterance
    check_marker_moved(pg, before, eps)
    scroll_to(pg, ".peekalign-peek")
    screenshot(pg, page["tmp"], "nb7-peek-lookahead.png")
