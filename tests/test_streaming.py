"""Trigger windows, right context, reach, cut mass, window consistency and the sweep."""

from __future__ import annotations

import numpy as np
import pytest

from peekalign import (
    FrameClock,
    ParameterError,
    Utterance,
    Vocabulary,
    WordBoundary,
    align_tokens,
)
from peekalign.search import prefix_search
from peekalign.streaming import (
    cut_mass,
    cut_mass_and_consistency,
    sweep,
    token_windows,
    trigger_frames,
    window_consistency,
    word_reach,
)

TOKENS = ["<b>", "|", "a", "b", "c", "d", "e", "o", "r", "t"]
VOCAB = Vocabulary(TOKENS, boundary=WordBoundary("separator", "|"))


def synth(spikes, T, *, V=None, peak=0.9, floor=1e-3, blank=0):
    """(T, V) log-probs: blank everywhere except ``{frame: (token, prob)}`` spikes.

    ``spikes`` maps a frame to a token id (prob ``peak``) or to ``(token, prob)``;
    the rest of each row goes to the blank, with ``floor`` on every other token.
    """
    p = np.full((T, V or len(TOKENS)), floor)
    for f, spec in spikes.items():
        k, q = spec if isinstance(spec, tuple) else (spec, peak)
        p[f, k] = q
    for t in range(T):
        rest = 1.0 - (p[t].sum() - p[t, blank])
        p[t, blank] = rest
    assert np.all(p > 0)
    return np.log(p)


def ids(text):
    return [TOKENS.index(c) for c in text.replace(" ", "|")]


def spaced(text, T, *, start=2, step=3, **kw):
    """Log-probs emitting the tokens of ``text`` every ``step`` frames from ``start``."""
    toks = ids(text)
    return synth({start + step * i: k for i, k in enumerate(toks)}, T, **kw), toks


# --------------------------------------------------------------------------- windows


def test_windows_hand_worked():
    clock = FrameClock(frame_shift_s=0.04, frame_offset_s=0.0425, right_context_s=0.0425)
    w = token_windows(
        [0, 10, 18], num_frames=20, clock=clock, lookahead=3, look_back=4,
        encoder_lookahead=(2, 2),
    )  # fmt: skip
    # reference: window [max(0, n - look_back), min(T - 1, n + lookahead)] (triggered
    # attention (2019)), worked by hand
    assert w.start.tolist() == [0, 6, 14]
    assert w.end.tolist() == [3, 13, 19]
    # heard-until frame n + lookahead + layers * per_layer, not clamped
    assert w.heard_until_frame.tolist() == [7, 17, 25]
    # heard-until time: centre of that frame + the front end's right context, by hand:
    # 0.0425 + 17 * 0.04 + 0.0425 = 0.765
    assert w.heard_until_s[1] == pytest.approx(0.765)
    # right context past the trigger, by hand: (3 + 4) frames * 40 ms + 42.5 ms = 322.5 ms
    np.testing.assert_allclose(w.right_context_ms, [322.5] * 3)
    assert w.encoder_frames == 4 and len(w) == 3
    full = token_windows([5], num_frames=9, clock=clock, lookahead=0)
    assert full.start.tolist() == [0] and full.end.tolist() == [5]
    assert full.mask().tolist() == [[True] * 6 + [False] * 3]


def test_trigger_frames_rules_and_search():
    lp, toks = spaced("bad cat", 30)
    a = align_tokens(lp, toks)
    # reference: the synthetic spikes sit at frames 2, 5, 8, ... (by construction)
    assert trigger_frames(a).tolist() == list(range(2, 2 + 3 * len(toks), 3))
    assert trigger_frames(a, "spike").tolist() == a.spike.tolist()
    # candidates only where a token is likely, so prefixes are created at the spikes
    res = prefix_search(lp, beam=4, token_floor=np.log(0.1))
    assert res.best.tokens.tolist() == toks
    assert trigger_frames(res).tolist() == res.best.trigger_frames.tolist()
    assert trigger_frames(res.best, "creation").tolist() == trigger_frames(a).tolist()
    with pytest.raises(ParameterError, match="creation frames only"):
        trigger_frames(res.best, "spike")
    with pytest.raises(ParameterError, match="'rule' parameter of trigger_frames"):
        trigger_frames(a, "last")
    with pytest.raises(ParameterError, match="must be an Alignment"):
        trigger_frames([1, 2])


