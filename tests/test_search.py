"""Tests of the traced CTC prefix beam search."""

from __future__ import annotations

import itertools
import json
import math
from collections import defaultdict

import numpy as np
import pytest
from conftest import ctc_collapse, random_log_probs, require

from peekalign.align import align_tokens
from peekalign.exceptions import AlignmentError, ParameterError
from peekalign.search import prefix_search, select_candidates

UNPRUNED = dict(beam=100_000, candidates=None, token_floor=None, prune_gap=None, nbest=100_000)


def brute_force_prefix_probs(lp, blank=0):
    """Per frame t: {labeling: log of the summed probability of every path over frames
    0..t that collapses to it}, by enumerating all V**(t+1) paths."""
    T, V = lp.shape
    p = np.exp(lp.astype(np.float64))
    frames = []
    for t in range(T):
        acc = defaultdict(list)
        for path in itertools.product(range(V), repeat=t + 1):
            acc[tuple(ctc_collapse(path, blank))].append(
                math.prod(p[i, k] for i, k in enumerate(path))
            )
        frames.append({lab: math.log(math.fsum(v)) for lab, v in acc.items()})
    return frames


def random_case(rng):
    T = int(rng.integers(1, 8))
    V = int(rng.integers(2, 5))
    return random_log_probs(rng, T, V, peaky=float(rng.uniform(0, 2))).astype(np.float64)


# ---------------------------------------------------------------------------
# CTC probabilities
# ---------------------------------------------------------------------------


def test_prefix_probabilities_equal_brute_force_at_every_frame(rng):
    for _ in range(25):
        lp = random_case(rng)
        res = prefix_search(lp, **UNPRUNED)
        ref = brute_force_prefix_probs(lp)
        tr = res.trace
        for t, expected in enumerate(ref):
            ids, scores = tr.beam_at(t)
            got = {
                tuple(tr.tokens_of(int(i)).tolist()): float(s)
                for i, s in zip(ids, scores, strict=True)
            }
            # reference: brute-force enumeration of all CTC paths over frames 0..t
            assert got.keys() == expected.keys()
            for lab, value in expected.items():
                assert got[lab] == pytest.approx(value, abs=1e-4)  # beam scores are float32
        final = {tuple(h.tokens.tolist()): h.ctc_score for h in res.hypotheses}
        assert final.keys() == ref[-1].keys()
        for lab, value in ref[-1].items():
            assert final[lab] == pytest.approx(value, abs=1e-9)
        # the best hypothesis is the most probable labelling (brute-force argmax)
        best = max(ref[-1], key=ref[-1].get)
        assert res.best.ctc_score == pytest.approx(ref[-1][best], abs=1e-9)


def test_ctc_scores_equal_torch_ctc_loss(rng):
    torch = require("torch")
    torch.set_num_threads(1)
    for _ in range(15):
        lp = random_case(rng)
        blank = int(rng.integers(0, lp.shape[1]))
        res = prefix_search(lp, blank=blank, **UNPRUNED)
        for hyp in res.hypotheses[:10]:
            if hyp.tokens.size == 0:
                continue
            # reference: torch.nn.functional.ctc_loss(reduction="sum") negated = log P(l|x),
            # float64 on both sides with a random blank index: equal to rounding
            ref = -torch.nn.functional.ctc_loss(
                torch.from_numpy(lp)[:, None, :],
                torch.from_numpy(hyp.tokens.astype(np.int64))[None, :],
                torch.tensor([lp.shape[0]]),
                torch.tensor([hyp.tokens.size]),
                blank=blank,
                reduction="sum",
            ).item()
            assert hyp.ctc_score == pytest.approx(ref, rel=1e-9, abs=0)


def test_prefix_search_with_a_random_blank_equals_brute_force(rng):
    # reference: brute-force enumeration of all V**T paths collapsed with the same
    # (random, often non-zero) blank index: every labelling and its probability
    for _ in range(25):
        lp = random_case(rng)
        blank = int(rng.integers(0, lp.shape[1]))
        res = prefix_search(lp, blank=blank, **UNPRUNED)
        expected = brute_force_prefix_probs(lp, blank)[-1]
        got = {tuple(h.tokens.tolist()): h.ctc_score for h in res.hypotheses}
        assert got.keys() == expected.keys()
        assert all(blank not in lab for lab in got)
        for lab, value in expected.items():
            assert got[lab] == pytest.approx(value, rel=1e-9, abs=1e-12)
        assert res.best.ctc_score == pytest.approx(max(expected.values()), rel=1e-9)


