"""The optional per-frame encoder right context of a bundle (an array, or a declared
chunk size): read, written, checked, and used by every heard-until time."""

from __future__ import annotations

import numpy as np
import pytest

from peekalign import BundleWriter, FrameClock, analyze, open_bundle
from peekalign.data import demo_path
from peekalign.exceptions import BundleError, ParameterError
from peekalign.streaming import sweep, token_windows

VOCAB = ["-", "|", "a", "b", "c"]
WB = {"kind": "separator", "symbol": "|"}


SPIKES = [(2, 2), (5, 1), (9, 3), (13, 1), (18, 4)]
# the same tokens held over several frames: words end well after their triggers
HELD = [(f, 2) for f in range(2, 5)] + [(6, 1)] + [(f, 3) for f in range(9, 16)] + [
    (17, 1)] + [(f, 4) for f in range(19, 23)]  # fmt: skip


def _posteriors(T=24, spikes=SPIKES):
    p = np.full((T, 5), 0.01)
    p[:, 0] = 0.96
    for f, k in spikes:
        p[f] = 0.01
        p[f, k] = 0.96
    return np.log(p)


def _write(path, *, encoder=None, right_context=None, spikes=SPIKES):
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=0.04, word_boundary=WB,
                      encoder=encoder, decoder={"lookahead": 1}) as w:  # fmt: skip
        w.add("u1", _posteriors(spikes=spikes), ref="a b c", encoder_right_context=right_context)
    return open_bundle(path)


def test_chunk_size_declares_rest_of_chunk(tmp_path):
    b = _write(tmp_path / "b", encoder={"layers": 0, "lookahead_per_layer": 0, "chunk_size": 4})
    rc = b["u1"].encoder_right_context
    # reference: hand-worked, C - 1 - (n mod C) (DEVELOPERS.md, "Measured encoder look-ahead")
    assert rc.tolist()[:9] == [3, 2, 1, 0, 3, 2, 1, 0, 3]
    # a decoder step at trigger 5 with look-ahead 1 reads frames up to 6, whose chunk
    # (4..7) ends at 7: it hears up to frame 7, not 6 + max(rc) = 9
    w = token_windows([5, 9], num_frames=24, clock=FrameClock(0.04), lookahead=1,
                      encoder_lookahead=rc)  # fmt: skip
    assert w.heard_until_frame.tolist() == [7, 11]


def test_old_bundles_open_without_it():
    utt = open_bundle(demo_path("full"))["tram-001"]
    assert utt.encoder_right_context is None and utt.encoder_ahead == (4, 1)


def test_per_frame_array_is_used_by_analysis(tmp_path):
    rc = np.zeros(24, np.int64)
    rc[10] = 9  # frame 10 leaks 9 frames ahead
    b = _write(tmp_path / "b", encoder={"layers": 2, "lookahead_per_layer": 1}, right_context=rc)
    utt = b["u1"]
    assert utt.encoder_right_context.tolist() == rc.tolist()
    a = analyze(utt, lookahead=1)
    # reference: hand-worked. triggers 2, 5, 9, 13, 18; look-ahead 1 reads up to
    # 3, 6, 10, 14, 19; the largest j + rc[j] up to there: 3, 6, 19, 19, 19
    assert a.windows.heard_until_frame.tolist() == [3, 6, 19, 19, 19]
    clock = utt.clock
    want = clock.time(np.array([3, 6, 19, 19, 19])) + clock.right_context_s
    assert np.allclose(a.windows.heard_until_s, want)


def test_uniform_array_equals_declared(tmp_path):
    # reference: DEVELOPERS.md, "Look-ahead, right context and reach": an array of L * r
    # everywhere gives the same heard-until times as the declared (L, r)
    b = _write(tmp_path / "b", encoder={"layers": 2, "lookahead_per_layer": 1},
               right_context=np.full(24, 2))  # fmt: skip
    d = _write(tmp_path / "d", encoder={"layers": 2, "lookahead_per_layer": 1})
    wa, wd = analyze(b["u1"], lookahead=3).windows, analyze(d["u1"], lookahead=3).windows
    assert wa.heard_until_frame.tolist() == wd.heard_until_frame.tolist()
    assert np.allclose(wa.heard_until_s, wd.heard_until_s)
    sa, sd = sweep(b, max_lookahead=5), sweep(d, max_lookahead=5)
    assert [r.reach for r in sa.rows] == [r.reach for r in sd.rows]


def test_sweep_with_array_matches_analysis_per_lookahead(tmp_path):
    rc = np.array([3, 2, 1, 0] * 6)
    b = _write(tmp_path / "b", encoder={"layers": 0, "lookahead_per_layer": 0},
               right_context=rc, spikes=HELD)  # fmt: skip
    s = sweep(b, max_lookahead=8, triggers="oracle")
    assert len({r.reach for r in s.rows}) >= 3  # the reach grows over these look-aheads
    # reference: brute force, the reach of analyze() at each look-ahead
    for row in s.rows:
        assert row.reach == pytest.approx(
            analyze(b["u1"], lookahead=row.lookahead_frames, triggers="oracle").words.reach
        )


def test_bad_array_names_utterance(tmp_path):
    with pytest.raises(ParameterError, match="u1.*encoder_right_context"):
        _write(tmp_path / "b", right_context=np.arange(5))
    b = _write(tmp_path / "c")
    np.savez(tmp_path / "c" / "arrays" / "u1.npz", log_probs=_posteriors(),
             encoder_right_context=-np.ones(24, np.int64))  # fmt: skip
    with pytest.raises(BundleError, match=r"u1.*encoder_right_context.*with -1"):
        b["u1"]