def test_windows_bad_input():
    clock = FrameClock()
    with pytest.raises(ParameterError, match="'lookahead' parameter of token_windows"):
        token_windows([1], num_frames=5, clock=clock, lookahead=-3)
    with pytest.raises(ParameterError, match="trigger frame 7"):
        token_windows([1, 7], num_frames=5, clock=clock, lookahead=0)
    with pytest.raises(ParameterError, match="'encoder_lookahead' parameter"):
        token_windows([1], num_frames=5, clock=clock, lookahead=0, encoder_lookahead="12x1")
    with pytest.raises(ParameterError, match="'clock' parameter"):
        token_windows([1], num_frames=5, clock=0.04, lookahead=0)


# --------------------------------------------------------------------------- reach


def test_word_reach_margin_by_hand():
    clock = FrameClock(0.04)
    lp, toks = spaced("ab cd", 20)  # a@2 b@5 |@8 c@11 d@14
    words = [("ab", 0.05, 0.30), ("cd", 0.40, 0.62)]
    u = Utterance.from_arrays(lp, ref="ab cd", vocab=VOCAB, clock=clock, words=words)
    a = align_tokens(u.log_probs, u.ref_tokens)
    w = token_windows(a.first, num_frames=20, clock=clock, lookahead=2)
    cov = word_reach(u, a, w)
    assert cov.source == "reference" and cov.source_note is None
    # reference: by hand - word "ab" ends at 0.30 s, its last token b triggers at frame 5,
    # heard until = (5 + 2) * 0.04 = 0.28 -> margin -0.02; "cd": (14 + 2) * 0.04 - 0.62 = 0.02
    assert cov.margin_s == pytest.approx([-0.02, 0.02])
    assert cov.reached.tolist() == [False, True]
    assert cov.reach == 0.5
    assert cov.rows()[1]["word"] == "cd" and cov.rows()[1]["source"] == "reference"


def test_word_reach_falls_back_to_alignment_and_says_why():
    clock = FrameClock(0.04)
    lp, toks = spaced("ab cd", 20)
    bad = [("ab", 0.05, 0.30), ("ce", 0.40, 0.62)]
    u = Utterance.from_arrays(lp, ref="ab cd", vocab=VOCAB, clock=clock, words=bad)
    a = align_tokens(u.log_probs, u.ref_tokens)
    cov = word_reach(u, a, token_windows(a.first, num_frames=20, clock=clock, lookahead=0))
    assert cov.source == "alignment"
    assert "word 1 ('ce' vs 'cd')" in cov.source_note
    # reference: by hand - alignment word times are the frame edges of its segments
    # "cd" = frames 11..14 -> [0.42, 0.58]; heard until of d = 14 * 0.04 -> margin -0.02
    assert cov.start_s[1] == pytest.approx(0.42) and cov.end_s[1] == pytest.approx(0.58)
    assert cov.margin_s[1] == pytest.approx(-0.02)
    short = Utterance.from_arrays(lp, ref="ab cd", vocab=VOCAB, clock=clock, words=bad[:1])
    cov = word_reach(short, a, token_windows(a.first, num_frames=20, clock=clock, lookahead=0))
    assert cov.source == "alignment" and "list 1 words but the reference has 2" in cov.source_note
    # case and punctuation do not count as a mismatch
    ok = Utterance.from_arrays(
        lp, ref="ab cd", vocab=VOCAB, clock=clock, words=[("AB,", 0, 0.3), ("Cd", 0.4, 0.6)]
    )
    w = token_windows(a.first, num_frames=20, clock=clock, lookahead=0)
    assert word_reach(ok, a, w).source == "reference"
    with pytest.raises(ParameterError, match="windows for 2 tokens"):
        word_reach(ok, a, token_windows([0, 1], num_frames=20, clock=clock, lookahead=0))


# --------------------------------------------------------------------------- attention


def brute_cut(att, start, end):
    """Per (l, h, u): mass outside [start[u], end[u]] / row mass, by explicit loops."""
    L, H, U, T = att.shape
    out = np.zeros((L, H, U))
    for l in range(L):  # noqa: E741
        for h in range(H):
            for u in range(U):
                row = att[l, h, u]
                outside = sum(row[t] for t in range(T) if t < start[u] or t > end[u])
                out[l, h, u] = outside / row.sum()
    return out


