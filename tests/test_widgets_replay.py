"""The peek widget's decoding replay (play button, frame slider, live beam table)."""

from __future__ import annotations

import pytest
from conftest import prefix_words, require

import peekalign
from peekalign.data import demo_path


@pytest.fixture(scope="module")
def app():
    require("ipywidgets")
    return peekalign.peek(demo_path("streaming"), utt="tram-006", scan=False,
                          options={"search": {"beam": 4}})  # fmt: skip


def test_replay_slider_steps_the_cursor_and_the_beam_table(app):
    import ipywidgets as W

    rp = app.replay
    assert rp.layout.display != "none"
    assert isinstance(rp.play, W.Play) and rp.play.max == rp.slider.max
    tr = app.analysis.search.trace
    vocab, clock = app.analysis.utt.vocab, app.analysis.utt.clock
    assert rp.slider.value == tr.num_frames - 1  # opens on the final result
    for f in (5, 33, 60):
        rp.slider.value = f  # what the play button does, one frame a tick
        ids, _ = tr.beam_at(f)
        # reference: the search trace, decoded with the vocabulary
        assert f'class="replay-partial">{prefix_words(vocab, tr, ids[0])}<' in rp.box.value
        assert all(f"<td>{prefix_words(vocab, tr, p)}" in rp.box.value for p in ids)
        cursor = app.view.panels["beam"].models["cursor"]
        assert cursor.location == pytest.approx(float(clock.time(f)))


def test_replay_hidden_without_a_search():
    require("ipywidgets")
    app = peekalign.peek(demo_path("streaming"), utt="tram-006", scan=False)
    assert app.replay.layout.display == "none"
