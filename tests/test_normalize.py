"""Clean scoring against sctk (csrfilt.sh + sclite), jiwer and hand-worked cases."""

from __future__ import annotations

import os
import re
import subprocess

import pytest
from conftest import require, require_program
from test_errors import optimal_alignments

from peekalign import ParameterError
from peekalign.errors import align_words
from peekalign.normalize import (
    align_alternates,
    apply_glm,
    boundary_errors,
    mer,
    normalize_text,
    read_glm,
    score,
    spell_number,
)

SCTK = "/usr/lib/sctk/bin"

GLM = """;; tram depot alternates
* name "tram"
* desc "alternates for the dispatch radio"
* format = 'NIST1'
* max_nrules = '100'
* copy_no_hit = 'T'
* case_sensitive = 'F'
;;
YOU'RE => { YOU ARE / YOU'RE } / [ ] __ [ ]   ;; contraction
YOU ARE => { YOU ARE / YOU'RE } / [ ] __ [ ]
OH => { OH / ZERO } / [ ] __ [ ]
ZERO => { OH / ZERO } / [ ] __ [ ]
UH => { UH / @ } / [ ] __ [ ]
OKAY => OK / [ ] __ [ ]
TRAM STOP => TRAMSTOP / [ ] __ [ ]
"""
VOCAB = "you're you are oh zero uh okay ok tram stop tramstop nine depot".split()


def random_pairs(rng, n, vocab=VOCAB):
    pairs = []
    for _ in range(n):
        ref = [str(w) for w in rng.choice(vocab, size=int(rng.integers(1, 8)))]
        hyp = []
        for w in ref:
            x = rng.random()
            if x < 0.15:
                continue
            hyp.append(str(rng.choice(vocab)) if x < 0.35 else w)
            if rng.random() < 0.1:
                hyp.append(str(rng.choice(vocab)))
        pairs.append((" ".join(ref), " ".join(hyp)))
    return pairs


def _sctk_env():
    return dict(os.environ, PATH=f"{SCTK}:{os.environ['PATH']}", SCTK=os.path.dirname(SCTK))


def _csrfilt(glm_path, lines):
    prog = require_program(f"{SCTK}/csrfilt.sh")
    text = "".join(f"{line} (spk_{i:04d})\n" for i, line in enumerate(lines))
    out = subprocess.run(
        [prog, "-i", "trn", str(glm_path)],
        input=text,
        capture_output=True,
        text=True,
        env=_sctk_env(),
        check=True,
    ).stdout
    return out


def _sclite(tmp_path, ref_trn, hyp_trn):
    sclite = require_program(f"{SCTK}/sclite")
    (tmp_path / "ref.trn").write_text(ref_trn)
    (tmp_path / "hyp.trn").write_text(hyp_trn)
    out = subprocess.run(
        [
            sclite,
            "-r",
            "ref.trn",
            "trn",
            "-h",
            "hyp.trn",
            "trn",
            "-i",
            "wsj",
            "-o",
            "pra",
            "stdout",
        ],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        env=_sctk_env(),
        check=True,
    ).stdout
    ids = [int(m) for m in re.findall(r"^id: \(spk_(\d+)\)", out, re.M)]
    scores = [
        tuple(int(x) for x in m)
        for m in re.findall(r"^Scores: \(#C #S #D #I\) (\d+) (\d+) (\d+) (\d+)", out, re.M)
    ]
    return dict(zip(ids, scores, strict=True))


def _render(items):
    """Our filtered transcript in csrfilt.sh's notation (upper case, '@' for empty)."""
    out = []
    for it in items:
        if isinstance(it, str):
            out.append(it.upper())
        else:
            alts = (" ".join(a).upper() if a else "@" for a in it)
            out.append("{ " + " / ".join(alts) + " }")
    return " ".join(out)


def test_spell_number_hand_worked():
    # reference: hand-worked English cardinals
    assert spell_number("0") == "zero"
    assert spell_number("13") == "thirteen"
    assert spell_number("90") == "ninety"
    assert spell_number("105") == "one hundred five"
    assert spell_number("2026") == "two thousand twenty six"
    assert spell_number("1,000,001") == "one million one"
    assert spell_number("0.5") == "zero point five"
    assert spell_number("042") == "zero four two"
    assert spell_number("4b") == "4b"


def test_normalize_text_hand_worked():
    # reference: hand-worked
    assert normalize_text('Tram-Stop 7: "Hold" at O\'Connell!') == (
        "tram stop seven hold at o'connell"
    )
    assert normalize_text("'quoted' words...") == "quoted words"
    assert normalize_text("Depot 4.", numbers=False) == "depot 4"
    assert normalize_text("Depot 4.", case=False, punctuation=False) == "Depot 4."


def test_glm_filter_equals_csrfilt(rng, tmp_path):
    glm = tmp_path / "tram.glm"
    glm.write_text(GLM)
    lines = [r for r, _ in random_pairs(rng, 200)]
    # reference: sctk csrfilt.sh on the same lines with the same GLM file
    theirs = _csrfilt(glm, lines).splitlines()
    rules = read_glm(glm)
    assert len(rules) == 7
    for line, out in zip(lines, theirs, strict=True):
        expected = " ".join(re.sub(r"\(spk_\d+\)\s*$", "", out).split())
        assert _render(apply_glm(line, rules)) == expected, line