def test_cut_mass_equals_loops(rng):
    for _ in range(20):
        L, H, U = (int(x) for x in rng.integers(1, 5, 3))
        T = int(rng.integers(5, 30))
        att = rng.random((L, H, U, T)) ** 3
        att /= att.sum(-1, keepdims=True)
        trig = np.sort(rng.integers(0, T, U))
        w = token_windows(
            trig, num_frames=T, clock=FrameClock(), lookahead=int(rng.integers(0, 5)),
            look_back=None if rng.random() < 0.5 else int(rng.integers(0, 6)),
        )  # fmt: skip
        cm = cut_mass(att, w)
        # reference: explicit loops over every weight
        ref = brute_cut(att, w.start, w.end)
        np.testing.assert_allclose(cm.per_head, ref, atol=1e-12)
        np.testing.assert_allclose(cm.mean, ref.mean(axis=(0, 1)), atol=1e-12)
        np.testing.assert_allclose(cm.kept, 1 - ref.mean(axis=(0, 1)), atol=1e-12)
        assert cm.per_layer.shape == (L, U)


def truncated_attention(rng, windows, L=2, H=3, shift_end=0):
    """Random attention whose rows are zero outside [start, end + shift_end]."""
    U, T = len(windows), windows.num_frames
    att = rng.random((L, H, U, T)) + 0.05
    t = np.arange(T)
    inside = (t[None] >= windows.start[:, None]) & (
        t[None] <= np.minimum(windows.end + shift_end, T - 1)[:, None]
    )
    att = att * inside
    return att / att.sum(-1, keepdims=True)


def test_window_consistency_finds_off_by_one(rng):
    T = 40
    w = token_windows([3, 10, 17, 25, 31], num_frames=T, clock=FrameClock(), lookahead=2)
    # reference: attention built by hand to be zero outside the windows
    good = window_consistency(truncated_attention(rng, w), w)
    assert good.ok and good.max_outside == 0.0 and good.first_token == -1
    assert "stays inside" in good.message()
    # the same windows, truncated one frame late (an off-by-one in the user's mask)
    late = window_consistency(truncated_attention(rng, w, shift_end=1), w)
    assert not late.ok and late.first_token == 0
    assert late.frames_past.tolist() == [1] * 5 and late.first_frames_past == 1
    assert late.frames_before.tolist() == [0] * 5
    assert "1 frame(s) past its end" in late.message() and "off-by-one" in late.message()
    # three frames late
    assert window_consistency(truncated_attention(rng, w, shift_end=3), w).frames_past[2] == 3
    # mass before the start of a look-back window
    wb = token_windows([10, 20], num_frames=T, clock=FrameClock(), lookahead=1, look_back=3)
    wider = token_windows([10, 20], num_frames=T, clock=FrameClock(), lookahead=1, look_back=5)
    c = window_consistency(truncated_attention(rng, wider), wb)
    assert c.frames_before.tolist() == [2, 2] and c.frames_past.tolist() == [0, 0]
    # tolerance
    assert window_consistency(truncated_attention(rng, w, shift_end=1), w, tol=1.0).ok


def test_window_consistency_extent_equals_loops(rng):
    # reference: explicit loops over the definition - the smallest k such that every
    # head's row has at most tol of its mass after frame end + k (before start - k)
    for _ in range(10):
        L, H, U, T = 2, 3, 6, int(rng.integers(8, 25))
        att = rng.random((L, H, U, T)) ** 6
        trig = np.sort(rng.integers(0, T, U))
        w = token_windows(trig, num_frames=T, clock=FrameClock(), lookahead=1, look_back=2)
        tol = float(rng.choice([1e-3, 0.05]))
        c = window_consistency(att, w, tol=tol)
        for u in range(U):
            rows = att[:, :, u].reshape(-1, T)
            past = next(
                k for k in range(T + 1)
                if all(r[w.end[u] + k + 1 :].sum() <= tol * r.sum() for r in rows)
            )  # fmt: skip
            before = next(
                k for k in range(T + 1)
                if all(r[: max(w.start[u] - k, 0)].sum() <= tol * r.sum() for r in rows)
            )  # fmt: skip
            share = max(1 - r[w.start[u] : w.end[u] + 1].sum() / r.sum() for r in rows)
            assert (c.frames_past[u], c.frames_before[u]) == (past, before)
            assert c.outside[u] == pytest.approx(share, abs=1e-12)


