"""The optional per-frame encoder right context of a bundle (an array, or a declared
chunk size): read, written, checked, and used by every heard-until time."""

from __future__ import annotations

import re

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


# Latency with a chunked encoder (C = 4, no other encoder look-ahead, no front end):
# frame m is heard up to the end of its chunk, H(m) = 4 (m // 4) + 3 (m <= 23), and a
# token triggered at n waits H(n + e) - n frames. Triggers 2, 5, 9, 13, 18 (SPIKES):
#   e = 0: reads 2, 5, 9, 13, 18 -> heard 3, 7, 11, 15, 19 -> waits 1, 2, 2, 2, 1 = 8
#   e = 1: reads 3, 6, 10, 14, 19 -> heard 3, 7, 11, 15, 19 -> waits 1, 2, 2, 2, 1 = 8
#   e = 2: reads 4, 7, 11, 15, 20 -> heard 7, 7, 11, 15, 23 -> waits 5, 2, 2, 2, 5 = 16
#   e = 3: reads 5, 8, 12, 16, 21 -> heard 7, 11, 15, 19, 23 -> waits 5, 6, 6, 6, 5 = 28
# mean over the 5 tokens times 40 ms: 64, 64, 128, 224 ms
CHUNKED_LATENCY_MS = [64.0, 64.0, 128.0, 224.0]  # reference: hand-worked (above)
CHUNKED = {"layers": 0, "lookahead_per_layer": 0, "chunk_size": 4}


def test_sweep_latency_is_what_tokens_wait_for_in_a_chunk(tmp_path):
    from peekalign import scan

    b = _write(tmp_path / "b", encoder=CHUNKED)
    s = sweep(b, max_lookahead=3)
    # reference: hand-worked (CHUNKED_LATENCY_MS)
    assert [r.latency_ms for r in s.rows] == pytest.approx(CHUNKED_LATENCY_MS, abs=1e-9)
    assert s.per_frame_right_context and s.n_tokens == 5
    assert s.wait_frames.tolist() == [8, 8, 16, 28]  # reference: hand-worked (above)
    # the scan's combined sweep, its sweep.csv and its recommendation say the same
    sc = scan(b, max_lookahead=3, workers=0, progress=False)
    assert [r.latency_ms for r in sc.sweep.rows] == pytest.approx(CHUNKED_LATENCY_MS, abs=1e-9)
    (tmp_path / "out").mkdir()
    sc.write_csv(tmp_path / "out")
    lines = (tmp_path / "out" / "sweep.csv").read_text().splitlines()
    # reference: hand-worked (above)
    assert [ln.split(",")[1] for ln in lines[1:]] == ["64", "64", "128", "224"]
    rec = sc.sweep.recommended_row
    assert rec is not None and rec.latency_ms == pytest.approx(
        CHUNKED_LATENCY_MS[rec.lookahead_frames], abs=1e-9
    )


def test_without_right_contexts_latency_is_the_algorithmic_lookahead(tmp_path):
    from peekalign import scan
    from peekalign.streaming import latency_budget

    b = _write(tmp_path / "b", encoder={"layers": 2, "lookahead_per_layer": 1})
    s = sweep(b, max_lookahead=3)
    sc = scan(b, max_lookahead=3, workers=0, progress=False)
    assert not s.per_frame_right_context and not sc.sweep.per_frame_right_context
    for row, row_scan in zip(s.rows, sc.sweep.rows, strict=True):
        want = latency_budget(frame_shift_ms=40.0, layers=2, per_layer=1,
                              lookahead=row.lookahead_frames, front_end_ms=0.0).total_ms  # fmt: skip
        # reference: DEVELOPERS.md, "Look-ahead, right context and reach" (the same
        # float, computed by the same formula as before per-frame right contexts)
        assert row.latency_ms == want and row_scan.latency_ms == want
    # a uniform array gives the same latencies (the mean of equal waits)
    u = _write(tmp_path / "u", encoder={"layers": 2, "lookahead_per_layer": 1},
               right_context=np.full(24, 2))  # fmt: skip
    # reference: DEVELOPERS.md, "Latency with a per-frame right context"
    assert [r.latency_ms for r in sweep(u, max_lookahead=3).rows] == pytest.approx(
        [r.latency_ms for r in s.rows], abs=1e-9
    )


