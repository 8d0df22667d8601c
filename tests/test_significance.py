"""Significance tests against sc_stats (NIST sctk), scipy and hand-worked examples."""

from __future__ import annotations

import math
import os
import re
import subprocess

import numpy as np
import pytest
from conftest import require, require_program
from test_errors import WORDS, _unique_under_both, random_pair

from peekalign import ParameterError
from peekalign.errors import align_words
from peekalign.significance import (
    bootstrap_rate,
    matched_pairs,
    paired_bootstrap,
    plain_difference,
    plain_p,
    segments,
    sign_test,
)

SCTK = "/usr/lib/sctk/bin"


def test_matched_pairs_hand_worked():
    # reference: hand-worked from the test's published description (NIST MAPSSWE,
    # Gillick and Cox, 1989): segments are bounded by >= 2 reference words both
    # systems got right; Z = errors A - errors B per segment; W = mean / (sd / sqrt n)
    refs = [
        "send tram nine to the north depot now please",
        "hold at dunmere junction for the four ten",
        "lower the pressure on track two",
    ]
    a = [
        align_words(refs[0], "send tram five to north depot now please"),
        align_words(refs[1], refs[1]),
        align_words(refs[2], "lower pressure on track too"),
    ]
    b = [
        align_words(refs[0], refs[0]),
        align_words(refs[1], "hold atdunmere junction for four ten"),
        align_words(refs[2], refs[2]),
    ]
    segs = segments(a, b)
    # utt 0: "nine" and "the" are one segment (only "to" between them);
    # utt 1: "at dunmere" and "the" are two ("junction for" between them)
    assert [(s.utt, s.start, s.stop, s.errors_a, s.errors_b) for s in segs] == [
        (0, 2, 5, 2, 0),
        (1, 1, 3, 0, 2),
        (1, 5, 6, 0, 1),
        (2, 1, 2, 1, 0),
        (2, 5, 6, 1, 0),
    ]
    t = matched_pairs(a, b)
    z = [2, -2, -1, 1, 1]
    mean = sum(z) / 5
    sd = math.sqrt(sum((x - mean) ** 2 for x in z) / 4)
    assert t.mean == pytest.approx(0.2) and t.sd == pytest.approx(sd)
    assert t.w == pytest.approx(mean / (sd / math.sqrt(5)))
    assert t.p == pytest.approx(math.erfc(abs(t.w) / math.sqrt(2)))
    # with a one-word boundary the first utterance splits in two
    assert len(segments(a, b, min_good=1)) == 6


def test_insertions_open_segments_between_good_words():
    # reference: hand-worked: an insertion between "tram" and "nine" is an error
    # between words, so it makes a segment of its own when 2 good words surround it
    ref = "send tram nine to depot"
    a = [align_words(ref, "send tram uh nine to depot")]
    b = [align_words(ref, ref)]
    (s,) = segments(a, b)
    assert (s.start, s.stop, s.errors_a, s.errors_b) == (2, 2, 1, 0)


def _sc_stats(tmp_path, refs, hyps_a, hyps_b):
    sclite = require_program(f"{SCTK}/sclite")
    sc_stats = require_program(f"{SCTK}/sc_stats")
    env = dict(os.environ, PATH=f"{SCTK}:{os.environ['PATH']}", SCTK=os.path.dirname(SCTK))

    def trn(name, lines):
        (tmp_path / name).write_text(
            "".join(f"{' '.join(x)} (spk_{i:04d})\n" for i, x in enumerate(lines))
        )

    trn("ref.trn", refs)
    trn("a.trn", hyps_a)
    trn("b.trn", hyps_b)
    for name, title in (("a.trn", "sysa"), ("b.trn", "sysb")):
        subprocess.run(
            [sclite, "-r", "ref.trn", "trn", "-h", name, "trn", title, "-i", "wsj"]
            + ["-o", "sgml", "-O", str(tmp_path)],
            cwd=tmp_path,
            env=env,
            check=True,
            capture_output=True,
        )
    sgml = (tmp_path / "a.trn.sgml").read_text() + (tmp_path / "b.trn.sgml").read_text()
    subprocess.run(
        [sc_stats, "-p", "-t", "mapsswe", "-v", "-n", "out", "-O", str(tmp_path)],
        input=sgml,
        text=True,
        env=env,
        check=True,
        capture_output=True,
    )
    text = (tmp_path / "out.stats.mapsswe").read_text()
    m = re.search(
        r"\(# segs: (\d+)\).*\(mean: ([-\d.]+)\) \(std dev: ([-\d.]+)\) \(Z Stat: ([-\d.]+)\)",
        text,
    )
    return int(m.group(1)), float(m.group(2)), float(m.group(3)), float(m.group(4))


