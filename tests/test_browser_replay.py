"""The beam lane and the replay cursor in a real browser (Debian Chromium, playwright).

Checks: the standalone page of an analysis that ran a traced search loads with no
console errors, the beam lane draws, and moving the replay slider moves the cursor and
rewrites the partial text and the beam list as the search trace says. Screenshots go
to pytest's tmp dir and, when ``PEEKALIGN_SCREENSHOTS`` names a folder, there too.
"""

from __future__ import annotations

import pytest
from browser import keep_screenshot, standalone_page

from peekalign import analyze, open_bundle
from peekalign.data import demo_path
from peekalign.views import save_html
from peekalign.views._export import wait_until_rendered

pytestmark = pytest.mark.browser

UTT = "tram-006"


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("replay")
    a = analyze(open_bundle(demo_path("streaming"))[UTT], search={"beam": 4})
    path = save_html(a, tmp / "replay.html")
    return {"analysis": a, "path": path, "tmp": tmp}


@pytest.fixture(scope="module")
def browser_page(built):
    viewport = {"width": 1450, "height": 1500}
    with standalone_page(built["tmp"], built["path"], viewport=viewport) as opened:
        yield opened


def _beam_canvas_pixels(page) -> list:
    """Non-white pixels of the beam lane's canvases (bokeh's own view tree)."""
    return page.evaluate(
        """() => {
        function* walk(v) { yield v; if (v.child_views) for (const c of v.child_views) yield* walk(c); }
        for (const v of walk(Bokeh.index.roots[0])) {
          if (v.model.name != "beam") continue;
          const out = [];
          for (const c of v.canvas_view.el.shadowRoot.querySelectorAll("canvas")) {
            const d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
            let n = 0;
            for (let i = 0; i < d.length; i += 4)
              if (d[i + 3] > 0 && (d[i] < 250 || d[i + 1] < 250 || d[i + 2] < 250)) n++;
            out.push(n);
          }
          return out;
        }
        return null; }"""
    )


def _replay_text(page) -> str:
    return page.evaluate("() => Bokeh.documents[0].get_model_by_name('replay_box').text")


def _move(page, frame: int) -> None:
    page.evaluate(
        "(f) => { Bokeh.documents[0].get_model_by_name('replay_frame').value = f; }", frame
    )
    wait_until_rendered(page)


def test_beam_lane_draws_and_replay_moves(browser_page, built):
    page, messages = browser_page
    pixels = _beam_canvas_pixels(page)
    assert pixels is not None and max(pixels) > 10_000, pixels
    a = built["analysis"]
    tr, vocab, clock = a.search.trace, a.utt.vocab, a.utt.clock
    before = _replay_text(page)
    seen = []
    for f in (12, 40, 75):
        _move(page, f)
        text = _replay_text(page)
        seen.append(text)
        # reference: the search trace: the best kept prefix after frame f and the kept
        # beam, decoded with the vocabulary (not with the view's own tables)
        ids, _ = tr.beam_at(f)
        words = [" ".join(w for w, _, _ in vocab.words(_tokens(tr, p))) for p in ids]
        assert f"<b>frame {f}</b>" in text
        assert f'class="replay-partial">{words[0]}<' in text
        for w in words:
            assert f"<td>{w}" in text
        assert len(text.split("<tr><td>")) - 1 == len(ids)
        loc = page.evaluate("() => Bokeh.documents[0].get_model_by_name('replay_cursor').location")
        assert loc == pytest.approx(float(clock.time(f)), abs=1e-6)
    assert len(set(seen + [before])) == 4  # the partial and the beam list changed
    page.locator(".replay").first.scroll_into_view_if_needed()
    path = built["tmp"] / "replay-beam-lane.png"
    page.screenshot(path=str(path), full_page=True)
    keep_screenshot(path)
    bad = [m for m in messages if m[0] in ("error", "pageerror")]
    assert not bad, bad


def _tokens(tr, p) -> list[int]:
    out = []
    j = int(p)
    while j > 0:
        out.append(int(tr.token[j]))
        j = int(tr.parent[j])
    return out[::-1]


def test_hover_of_a_prune_event_names_its_prefix(browser_page, built):
    page, _ = browser_page
    a = built["analysis"]
    # the first prune event of a prefix that had been kept, in screen coordinates
    xy = page.evaluate(
        """() => {
        function* walk(v) { yield v; if (v.child_views) for (const c of v.child_views) yield* walk(c); }
        const src = Bokeh.documents[0].get_model_by_name("beam_pruned");
        for (const v of walk(Bokeh.index.roots[0])) {
          if (v.model.name != "beam") continue;
          const f = v.frame, r = v.canvas_view.el.getBoundingClientRect();
          return [r.x + f.x_scale.compute(src.data.x[0]), r.y + f.y_scale.compute(src.data.y[0]),
                  src.data.prefix[0]];
        }
        return null; }"""
    )
    assert xy is not None
    page.mouse.move(xy[0], xy[1])
    page.wait_for_timeout(300)
    text = page.evaluate(
        """() => { const out = [];
        function* all(root) {
          for (const el of root.querySelectorAll("*")) { yield el; if (el.shadowRoot) yield* all(el.shadowRoot); }
        }
        for (const el of all(document))
          if (el.classList && el.classList.contains("bk-tooltip-content")) out.push(el.textContent);
        return out.join(" | "); }"""
    )
    page.mouse.move(2, 2)
    # reference: the search trace: its first prune event of a prefix held before
    tr = a.search.trace
    first, _ = tr._held_span()
    e = next(
        i for i, (p, f) in enumerate(zip(tr.prune_prefix, tr.prune_frame, strict=True))
        if -2 < first[p] < f
    )  # fmt: skip
    words = " ".join(w for w, _, _ in a.utt.vocab.words(_tokens(tr, tr.prune_prefix[e])))
    assert "gap to cut-off" in text and "pruned at" in text
    assert f"{float(tr.prune_gap[e]):.3f}" in text
    assert words in text


def test_beam_list_lm_and_decoder_columns_in_the_browser(browser_page, built):
    from test_views_beam import _FixedDecoder

    from peekalign.views import utterance_view
    from peekalign.views._beam import _REPLAY_STYLE, replay_html
    from peekalign.views._model import view_model

    u = open_bundle(demo_path("streaming"))[UTT]
    opts = {
        "beam": 4,
        "lm": lambda history, unit: -0.5 * (len(history) + 1),
        "lm_weight": 0.5,
        "decoder": _FixedDecoder(u.log_probs.shape[1] + 1),
        "decoder_weight": 0.3,
    }
    a = analyze(u, search=opts)
    path = save_html(a, built["tmp"] / "replay-parts.html")
    page = browser_page[0].context.new_page()
    try:
        errors = []
        page.on("pageerror", lambda e: errors.append(str(e)))
        page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        page.goto(path.resolve().as_uri())
        wait_until_rendered(page)
        vm, view = view_model(a), utterance_view(a)
        for f in (20, 60):
            _move(page, f)
            # reference: the box Python writes for the same frame (the page's script
            # computes the columns from its own tables)
            expect = _REPLAY_STYLE + replay_html(vm, view.replay, f, lookahead=view.lookahead)
            assert _replay_text(page) == expect
            assert "<th>lm</th><th>decoder</th>" in expect
        page.locator(".replay").first.scroll_into_view_if_needed()
        shot = built["tmp"] / "replay-beam-parts.png"
        page.locator(".replay").first.screenshot(path=str(shot))
        keep_screenshot(shot)
    finally:
        page.close()
    assert errors == []