def test_cut_mass_and_consistency_in_one_pass_equal_loops(rng):
    # reference: the explicit loops of the two tests above (brute_cut and the
    # definition of frames past / before); the one-pass kernel must also give the
    # figures of the two separate passes bit for bit, float32 rows included
    for k in range(12):
        L, H, U = (int(x) for x in rng.integers(1, 4, 3))
        T = int(rng.integers(6, 30))
        att = rng.random((L, H, U, T)) ** 5
        if k % 2:
            att = att.astype(np.float32)
        trig = np.sort(rng.integers(0, T, U))
        w = token_windows(
            trig, num_frames=T, clock=FrameClock(), lookahead=int(rng.integers(0, 4)),
            look_back=None if k % 3 else 2,
        )  # fmt: skip
        tol = float(rng.choice([1e-3, 0.05]))
        cm, c = cut_mass_and_consistency(att, w, tol=tol)
        np.testing.assert_allclose(cm.per_head, brute_cut(att, w.start, w.end), atol=1e-6)
        for u in range(U):
            rows = att[:, :, u].reshape(-1, T).astype(np.float64)
            past = next(
                k for k in range(T + 1)
                if all(r[w.end[u] + k + 1 :].sum() <= tol * r.sum() for r in rows)
            )  # fmt: skip
            assert c.frames_past[u] == past
        one, two = cut_mass(att, w), window_consistency(att, w, tol=tol)
        for a, b in ((cm.per_head, one.per_head), (cm.mean, one.mean), (c.outside, two.outside)):
            assert np.array_equal(a, b, equal_nan=True)
        assert np.array_equal(c.frames_past, two.frames_past)
        assert np.array_equal(c.frames_before, two.frames_before)
        assert (c.ok, c.first_token, c.max_outside) == (two.ok, two.first_token, two.max_outside)


def test_attention_shape_errors():
    w = token_windows([1, 2], num_frames=5, clock=FrameClock(), lookahead=0)
    with pytest.raises(ParameterError, match="3 rows over 5 frames"):
        cut_mass(np.ones((3, 5)), w)
    with pytest.raises(ParameterError, match="attention of shape"):
        cut_mass(np.ones((1, 1, 1, 2, 5)), w)


# --------------------------------------------------------------------------- sweep


def random_utterance(rng, uid, *, n_words=4, T=None, attention=True):
    letters = "abcdeort"
    words = [
        "".join(rng.choice(list(letters), size=int(rng.integers(1, 4)))) for _ in range(n_words)
    ]
    text = " ".join(words)
    toks = ids(text)
    T = T or 3 * len(toks) + 10
    frames = np.sort(rng.choice(np.arange(1, T - 1), size=len(toks), replace=False))
    lp = synth({int(f): k for f, k in zip(frames, toks, strict=True)}, T, peak=0.8)
    # reference word times: a little before / after the spikes of first / last token
    spans = VOCAB.words(toks)
    times = [
        (w, max(0.0, 0.04 * frames[a] - 0.05), 0.04 * frames[b] + float(rng.uniform(0, 0.3)))
        for w, a, b in spans
    ]
    att = None
    if attention:
        att = rng.random((2, 2, len(toks), T)) ** 4
        att /= att.sum(-1, keepdims=True)
    return Utterance.from_arrays(
        lp, ref=text, vocab=VOCAB, id=uid, clock=FrameClock(0.04), words=times,
        attention=att, attention_tokens=toks if attention else None, encoder_lookahead=(2, 1),
    )  # fmt: skip


