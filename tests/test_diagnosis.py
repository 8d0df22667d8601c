"""Deletion diagnosis: one hand-built case per code."""

from __future__ import annotations

import itertools
import math
from collections import defaultdict

import numpy as np
import pytest
from conftest import ctc_collapse
from test_streaming import TOKENS, VOCAB, ids, synth

from peekalign import (
    FrameClock,
    ParameterError,
    Utterance,
    Vocabulary,
    WordBoundary,
    align_tokens,
)
from peekalign.diagnosis import DELETION_CODES, diagnose_deletions
from peekalign.errors import align_words
from peekalign.search import prefix_search
from peekalign.streaming import token_windows, word_reach

A, B, SEP, C, D, E = (TOKENS.index(x) for x in "ab|cde")
CLOCK = FrameClock(0.04, right_context_s=0.02)


def diagnose(spikes, *, hyp="ab", T=20, words=None, lookahead=0, search=None, **kw):
    """Reference "ab cd" over hand-placed spikes; returns the diagnoses.

    The clock's frames read input up to their end (right context = half a shift), so a
    word is reached once the decoder's view reaches the word's last aligned frame.
    """
    u = Utterance.from_arrays(
        synth(spikes, T), ref="ab cd", vocab=VOCAB, hyp=hyp, clock=CLOCK, words=words
    )
    a = align_tokens(u.log_probs, u.ref_tokens)
    cov = word_reach(
        u, a, token_windows(a.first, num_frames=T, clock=u.clock, lookahead=lookahead)
    )
    res = None if search is None else prefix_search(u.log_probs, trace=True, **search)
    errs = align_words(["ab", "cd"], hyp)
    return diagnose_deletions(u, a, errs, words=cov, search=res, **kw), res


def only(diags):
    assert len(diags) == 1 and diags[0].word == "cd" and diags[0].ref_index == 1
    return diags[0]


CLEAR = {2: A, 5: B, 8: SEP, 11: C, 14: D}


def test_no_spike():
    # reference: hand-built - "c" and "d" never rise above the 1e-3 background, below
    # the 0.05 floor
    d = only(diagnose({2: A, 5: B, 8: SEP})[0])
    assert d.code == "no-spike" and d.also == ()
    assert d.evidence["peak"] < 0.05


def test_weak():
    # reference: hand-built - both tokens peak at 0.2: above the floor (0.05), below the
    # spike threshold (0.5); the blank (0.8) wins their frames
    d = only(diagnose({2: A, 5: B, 8: SEP, 11: (C, 0.2), 14: (D, 0.2)})[0])
    assert d.code == "weak" and d.also == ()
    assert d.evidence["peak"] == pytest.approx(0.2)
    assert d.evidence["peak_frame"] in (11, 14)


def test_glued_missing_separator():
    # reference: hand-built - clear spikes for c and d but the separator never fires,
    # so the best path reads "abcd": the word survives glued onto "ab"
    d = only(diagnose({2: A, 5: B, 11: C, 14: D}, hyp="abcd")[0])
    assert d.code == "glued" and d.also == ()
    assert d.evidence["neighbour_token"] == "b" and "how" not in d.evidence
    assert d.evidence["between"] == [5, 11]


def test_repeat_collapsed_without_blank():
    # reference: hand-built - word-piece vocabulary, "a a b": the two "a" frames are
    # adjacent with no blank between, so CTC collapses them into one word
    toks = ["<b>", "\u2581a", "\u2581b"]
    v = Vocabulary(toks, boundary=WordBoundary("prefix", "\u2581"))
    lp = synth({2: 1, 3: 1, 7: 2}, 10, V=3)
    u = Utterance.from_arrays(lp, ref="a a b", vocab=v, hyp="a b")
    a = align_tokens(u.log_probs, u.ref_tokens)
    (d,) = diagnose_deletions(u, a, align_words("a a b", "a b"))
    assert (d.ref_index, d.code, d.also) == (1, "repeat-collapsed", ())
    assert d.evidence["neighbour"] == 0


def test_repeated_word_with_a_blank_between_is_not_collapsed():
    # reference: hand-built - the same "a a b" with a blank frame between the two "a"
    # spikes: CTC emits both, so a recognizer that lost the word lost it downstream
    toks = ["<b>", "\u2581a", "\u2581b"]
    v = Vocabulary(toks, boundary=WordBoundary("prefix", "\u2581"))
    lp = synth({2: 1, 4: 1, 7: 2}, 10, V=3)
    u = Utterance.from_arrays(lp, ref="a a b", vocab=v, hyp="a b")
    a = align_tokens(u.log_probs, u.ref_tokens)
    (d,) = diagnose_deletions(u, a, align_words("a a b", "a b"))
    assert (d.code, d.also) == ("decoder-drop", ())


