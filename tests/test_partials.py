"""Tests of the partial results over time and their shown times (peekalign.partials)."""

from __future__ import annotations

import itertools
import json
import math
from collections import defaultdict

import numpy as np
import pytest
from conftest import random_log_probs

from peekalign import FrameClock, Vocabulary, WordBoundary
from peekalign.exceptions import ParameterError
from peekalign.lm import ArpaLM
from peekalign.partials import partials, shown_words
from peekalign.search import prefix_search

UNPRUNED = dict(beam=100_000, candidates=None, token_floor=None, prune_gap=None)

# one word per token: a partial's words name its token sequence
WORD_VOCAB = Vocabulary(["-", "\u2581a", "\u2581b", "\u2581c"], boundary=WordBoundary())

# Hand-worked posteriors over (blank, a, b): the best partial changes twice.
#   frame 0: P('') = .9,  P(a) = P(b) = .05                        -> ''
#   frame 1: P(a) = .9*.5 + .05*.5 + .05*.2 = .485, P(b) = .295   -> 'a'
#   frame 2: P(b) = (.285 + .18)*.7 + .295*.2 = .3845,
#            P(a b) = .485*.7 + .015*.7 + .015*.2 = .353, P(a) = .1625 -> 'b'
#   frame 3: P(b) = .3641 > P(a b) = .3433                         -> 'b'
HAND = np.log(np.array([[0.9, 0.05, 0.05], [0.2, 0.5, 0.3], [0.2, 0.1, 0.7], [0.9, 0.05, 0.05]]))
HAND_VOCAB = Vocabulary(["-", "\u2581a", "\u2581b"], boundary=WordBoundary())
# frame centres 0.02 + 0.04 t, front end reads 0.01 s past a centre
HAND_CLOCK = FrameClock(0.04, 0.02, 0.01)


def hand_partials(**kw):
    res = prefix_search(HAND, **UNPRUNED)
    return partials(res, HAND_VOCAB, HAND_CLOCK, **kw)


def test_hand_worked_partial_changing_twice():
    pt = hand_partials(encoder_lookahead=1)
    # reference: hand-worked (the prefix probabilities above)
    assert [pt.text(i) for i in range(4)] == ["", "a", "b", "b"]
    # ready = centre of frame t + 1 + 0.01, capped at the input's end 0.14 + 0.01
    # reference: hand-worked
    np.testing.assert_allclose(pt.shown_s, [0.07, 0.11, 0.15, 0.15])
    np.testing.assert_allclose(pt.time_s, [0.02, 0.06, 0.10, 0.14])
    # frames 2 and 3 are shown at once: the last one is what is seen
    assert pt.events().tolist() == [0, 1, 3]  # reference: hand-worked
    sw = shown_words(pt, ["b"], [0.10])
    # 'a' appears at 0.11 where 'b' ends up, 'b' replaces it at 0.15: one rewrite
    # reference: hand-worked
    assert sw.first_shown_s.tolist() == pytest.approx([0.11])
    assert sw.final_shown_s.tolist() == pytest.approx([0.15])
    assert sw.rewrites.tolist() == [1]
    assert sw.shown_delay_s.tolist() == pytest.approx([0.05])
    assert sw.rewrite_rate == 1.0
    assert sw.first_word_s == pytest.approx(0.11)
    assert sw.endpoint_s == pytest.approx(0.05)
    assert sw.trailing_missing == 0


def test_growing_last_word_is_no_rewrite_but_a_changed_word_is():
    # separator vocabulary: "a" then "ab" is the open last word growing; then the
    # separator closes it and "c" starts a second word
    v = Vocabulary(["-", "|", "a", "b", "c"], boundary=WordBoundary("separator", "|"))
    p = np.full((7, 5), 0.01)
    p[:, 0] = 0.96
    for t, k in ((1, 2), (3, 3), (4, 1), (5, 4)):
        p[t] = 0.01
        p[t, k] = 0.96
    res = prefix_search(np.log(p), beam=8, token_floor=-3.0)
    pt = partials(res, v, FrameClock(0.04))
    # reference: hand-worked (one token spike a frame, blanks elsewhere)
    assert [pt.text(i) for i in range(7)] == ["", "a", "a", "ab", "ab", "ab c", "ab c"]
    assert pt.open_last.tolist() == [False, True, True, True, False, True, True]
    sw = shown_words(pt, ["ab", "c"], [0.17, 0.22])
    # reference: hand-worked: "ab" first shown (as "a") at frame 1, final at frame 3
    assert sw.first_shown_s.tolist() == pytest.approx([0.04, 0.20])
    assert sw.final_shown_s.tolist() == pytest.approx([0.12, 0.20])
    assert sw.rewrites.tolist() == [0, 0]
    assert sw.rewrite_rate == 0.0