def test_pruned_search_scores_bound_torch_from_below(rng):
    torch = require("torch")
    torch.set_num_threads(1)
    lp = random_log_probs(rng, 60, 12, peaky=1.5).astype(np.float64)
    res = prefix_search(lp, beam=8, candidates=5, token_floor=-8.0, nbest=8)
    assert len(res.hypotheses) == 8
    for hyp in res.hypotheses:
        ref = -torch.nn.functional.ctc_loss(
            torch.from_numpy(lp)[:, None, :],
            torch.from_numpy(hyp.tokens.astype(np.int64))[None, :],
            torch.tensor([60]),
            torch.tensor([hyp.tokens.size]),
            blank=0,
            reduction="sum",
        ).item()
        # reference: torch ctc_loss sums all alignments; a pruned search sums a subset
        assert hyp.ctc_score <= ref + 1e-9
        assert hyp.ctc_score > ref - 5.0  # and on peaky posteriors most of them


def test_candidates_match_numpy_sort(rng):
    lp = random_log_probs(rng, 30, 50)
    cand, n = select_candidates(lp, blank=3, candidates=7, token_floor=-4.5)
    for t in range(30):
        # reference: numpy's full sort of the row, blank removed, floor applied
        order = [int(k) for k in np.argsort(-lp[t], kind="stable") if k != 3]
        expected = [k for k in order[:7] if lp[t, k] >= -4.5]
        assert n[t] == len(expected)
        assert cand[t, : n[t]].tolist() == expected
        assert (cand[t, n[t] :] == -1).all()


# ---------------------------------------------------------------------------
# trigger frames
# ---------------------------------------------------------------------------


def peaky_posteriors(path, V, *, on=0.97):
    """Hand-built posteriors: ``on`` on the path's label, the rest spread evenly."""
    p = np.full((len(path), V), (1.0 - on) / (V - 1))
    p[np.arange(len(path)), path] = on
    return np.log(p)


def test_trigger_frames_are_first_frames_of_viterbi_segments():
    # frames: 0:b 1:a 2:a 3:b 4:c 5:c 6:b 7:c 8:d 9:d 10:b (a=1, c=2, d=3)
    path = [0, 1, 1, 0, 2, 2, 0, 2, 3, 3, 0]
    V = 6
    lp = peaky_posteriors(path, V, on=1.0 - 4e-6)  # off-path posteriors 1e-6 < e^-10
    res = prefix_search(lp, beam=16)
    # reference: hand-worked from the constructed path
    assert res.best.tokens.tolist() == [1, 2, 2, 3]
    assert res.best.trigger_frames.tolist() == [1, 4, 7, 8]
    segs = align_tokens(lp, res.best.tokens, blank=0).runs
    # reference: first frame of each Viterbi segment (peekalign.align, tested against
    # brute force there) agrees with the search's trigger frames
    assert [s.first for s in segs] == res.best.trigger_frames.tolist()


def test_trigger_frames_on_longer_peaky_case(rng):
    # random token sequence, each token a 1-3 frame segment, blanks of 0-2 frames
    V = 9
    path = []
    firsts = []
    tokens = []
    for _ in range(12):
        k = int(rng.integers(1, V))
        if tokens and tokens[-1] == k:
            path.append(0)  # a repeat needs a blank between
        path += [0] * int(rng.integers(0, 3))
        firsts.append(len(path))
        tokens.append(k)
        path += [k] * int(rng.integers(1, 4))
    path.append(0)
    lp = peaky_posteriors(path, V, on=1.0 - 8e-6)
    res = prefix_search(lp, beam=8)
    # reference: the segment starts recorded while building the path by hand
    assert res.best.tokens.tolist() == tokens
    assert res.best.trigger_frames.tolist() == firsts


# ---------------------------------------------------------------------------
# attention scorer and LM
# ---------------------------------------------------------------------------


class _FnDecoder:
    """An UtteranceDecoder from a function ``f(prefix tuple, last_frame) -> (V,) log-probs``."""

    def __init__(self, f, calls=None):
        self.f = f
        self.calls = calls

    def log_probs(self, prefixes, last_frames):
        if self.calls is not None:
            self.calls.append(
                [(tuple(p), int(e)) for p, e in zip(prefixes, last_frames, strict=True)]
            )
        return np.stack(
            [self.f(tuple(p), int(e)) for p, e in zip(prefixes, last_frames, strict=True)]
        )