def test_overlap():
    # reference: hand-built - "b" peaks at frame 5 (0.45) where its neighbour "a" has
    # 0.5: "a" owns the frame on the best path, so "b" is never emitted
    toks = ["<b>", "\u2581a", "\u2581b"]
    v = Vocabulary(toks, boundary=WordBoundary("prefix", "\u2581"))
    p = np.full((9, 3), 0.01)
    p[:, 0] = 0.98
    p[2] = [0.05, 0.94, 0.01]
    p[5] = [0.05, 0.50, 0.45]
    u = Utterance.from_arrays(np.log(p), ref="a b", vocab=v, hyp="a")
    a = align_tokens(u.log_probs, u.ref_tokens)
    (d,) = diagnose_deletions(u, a, align_words("a b", "a"), spike_threshold=0.4)
    assert (d.ref_index, d.code, d.also) == (1, "overlap", ())
    assert d.evidence["peak_frame"] == 5 and d.evidence["neighbour"] == 0
    # with the default spike threshold (0.5) the same spike counts as weak first
    (d,) = diagnose_deletions(u, a, align_words("a b", "a"))
    assert (d.code, d.also) == ("weak", ("overlap",))


# Doubled letters inside the deleted word "c?d?" (start, middle, end): the doubled
# letter's two spikes sit on adjacent frames, so the best path holds one run of it (its
# CTC output would be misspelt), but every spike is clear and the separator fires: the
# word was lost downstream. A repeat inside the word is no neighbour (a neighbour is a
# token of another word), so the code is decoder-drop, never a collapse code.
DOUBLED = {
    "start": ("ccd", {11: C, 12: C, 15: D}),
    "middle": ("cdde", {11: C, 14: D, 15: D, 18: E}),
    "end": ("cdd", {11: C, 14: D, 15: D}),
}


@pytest.mark.parametrize("where", list(DOUBLED))
def test_doubled_letter_inside_the_word_is_no_neighbour(where):
    word, spikes = DOUBLED[where]
    # reference: hand-built (above); on main the doubled letter was taken for a
    # neighbour and the word coded as lost in the collapse
    ref = f"ab {word}"
    lp = synth({2: A, 5: B, 8: SEP, **spikes}, 24)
    u = Utterance.from_arrays(lp, ref=ref, vocab=VOCAB, hyp="ab")
    a = align_tokens(u.log_probs, u.ref_tokens)
    labels = u.log_probs.argmax(axis=1)
    misspelt = word.replace("dd", "d").replace("cc", "c")
    assert ctc_collapse(labels.tolist(), 0) == ids(f"ab {misspelt}")
    (d,) = diagnose_deletions(u, a, align_words(["ab", word], ["ab"]))
    assert (d.word, d.code, d.also) == (word, "decoder-drop", ())


def test_doubled_letter_at_a_word_boundary_with_separator_is_glued():
    # reference: hand-built - "ab bc" where the separator never fires and the two
    # "b" spikes are adjacent: the best path reads "abc", one word glued onto the
    # other; the repeat crosses a separator in the reference, so it is not the cause
    lp = synth({2: A, 5: B, 6: B, 9: C}, 14)
    u = Utterance.from_arrays(lp, ref="ab bc", vocab=VOCAB, hyp="abc")
    a = align_tokens(u.log_probs, u.ref_tokens)
    (d,) = diagnose_deletions(u, a, align_words(["ab", "bc"], ["abc"]))
    assert d.code == "glued" and "repeat-collapsed" not in d.also


def test_doubled_letter_at_a_word_boundary_without_separator_is_repeat_collapsed():
    # reference: hand-built - word pieces "▁a ▁b ▁b ▁c": the two one-token words "b"
    # meet with no separator token between; their spikes are adjacent, so the best
    # path holds one run of "▁b" and CTC emits one "b"
    toks = ["<b>", "\u2581a", "\u2581b", "\u2581c"]
    v = Vocabulary(toks, boundary=WordBoundary("prefix", "\u2581"))
    lp = synth({2: 1, 5: 2, 6: 2, 9: 3}, 12, V=4)
    u = Utterance.from_arrays(lp, ref="a b b c", vocab=v, hyp="a b c")
    a = align_tokens(u.log_probs, u.ref_tokens)
    (d,) = diagnose_deletions(u, a, align_words("a b b c", "a b c"))
    assert d.word == "b" and d.code == "repeat-collapsed"
    assert d.evidence["neighbour"] in (1, 2) and d.evidence["neighbour"] != d.ref_index


