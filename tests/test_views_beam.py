"""The beam lane and replay cursor built in Python (no browser): data, sizes, errors."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import prefix_words

from peekalign import FrameClock, Utterance, Vocabulary, WordBoundary, analyze, open_bundle
from peekalign.data import demo_path
from peekalign.exceptions import ParameterError
from peekalign.views import standalone_html, utterance_view
from peekalign.views._beam import replay_to


@pytest.fixture(scope="module")
def searched():
    return analyze(open_bundle(demo_path("streaming"))["tram-006"], search={"beam": 4})


def test_lane_only_with_a_search_unless_asked(searched):
    plain = analyze(searched.utt)
    assert "beam" not in utterance_view(plain, controls=False).panels
    assert "beam" in utterance_view(plain, controls=False, beam=True).panels
    assert "beam" not in utterance_view(searched, beam=False).panels
    view = utterance_view(searched)
    assert "beam" in view.panels and view.replay is not None


def test_replay_to_writes_the_trace_beam(searched):
    view = utterance_view(searched)
    tr, vocab, clock = searched.search.trace, searched.utt.vocab, searched.utt.clock
    panel = view.panels["beam"]
    for f in (0, 30, tr.num_frames - 1):
        replay_to(view, f)
        ids, scores = tr.beam_at(f)
        text = panel.models["box"].text
        # reference: the search trace, decoded with the vocabulary
        best = searched.search.best.prefix if f == tr.num_frames - 1 else ids[0]
        assert f'class="replay-partial">{prefix_words(vocab, tr, best)}<' in text
        for p, s in zip(ids, scores, strict=True):
            assert f"<td>{prefix_words(vocab, tr, p)}" in text
            assert f"<td>{float(s):.3f}</td>" in text
        assert panel.models["cursor"].location == pytest.approx(float(clock.time(f)))
        assert panel.models["slider"].value == f
        # the decoder window of a token triggered at f: frames [0, f + look-ahead]
        # reference: triggered attention (2019) window, full history
        end = min(tr.num_frames - 1, f + view.lookahead)
        assert panel.models["window"].right == pytest.approx(float(clock.end(end)))
    with pytest.raises(ParameterError, match="'frame'"):
        replay_to(view, tr.num_frames)
    with pytest.raises(ParameterError, match="beam=True"):
        replay_to(utterance_view(searched, beam=False), 0)


def test_beam_lane_adds_at_most_1_mb_to_a_60_s_page():
    sys.path.insert(0, str(Path(__file__).parent / "bench"))
    import synth

    rng = np.random.default_rng(0)
    toks, lp = synth.utterance_arrays(rng, 1500, 300, 5000)  # 60 s at 40 ms, V = 5,000
    v = Vocabulary(synth.vocabulary(5000), boundary=WordBoundary("prefix", "\u2581"))
    words = [w for w, _, _ in v.words(toks)]
    u = Utterance.from_arrays(
        lp, ref=" ".join(words), ref_tokens=toks, vocab=v, clock=FrameClock(0.04)
    )
    a = analyze(u, search={"beam": 16}, soft=False)
    without = len(standalone_html(utterance_view(a, beam=False)).encode())
    view = utterance_view(a)
    with_lane = len(standalone_html(view).encode())
    assert view.replay.prefix.size == 1500 * 16  # the whole beam of every frame travels
    # DEVELOPERS.md, "Partial results and shown times" (data budget)
    assert 0 < with_lane - without <= 1_000_000


def test_view_command_beam_option(tmp_path):
    from peekalign.cli import main

    out = tmp_path / "v.html"
    assert main(["view", str(demo_path("streaming")), "tram-006", "--html", str(out)]) == 0
    assert "replay_frame" not in out.read_text()  # no search, no lane
    out2 = tmp_path / "b.html"
    args = ["view", str(demo_path("streaming")), "tram-006", "--beam", "4", "--html", str(out2)]
    assert main(args) == 0
    text = out2.read_text()
    assert "replay_frame" in text and "beam_kept" in text
    assert main([*args[:-2], "--beam", "0", "--html", str(tmp_path / "c.html")]) == 2


class _FixedDecoder:
    """A decoder whose log-probability of token k is -0.1 k whatever it sees."""

    def __init__(self, size: int):
        self.row = -0.1 * np.arange(size, dtype=np.float64)

    def log_probs(self, prefixes, last_frames):
        return np.tile(self.row, (len(prefixes), 1))


def test_beam_list_has_lm_and_decoder_columns():
    u = open_bundle(demo_path("streaming"))["tram-006"]
    V = u.log_probs.shape[1]
    opts = {
        "beam": 4,
        "lm": lambda history, unit: -0.5 * (len(history) + 1),  # -0.5 (i + 1) for token i
        "lm_weight": 0.5,
        "decoder": _FixedDecoder(V + 1),
        "decoder_weight": 0.3,
        "token_bonus": 0.2,
    }
    a = analyze(u, search=opts)
    tr = a.search.trace
    assert tr.lm_part is not None and tr.dec_part is not None
    view = utterance_view(a)
    panel = view.panels["beam"]
    f = 60
    replay_to(view, f)
    text = panel.models["box"].text
    assert "<th>ctc</th><th>lm</th><th>decoder</th><th>token bonus</th>" in text
    ids, scores = tr.beam_at(f)
    rows = text.split("<tr><td>")[1:]  # the header row has <th> cells
    assert len(rows) == len(ids)
    for row, p, s in zip(rows, ids, scores, strict=True):
        toks = tr.tokens_of(int(p)).tolist()
        n = len(toks)
        # reference: hand-worked - the LM gives -0.5 (i + 1) to the i-th token, the
        # decoder -0.1 k to token k, the token bonus 0.2 a token, each part weighted
        lm = 0.5 * sum(-0.5 * (i + 1) for i in range(n))
        dec = 0.3 * sum(-0.1 * k for k in toks)
        cells = [c.split("</td>")[0] for c in row.split("<td>")]
        score, ctc, lm_c, dec_c, token_bonus = (float(c) for c in cells[2:7])
        assert score == pytest.approx(float(s), abs=1e-3)
        assert lm_c == pytest.approx(lm, abs=2e-3)
        assert dec_c == pytest.approx(dec, abs=2e-3)
        assert token_bonus == pytest.approx(0.2 * n, abs=1e-3)
        assert ctc + lm_c + dec_c + token_bonus == pytest.approx(score, abs=5e-3)