def test_glm_rules_read_once_left_to_right():
    # reference: sctk csrfilt.sh behaviour observed on these rules (hand-checked):
    # output is not read again (X -> Y, not Z) and the first rule in file order wins
    rules = read_glm("X => Y / [ ] __ [ ]\nY => Z / [ ] __ [ ]\nB => R\nB C => Q")
    assert apply_glm("x y b c", rules) == ["y", "z", "r", "c"]


def test_normalised_wer_equals_sclite_after_csrfilt(rng, tmp_path):
    glm = tmp_path / "tram.glm"
    glm.write_text(GLM)
    pairs = random_pairs(rng, 250)
    # reference: sctk csrfilt.sh on both sides, then sclite (its default weights
    # 4/3/3, the weights passed to ours), per-utterance #C #S #D #I
    scores = _sclite(
        tmp_path,
        _csrfilt(glm, [r for r, _ in pairs]),
        _csrfilt(glm, [h for _, h in pairs]),
    )
    report = score(pairs, glm=glm, weights=(4, 3, 3))
    assert len(scores) == len(pairs) == len(report.utterances)
    for i, u in enumerate(report.utterances):
        assert (u.clean.C, u.clean.S, u.clean.D, u.clean.I) == scores[i], pairs[i]
    C, S, D, I = (sum(s[k] for s in scores.values()) for k in range(4))  # noqa: E741
    assert report.wer == pytest.approx((S + D + I) / (C + S + D))
    assert min(S, D, I) > 20  # the set exercises every kind of error
    # the alternates did something: fewer errors than scoring the text as given
    assert report.removed > 0


def test_mer_and_cer_equal_jiwer(rng):
    jiwer = require("jiwer")
    # MER depends on the S/D/I split, so keep pairs whose minimal alignment is unique
    pairs = [
        (r, h)
        for r, h in random_pairs(rng, 300, vocab="tram depot nine four track yard".split())
        if h and optimal_alignments(r.split(), h.split())[1] == 1
    ]
    assert len(pairs) > 100
    report = score(pairs)
    refs, hyps = [r for r, _ in pairs], [h for _, h in pairs]
    # reference: jiwer (mer, wer, cer) on the same (already clean) pairs
    assert report.mer == pytest.approx(jiwer.mer(refs, hyps))
    assert report.wer == pytest.approx(jiwer.wer(refs, hyps))
    assert report.cer == pytest.approx(jiwer.cer(refs, hyps))
    assert mer(align_words("a b", "a c d")) == pytest.approx(jiwer.mer("a b", "a c d"))


def test_removed_errors_hand_worked():
    # reference: hand-worked: raw, "You're"/"you" "Depot"/"depot" "4."/"are" and the
    # extra "four" differ (3 S + 1 I = 4 errors on 3 words); after case, punctuation,
    # numbers and the GLM both read "you are at depot four"
    r = score([("You're at Depot 4.", "you are at depot four")], glm=GLM)
    assert (r.raw.S, r.raw.D, r.raw.I) == (3, 0, 1)
    assert r.clean.errors == 0 and r.removed == 4
    assert r.steps == {"case": True, "punctuation": True, "numbers": True, "glm": 7}


def test_boundary_errors_hand_worked():
    # reference: hand-worked
    e = align_words("hold at dunmere junction", "hold atdunmere junction")
    (b,) = boundary_errors(e)
    assert (b.kind, b.ref, b.hyp, b.ops) == ("merge", ("at", "dunmere"), ("atdunmere",), 2)
    e = align_words("north tramstop now", "north tram stop now")
    (b,) = boundary_errors(e)
    assert (b.kind, b.ref, b.hyp, b.ops) == ("split", ("tramstop",), ("tram", "stop"), 2)
    e = align_words("the old depot yard", "theolddepot yard")
    assert [(b.kind, b.ref) for b in boundary_errors(e)] == [("merge", ("the", "old", "depot"))]
    # a substitution next to a deletion that does not spell the word is no spacing error
    assert boundary_errors(align_words("at dunmere", "atdunmore")) == []
    assert boundary_errors(align_words("at dunmere", "dunmere")) == []
    r = score([("hold at dunmere", "hold atdunmere"), ("tram stop", "tramstop")])
    assert r.boundary == {"merge": 2, "split": 0, "ops": 4}


def test_bad_glm_lines_are_named(tmp_path):
    p = tmp_path / "bad.glm"
    p.write_text(";; ok\nOH => ZERO / [ ] __ [ ]\nTHIS LINE HAS NO ARROW\n")
    with pytest.raises(ParameterError, match=r"line 3.*=>"):
        read_glm(p)
    with pytest.raises(ParameterError, match="context"):
        read_glm("OH => ZERO / [ TRAM ] __ [ ]")
    with pytest.raises(ParameterError, match="no file"):
        read_glm(tmp_path / "missing.glm")
    with pytest.raises(ParameterError, match="weights"):
        align_alternates(["a"], ["a"], weights=(1, 0, 1))