def test_sweep_reach_monotone_latency_linear(rng):
    utts = [random_utterance(rng, f"u{i}", n_words=int(rng.integers(1, 6))) for i in range(12)]
    s = sweep(utts, max_lookahead=12, target=0.9, front_end_ms=25.0)
    cols = s.columns()
    assert cols["lookahead_frames"].tolist() == list(range(13))
    # reach never decreases with more look-ahead (the heard until only moves later)
    assert np.all(np.diff(cols["reach"]) >= 0)
    assert np.all(np.diff(cols["kept_attention"]) >= -1e-12)
    # reference: latency = (layers * per_layer + e) * frame shift + front end (common
    # practice): linear in e with slope = frame shift (40 ms)
    np.testing.assert_allclose(np.diff(cols["latency_ms"]), 40.0)
    assert cols["latency_ms"][0] == pytest.approx(2 * 40 + 25)
    # each row agrees with the per-utterance functions at that look-ahead (oracle
    # triggers: the forced alignment's first frames, as below)
    s_all = sweep(utts, max_lookahead=12, triggers="oracle")
    assert s_all.triggers == "oracle" and s_all.n_oracle_words == s_all.n_words
    s_back = sweep(utts, max_lookahead=12, look_back=3, triggers="oracle")
    for e, look_back in ((0, None), (3, None), (12, None), (0, 3), (5, 3)):
        cov_n = kept = n_rows = 0
        for u in utts:
            a = align_tokens(u.log_probs, u.ref_tokens)
            w = token_windows(
                a.first, num_frames=u.num_frames, clock=u.clock, lookahead=e,
                look_back=look_back, encoder_lookahead=(2, 1),
            )  # fmt: skip
            cov_n += int(word_reach(u, a, w).reached.sum())
            # reference: explicit loops for the kept mass
            ref = 1 - brute_cut(u.attention.astype(np.float64), w.start, w.end).mean(axis=(0, 1))
            kept += ref.sum()
            n_rows += ref.size
        row = (s_all if look_back is None else s_back).rows[e]
        assert row.n_reached == cov_n
        assert row.kept_attention == pytest.approx(kept / n_rows, abs=1e-6)
    ok = [r.lookahead_frames for r in s.rows if r.reach >= 0.9]
    assert s.recommended == (ok[0] if ok else None)
    assert s.n_utterances == 12 and s.word_sources == {"reference": 12, "alignment": 0}


def test_sweep_skips_bad_utterances(rng):
    good = random_utterance(rng, "good", attention=False)
    lp = synth({2: 2, 5: 3}, 10)
    lp[:, 3] = -np.inf  # token "b" impossible everywhere: no CTC path
    lp -= np.logaddexp.reduce(lp, axis=1, keepdims=True)
    bad = Utterance.from_arrays(
        lp, ref="ab", vocab=VOCAB, id="bad", clock=FrameClock(0.04), encoder_lookahead=(2, 1)
    )
    s = sweep([good, bad], max_lookahead=3)
    assert s.n_utterances == 1 and [p.utt for p in s.problems] == ["bad"]
    assert "no CTC path" in s.problems[0].message
    assert np.isnan(s.rows[0].kept_attention)
    with pytest.raises(ParameterError, match="'target' parameter of sweep"):
        sweep([good], target=95)
    with pytest.raises(ParameterError, match="'max_lookahead' parameter of sweep"):
        sweep([good], max_lookahead=-1)
    other = random_utterance(rng, "other", attention=False)
    other.clock = FrameClock(0.03)
    with pytest.raises(ParameterError, match="one model"):
        sweep([good, other])


def test_sweep_csv(rng, tmp_path):
    s = sweep([random_utterance(rng, "u")], max_lookahead=2)
    out = tmp_path / "s.csv"
    s.write_csv(out)
    lines = out.read_text().splitlines()
    assert lines[0] == "lookahead_frames,latency_ms,reach,kept_attention"
    assert len(lines) == 4
    with pytest.raises(ParameterError, match="existing file"):
        s.write_csv(out)


def write_bundle(path, utts, *, bad=False):
    from peekalign import BundleWriter

    with BundleWriter(
        path, vocab=TOKENS, frame_shift_s=0.04, word_boundary={"kind": "separator", "symbol": "|"},
        encoder={"layers": 2, "lookahead_per_layer": 1}, decoder={"lookahead": 3},
    ) as w:  # fmt: skip
        for u in utts:
            w.add(
                u.id, u.log_probs, ref=u.ref, words=u.words, attention=u.attention,
                attention_tokens=u.attention_tokens,
            )  # fmt: skip
        if bad:
            lp = synth({2: 2, 5: 3}, 10)
            lp[:, 3] = -np.inf
            w.add("bad", lp - np.logaddexp.reduce(lp, axis=1, keepdims=True), ref="ab")
    return path