def test_zero_decoder_changes_nothing(rng):
    lp = random_log_probs(rng, 40, 8, peaky=1.0)
    plain = prefix_search(lp, beam=6, candidates=4, token_bonus=0.3, nbest=6)
    calls = []
    zero = _FnDecoder(lambda p, e: np.zeros(8), calls)
    joint = prefix_search(
        lp, beam=6, candidates=4, token_bonus=0.3, nbest=6, decoder=zero,
        decoder_weight=2.0, lookahead=3,
    )  # fmt: skip
    assert calls  # the decoder was consulted
    # reference: adding lambda * 0 to every prefix cannot change any decision
    for a, b in zip(plain.hypotheses, joint.hypotheses, strict=True):
        assert a.tokens.tolist() == b.tokens.tolist()
        assert a.trigger_frames.tolist() == b.trigger_frames.tolist()
        assert a.score == b.score and a.ctc_score == b.ctc_score
        assert b.decoder_score == 0.0
    for name in ("parent", "token", "trigger_frame", "beam_prefix", "beam_score",
                 "prune_frame", "prune_prefix", "prune_rank", "prune_gap"):  # fmt: skip
        np.testing.assert_array_equal(getattr(plain.trace, name), getattr(joint.trace, name))


def test_decoder_weight_zero_gives_the_plain_nbest(rng):
    # a decoder with strong, prefix- and window-dependent opinions, weighted by 0
    lp = random_log_probs(rng, 30, 6, peaky=0.5)
    plain = prefix_search(lp, beam=5, candidates=5, nbest=5, trace=False)

    def opinionated(prefix, end):
        r = np.random.default_rng(hash((prefix, end)) % 2**32).normal(size=7) * 3
        return r - np.logaddexp.reduce(r)

    joint = prefix_search(
        lp, beam=5, candidates=5, nbest=5, trace=False, decoder=_FnDecoder(opinionated),
        decoder_weight=0.0, lookahead=2, decoder_eos=6,
    )  # fmt: skip
    # reference: hand-worked (lambda = 0 removes the decoder term from every score)
    assert [h.tokens.tolist() for h in joint.hypotheses] == [
        h.tokens.tolist() for h in plain.hypotheses
    ]
    assert [h.score for h in joint.hypotheses] == [h.score for h in plain.hypotheses]
    assert all(h.decoder_score < 0 for h in joint.hypotheses)


def test_decoder_that_prefers_a_token_reorders_the_nbest():
    lp = np.log(np.array([[0.1, 0.5, 0.4]]))
    plain = prefix_search(lp, beam=3, nbest=3)
    assert [h.tokens.tolist() for h in plain.hypotheses] == [[1], [2], []]
    prefers_2 = _FnDecoder(lambda p, e: np.log([0.0 + 1e-300, 0.01, 0.99]))

    joint = prefix_search(lp, beam=3, nbest=3, decoder=prefers_2, decoder_weight=1.0)
    # reference: hand-worked; scores log(0.4 * 0.99) > log(0.1) > log(0.5 * 0.01)
    assert [h.tokens.tolist() for h in joint.hypotheses] == [[2], [], [1]]
    assert [h.score for h in joint.hypotheses] == pytest.approx(
        [math.log(0.4 * 0.99), math.log(0.1), math.log(0.005)]
    )
    h1 = joint.hypotheses[2]
    assert h1.ctc_score == pytest.approx(math.log(0.5))
    assert h1.decoder_score == pytest.approx(math.log(0.01))


def test_decoder_window_is_trigger_plus_lookahead():
    lp = np.log(np.array([[0.1, 0.8, 0.1], [0.8, 0.1, 0.1], [0.1, 0.1, 0.8]]))
    calls = []
    dec = _FnDecoder(lambda p, e: np.full(4, -1.0), calls)
    res = prefix_search(lp, beam=4, token_floor=-2.0, decoder=dec, decoder_weight=0.5, lookahead=1)
    # reference: hand-worked. Only p = 0.8 passes the floor: token 1 at frame 0, token 2 at
    # frame 2, so "1" triggers at 0 (window end 0 + 1) and "2", "1 2" at 2 (end min(2, 3)).
    # The decoder is asked for the parent's row: () at end 1, then () and (1,) at end 2 in
    # one batched call
    assert calls == [[((), 1)], [((1,), 2), ((), 2)]] or calls == [[((), 1)], [((), 2), ((1,), 2)]]
    best = res.best
    assert best.tokens.tolist() == [1, 2]
    assert best.decoder_score == pytest.approx(-2.0)
    assert best.score == pytest.approx(best.ctc_score + 0.5 * -2.0)