def test_compute_time_per_chunk_shifts_shown_times_by_hand_worked_amount():
    base = hand_partials(encoder_lookahead=1, chunk=2)
    # a chunk of frames 0-1 is ready with frame 1 (0.11), frames 2-3 with frame 3 (0.15)
    np.testing.assert_allclose(base.shown_s, [0.11, 0.11, 0.15, 0.15])  # hand-worked
    small = hand_partials(encoder_lookahead=1, chunk=2, compute_s=0.01)
    # each chunk done 0.01 s after its input: every shown time moves by exactly 0.01
    np.testing.assert_allclose(small.shown_s - base.shown_s, 0.01)  # reference: hand-worked
    slow = hand_partials(encoder_lookahead=1, chunk=2, compute_s=0.1)
    # chunk 1 waits for chunk 0 (done 0.21): 0.21 + 0.1 = 0.31 -> shifts 0.1 and 0.16
    np.testing.assert_allclose(slow.shown_s, [0.21, 0.21, 0.31, 0.31])  # hand-worked
    per_step = hand_partials(encoder_lookahead=1, compute_s=0.01)
    # frame 3 is ready at 0.15 but waits for frame 2's step (done 0.16): 0.17
    np.testing.assert_allclose(per_step.shown_s, [0.08, 0.12, 0.16, 0.17])  # hand-worked


def test_decoder_lookahead_waits_for_its_window():
    pt = hand_partials(encoder_lookahead=1, decoder_lookahead=1)
    # frame t is computed with frame t + 2: 0.02 + 0.04 (t + 2) + 0.01, capped at 0.15
    np.testing.assert_allclose(pt.shown_s, [0.11, 0.15, 0.15, 0.15])  # hand-worked


def test_endpoint_and_trailing_words_the_final_result_lacks():
    pt = hand_partials(encoder_lookahead=1)
    # the reference says "b a"; the final result "b" lacks its last word
    sw = shown_words(pt, ["b", "a"], [0.08, 0.12])
    # reference: hand-worked: final result at 0.15, last word ends at 0.12
    assert sw.endpoint_s == pytest.approx(0.03)
    assert sw.trailing_missing == 1
    assert math.isnan(sw.final_shown_s[1]) and sw.rewrites[1] == -1
    assert sw.delay_percentile(50) == pytest.approx(0.07)
    assert sw.summary()["shown_delay_p90_s"] == pytest.approx(0.07)


def _labeling_probs(lp, t) -> dict:
    """Summed probability of each labeling's CTC paths over frames 0..t (blank 0), by
    enumerating all V**(t+1) paths."""
    V = lp.shape[1]
    p = np.exp(lp.astype(np.float64))
    acc = defaultdict(float)
    for path in itertools.product(range(V), repeat=t + 1):
        out, prev = [], None
        for k in path:
            if k != prev and k != 0:
                out.append(k)
            prev = k
        acc[tuple(out)] += math.prod(p[i, k] for i, k in enumerate(path))
    return acc


def brute_force_best(lp, t):
    """Labeling with the largest summed probability of its CTC paths over frames 0..t
    (prefix probability, Graves et al., 2006), by enumerating all V**(t+1) paths."""
    acc = _labeling_probs(lp, t)
    return max(acc, key=acc.get)


def test_best_partial_equals_brute_force_argmax_at_every_frame(rng):
    for _ in range(20):
        T = int(rng.integers(1, 7))
        V = int(rng.integers(2, 5))
        lp = random_log_probs(rng, T, V, peaky=float(rng.uniform(0, 2))).astype(np.float64)
        vocab = Vocabulary(WORD_VOCAB.tokens[:V], boundary=WordBoundary())
        pt = partials(prefix_search(lp, **UNPRUNED), vocab, FrameClock(0.04))
        for t in range(T):
            best = brute_force_best(lp, t)
            # reference: brute force
            assert pt.words[t] == tuple(vocab.tokens[k][1:] for k in best), (T, V, t)


