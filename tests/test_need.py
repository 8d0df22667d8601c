"""Look-ahead need per token (peekalign.need): numpy decoders built to depend on known
frames have exactly the hand-worked need."""

from __future__ import annotations

import numpy as np
import pytest

from peekalign import Utterance, Vocabulary, WordBoundary
from peekalign.exceptions import ParameterError
from peekalign.need import lookahead_need, need_summary, word_class

VOCAB = Vocabulary(["-", "|", "a", "b", "c"], boundary=WordBoundary("separator", "|"))


def _utt(T=20):
    # greedy path: a@2, |@4, b@6 b@7, |@9, c@12 -> triggers (first frame) 2, 4, 6, 9, 12
    p = np.full((T, 5), 0.01)
    p[:, 0] = 0.96
    for f, k in [(2, 2), (4, 1), (6, 3), (7, 3), (9, 1), (12, 4)]:
        p[f] = 0.01
        p[f, k] = 0.96
    return Utterance.from_arrays(np.log(p), ref="a b c", vocab=VOCAB, id="u1")


REF = [2, 1, 3, 1, 4]  # a | b | c


class KnownFrame:
    """Token u of the reference is sure (log-prob 0) once frame KEY[u] is visible and
    gets ``missing(frames short)`` before: a step of -2 by default."""

    def __init__(self, key, missing=lambda short: -2.0):
        self.key, self.missing = key, missing

    def log_probs(self, prefixes, last_frames):
        out = np.full((len(prefixes), 6), -5.0)
        for b, (pre, end) in enumerate(zip(prefixes, last_frames, strict=True)):
            short = self.key[len(pre)] - end
            out[b, REF[len(pre)]] = 0.0 if short <= 0 else self.missing(short)
        return out


def Graded(key):  # noqa: N802
    """log P(ref[u]) = -0.04 * frames short: a ramp, 0.04 nats per missing frame."""
    return KnownFrame(key, lambda short: -0.04 * short)


def test_step_decoder_need_is_hand_worked():
    utt = _utt()
    key = [5, 4, 15, 9, 19]
    n = lookahead_need(utt, KnownFrame(key), max_lookahead=10, triggers="oracle")
    # reference: hand-worked. Oracle triggers (forced alignment's first frames) are
    # 2, 4, 6, 9, 12; need = key - trigger, clipped at 0; c at 12 needs 7
    assert n.trigger.tolist() == [2, 4, 6, 9, 12]
    assert n.need.tolist() == [3.0, 0.0, 9.0, 0.0, 7.0]
    # with max_lookahead 8, b (needs 9) is beyond: inf
    n8 = lookahead_need(utt, KnownFrame(key), max_lookahead=8, triggers="oracle")
    assert n8.need.tolist() == [3.0, 0.0, np.inf, 0.0, 7.0]  # reference: hand-worked
    assert n8.word_need.tolist() == [3.0, np.inf, 7.0]  # reference: hand-worked


def test_graded_decoder_and_delta():
    utt = _utt()
    key = [5, 4, 15, 9, 19]
    # reference: hand-worked. within delta when 0.04 * (key - n - e) <= delta:
    # delta 0.1 -> 2 frames short is enough (0.08), 3 is not (0.12)
    n = lookahead_need(utt, Graded(key), max_lookahead=10, delta=0.1, triggers="oracle")
    assert n.need.tolist() == [1.0, 0.0, 7.0, 0.0, 5.0]
    n0 = lookahead_need(utt, Graded(key), max_lookahead=10, delta=0.0, triggers="oracle")
    assert n0.need.tolist() == [3.0, 0.0, 9.0, 0.0, 7.0]
    # full context: the last frame (19) visible
    assert np.allclose(n.full, 0.0)


def test_need_is_where_it_stays_within_delta():
    # a decoder sure at e = 0, unsure at e = 1..2, sure again from e = 3: the need is 3
    class Dip:
        def log_probs(self, prefixes, last_frames):
            out = np.full((len(prefixes), 6), -5.0)
            for b, (pre, end) in enumerate(zip(prefixes, last_frames, strict=True)):
                trig = [2, 4, 6, 9, 12][len(pre)]
                out[b, REF[len(pre)]] = -1.0 if end - trig in (1, 2) else 0.0
            return out

    n = lookahead_need(_utt(), Dip(), max_lookahead=6, triggers="oracle")
    assert (
        n.need.tolist() == [3.0] * 5
    )  # reference: hand-worked (DEVELOPERS.md, "Look-ahead need")


def test_summary_per_class():
    utt = _utt()
    n = lookahead_need(
        utt, KnownFrame([5, 4, 15, 9, 19]), max_lookahead=10, triggers="oracle",
        classes={"a": "short", "b": "short", "c": "other"},
    )  # fmt: skip
    t = {r["class"]: r for r in need_summary([n], lookahead=3)}
    # reference: hand-worked. needs 3, 0, 9, 0, 7; a and b short (3, 9), c other (7)
    assert t["all"]["tokens"] == 5 and t["all"]["need_max_frames"] == 9.0
    assert t["all"]["within_lookahead"] == pytest.approx(3 / 5)
    assert t["short"]["tokens"] == 2 and t["short"]["need_p50_frames"] == 3.0
    assert t["(separator)"]["tokens"] == 2 and t["(separator)"]["need_max_frames"] == 0.0
    assert t["other"]["need_p90_frames"] == 7.0


def test_word_class_default():
    # common practice, no source: number words, a closed list of function words
    assert [word_class(w) for w in ["twelve", "the", "tram", "007"]] == [
        "number", "function", "content", "number",
    ]  # fmt: skip


def test_bad_parameters():
    with pytest.raises(ParameterError, match="max_lookahead"):
        lookahead_need(_utt(), KnownFrame([0] * 5), max_lookahead=-1)
    with pytest.raises(ParameterError, match="delta"):
        lookahead_need(_utt(), KnownFrame([0] * 5), delta=float("nan"))
    with pytest.raises(ParameterError, match="decoder"):
        lookahead_need(_utt(), object())