def test_decoder_eos_enters_the_nbest_scores():
    lp = np.log(np.array([[0.1, 0.5, 0.4]]))
    # end of sentence (index 3) likely after "2", unlikely after "1"
    table = {(): [-9, -1, -1, -9], (1,): [-9, -1, -1, math.log(0.01)], (2,): [-9, -1, -1, 0.0]}
    dec = _FnDecoder(lambda p, e: np.array(table[p], float))
    res = prefix_search(lp, beam=3, nbest=3, decoder=dec, decoder_weight=1.0, decoder_eos=3)
    # reference: hand-worked: [2] log .4 - 1 + 0; [1] log .5 - 1 + log .01; [] log .1 - 9
    assert [h.tokens.tolist() for h in res.hypotheses] == [[2], [1], []]
    assert [h.score for h in res.hypotheses] == pytest.approx(
        [math.log(0.4) - 1, math.log(0.5) - 1 + math.log(0.01), math.log(0.1) - 9]
    )


def test_token_lm_reorders_hand_worked():
    lp = np.log(np.array([[0.2, 0.5, 0.3]]))
    table = {((), 1): math.log(0.1), ((), 2): math.log(0.9)}
    res = prefix_search(lp, beam=3, nbest=3, lm=lambda h, u: table[(h, u)], lm_weight=1.0)
    # reference: hand-worked; log(0.3 * 0.9) > log(0.2) > log(0.5 * 0.1)
    assert [h.tokens.tolist() for h in res.hypotheses] == [[2], [], [1]]
    assert [h.score for h in res.hypotheses] == pytest.approx(
        [math.log(0.27), math.log(0.2), math.log(0.05)]
    )
    assert res.hypotheses[2].lm_score == pytest.approx(math.log(0.1))


def test_word_lm_is_called_at_word_ends():
    vocab = ["-", "a", "b", "|"]
    # frames: a - | - b   (separator id 3)
    lp = peaky_posteriors([1, 0, 3, 0, 2], 4, on=1.0 - 3e-6)
    calls = []

    def lm(history, word):
        calls.append((history, word))
        return math.log(0.5)

    res = prefix_search(
        lp, beam=4, lm=lm, lm_weight=2.0, word_separator=3, vocab=vocab, lm_eos=True,
        token_bonus=0.25,
    )  # fmt: skip
    best = res.best
    assert best.tokens.tolist() == [1, 3, 2]
    # reference: hand-worked; "a" closes at the separator, "b" at the end, then </s>
    assert ((), "a") in calls and (("a",), "b") in calls and (("a", "b"), "</s>") in calls
    assert not any(w in ("|", "a|") for _, w in calls)  # the separator is not a word
    assert best.lm_score == pytest.approx(3 * math.log(0.5))
    assert best.token_bonus == pytest.approx(0.75)
    assert best.score == pytest.approx(best.ctc_score + 2.0 * 3 * math.log(0.5) + 0.75)


def test_word_lm_with_arpa_model(tmp_path):
    from peekalign.lm import ArpaLM

    arpa = tmp_path / "lm.arpa"
    arpa.write_text(
        "\\data\\\nngram 1=4\nngram 2=2\n\n\\1-grams:\n-99 <s> -0.3\n-0.5 a -0.2\n"
        "-0.6 b\n-0.4 </s>\n\n\\2-grams:\n-0.1 <s> a\n-0.2 a b\n\n\\end\\\n"
    )
    lm = ArpaLM.from_file(arpa)
    vocab = ["-", "a", "b", "|"]
    lp = peaky_posteriors([1, 0, 3, 0, 2], 4, on=1.0 - 3e-6)
    res = prefix_search(lp, beam=4, lm=lm, lm_weight=1.0, word_separator=3, vocab=vocab,
                        lm_eos=True)  # fmt: skip
    # reference: hand-worked ARPA back-off: P(a|<s>) = 10^-0.1, P(b|a) = 10^-0.2,
    # P(</s>|b) = bow(b) (absent: 1) * P(</s>) = 10^-0.4
    assert res.best.tokens.tolist() == [1, 3, 2]
    assert res.best.lm_score == pytest.approx(-0.7 * math.log(10))