def test_matched_pairs_equals_sc_stats(rng, tmp_path):
    refs, ha, hb = [], [], []
    while len(refs) < 150:
        ref, a = random_pair(rng, max_len=10, vocab=WORDS[:6])
        b = random_pair_from(rng, ref)
        # both alignments must be the only minimum under unit and sclite weights, so
        # both tools see the same errors
        if _unique_under_both(ref, a) and _unique_under_both(ref, b):
            refs.append(ref)
            ha.append(a)
            hb.append(b)
    # reference: NIST sc_stats -t mapsswe (sctk), statistics printed to 3 decimals
    n, mean, sd, z = _sc_stats(tmp_path, refs, ha, hb)
    t = matched_pairs(
        [align_words(r, h) for r, h in zip(refs, ha, strict=True)],
        [align_words(r, h) for r, h in zip(refs, hb, strict=True)],
    )
    assert t.n == n and n > 30
    assert t.mean == pytest.approx(mean, abs=6e-4)
    assert t.sd == pytest.approx(sd, abs=6e-4)
    assert t.w == pytest.approx(z, abs=6e-4)


def random_pair_from(rng, ref):
    """A second hypothesis of the same reference, with fewer edits."""
    hyp = []
    for w in ref:
        r = rng.random()
        if r < 0.05:
            continue
        hyp.append(str(rng.choice(WORDS[:6])) if r < 0.15 else w)
        if rng.random() < 0.05:
            hyp.append(str(rng.choice(WORDS[:6])))
    return hyp


def test_sign_test_equals_scipy_binomtest(rng):
    stats = require("scipy.stats")
    for _ in range(60):
        n = int(rng.integers(1, 40))
        a = rng.integers(0, 4, size=n)
        b = rng.integers(0, 4, size=n)
        t = sign_test(a, b)
        k, m = t.b_better, t.a_better + t.b_better
        expected = stats.binomtest(k, m, 0.5).pvalue if m else 1.0
        # reference: scipy.stats.binomtest (two-sided, probability 1/2)
        assert t.p == pytest.approx(expected, rel=1e-9)
        assert t.a_better + t.b_better + t.ties == n


def test_bootstrap_rate_reproducible_and_close_to_scipy(rng):
    stats = require("scipy.stats")
    words = rng.integers(3, 15, size=300).astype(float)
    errors = rng.binomial(words.astype(int), 0.15).astype(float)
    r1 = bootstrap_rate(errors, words, seed=7, resamples=2000)
    r2 = bootstrap_rate(errors, words, seed=7, resamples=2000)
    assert (r1.lo, r1.hi) == (r2.lo, r2.hi)
    assert r1.rate == pytest.approx(errors.sum() / words.sum())
    # reference: scipy.stats.bootstrap, percentile method, paired resampling of
    # (errors, words) with the same statistic; agreement within resampling noise
    ref = stats.bootstrap(
        (errors, words),
        lambda e, n, axis=-1: e.sum(axis=axis) / n.sum(axis=axis),
        paired=True,
        vectorized=True,
        n_resamples=2000,
        method="percentile",
        confidence_level=0.95,
        random_state=np.random.default_rng(7),
    ).confidence_interval
    width = r1.hi - r1.lo
    assert r1.lo == pytest.approx(ref.low, abs=0.1 * width)
    assert r1.hi == pytest.approx(ref.high, abs=0.1 * width)


def test_paired_bootstrap_sides_and_p(rng):
    words = rng.integers(4, 12, size=200).astype(float)
    ea = rng.binomial(words.astype(int), 0.2).astype(float)
    eb = np.maximum(ea - rng.binomial(1, 0.3, size=200), 0)
    t = paired_bootstrap(ea, eb, words, seed=3)
    # reference: hand-worked: B never makes more errors than A and often fewer, so
    # every resample favours B
    assert t.delta == pytest.approx((eb.sum() - ea.sum()) / words.sum())
    assert t.b_better == 1.0 and t.p == 0.0 and t.hi < 0
    same = paired_bootstrap(ea, ea, words)
    # reference: hand-worked: identical systems differ in no resample
    assert same.delta == 0 and same.p == 1.0


def test_plain_words():
    # reference: hand-worked
    assert plain_p(0.03) == "a difference this large would arise by chance about 3 times in 100"
    assert plain_p(0.5).endswith("about 5 times in 10")
    assert plain_p(0.001).endswith("about once in 1000")
    assert plain_p(0.99).endswith("nearly every time")
    s = plain_difference(0.20, 0.215, 0.4, names=("base", "wide"))
    assert s.startswith("base's WER is lower by 1.5 points;")


def test_bad_inputs_named():
    with pytest.raises(ParameterError, match="same reference"):
        segments([align_words("a b", "a")], [align_words("a c", "a")])
    with pytest.raises(ParameterError, match="2 alignments for A and 1"):
        segments([align_words("a", "a")] * 2, [align_words("a", "a")])
    with pytest.raises(ParameterError, match="per-utterance"):
        paired_bootstrap([1, 2], [1], [3, 4])
