"""Partial results of triggered decoding (peekalign.partials.decoded_partials)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from peekalign import FrameClock, Vocabulary, WordBoundary
from peekalign.cli import main
from peekalign.data import demo_path
from peekalign.decoder import ctc_triggers, triggered_decode
from peekalign.exceptions import ParameterError
from peekalign.model import open_bundle
from peekalign.partials import decoded_partials, shown_words

VOCAB = Vocabulary(["-", "|", "a", "b", "c"], boundary=WordBoundary("separator", "|"))
# frame centres 0.02 + 0.04 t, the front end reads 0.01 s past a centre
CLOCK = FrameClock(0.04, 0.02, 0.01)
# the token the "encoder" hears at each of 10 frames
HEARD = np.array([0, 2, 0, 2, 0, 1, 3, 3, 4, 0])


class LastFrame:
    """A decoder that emits the token heard at the last frame of its window."""

    def log_probs(self, prefixes, last_frames):
        out = np.full((len(prefixes), 5), -5.0)
        out[np.arange(len(prefixes)), HEARD[list(last_frames)]] = 0.0
        return out


def decode(lookahead):
    return triggered_decode(LastFrame(), [1, 3, 5, 6], num_frames=10, lookaheads=lookahead)[0]


def test_hand_worked_decoder_partials_and_shown_times():
    d = decode(2)
    # reference: hand-worked - windows end at triggers + 2: frames 3, 5, 7, 8, which
    # hear a, |, b, c
    assert d.last_frames.tolist() == [3, 5, 7, 8] and d.tokens.tolist() == [2, 1, 3, 4]
    pt = decoded_partials(d, VOCAB, CLOCK, num_frames=10, encoder_lookahead=1)
    # reference: hand-worked - a token shows from the frame its window ends
    assert [pt.text(i) for i in range(10)] == (
        ["", "", "", "a", "a", "a", "a", "a b", "a bc", "a bc"]
    )
    assert pt.open_last.tolist() == [False] * 3 + [True, True, False, False, True, True, True]
    # ready = centre of frame t + 1 + 0.01 s, capped at the input's end 0.38 + 0.01
    # reference: hand-worked
    np.testing.assert_allclose(pt.shown_s, 0.07 + 0.04 * np.minimum(np.arange(10), 8))
    assert pt.decoder_lookahead == 2 and pt.encoder_frames == 1
    # the token triggered at frame 1 shows at time(1 + 2 + 1) + 0.01 = 0.19
    sw = shown_words(pt, ["a", "bc"], [0.10, 0.30])
    # reference: hand-worked - "bc" first shown as "b" (frame 7), final at frame 8; a
    # growing last word is no rewrite, and triggered decoding never takes a token back
    assert sw.first_shown_s.tolist() == pytest.approx([0.19, 0.35])
    assert sw.final_shown_s.tolist() == pytest.approx([0.19, 0.39])
    assert sw.rewrites.tolist() == [0, 0]
    assert sw.shown_delay_s.tolist() == pytest.approx([0.09, 0.09])
    # the last partial is the whole decoding
    assert pt.words[-1] == tuple(w for w, _, _ in VOCAB.words(d.tokens.tolist()))


def test_a_longer_lookahead_shows_later_and_compute_time_shifts_by_hand_worked_amount():
    short = decoded_partials(decode(0), VOCAB, CLOCK, num_frames=10)
    # reference: hand-worked - windows end at the triggers 1, 3, 5, 6: a, a, |, b
    assert [short.text(i) for i in (0, 1, 3, 5, 6)] == ["", "a", "aa", "aa", "aa b"]
    base = decoded_partials(decode(2), VOCAB, CLOCK, num_frames=10, chunk=2)
    slow = decoded_partials(decode(2), VOCAB, CLOCK, num_frames=10, chunk=2, compute_s=0.01)
    # each 2-frame step done 0.01 s after its input (steps never queue at 0.01 s per
    # 0.08 s): every shown time moves by exactly 0.01. reference: hand-worked
    np.testing.assert_allclose(slow.shown_s - base.shown_s, 0.01)
    np.testing.assert_allclose(base.shown_s[:4], [0.07, 0.07, 0.15, 0.15])  # hand-worked
    full = decoded_partials(decode(None), VOCAB, CLOCK, num_frames=10)
    # full context: every window ends at the last frame; nothing shows before it
    assert [full.text(i) for i in range(9)] == [""] * 9 and full.decoder_lookahead == 10


def test_bad_input_names_what_and_fix():
    d = decode(2)
    with pytest.raises(ParameterError, match="same utterance"):
        decoded_partials(d, VOCAB, CLOCK, num_frames=5)
    with pytest.raises(ParameterError, match="clock"):
        decoded_partials(d, VOCAB, 0.04, num_frames=10)


def test_search_command_writes_decoder_partials(tmp_path):
    path = demo_path("streaming")
    utt = open_bundle(path)["tram-006"]
    out = tmp_path / "p.jsonl"
    args = ["search", str(path), "tram-006", "--partials", str(out), "--lookahead", "3"]
    assert main([*args, "--decoder", "redecode_helpers:late_echo"]) == 0
    rows = [json.loads(x) for x in out.read_text().splitlines()]
    assert len(rows) == utt.num_frames
    from redecode_helpers import LateEcho

    dec = LateEcho()
    # reference: the triggered decoding itself, CTC-greedy triggers, look-ahead 3
    d = triggered_decode(
        dec.open(utt), ctc_triggers(utt.log_probs, blank=utt.blank),
        num_frames=utt.num_frames, lookaheads=3, eos=dec.eos, blank=utt.blank,
    )[0]  # fmt: skip
    assert rows[-1]["text"] == " ".join(w for w, _, _ in utt.vocab.words(d.tokens.tolist()))
    shown = [r["shown_s"] for r in rows]
    assert shown == sorted(shown)
    assert main([*args, "--overwrite"]) == 2  # a look-ahead without a decoder