# ---------------------------------------------------------------------------
# trace: prune events and the reference walk
# ---------------------------------------------------------------------------


def beam_one_case():
    # blank, a, b
    return np.log(np.array([[0.6, 0.3, 0.1], [0.2, 0.1, 0.7]]))


def test_prune_events_hand_worked():
    res = prefix_search(beam_one_case(), beam=1, candidates=None, token_floor=None)
    tr = res.trace
    # reference: hand-worked. Frame 0 keeps "" (0.6) and drops "a" (0.3), "b" (0.1).
    # Frame 1 from "": "" 0.12, "a" 0.06, "b" 0.42 -> keeps "b".
    assert res.best.tokens.tolist() == [2]
    assert res.best.trigger_frames.tolist() == [1]
    assert res.best.ctc_score == pytest.approx(math.log(0.42))
    events = [
        (int(f), tr.tokens_of(int(p)).tolist(), int(r), float(g))
        for f, p, r, g in zip(
            tr.prune_frame, tr.prune_prefix, tr.prune_rank, tr.prune_gap, strict=True
        )
    ]
    expected = [
        (0, [1], 1, math.log(2.0)),
        (0, [2], 2, math.log(6.0)),
        (1, [], 1, math.log(3.5)),
        (1, [1], 2, math.log(7.0)),
    ]
    assert [e[:3] for e in events] == [e[:3] for e in expected]
    assert [e[3] for e in events] == pytest.approx([e[3] for e in expected], abs=1e-6)
    # "a" was proposed twice: two ids, each rejected at its own creation frame
    ids = tr.find([1])
    assert len(ids) == 2 and sorted(tr.trigger_frame[ids].tolist()) == [0, 1]
    ev = tr.events_for([1])
    assert ev.frame.tolist() == [0, 1]
    assert len(tr.events_for(int(ids[0]))) == 1


def test_best_reference_prefix_hand_worked():
    tr = prefix_search(beam_one_case(), beam=1, candidates=None, token_floor=None).trace
    miss = tr.best_reference_prefix([1])
    # reference: hand-worked (see test_prune_events_hand_worked)
    assert miss.n_matched == 0 and not miss.complete
    assert (miss.first_frame_held, miss.last_frame_held) == (-1, 0)
    assert miss.prune_frame == 1 and miss.prune_gap == pytest.approx(math.log(3.5), abs=1e-6)
    assert miss.next_frame == 0 and miss.next_gap == pytest.approx(math.log(2.0), abs=1e-6)
    hit = tr.best_reference_prefix([2])
    assert hit.complete and hit.n_matched == 1
    assert (hit.first_frame_held, hit.last_frame_held, hit.prune_frame) == (1, 1, -1)
    assert math.isnan(hit.prune_gap) and hit.next_frame == -1


def test_best_reference_prefix_finds_a_pruned_word():
    # blank, 1, 2, 3; the reference "1 2" is possible but "1 3" wins a beam of 2
    lp = np.log(
        np.array(
            [
                [0.05, 0.9, 0.025, 0.025],
                [0.9, 0.05, 0.025, 0.025],
                [0.3, 0.05, 0.2, 0.45],
                [0.9, 0.05, 0.025, 0.025],
            ]
        )
    )
    res = prefix_search(lp, beam=2, candidates=None, token_floor=None)
    match = res.trace.best_reference_prefix([1, 2])
    assert res.best.tokens.tolist() == [1, 3]
    # reference: hand-worked prefix recursion. After frame 1 the beam is "1"
    # (p_b = .9*.9, p_nb = .9*.05 + .05*.05) and "" (.05*.9).
    p1_b, p1_nb, p_empty = 0.9 * 0.9, 0.9 * 0.05 + 0.05 * 0.05, 0.05 * 0.9
    # frame 2: "1 3" = .8575*.45 is first, "1" = .8575*.3 + (p1_nb + p_empty)*.05 second
    # (the cut-off), "1 2" = .8575*.2 is rejected
    cut = (p1_b + p1_nb) * 0.3 + (p1_nb + p_empty) * 0.05
    p12 = (p1_b + p1_nb) * 0.2
    assert match.n_matched == 1 and not match.complete
    assert res.trace.tokens_of(match.prefix).tolist() == [1]
    assert (match.first_frame_held, match.last_frame_held, match.prune_frame) == (0, 3, -1)
    # "1 2" was also rejected at frame 1 (gap log 2) and 3 (larger): frame 2 is closest
    assert match.next_frame == 2
    assert match.next_gap == pytest.approx(math.log(cut / p12), abs=1e-6)
    gaps = res.trace.events_for([1, 2]).gap
    assert gaps.min() == pytest.approx(match.next_gap)