def test_sweep_command(rng, tmp_path, capsys):
    import csv

    from peekalign import open_bundle
    from peekalign.cli import main

    utts = [random_utterance(rng, f"u{i}") for i in range(5)]
    path = write_bundle(tmp_path / "b", utts)
    out = tmp_path / "sweep.csv"
    rc = main(["sweep", str(path), "--max-lookahead", "8", "--target", "0.8", "--csv", str(out)])
    assert rc == 0
    text = capsys.readouterr().out
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["lookahead_frames", "latency_ms", "reach", "kept_attention"]
    api = sweep(open_bundle(path), max_lookahead=8, target=0.8)
    assert [int(r["lookahead_frames"]) for r in rows] == list(range(9))
    np.testing.assert_allclose([float(r["reach"]) for r in rows], api.columns()["reach"])
    np.testing.assert_allclose(
        [float(r["kept_attention"]) for r in rows], api.columns()["kept_attention"], atol=1e-6
    )
    # reference: the bundle's encoder look-ahead is 2 layers x 1 frame x 40 ms = 80 ms
    assert [float(r["latency_ms"]) for r in rows] == [80.0 + 40 * e for e in range(9)]
    from peekalign.recommend import from_sweep

    decided, _ = from_sweep(api)
    # reference: DEVELOPERS.md, look-ahead recommendation (reach, or attention when reach
    # is saturated at 0)
    if decided.lookahead is not None:
        assert f"recommended look-ahead: {decided.lookahead} frames" in text
    else:
        assert "recommended look-ahead: none" in text
    assert f"criterion: {decided.criterion} - " in text
    # an existing CSV is kept unless --overwrite
    assert main(["sweep", str(path), "--csv", str(out)]) == 2
    assert "existing file" in capsys.readouterr().err
    assert (
        main(["sweep", str(path), "--csv", str(out), "--overwrite", "--max-lookahead", "2"]) == 0
    )
    assert len(out.read_text().splitlines()) == 4


def test_sweep_command_reports_bad_utterances(rng, tmp_path, capsys):
    from peekalign.cli import main

    path = write_bundle(tmp_path / "b", [random_utterance(rng, "u0")], bad=True)
    assert main(["sweep", str(path), "--max-lookahead", "2"]) == 1
    captured = capsys.readouterr()
    assert "bad: " in captured.err and "1 problem(s)" in captured.out
    assert main(["sweep", str(path), "--target", "95"]) == 2
    assert "write 0.95 for 95 %" in capsys.readouterr().err


# --------------------------------------------------------------------------- demo bundles


def demo_bundle(kind):
    from peekalign import open_bundle
    from peekalign.data import demo_path

    return open_bundle(demo_path(kind))


def test_demo_streaming_attention_stays_in_its_windows():
    from peekalign import analyze

    bundle = demo_bundle("streaming")
    assert bundle.decoder_lookahead == 6
    for utt in bundle:
        a = analyze(utt)  # the bundle's own look-ahead, trigger = first frame
        # reference: the demo build (fixtures/make/dump.py) masked decoder step u to
        # encoder frames [0, n_u + 6] in torch before the softmax
        assert a.consistency.ok, (utt.id, a.consistency.message())
        assert a.consistency.max_outside < 1e-3
        assert np.nanmax(a.cut_mass.mean) < 1e-3
    # one frame less of look-ahead than the run used: every utterance shows the mass
    # reaching exactly one frame past the window (the off-by-one the check is for)
    for utt in list(bundle)[:6]:
        c = analyze(utt, lookahead=5).consistency
        assert not c.ok and c.frames_past.max() == 1 and c.first_frames_past == 1


def test_demo_full_context_attention_reports_the_cut_mass():
    from peekalign import analyze

    bundle = demo_bundle("full")
    means = []
    for k, utt in enumerate(bundle):
        a = analyze(utt)
        assert not a.consistency.ok
        means.append(np.nanmean(a.cut_mass.mean))
        if k < 6:
            # reference: explicit loops over every attention weight of the dump
            w = a.attention_windows
            ref = brute_cut(utt.attention.astype(np.float64), w.start, w.end)
            np.testing.assert_allclose(a.cut_mass.per_head, ref, atol=1e-9)
            assert a.consistency.max_outside == pytest.approx(ref.max(axis=(0, 1)).max())
    # full-context attention looks well past n_u + 6: a real share is cut
    assert np.mean(means) > 0.05
