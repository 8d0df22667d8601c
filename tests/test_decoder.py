"""The decoder protocol, triggered decoding and joint decoding under a look-ahead."""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import random_log_probs

from peekalign import ParameterError, prefix_search
from peekalign.decoder import (
    Decoder,
    UtteranceDecoder,
    check_decoder,
    ctc_triggers,
    triggered_decode,
    window_end,
)

# A 10-frame utterance, CTC vocabulary {0: blank, 1..4}, decoder eos = 5. Token 2 spikes
# at frame 1, token 3 at frame 5 (token 4 has 0.3 there). The decoder "hears" that the
# second word really ends at frame 7: after prefix (2,) it prefers token 4 once frame 7
# is visible, token 3 before.
T, V, EOS = 10, 5, 5


def _ctc() -> np.ndarray:
    p = np.full((T, V), 1e-6)
    p[:, 0] = 1.0
    p[1] = [0.1, 1e-6, 0.9, 1e-6, 1e-6]
    p[5] = [0.1, 1e-6, 1e-6, 0.6, 0.3]
    return np.log(p / p.sum(axis=1, keepdims=True))


class LateWordDecoder:
    """Hand-built numpy decoder (implements the Decoder protocol)."""

    eos = EOS

    def __init__(self):
        self.calls: list[list[tuple]] = []

    def open(self, utt=None):
        return self

    def log_probs(self, prefixes, last_frames):
        self.calls.append([(tuple(p), int(e)) for p, e in zip(prefixes, last_frames, strict=True)])
        out = np.full((len(prefixes), V + 1), math.log(0.01))
        for b, (p, e) in enumerate(zip(prefixes, last_frames, strict=True)):
            p = tuple(p)
            if p == ():
                out[b, 2] = math.log(0.9)
            elif p == (2,):
                out[b, 4 if e >= 7 else 3] = math.log(0.9)
                out[b, 3 if e >= 7 else 4] = math.log(0.05)
            else:
                out[b, EOS] = math.log(0.9)
        return out


def test_protocols_are_recognised():
    d = LateWordDecoder()
    assert isinstance(d, Decoder) and isinstance(d.open(), UtteranceDecoder)
    check_decoder(d)
    with pytest.raises(ParameterError, match="must follow peekalign.decoder.Decoder"):
        check_decoder(object())


def test_window_end_is_trigger_plus_lookahead_clamped():
    # reference: hand-worked (window [0, min(T - 1, n + e)])
    assert [window_end(5, e, T) for e in (0, 1, 4, 9, None)] == [5, 6, 9, 9, 9]


def test_triggered_decoding_changes_exactly_at_the_hand_worked_lookahead():
    lp = _ctc()
    trig = ctc_triggers(lp)
    # reference: hand-worked (greedy runs: token 2 at frame 1, token 3 at frame 5)
    assert trig.tolist() == [1, 5]
    dec = LateWordDecoder()
    out = triggered_decode(dec, trig, num_frames=T, lookaheads=[0, 1, 2, 3, None], eos=EOS)
    # reference: hand-worked: the second token sees frame 7 once 5 + e >= 7, i.e. e >= 2
    assert [d.tokens.tolist() for d in out] == [[2, 3], [2, 3], [2, 4], [2, 4], [2, 4]]
    assert [d.last_frames.tolist() for d in out] == [[1, 5], [2, 6], [3, 7], [4, 8], [9, 9]]
    assert out[2].token_log_probs.tolist() == pytest.approx([math.log(0.9)] * 2)
    # one batched call per step; equal (prefix, last frame) rows asked once
    assert len(dec.calls) == 2
    assert dec.calls[0] == [((), 1), ((), 2), ((), 3), ((), 4), ((), 9)]


def test_triggered_decoding_with_every_window_at_the_last_frame_is_full_context(rng):
    lp = random_log_probs(rng, 40, 7, peaky=2.0)
    trig = ctc_triggers(lp)
    assert trig.size > 3

    class Random:
        def log_probs(self, prefixes, last_frames):
            rows = []
            for p, e in zip(prefixes, last_frames, strict=True):
                g = np.random.default_rng(hash((tuple(p), int(e))) % 2**32)
                r = g.normal(size=8) * 2
                rows.append(r - np.logaddexp.reduce(r))
            return np.array(rows)

    full, wide, short = triggered_decode(
        Random(), trig, num_frames=40, lookaheads=[None, 40, 0], eos=7
    )
    # reference: hand-worked (min(T - 1, n + 40) = T - 1 for every trigger)
    assert (wide.last_frames == 39).all()
    assert wide.tokens.tolist() == full.tokens.tolist()
    assert wide.token_log_probs.tolist() == full.token_log_probs.tolist()
    assert not {0, 7} & set(full.tokens.tolist())  # blank and eos are never emitted
    assert short.last_frames.tolist() == trig.tolist()


def test_joint_decoding_changes_exactly_at_the_hand_worked_lookahead():
    lp = _ctc()
    best = []
    for e in (0, 1, 2, 3, None):
        res = prefix_search(
            lp, beam=4, decoder=LateWordDecoder(), decoder_weight=1.0, lookahead=e,
            decoder_eos=EOS, trace=False,
        )  # fmt: skip
        best.append(res.best.tokens.tolist())
    # reference: hand-worked: prefixes (2, 3) and (2, 4) are created at frame 5 with window
    # end 5 + e; score (2,3) = log .6 + log .9 + ... vs (2,4) = log .3 + log .05 for e < 2,
    # and log .6 + log .05 vs log .3 + log .9 from e = 2 on
    assert best == [[2, 3], [2, 3], [2, 4], [2, 4], [2, 4]]


def test_joint_decoding_with_weight_zero_is_the_plain_search():
    lp = _ctc()
    plain = prefix_search(lp, beam=4, nbest=4)
    joint = prefix_search(
        lp, beam=4, nbest=4, decoder=LateWordDecoder(), decoder_weight=0.0, lookahead=2,
        decoder_eos=EOS,
    )  # fmt: skip
    # reference: hand-worked (lambda = 0)
    assert [h.tokens.tolist() for h in joint.hypotheses] == [
        h.tokens.tolist() for h in plain.hypotheses
    ]
    assert [h.score for h in joint.hypotheses] == [h.score for h in plain.hypotheses]


def test_bad_decoder_output_names_the_utterance():
    class Short:
        def log_probs(self, prefixes, last_frames):
            return np.zeros((len(prefixes) + 1, 3))

    with pytest.raises(ParameterError, match="utt 'u9'.*returned shape"):
        triggered_decode(Short(), [0, 1], num_frames=3, utt="u9")
    with pytest.raises(ParameterError, match="non-decreasing frames"):
        triggered_decode(LateWordDecoder(), [3, 1], num_frames=5)
    with pytest.raises(ParameterError, match="'lookaheads'"):
        triggered_decode(LateWordDecoder(), [0], num_frames=5, lookaheads=[-1])