def test_trace_is_compact_and_beam_sorted(rng):
    lp = random_log_probs(rng, 200, 30, peaky=1.0)
    res = prefix_search(lp, beam=5, candidates=6)
    tr = res.trace
    for name in ("parent", "token", "trigger_frame", "beam_prefix", "prune_frame",
                 "prune_prefix", "prune_rank"):  # fmt: skip
        assert getattr(tr, name).dtype == np.int32
    assert tr.beam_score.dtype == np.float32 and tr.prune_gap.dtype == np.float32
    assert tr.beam_offsets.shape == (201,)
    for t in range(200):
        ids, scores = tr.beam_at(t)
        assert 1 <= ids.size <= 5
        assert (np.diff(scores) <= 0).all()
    kept = np.diff(tr.beam_offsets)[tr.prune_frame]
    assert (tr.prune_rank >= kept).all() and (tr.prune_gap >= 0).all()
    # a prefix created at frame t has its parent in the beam kept after frame t - 1
    for i in rng.choice(np.arange(1, tr.num_prefixes), 50, replace=False):
        t = int(tr.trigger_frame[i])
        p = int(tr.parent[i])
        if t > 0:
            assert p in tr.beam_at(t - 1)[0]
        else:
            assert p == 0
    assert res.best.prefix in tr.beam_at(199)[0]
    untraced = prefix_search(lp, beam=5, candidates=6, trace=False)
    assert untraced.trace is None
    assert [h.tokens.tolist() for h in untraced.hypotheses] == [
        h.tokens.tolist() for h in res.hypotheses
    ]


# ---------------------------------------------------------------------------
# errors
# ---------------------------------------------------------------------------


def test_parameter_errors(rng):
    lp = random_log_probs(rng, 5, 4)
    with pytest.raises(ParameterError, match=r"The 'beam' parameter of prefix_search must be "
                       r"an int in the range \[1, inf\)\. Got 0 instead\."):  # fmt: skip
        prefix_search(lp, beam=0)
    with pytest.raises(ParameterError, match="'lookahead'.*Got -3"):
        prefix_search(lp, lookahead=-3)
    with pytest.raises(ParameterError, match="'blank'"):
        prefix_search(lp, blank=4)
    with pytest.raises(ParameterError, match="'word_separator'"):
        prefix_search(lp, word_separator=0)
    with pytest.raises(ParameterError, match="vocab of 3 tokens"):
        prefix_search(lp, lm=lambda h, u: 0.0, vocab=["a", "b", "c"])
    bad = lp.copy()
    bad[2, 1] = np.nan
    with pytest.raises(ParameterError, match="utt 'x-1'.*NaN"):
        prefix_search(bad, utt="x-1")
    with pytest.raises(ParameterError, match="utt .x-1.*nan from the decoder for prefix"):
        nan_dec = _FnDecoder(lambda p, e: np.full(3, np.nan))
        prefix_search(lp, decoder=nan_dec, decoder_weight=1.0, utt="x-1")


def test_impossible_frame_is_an_alignment_error():
    lp = np.log(np.array([[0.5, 0.5, 1e-300], [1e-300, 1e-300, 1.0]]))
    lp[lp < -600] = -np.inf
    # frame 1 only allows token 2, which the floor removes: no path survives
    with pytest.raises(AlignmentError, match="utt 'u7'.*after frame 1.*token_floor"):
        prefix_search(lp, token_floor=0.5, utt="u7")


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------

CLI_VOCAB = ["<b>", "|", "a", "c", "m", "r", "t"]


