"""The standalone page in a real browser: Debian's Chromium driven by playwright.

Checks: the page loads from file:// with no console errors, every canvas has drawn
pixels, and selecting a token (widget or click), moving the look-ahead slider,
switching the attention view and the posterior scale change the page's model state
as the streaming formulas say. Screenshots go to pytest's tmp dir and, when the env
``PEEKALIGN_SCREENSHOTS`` names a folder, are copied there.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from browser import isolate_home, keep_screenshot, require_chromium, standalone_page
from test_views import make_utterance

from peekalign.analysis import analyze
from peekalign.streaming import token_windows
from peekalign.views import export_png, export_svg, save_html, utterance_view, window_state
from peekalign.views._export import wait_until_rendered

pytestmark = pytest.mark.browser

LOOKAHEAD = 3


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("page")
    utt = make_utterance(np.random.default_rng(20261202), tmp)
    a = analyze(utt, lookahead=LOOKAHEAD)
    view = utterance_view(a)
    path = save_html(view, tmp / "utt.html")
    return {"analysis": a, "view": view, "path": path, "tmp": tmp}


@pytest.fixture(scope="module")
def browser_page(built):
    viewport = {"width": 1450, "height": 1300}
    with standalone_page(built["tmp"], built["path"], viewport=viewport) as opened:
        yield opened


def _model(page, name: str, attr: str):
    return page.evaluate("([n, a]) => Bokeh.documents[0].get_model_by_name(n)[a]", [name, attr])


def _set(page, name: str, attr: str, value) -> None:
    page.evaluate(
        "([n, a, v]) => { Bokeh.documents[0].get_model_by_name(n)[a] = v; }", [name, attr, value]
    )


def _markers(page) -> dict:
    return page.evaluate(
        """() => {
        const d = Bokeh.documents[0], out = {};
        for (const p of ["spectrogram", "posteriors", "lanes", "occupancy", "attention"]) {
          const w = d.get_model_by_name("window_strip_" + p), c = d.get_model_by_name("context_strip_" + p);
          const e = d.get_model_by_name("window_end_" + p), t = d.get_model_by_name("trigger_line_" + p);
          out[p] = [w.left, w.right, c.right, t.location, e.location, c.left, w.visible];
        }
        return out; }"""
    )


def _expected(built, u: int, eps: int) -> list:
    # reference: the streaming module's token_windows (the triggered-attention window
    # formula), independent of the view code that draws the marker
    a = built["analysis"]
    c = a.utt.clock
    w = token_windows(
        a.windows.trigger,
        num_frames=a.utt.num_frames,
        clock=c,
        lookahead=eps,
        encoder_lookahead=a.utt.encoder_lookahead,
    )
    x0 = float(c.start(w.start[u]))
    x1 = float(c.end(w.end[u]))
    return [x0, x1, max(float(w.heard_until_s[u]), x1), float(c.time(w.trigger[u]))]


def _wait_marker(page, right: float) -> None:
    page.wait_for_function(
        "r => Math.abs(Bokeh.documents[0].get_model_by_name('window_strip_lanes').right - r) < 1e-9",
        arg=right,
        timeout=10_000,
    )
    wait_until_rendered(page)


_BLANK_CANVASES = """() => {
    let blank = 0;
    function* all(root) {
      for (const el of root.querySelectorAll("*")) {
        if (el.tagName == "CANVAS") yield el;
        if (el.shadowRoot) yield* all(el.shadowRoot);
      }
    }
    for (const c of all(document)) {
      if (c.width == 0 || c.height == 0) { blank++; continue; }
      const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
      let n = 0;
      for (let i = 3; i < d.length && n == 0; i += 4) if (d[i] > 0) n++;
      if (n == 0) blank++;
    }
    return blank;
}"""


def _screenshot(page, built, name: str) -> Path:
    # a layout change (e.g. the slider's title) redraws the legends' swatches: wait for
    # every canvas to be drawn again before taking the picture
    page.wait_for_function(f"({_BLANK_CANVASES})() == 0", timeout=10_000)
    path = built["tmp"] / name
    page.screenshot(path=str(path), full_page=True)
    keep_screenshot(path)
    return path


def test_page_loads_without_console_errors(browser_page):
    page, messages = browser_page
    bad = [m for m in messages if m[0] in ("error", "pageerror")]
    assert not bad, bad
    assert page.evaluate("Bokeh.documents.length") == 1


def test_every_canvas_has_pixels(browser_page, built):
    page, _ = browser_page
    counts = page.evaluate(
        """() => {
        const out = [];
        function* all(root) {
          for (const el of root.querySelectorAll("*")) {
            if (el.tagName == "CANVAS") yield el;
            if (el.shadowRoot) yield* all(el.shadowRoot);
          }
        }
        for (const c of all(document)) {
          const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
          let n = 0;
          for (let i = 0; i < d.length; i += 4)
            if (d[i + 3] > 0 && (d[i] < 250 || d[i + 1] < 250 || d[i + 2] < 250)) n++;
          out.push([c.width, c.height, n]);
        }
        return out; }"""
    )
    big = [c for c in counts if c[0] > 200]
    # five panels, each with a primary and an overlay layer
    assert len(big) == 10, counts
    assert all(n > 0 for _, _, n in counts), counts
    _screenshot(page, built, "view-initial.png")


def test_selecting_a_token_moves_the_window_marker(browser_page, built):
    page, _ = browser_page
    u = 4
    want = _expected(built, u, LOOKAHEAD)
    _set(page, "token_select", "value", str(u))
    _wait_marker(page, want[1])
    for name, (x0, x1, hs, trig, end, _c0, visible) in _markers(page).items():
        assert visible, name
        np.testing.assert_allclose(
            [x0, x1, hs, trig, end], want + [want[1]], atol=1e-9, err_msg=name
        )
    # the info line says the same as the Python side (up to the attention mass, which
    # the browser computes from the uint8 image)
    info = _model(page, "info", "text")
    v = built["view"]
    v.select(u)
    assert (
        info.split(" &middot; attention mass")[0]
        == v.info.text.split(" &middot; attention mass")[0]
    )
    _screenshot(page, built, "view-token-4.png")


def test_clicking_a_token_selects_it(browser_page, built):
    page, _ = browser_page
    a = built["analysis"]
    u = 9
    c = a.utt.clock
    cx = float((c.start(a.alignment.first[u]) + c.end(a.alignment.last[u])) / 2)
    # screen position of token u in the lanes panel (bokeh's own scales)
    xy = page.evaluate(
        """(cx) => {
        function* walk(v) { yield v; if (v.child_views) for (const c of v.child_views) yield* walk(c); }
        for (const v of walk(Bokeh.index.roots[0])) {
          if (v.model.name == "lanes") {
            const f = v.frame, r = v.canvas_view.el.getBoundingClientRect();
            return [r.x + f.x_scale.compute(cx), r.y + f.y_scale.compute(0.2)];
          }
        }
        return null; }""",
        cx,
    )
    assert xy is not None
    page.mouse.click(xy[0], xy[1])
    want = _expected(built, u, LOOKAHEAD)
    _wait_marker(page, want[1])
    assert _model(page, "token_select", "value") == str(u)


def test_lookahead_slider_moves_the_window_marker(browser_page, built):
    page, _ = browser_page
    _set(page, "token_select", "value", "4")
    for eps in (0, 9):
        want = _expected(built, 4, eps)
        _set(page, "lookahead", "value", eps)
        _wait_marker(page, want[1])
        for name, (x0, x1, hs, trig, end, c0, _v) in _markers(page).items():
            np.testing.assert_allclose([x0, x1, hs, trig], want, atol=1e-9, err_msg=name)
            # the dashed end line and the right-context strip start where the window ends
            np.testing.assert_allclose([end, c0], [x1, x1], atol=1e-9, err_msg=name)
    # the attention panel's window edges follow the attention rows' own windows
    a = built["analysis"]
    aw = a.attention_windows
    w = token_windows(
        aw.trigger,
        num_frames=a.utt.num_frames,
        clock=a.utt.clock,
        lookahead=9,
        encoder_lookahead=a.utt.encoder_lookahead,
    )
    edge = page.evaluate(
        "() => Array.from(Bokeh.documents[0].get_model_by_name('attention_window_end').data.x)"
    )
    np.testing.assert_allclose(edge[::2], a.utt.clock.end(w.end), atol=1e-9)
    _screenshot(page, built, "view-lookahead-9.png")
    # Python's window_state agrees with the browser at the same look-ahead
    st = window_state(built["view"].vm, 9)
    assert _markers(page)["lanes"][2] == pytest.approx(st["heard_until_s"][4])


def test_attention_view_and_posterior_scale_switch(browser_page, built):
    page, _ = browser_page
    title = _model(page, "attention", "title")
    assert page.evaluate(
        "() => Bokeh.documents[0].get_model_by_name('attention').title.text"
    ).startswith("decoder cross-attention: mean")
    assert title is not None
    _set(page, "attention_mode", "value", "L1H1")
    page.wait_for_function(
        "() => Bokeh.documents[0].get_model_by_name('attention').title.text"
        ".endsWith('layer 2, head 2')",
        timeout=10_000,
    )
    # the unpacked head image equals the dumped head to a uint8 step
    img = page.evaluate(
        "() => Array.from(Bokeh.documents[0].get_model_by_name('attention_image').data.image[0])"
    )
    head = built["analysis"].utt.attention[1, 1]
    got = np.asarray(img, np.float32).reshape(head.shape)
    assert np.abs(got - head).max() <= head.max() / 255 / 2 + 1e-6
    _set(page, "scale", "active", 1)
    page.wait_for_function(
        "() => Bokeh.documents[0].get_model_by_name('posteriors').y_range.start == -4",
        timeout=10_000,
    )
    wait_until_rendered(page)
    _screenshot(page, built, "view-log-scale-head.png")


def test_export_png_and_svg(built, tmp_path, monkeypatch):
    require_chromium()
    isolate_home(monkeypatch, tmp_path)
    a = built["analysis"]
    png = export_png(a, tmp_path / "utt.png", token=4)
    from PIL import Image

    im = np.asarray(Image.open(png).convert("L"))
    assert im.shape[0] > 600 and im.shape[1] > 1000
    assert (im < 128).mean() > 0.01  # drawn, not a blank page
    keep_screenshot(png)
    svg = export_svg(a, tmp_path / "utt.svg", token=4)
    import xml.etree.ElementTree as ET

    root = ET.parse(svg).getroot()
    assert root.tag.endswith("svg")
    assert len(list(root.iter())) > 100
    with pytest.raises(Exception, match="overwrite"):
        export_png(a, png)


def test_hover_shows_transcript_text_as_text(browser_page, built):
    # the reference word "<b>" must show literally in the tooltip, never as markup
    page, _ = browser_page
    w = built["analysis"].words
    i = list(w.words).index("<b>")
    cx = float((w.start_s[i] + w.end_s[i]) / 2)
    xy = page.evaluate(
        """(cx) => {
        function* walk(v) { yield v; if (v.child_views) for (const c of v.child_views) yield* walk(c); }
        for (const v of walk(Bokeh.index.roots[0])) if (v.model.name == "lanes") {
          const r = v.canvas_view.el.getBoundingClientRect(), f = v.frame;
          return [r.x + f.x_scale.compute(cx), r.y + f.y_scale.compute(2)];
        }
        return null; }""",
        cx,
    )
    page.mouse.move(xy[0], xy[1])
    page.wait_for_timeout(300)
    tips = page.evaluate(
        """() => { const out = [];
        function* all(root) {
          for (const el of root.querySelectorAll("*")) { yield el; if (el.shadowRoot) yield* all(el.shadowRoot); }
        }
        for (const el of all(document))
          if (el.classList && el.classList.contains("bk-tooltip-content"))
            out.push([el.textContent, el.querySelectorAll("b").length]);
        return out; }"""
    )
    page.mouse.move(2, 2)
    assert any("word: <b>" in text and n_bold == 0 for text, n_bold in tips), tips