def test_last_partial_is_the_best_hypothesis_and_first_before_final(rng):
    lm = ArpaLM.from_string(
        "\\data\\\nngram 1=4\n\n\\1-grams:\n-0.5 <s>\n-0.3 a\n-0.6 b\n-0.4 </s>\n\n\\end\\\n"
    )
    v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    for _ in range(10):
        lp = random_log_probs(rng, int(rng.integers(5, 30)), 4, peaky=2.0)
        res = prefix_search(
            lp, beam=4, lm=lm, lm_weight=1.0, word_separator=1, vocab=list(v.tokens),
            lm_eos=True,
        )  # fmt: skip
        pt = partials(res, v, FrameClock(0.04), encoder_lookahead=3, compute_s=0.005)
        # reference: the search's own best hypothesis (end-of-utterance terms included)
        assert pt.prefix[-1] == res.best.prefix
        assert pt.words[-1] == tuple(w for w, _, _ in v.words(res.best.tokens))
        sw = shown_words(pt, pt.words[-1], np.arange(len(pt.words[-1])) * 0.1)
        have = ~np.isnan(sw.first_shown_s)
        assert have.all()  # every final word was shown
        assert (sw.first_shown_s <= sw.final_shown_s).all()  # DEVELOPERS.md, partials
        assert (np.diff(pt.shown_s) >= 0).all()


def test_partials_json_lines_and_no_overwrite(tmp_path):
    pt = hand_partials(encoder_lookahead=1)
    f = tmp_path / "p.jsonl"
    pt.write_jsonl(f)
    rows = [json.loads(line) for line in f.read_text().splitlines()]
    assert rows[2] == {"frame": 2, "time_s": 0.1, "shown_s": 0.15, "text": "b"}  # hand-worked
    with pytest.raises(Exception, match="overwrite"):
        pt.write_jsonl(f)
    pt.write_jsonl(f, overwrite=True)


def test_bad_input_names_what_and_fix():
    res = prefix_search(HAND, beam=4, trace=False)
    with pytest.raises(ParameterError, match="trace=True"):
        partials(res, HAND_VOCAB, HAND_CLOCK)
    res = prefix_search(HAND, beam=4)
    with pytest.raises(ParameterError, match="compute_s"):
        partials(res, HAND_VOCAB, HAND_CLOCK, compute_s=-1.0)
    with pytest.raises(ParameterError, match="chunk"):
        partials(res, HAND_VOCAB, HAND_CLOCK, chunk=0)
    with pytest.raises(ParameterError, match="one end time per reference word"):
        shown_words(partials(res, HAND_VOCAB, HAND_CLOCK), ["a", "b"], [0.1])


def test_scan_tables_carry_the_shown_times(tmp_path):
    from peekalign import BundleWriter, scan

    vocab = ["<b>", "|", "a", "c", "m", "r", "t"]
    ref = "tram car"
    toks = [vocab.index(c) for c in ref.replace(" ", "|")]
    # blank, then each token on 2 frames followed by a blank frame
    path = [0] + [x for k in toks for x in (k, k, 0)]
    p = np.full((len(path), len(vocab)), 1e-6)
    p[np.arange(len(path)), path] = 1.0 - 6e-6
    with BundleWriter(
        tmp_path / "b", vocab=vocab, frame_shift_s=0.04,
        word_boundary={"kind": "separator", "symbol": "|"},
    ) as w:  # fmt: skip
        w.add("d-0", np.log(p), ref=ref, hyp=ref)
    s = scan(tmp_path / "b", workers=0, progress=False)
    words = s.words
    # reference: hand-worked: token k (0-based) is created on frame 1 + 3k, shown at its
    # centre (no look-ahead stated); "tram" grows from "t" (frame 1) to "tram" (frame 10),
    # "car" from frame 16 to frame 22; forced-alignment word ends are the end of the
    # second frame of the last token: frames 11 and 23, 0.46 s and 0.94 s
    assert words["first_shown_s"].tolist() == pytest.approx([0.04, 0.64])
    assert words["final_shown_s"].tolist() == pytest.approx([0.40, 0.88])
    assert words["rewrites"].tolist() == [0, 0]
    u = s.utterances
    assert u["rewrite_rate"].tolist() == [0.0]
    assert u["shown_delay_p50_ms"].tolist() == pytest.approx([-60.0])
    assert u["shown_delay_p90_ms"].tolist() == pytest.approx([-60.0])


# ---------------------------------------------------------------------------
# beam replay data
# ---------------------------------------------------------------------------


def brute_force_ranking(lp, t, bonus=0.0):
    """Every labeling with its log summed path probability over frames 0..t (Graves et
    al., 2006), best first by that plus ``bonus`` per token, by enumerating all V**(t+1)
    paths."""
    rows = [(math.log(v), k) for k, v in _labeling_probs(lp, t).items()]
    return sorted(rows, key=lambda r: -(r[0] + bonus * len(r[1])))