@pytest.fixture
def search_bundle(tmp_path):
    from peekalign import BundleWriter

    path = tmp_path / "b"
    ref = "tram car"
    toks = [CLI_VOCAB.index(c) for c in ref.replace(" ", "|")]
    # hand-built path: blank, then each token on 2 frames followed by a blank frame
    path_labels = [0] + [x for k in toks for x in (k, k, 0)]
    lp = peaky_posteriors(path_labels, len(CLI_VOCAB), on=1.0 - 6e-6).astype(np.float32)
    with BundleWriter(
        path,
        vocab=CLI_VOCAB,
        frame_shift_s=0.04,
        word_boundary={"kind": "separator", "symbol": "|"},
    ) as w:
        w.add("d-0", lp, ref=ref)
    return path, toks, lp


def test_search_command_writes_json(search_bundle, tmp_path, capsys):
    from peekalign.cli import main

    path, toks, lp = search_bundle
    out = tmp_path / "s.json"
    assert main(["search", str(path), "d-0", "--beam", "8", "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "tram|car" in text and "prune events:" in text
    assert "reference: all 8 tokens held in the beam" in text
    data = json.loads(out.read_text())
    best = data["hypotheses"][0]
    # reference: the constructed path emits the reference; its trigger frames are the
    # first frames of the Viterbi segments (peekalign.align) and their times frame * 0.04 s
    assert best["text"] == "tram car"
    first = align_tokens(lp, toks, blank=0).first.tolist()
    assert [t["trigger_frame"] for t in best["tokens"]] == first
    assert [t["trigger_s"] for t in best["tokens"]] == pytest.approx([f * 0.04 for f in first])
    assert data["params"]["beam"] == 8
    ev = data["prune_events"]
    assert len(ev["frame"]) == len(ev["gap"]) == len(ev["prefix"])
    assert max(ev["prefix"], default=0) < len(data["prefixes"]["parent"])
    assert data["reference"]["complete"] is True
    # a second run refuses to overwrite the file (usage error, exit 2)
    assert main(["search", str(path), "d-0", "--json", str(out)]) == 2


def test_search_command_with_arpa_lm(search_bundle, tmp_path):
    from peekalign.cli import main

    path, _, _ = search_bundle
    arpa = tmp_path / "u.arpa"
    arpa.write_text(
        "\\data\\\nngram 1=4\n\n\\1-grams:\n-0.5 tram\n-0.5 car\n-0.3 </s>\n-99 <s>\n\n\\end\\\n"
    )
    out = tmp_path / "s.json"
    args = ["search", str(path), "d-0", "--lm", str(arpa), "--lm-weight", "0.5"]
    assert main([*args, "--json", str(out)]) == 0
    best = json.loads(out.read_text())["hypotheses"][0]
    # reference: hand-worked unigram model: log10 P = -0.5 - 0.5 - 0.3 (</s>)
    assert best["text"] == "tram car"
    assert best["lm_score"] == pytest.approx(-1.3 * math.log(10), abs=1e-3)
    assert best["score"] == pytest.approx(best["ctc_score"] + 0.5 * best["lm_score"], abs=1e-3)


def test_search_command_unknown_utterance(search_bundle, capsys):
    from peekalign.cli import main

    path, _, _ = search_bundle
    assert main(["search", str(path), "nope"]) == 2
    err = capsys.readouterr().err
    assert "'nope'" in err and "d-0" in err


def test_search_command_writes_partials(search_bundle, tmp_path, capsys):
    from peekalign.cli import main

    path, toks, lp = search_bundle
    out = tmp_path / "p.jsonl"
    args = ["search", str(path), "d-0", "--partials", str(out), "--compute-s", "0.01"]
    assert main(args) == 0
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    # one line a frame; the last partial is the best hypothesis "tram car"
    assert [r["frame"] for r in rows] == list(range(lp.shape[0]))
    assert set(rows[0]) == {"frame", "time_s", "shown_s", "text"}
    assert rows[-1]["text"] == "tram car"
    # reference: hand-worked: no look-ahead stated, so shown = frame centre + 10 ms
    assert [r["shown_s"] for r in rows] == pytest.approx(
        [0.04 * i + 0.01 for i in range(len(rows))]
    )
    # the first "t" is shown once its frame (the first of its Viterbi segment) is computed
    first_t = align_tokens(lp, toks, blank=0).first[0]
    assert next(r["frame"] for r in rows if r["text"]) == first_t
    # a second run refuses to overwrite, and writes no --json either
    js = tmp_path / "s.json"
    assert main([*args, "--json", str(js)]) == 2
    assert not js.exists()
    assert main([*args, "--overwrite"]) == 0