def test_pruned_with_frame_and_gap():
    # reference: hand-worked - beam 1, token bonus -2 per token. At frame 11 the
    # beam holds "ab|" with mass m (almost all of it ending in a blank); "ab|c" gets
    # m * 0.6 and one more token, "ab|" keeps m * 0.392 (the blank's share: 1 - 0.6 -
    # 8 x 0.001): gap = (log 0.392 - 2 * 3) - (log 0.6 - 2 * 4) = log(0.392 / 0.6) + 2
    spikes = {2: A, 5: B, 8: SEP, 11: (C, 0.6), 14: (D, 0.6)}
    diags, res = diagnose(spikes, search={"beam": 1, "token_bonus": -2.0})
    assert res.best.tokens.tolist() == ids("ab|")  # the search lost the word
    d = only(diags)
    assert d.code == "pruned" and d.also == ()
    assert d.evidence["prune_frame"] == 11
    assert d.evidence["score_gap"] == pytest.approx(np.log(0.392 / 0.6) + 2, abs=1e-3)
    assert d.evidence["held"] is False and d.evidence["tokens_held"] == 1


def test_pruned_after_being_held():
    # reference: hand-worked - beam 2, token bonus -1 per token, candidates only
    # tokens with posterior >= e^-3 (here: the one spike of each frame); every frame
    # gives 0.001 to each of the 8 other tokens and the rest to the blank. Frames 0-2
    # (a .95, b .9, | .95) leave "ab|" with M = .95 * .9 * .95 = .81225 (one path).
    # Frame 3 (c .6, blank .392): "ab|" keeps M * (.392 + .001) (blank or "|" again),
    # "ab|c" gets M * .6; the other held prefix "a|" (.95 * .093 * .95 = .0839, one
    # token fewer) keeps .0839 * .393 = .033 e^-2 and "a|c" gets .050 e^-3, below
    # "ab|c"'s .487 e^-4 = .066 e^-2, so the beam HOLDS "ab|c". Frame 4 (e .65, blank .342):
    # "ab|e" gets M * .393 * .65, "ab|c" keeps M * .6 * (.342 + .001); "ab|" stays
    # first (token_bonus), "ab|e" takes the second place and "ab|c" is pruned at rank 2 with
    # gap = log(.393 * .65 / (.6 * .343)) = log(.25545 / .2058) = 0.21612 (same token
    # count: the token_bonus cancels). "ab|" stays best to the end: at frame 4 "ab|e" scores
    # .65 * e^-1 = .24 times "ab|"'s mass against the .342 "ab|" keeps, and at frame 5
    # (d .6) "ab|d" scores .6 * e^-1 = .22 against .392.
    spikes = {0: (A, 0.95), 1: (B, 0.9), 2: (SEP, 0.95), 3: (C, 0.6), 4: (E, 0.65), 5: (D, 0.6)}
    search = {"beam": 2, "token_bonus": -1.0, "token_floor": -3.0}
    diags, res = diagnose(spikes, T=7, search=search)
    assert res.best.tokens.tolist() == ids("ab|")  # the search lost the word
    d = only(diags)
    assert d.code == "pruned" and d.also == ()
    ev = d.evidence
    assert ev["held"] is True and ev["tokens_held"] == 1 and ev["tokens_in_word"] == 2
    assert ev["prune_frame"] == 4 and ev["rank"] == 2 and ev["prune_events"] == 1
    gap = math.log(0.393 * 0.65 / (0.6 * 0.343))
    assert ev["score_gap"] == pytest.approx(gap, abs=1e-5)
    # the trace agrees: "ab|c" was created at frame 3 and kept for that frame
    tr = res.trace
    (pid,) = tr.find(ids("ab|c"))
    assert tr.trigger_frame[pid] == 3 and pid in tr.beam_at(3)[0]
    # reference: brute-force enumeration of all CTC paths over frames 0..t (10^4 and
    # 10^5 paths), keeping those that start every token run on a frame where the token
    # is a candidate (the token floor), summed per labelling: the masses the search
    # gives these prefixes (their ancestors were held at every frame, so no path was
    # lost to pruning), and the hand-worked gap
    lp = synth(spikes, 7)
    brute3, brute4 = (_floor_limited_prefix_probs(lp[:n], -3.0) for n in (4, 5))
    beam3 = dict(zip(*(x.tolist() for x in tr.beam_at(3)), strict=True))
    assert beam3[pid] == pytest.approx(brute3[tuple(ids("ab|c"))] - 4.0, abs=1e-5)
    assert brute3[tuple(ids("ab|c"))] == pytest.approx(math.log(0.81225 * 0.6))
    assert brute4[tuple(ids("ab|e"))] - brute4[tuple(ids("ab|c"))] == pytest.approx(gap)