def test_replay_beam_equals_brute_force_ranking(rng):
    from peekalign.replay import beam_replay

    for _ in range(8):
        T = int(rng.integers(1, 6))
        V = int(rng.integers(2, 4))
        lp = random_log_probs(rng, T, V, peaky=1.0).astype(np.float64)
        vocab = Vocabulary(WORD_VOCAB.tokens[:V], boundary=WordBoundary())
        rp = beam_replay(prefix_search(lp, **UNPRUNED, token_bonus=0.25), vocab)
        for t in range(T):
            want = brute_force_ranking(lp, t, bonus=0.25)
            got = rp.beam_at(t)
            # reference: brute force (every labeling with non-zero mass is kept, best first)
            assert [r["text"] for r in got] == [
                " ".join(vocab.tokens[k][1:] for k in lab) for _, lab in want
            ]
            np.testing.assert_allclose([r["ctc"] for r in got], [s for s, _ in want], atol=1e-5)
            # score = ctc + token_bonus * tokens (DEVELOPERS.md, search scores)
            for r, (_, lab) in zip(got, want, strict=True):
                assert r["token_bonus"] == pytest.approx(0.25 * len(lab))


def test_replay_marks_the_reference_off_track_where_the_beam_lost_it():
    from peekalign.replay import beam_replay

    # beam 1 on the hand-worked posteriors: frame 0 keeps '' (.9), frame 1 'a'
    # (.9*.5 = .45 over 'b' .27 and '' .18), frames 2-3 'a b'; the reference is 'b',
    # which the forced alignment starts on frame 2
    res = prefix_search(HAND, beam=1, candidates=None, token_floor=None, prune_gap=None)
    rp = beam_replay(res, HAND_VOCAB, ref_tokens=[2], ref_first_frames=[2])
    # reference: hand-worked
    assert [rp.text(int(p)) for p in rp.partial] == ["", "a", "a b", "a b"]
    assert rp.ref_due.tolist() == [0, 0, 1, 1]
    assert rp.ref_held.tolist() == [0, 0, 0, 0]
    assert rp.on_track.tolist() == [True, True, False, False]
    lost = rp.lost
    assert lost["n_matched"] == 0 and lost["complete"] is False
    # the empty prefix was last held on frame 0 and pruned on frame 1 (gap log(.45/.18));
    # the closest miss of 'b' was on frame 1 (gap log(.45/.27))
    assert lost["last_frame_held"] == 0 and lost["prune_frame"] == 1
    assert lost["prune_gap"] == pytest.approx(math.log(0.45 / 0.18), abs=1e-5)
    assert lost["next_frame"] == 1
    assert lost["next_gap"] == pytest.approx(math.log(0.45 / 0.27), abs=1e-5)
    # the empty prefix's prune event is kept (it had been in the beam); 'b' never was
    assert rp.prune_frame.tolist() == [1, 2]
    assert [rp.text(int(p)) for p in rp.prune_prefix] == ["", "a"]


@pytest.mark.parametrize("kind", ["prefix", "separator"])
def test_prefix_words_equal_decoding_each_prefix_whole(kind):
    from peekalign.partials import _prefix_words

    # reference: brute force, each prefix's token sequence walked from the root and
    # grouped into words from scratch (the memoised one-token steps must agree)
    if kind == "prefix":
        v = Vocabulary(["-", "\u2581a", "\u2581", "b", "c"], boundary=WordBoundary())
    else:
        v = Vocabulary(["-", "|", "a", "b", "c"], boundary=WordBoundary("separator", "|"))
    rng = np.random.default_rng(4)
    n = 400
    parent = np.r_[-1, [int(rng.integers(0, k)) for k in range(1, n)]]
    token = np.r_[-1, rng.integers(1, len(v), size=n - 1)]
    table = type("Table", (), {"parent": parent, "token": token})
    ids = rng.integers(0, n, size=300)
    words, open_last = _prefix_words(table, v, ids)
    for pid, ws, op in zip(ids.tolist(), words, open_last.tolist(), strict=True):
        toks, j = [], pid
        while j > 0:
            toks.append(int(token[j]))
            j = int(parent[j])
        toks.reverse()
        assert ws == tuple(w for w, _, _ in v.words(toks))
        closed = kind == "separator" and bool(toks) and toks[-1] == 1
        assert op == (bool(ws) and not closed)
