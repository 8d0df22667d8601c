"""The tour notebook in a real JupyterLab, driven by Debian's Chromium (playwright).

JupyterLab runs on a free loopback port with a token; HOME, TMPDIR and every Jupyter
folder live under pytest's tmp dir, and a kernel spec of this interpreter is installed
there (helpers in ``tests/browser.py``). The test runs all cells from the page, checks
that the peek widget's bokeh plots are drawn inside the widget, moves the peek widget's
look-ahead slider with the keyboard and reads the window marker back from BokehJS,
comparing it with :func:`peekalign.streaming.token_windows` computed here.
Screenshots go to pytest's tmp dir and, when the env ``PEEKALIGN_SCREENSHOTS`` names a
folder, are copied there.
"""

from __future__ import annotations

import pytest
from browser import (
    ERRORS,
    MARKER,
    check_marker_moved,
    check_peek_drawn,
    jupyter_server,
    press_lookahead,
    quiet_settings,
    screenshot,
    scroll_to,
    tour_page,
)
from conftest import require

pytestmark = [pytest.mark.browser, pytest.mark.slow]


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    """A running JupyterLab serving a copy of the tour notebook; yields its URL."""
    require("jupyterlab")
    tmp = tmp_path_factory.mktemp("lab")
    args = [
        "--LabApp.news_url=None",
        "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
        "--LabApp.extension_manager=readonly",
        "--LabApp.expose_app_in_browser=True",
        # no news or update pop-ups over the notebook
        f"--LabApp.app_settings_dir={quiet_settings(tmp)}",
    ]
    with jupyter_server(tmp, "lab", args, path="/lab/tree/{name}") as server:
        yield server


@pytest.fixture(scope="module")
def page(lab):
    # room for the figures: fold the file browser away
    fold = (
        "() => { const s = window.jupyterapp.shell; if (s.leftCollapsed === false) "
        "window.jupyterapp.commands.execute('application:toggle-left-area'); }"
    )
    with tour_page(lab, before_run=lambda p: p.evaluate(fold)) as page:
        yield page


def test_all_cells_run_without_errors(page):
    errors = page["page"].evaluate(ERRORS)
    assert errors == []
    bad = [m for m in page["messages"] if "Failed to create view" in m or "pageerror" in m]
    assert bad == []


def test_peek_plots_render_inside_the_widget(page):
    check_peek_drawn(page["page"], page["tmp"], "lab-peek.png")


def test_moving_the_lookahead_slider_in_the_page_moves_the_window_marker(page):
    pg = page["page"]
    before = pg.evaluate(MARKER)
    eps0, eps = press_lookahead(pg, 3)
    assert eps == eps0 + 3

    # reference: token_windows for the selected token of the shown utterance
    check_marker_moved(pg, before, eps)
    scroll_to(pg, ".peekalign-peek")
    screenshot(pg, page["tmp"], "lab-peek-lookahead.png")


def test_clicking_a_word_in_the_page_selects_it(page):
    pg = page["page"]
    before = pg.evaluate(MARKER)
    buttons = pg.locator(".peekalign-peek .widget-gridbox button")
    assert buttons.count() >= 2
    # a word whose button is not the selected one
    for i in range(buttons.count()):
        b = buttons.nth(i)
        if "mod-info" not in (b.get_attribute("class") or ""):
            b.scroll_into_view_if_needed()
            b.click()
            break
    pg.wait_for_function(
        f"Math.abs((({MARKER})() || {{}}).trigger - {before['trigger']}) > 1e-9", timeout=30_000
    )
    assert pg.locator(".peekalign-peek .widget-gridbox button.mod-info").count() == 1
    screenshot(pg, page["tmp"], "lab-peek-word.png")
