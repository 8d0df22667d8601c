"""Deletion causes confirmed by their fix (peekalign.confirm), on injected faults whose
cause is known by construction."""

from __future__ import annotations

import numpy as np
import pytest

from peekalign import Utterance, Vocabulary, WordBoundary
from peekalign.confirm import DecodeSetup, confirm_causes, confirmation_summary
from peekalign.exceptions import ParameterError

VOCAB = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
EOS = 4


def _posteriors(T, spikes):
    p = np.full((T, 4), 1e-4)
    p[:, 0] = 1.0
    for f, k, q in spikes:
        p[f] = 1e-4
        p[f, 0], p[f, k] = 1.0 - q, q
    return np.log(p / p.sum(axis=1, keepdims=True))


def _long_b():
    # a@1, |@3, b held over frames 6..12 (forced alignment: the word ends at frame 12),
    # greedy trigger of b = its first frame 6
    spikes = [(1, 2, 0.95), (3, 1, 0.95)] + [(f, 3, 0.95) for f in range(6, 13)]
    return Utterance.from_arrays(_posteriors(16, spikes), ref="a b", vocab=VOCAB, id="u1")


class SeesFrame:
    """Emits the CTC token the trigger asks for, except "b": emitted only once frame
    ``key`` is visible, "|" before (the word vanishes). ``key=None``: never."""

    eos = EOS

    def __init__(self, key):
        self.key = key

    def open(self, utt):
        return self

    def log_probs(self, prefixes, last_frames):
        out = np.full((len(prefixes), 5), -8.0)
        for r, (pre, end) in enumerate(zip(prefixes, last_frames, strict=True)):
            nxt = [2, 1, 3][min(len(pre), 2)]
            if nxt == 3 and (self.key is None or end < self.key):
                nxt = 1
            out[r, nxt] = 0.0
        return out


def test_cut_off_confirmed_by_full_context_not_by_beam():
    utt = _long_b()
    setup = DecodeSetup(mode="triggered", lookahead=2)
    [c] = confirm_causes(utt, SeesFrame(11), setup)
    # reference: hand-worked. b's trigger is 6, look-ahead 2: frames up to 8 visible,
    # the decoder needs 11 -> "|" instead of "b", b deleted; the word ends at frame 12
    # past the window (reach margin < 0): cut-off; full context (frame 15) shows frame 11
    assert (c.word, c.code, c.fix, c.confirmed) == ("b", "cut-off", "full-context", True)
    # a wider beam or a blank penalty changes nothing the decoder sees: b stays lost;
    # decoder weight 0 emits CTC's own "b"
    assert c.fixed_by == ("full-context", "no-decoder")


def test_wrong_cause_not_confirmed():
    # the decoder never emits b: the reach margin still says cut-off, but full context
    # does not bring it back; only dropping the decoder does (reference: hand-worked)
    [c] = confirm_causes(_long_b(), SeesFrame(None), DecodeSetup(lookahead=2))
    assert (c.code, c.confirmed, c.fixed_by) == ("cut-off", False, ("no-decoder",))
    t = confirmation_summary([c]).records()[0]
    assert (t["code"], t["tested"], t["confirmed"], t["share"]) == ("cut-off", 1, 0, 0.0)
    assert t["not_confirmed"] == "u1:b[no-decoder]"


def test_decoder_drop_confirmed_by_decoder_weight_zero():
    # at look-ahead 8 the whole word is reached (no cut-off) and b's spike is clear, but
    # the decoder never emits it: decoder-drop, confirmed by weight 0, not by full context
    [c] = confirm_causes(_long_b(), SeesFrame(None), DecodeSetup(lookahead=8))
    assert (c.code, c.confirmed, c.fixed_by) == ("decoder-drop", True, ("no-decoder",))


def test_pruned_by_beam_one_confirmed_by_wider_beam():
    # reference: hand-worked prefix search. a@0, |@1, then three frames of b 0.3 against
    # a blank 0.7. Beam 1 keeps "a|" (0.7 per frame beats 0.3) and prunes the prefix
    # "a|b" at frames 2-4; summed over its paths "a|b" has 1 - 0.7^3 - P(b-b) = 0.594
    # against 0.343, so a beam of 4 keeps it and it wins.
    spikes = [(0, 2, 0.999), (1, 1, 0.999)] + [(f, 3, 0.3) for f in range(2, 5)]
    utt = Utterance.from_arrays(_posteriors(7, spikes), ref="a b", vocab=VOCAB, id="u2")
    checks = confirm_causes(utt, None, DecodeSetup(mode="ctc", beam=1), spike_threshold=0.25)
    [c] = checks
    assert (c.code, c.fix, c.confirmed) == ("pruned", "wider-beam", True)
    # full context and dropping a decoder change nothing in a CTC-only search
    assert "full-context" not in c.fixed_by and "no-decoder" not in c.fixed_by
    # with the beam already 4 nothing is deleted
    assert confirm_causes(utt, None, DecodeSetup(mode="ctc", beam=4), spike_threshold=0.25) == []


def test_weak_confirmed_by_blank_penalty():
    # b peaks at 0.3 in one frame (weak: between floor 0.05 and 0.5); greedy never emits
    # it; a blank penalty of -log(0.05) = 3 nats makes it win its frame
    # (reference: hand-worked, log 0.7 - 3.0 = -3.36 < log 0.3 = -1.20)
    spikes = [(1, 2, 0.95), (3, 1, 0.95), (6, 3, 0.3)]
    utt = Utterance.from_arrays(_posteriors(10, spikes), ref="a b", vocab=VOCAB, id="u3")
    [c] = confirm_causes(utt, None, DecodeSetup(mode="triggered", lookahead=None))
    assert (c.code, c.fix, c.confirmed, c.fixed_by) == (
        "weak", "blank-penalty", True, ("blank-penalty",),
    )  # fmt: skip


def test_setup_checks():
    with pytest.raises(ParameterError, match="mode"):
        DecodeSetup(mode="beam")
    with pytest.raises(ParameterError, match="beam"):
        DecodeSetup(beam=0)
    with pytest.raises(ParameterError, match="lookahead"):
        DecodeSetup(lookahead=-1)
    assert (
        DecodeSetup(beam=3).fixed("wider-beam").beam == 12
    )  # DEVELOPERS.md, "Causes confirmed by their fix"
