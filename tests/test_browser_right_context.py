"""A chunked encoder in a real browser: moving the look-ahead slider moves each
panel's window end and right-context end to where a chunk of 4 frames puts them, as
the Python side does. (Its own module: the view tests keep one Chromium open for the
whole module.)
"""

from __future__ import annotations

import numpy as np
import pytest
from browser import keep_screenshot, standalone_page
from test_views import chunked_utterance

from peekalign.analysis import analyze
from peekalign.views import save_html, utterance_view
from peekalign.views._export import wait_until_rendered

pytestmark = pytest.mark.browser

PANELS = ("spectrogram", "posteriors", "lanes", "occupancy", "attention", "need")

_MARKERS = """(panels) => {
    const d = Bokeh.documents[0], out = {};
    for (const p of panels) {
      const w = d.get_model_by_name("window_strip_" + p), c = d.get_model_by_name("context_strip_" + p);
      const e = d.get_model_by_name("window_end_" + p);
      out[p] = [w.right, e.location, c.right];
    }
    out.rows = Array.from(d.get_model_by_name("attention_heard_until").data.x);
    return out; }"""


def _hand_worked(vm, n: int, eps: int) -> tuple[float, float]:
    """Window end (right edge of frame n + eps) and heard-until time (centre of the last
    frame of the chunk of n + eps, plus the front end's right context)."""
    # reference: hand-worked: chunks of 4 frames, frame m hears up to 4 (m // 4) + 3
    end = min(n + eps, vm.num_frames - 1)
    heard = 4 * ((n + eps) // 4) + 3
    return float(vm.frame_end(end)), float(vm.frame_time(heard)) + vm.right_context_s


def test_slider_moves_window_ends_by_chunks(tmp_path_factory):
    # a short folder name: Chromium's singleton socket path has a length limit
    tmp_path = tmp_path_factory.mktemp("chunk")
    utt = chunked_utterance(np.random.default_rng(20261203), tmp_path)
    a = analyze(utt, lookahead=0)
    need = np.arange(len(utt.ref_tokens)) % 5
    view = utterance_view(a, need=need, token=2)
    vm = view.vm
    n = int(vm.trigger[2])
    path = save_html(view, tmp_path / "chunked.html")
    with standalone_page(tmp_path, path, viewport={"width": 1450, "height": 1700}) as opened:
        page, messages = opened
        for eps in (0, 1, 2, 3, 6):
            page.evaluate(
                "(v) => { Bokeh.documents[0].get_model_by_name('lookahead').value = v; }", eps
            )
            end_s, heard_s = _hand_worked(vm, n, eps)
            page.wait_for_function(
                "r => Math.abs(Bokeh.documents[0].get_model_by_name('window_end_lanes')"
                ".location - r) < 1e-9",
                arg=end_s,
                timeout=10_000,
            )
            wait_until_rendered(page)
            drawn = page.evaluate(_MARKERS, list(PANELS))
            for p in PANELS:
                # the strip ends at the window, its hatched continuation at the chunk end
                assert drawn[p][:2] == pytest.approx([end_s, end_s], abs=1e-9), (p, eps)
                assert drawn[p][2] == pytest.approx(max(heard_s, end_s), abs=1e-9), (p, eps)
            # every attention row's heard-until edge: the chunk end of its own trigger
            rows = [t for t in vm.attention_trigger.tolist() if t >= 0]
            want = [_hand_worked(vm, t, eps)[1] for t in rows for _ in (0, 1)]
            assert drawn["rows"] == pytest.approx(want, abs=1e-9)
            view.set_lookahead(eps)  # the Python side draws the same
            assert view.state()["heard_until"] == pytest.approx(drawn["lanes"][2], abs=1e-9)
            if eps == 2:
                shot = tmp_path / "view-chunked-encoder.png"
                page.screenshot(path=str(shot), full_page=True)
                keep_screenshot(shot)
        bad = [m for m in messages if m[0] in ("error", "pageerror")]
        assert not bad, bad