def _floor_limited_prefix_probs(lp, token_floor, blank=0):
    """{labelling: log of the summed probability of every path over all frames of
    ``lp`` that collapses to it and starts each token run where the token has
    log-prob >= ``token_floor``}, by enumerating all V**T paths."""
    T, V = lp.shape
    p = np.exp(lp.astype(np.float64))
    acc = defaultdict(list)
    for path in itertools.product(range(V), repeat=T):
        starts = [t for t, k in enumerate(path) if k != blank and (t == 0 or path[t - 1] != k)]
        if all(lp[t, path[t]] >= token_floor for t in starts):
            acc[tuple(ctc_collapse(path, blank))].append(
                math.prod(p[t, k] for t, k in enumerate(path))
            )
    return {lab: math.log(math.fsum(v)) for lab, v in acc.items()}


def test_cut_off():
    # reference: hand-worked - reference times say "cd" ends at 0.90 s; its last token
    # triggers at frame 14 -> heard until 14 * 0.04 + 0.02 = 0.58 s with no look-ahead:
    # margin -0.32
    words = [("ab", 0.05, 0.25), ("cd", 0.40, 0.90)]
    d = only(diagnose(CLEAR, words=words)[0])
    assert d.code == "cut-off" and d.also == ("decoder-drop",)
    assert d.evidence["reach_margin_ms"] == pytest.approx(-320)
    assert d.evidence["word_times"] == "reference"
    # with 9 frames of look-ahead the heard until reaches 0.94 s: no longer cut off
    assert only(diagnose(CLEAR, words=words, lookahead=9)[0]).code == "decoder-drop"
    # and the check can be turned off (offline models)
    assert only(diagnose(CLEAR, words=words, cut_off=False)[0]).code == "decoder-drop"


def test_decoder_drop():
    # reference: hand-built - clear spikes (0.9), separator present, the search keeps
    # the word, yet the recognizer's hypothesis lacks it
    d = only(diagnose(CLEAR, search={"beam": 4})[0])
    assert d.code == "decoder-drop" and d.also == ()
    assert d.evidence["in_greedy"] is True and d.evidence["in_search"] is True


def test_precedence_lists_the_other_codes():
    # reference: hand-built - weak spikes of a word that is also cut off
    words = [("ab", 0.05, 0.25), ("cd", 0.40, 0.90)]
    d = only(diagnose({2: A, 5: B, 8: SEP, 11: (C, 0.2), 14: (D, 0.2)}, words=words)[0])
    assert d.code == "cut-off" and d.also == ("weak",)
    assert DELETION_CODES.index("cut-off") < DELETION_CODES.index("weak")
    assert d.as_row()["also"] == "weak"


def test_no_deletion_no_diagnosis():
    assert diagnose(CLEAR, hyp="ab cd")[0] == []


def test_bad_input():
    u = Utterance.from_arrays(synth(CLEAR, 20), ref="ab cd", vocab=VOCAB)
    a = align_tokens(u.log_probs, u.ref_tokens)
    with pytest.raises(ParameterError, match="over 3 reference words"):
        diagnose_deletions(u, a, align_words("ab cd ef", "ab"))
    with pytest.raises(ParameterError, match="'spike_threshold' parameter"):
        diagnose_deletions(u, a, align_words("ab cd", "ab"), floor=0.3, spike_threshold=0.2)
    res = prefix_search(u.log_probs, trace=False)
    with pytest.raises(ParameterError, match="trace=True"):
        diagnose_deletions(u, a, align_words("ab cd", "ab"), search=res)