# The joint search (weight 0, the plain search) creates the prefixes of the same tokens
# at frames 0, 1, 6, 13, 18 (a prefix is created when it first enters the beam):
#   e = 0: reads 0, 1, 6, 13, 18 -> heard 3, 3, 7, 15, 19 -> waits 3, 2, 1, 2, 1 = 9
#   e = 1: reads 1, 2, 7, 14, 19 -> heard 3, 3, 7, 15, 19 -> waits 3, 2, 1, 2, 1 = 9
#   e = 2: reads 2, 3, 8, 15, 20 -> heard 3, 3, 11, 15, 23 -> waits 3, 2, 5, 2, 5 = 17
#   e = 3: reads 3, 4, 9, 16, 21 -> heard 3, 7, 11, 19, 23 -> waits 3, 6, 5, 6, 5 = 25
JOINT_LATENCY_MS = [72.0, 72.0, 136.0, 200.0]  # reference: hand-worked (above)


@pytest.mark.parametrize("mode", ["triggered", "joint"])
def test_redecode_latency_is_what_tokens_wait_for_in_a_chunk(tmp_path, mode):
    import math

    from redecode_helpers import LateEcho

    from peekalign import redecode
    from peekalign.search import prefix_search

    # joint with weight 0: the plain search, whose best hypothesis is the same at every e
    kw = {"decoder_weight": 0.0} if mode == "joint" else {}
    b = _write(tmp_path / "b", encoder=CHUNKED)
    r = redecode(b, LateEcho(), lookaheads=[0, 1, 2, 3], mode=mode, workers=0, progress=False,
                 **kw)  # fmt: skip
    if mode == "triggered":  # CTC greedy triggers 2, 5, 9, 13, 18 (SPIKES)
        want = CHUNKED_LATENCY_MS
    else:
        best = prefix_search(b["u1"].log_probs, blank=0, trace=False, nbest=1).best
        assert best.trigger_frames.tolist() == [0, 1, 6, 13, 18]
        want = JOINT_LATENCY_MS
    # reference: hand-worked (CHUNKED_LATENCY_MS, JOINT_LATENCY_MS)
    assert r.table["latency_ms"].tolist()[:-1] == pytest.approx(want, abs=1e-9)
    assert r.table["latency_ms"].tolist()[-1] == math.inf
    d = _write(tmp_path / "d", encoder={"layers": 2, "lookahead_per_layer": 1})
    rd = redecode(d, LateEcho(), lookaheads=[0, 3], mode=mode, workers=0, progress=False, **kw)
    # reference: DEVELOPERS.md, "Look-ahead, right context and reach": (2 + e) x 40 ms
    assert rd.table["latency_ms"].tolist() == [80.0, 200.0, math.inf]


def test_report_says_what_the_latency_is(tmp_path):
    import html
    import re

    from peekalign.report import write_report

    def note(b, out):
        write_report(b, out, workers=0, pages=False, progress=False, max_lookahead=3)
        text = html.unescape((out / "index.html").read_text())
        return re.sub(r"\s+", " ", text)

    chunked = note(_write(tmp_path / "b", encoder=CHUNKED), tmp_path / "out")
    # reference: DEVELOPERS.md, "Latency with a per-frame right context" (5 tokens)
    assert "latency is the mean over the 5 tokens of what each waits for" in chunked
    plain = note(_write(tmp_path / "d", encoder={"layers": 2, "lookahead_per_layer": 1}),
                 tmp_path / "out-d")  # fmt: skip
    assert "latency is the algorithmic look-ahead: the encoder’s 2 frame(s)" in plain
    assert "mean over the" not in plain
    # the recommendation card names what its latency is (DEVELOPERS.md, "Latency with a
    # per-frame right context")
    assert re.search(r"\d+ ms mean token wait; criterion", chunked)
    assert re.search(r"\d+ ms algorithmic look-ahead; criterion", plain)


def test_printouts_name_the_latency(tmp_path, capsys):
    from peekalign.cli import main

    # reference: DEVELOPERS.md, "Latency with a per-frame right context": with a chunk
    # size the latency column is the tokens' mean wait, not the algorithmic look-ahead
    _write(tmp_path / "b", encoder=CHUNKED)
    main(["sweep", str(tmp_path / "b"), "--max-lookahead", "3", "--target", "0.5"])
    out = capsys.readouterr().out
    assert "ms mean token wait) reach" in out and "algorithmic" not in out
    main(["scan", str(tmp_path / "b"), "--out", str(tmp_path / "o"), "--workers", "0",
          "--no-pages", "--lookahead", "1"])  # fmt: skip
    out = capsys.readouterr().out
    assert re.search(r"recommended look-ahead: \d+ frames \(\d+ ms mean token wait\)", out)
