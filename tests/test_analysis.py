"""The analysis facade: analyze() and UtteranceAnalysis."""

from __future__ import annotations

import numpy as np
import pytest
from test_streaming import TOKENS, VOCAB, brute_cut, ids, synth

import peekalign
from peekalign import (
    FrameClock,
    ParameterError,
    Utterance,
    align_tokens,
    analyze,
)
from peekalign.diagnosis import DELETION_CODES

A, B = TOKENS.index("a"), TOKENS.index("b")
CLOCK = FrameClock(0.04, right_context_s=0.02)


def utterance(rng=None, *, hyp="ab", attention_tokens=None, words=None, T_=24, **kw):
    """Reference "ab cd to": clear spikes every 3 frames from frame 2."""
    spikes = {2 + 3 * i: k for i, k in enumerate(ids("ab cd to"))}
    lp = synth(spikes, T_)
    att = None
    if attention_tokens is not None:
        rng = rng or np.random.default_rng(0)
        att = rng.random((2, 2, len(attention_tokens), T_)) ** 3
        att /= att.sum(-1, keepdims=True)
    return Utterance.from_arrays(
        lp, ref="ab cd to", vocab=VOCAB, id="x-1", clock=CLOCK, hyp=hyp, words=words,
        attention=att, attention_tokens=attention_tokens, **kw,
    )  # fmt: skip


def test_analyze_hand_worked_summary():
    words = [("ab", 0.05, 0.25), ("cd", 0.40, 0.62), ("to", 0.70, 0.85)]
    u = utterance(hyp="ab to", words=words, decoder_lookahead=1)
    a = analyze(u)
    assert a.lookahead == 1 and a.trigger_rule == "first" and a.hyp_source == "utterance"
    s = a.summary()
    # reference: worked by hand - "cd" deleted; spikes a2 b5 |8 c11 d14 |17 t20 o23
    assert (s["S"], s["D"], s["I"], s["n_words"]) == (0, 1, 0, 3)
    assert s["wer"] == pytest.approx(1 / 3)
    # heard until of each word's last token: frames (5, 14, 23) + 1 of look-ahead, times
    # 0.04 s, + 0.02 s right context = 0.26, 0.62, 0.98 s; margins 0.26 - 0.25,
    # 0.62 - 0.62, 0.98 - 0.85
    np.testing.assert_allclose(a.words.margin_s, [0.01, 0.0, 0.13], atol=1e-12)
    assert a.words.reached.tolist() == [True, True, True]
    assert s["worst_margin_s"] == pytest.approx(0.0, abs=1e-12)
    # emission delay: spike time of the last token minus the word end: 0.20-0.25,
    # 0.56-0.62, 0.92-0.85 -> median -0.05
    assert s["median_emission_delay_s"] == pytest.approx(-0.05)
    assert s["del_decoder-drop"] == 1 and sum(s[f"del_{c}"] for c in DELETION_CODES) == 1
    assert s["words_source"] == "reference" and np.isnan(s["mean_cut_mass"])
    assert s["window_ok"] is None
    rows = a.word_table()
    assert [r["op"] for r in rows] == ["C", "D", "C"]
    assert [r["code"] for r in rows] == ["", "decoder-drop", ""]
    assert [r["hyp_word"] for r in rows] == ["ab", "", "to"]
    assert [r["trigger_frame"] for r in rows] == [5, 14, 23]
    assert rows[1]["emission_delay_s"] == pytest.approx(-0.06)
    assert 0 < rows[1]["confidence"] <= 1
    assert a.diagnosis_of(1).code == "decoder-drop" and a.diagnosis_of(0) is None
    assert "deletions=1" in repr(a)


def test_attention_rows_follow_their_own_tokens(rng):
    # attention rows for the hypothesis "ab to" (teacher-forced), not the reference
    hyp_tokens = ids("ab to")
    u = utterance(rng, hyp="ab to", attention_tokens=hyp_tokens, decoder_lookahead=2)
    a = analyze(u)
    # reference: forced alignment of the attention tokens themselves gives the triggers
    own = align_tokens(u.log_probs, hyp_tokens)
    assert a.attention_windows.trigger.tolist() == own.first.tolist()
    assert len(a.attention_windows) == len(hyp_tokens) != len(a.windows)
    # reference: explicit loops over every attention weight
    ref = brute_cut(
        u.attention.astype(np.float64), a.attention_windows.start, a.attention_windows.end
    )
    np.testing.assert_allclose(a.cut_mass.per_head, ref, atol=1e-9)
    assert a.summary()["mean_cut_mass"] == pytest.approx(ref.mean(axis=(0, 1)).mean())
    assert a.consistency is not None and a.summary()["window_ok"] is False


def test_attention_that_cannot_be_aligned_is_noted(rng):
    # 13 attention tokens cannot fit 12 frames: the attention parts are skipped
    u = Utterance.from_arrays(
        synth({2: A, 5: B}, 12), ref="ab", vocab=VOCAB, clock=CLOCK,
        attention=np.full((13, 12), 1 / 12), attention_tokens=[A] * 13,
    )  # fmt: skip
    a = analyze(u)
    assert a.cut_mass is None and a.consistency is None
    assert any("attention not analysed" in n for n in a.notes)


def test_search_supplies_the_hypothesis():
    u = utterance(hyp=None)
    a = analyze(u, search={"beam": 4})
    assert a.hyp_source == "search" and a.hyp_words == ("ab", "cd", "to")
    assert a.summary()["wer"] == 0.0 and a.diagnoses == []
    # without a hypothesis nor a search there are no errors
    b = analyze(utterance(hyp=None), soft=False)
    assert b.errors is None and b.soft is None and b.summary()["S"] is None
    assert np.isnan(b.word_table()[0]["confidence"])


def test_cut_off_only_with_a_streaming_setup():
    words = [("ab", 0.05, 0.25), ("cd", 0.40, 0.90), ("to", 0.95, 1.0)]
    # no look-ahead known anywhere: offline use, no cut-off
    assert analyze(utterance(hyp="ab to", words=words)).diagnoses[0].code == "decoder-drop"
    # reference: by hand - with lookahead 0 "cd" ends 0.90 s, heard until 14*0.04+0.02 = 0.58 s
    d = analyze(utterance(hyp="ab to", words=words), lookahead=0).diagnoses[0]
    assert d.code == "cut-off" and d.evidence["reach_margin_ms"] == pytest.approx(-320)
    # the encoder look-ahead moves the heard until too: 2 layers x 4 frames = 0.32 s later
    d = analyze(utterance(hyp="ab to", words=words), lookahead=0, encoder_lookahead=(2, 4))
    assert d.diagnoses[0].evidence["reach_margin_ms"] == pytest.approx(0.0, abs=1e-6)
    assert d.diagnoses[0].code == "decoder-drop"


def test_bad_parameters():
    u = utterance()
    with pytest.raises(ParameterError, match="'lookahead' parameter of analyze"):
        analyze(u, lookahead=-3)
    with pytest.raises(ParameterError, match="'trigger_rule' parameter of analyze"):
        analyze(u, trigger_rule="last")
    with pytest.raises(ParameterError, match="'search' parameter of analyze"):
        analyze(u, search="yes")
    with pytest.raises(ParameterError, match="must not set 'trace'"):
        analyze(u, search={"trace": False})
    with pytest.raises(ParameterError, match="must be an Utterance"):
        analyze(u.log_probs)


def test_public_names():
    # names other parts of the project script against
    for name in (
        "analyze", "UtteranceAnalysis", "token_windows", "Windows", "trigger_frames",
        "word_reach", "WordReach", "cut_mass", "CutMass", "window_consistency",
        "Consistency", "sweep", "Sweep", "SweepRow", "align_words", "align_chars", "wer",
        "cer", "error_totals", "emission_delay", "ErrorAlignment", "diagnose_deletions",
        "Diagnosis", "DELETION_CODES", "latency_budget",
    ):  # fmt: skip
        assert name in peekalign.__all__ and hasattr(peekalign, name)
    assert peekalign.__all__ == sorted(peekalign.__all__)
    fields = set(peekalign.UtteranceAnalysis.__dataclass_fields__)
    assert {
        "utt", "alignment", "soft", "greedy", "windows", "words", "cut_mass",
        "consistency", "errors", "diagnoses", "lookahead", "trigger_rule",
    } <= fields  # fmt: skip
