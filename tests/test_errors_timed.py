"""Time-mediated word alignment against NIST sclite -T and hand-worked cases."""

from __future__ import annotations

import functools
import os
import re
import subprocess

import numpy as np
import pytest
from conftest import require_program

from peekalign import ParameterError
from peekalign.errors import align_words, align_words_timed

SCTK = "/usr/lib/sctk/bin"
WORDS = ["tram", "depot", "nine", "four", "track", "switch", "north", "yard", "hold"]


def test_lower_the_pressure_hand_worked():
    # reference: hand-worked: "lowrethe" covers the time of "lower" and "the", so the
    # word with no hypothesis word of its own is "the" (cost 0.15 s + 0.001 twice)
    # while the unit-cost alignment, blind to time, deletes the last word
    ref, hyp = "lower the pressure", "lowrethe presure"
    rt = [(0.0, 0.40), (0.40, 0.55), (0.55, 1.10)]
    ht = [(0.0, 0.55), (0.55, 1.10)]
    assert align_words(ref, hyp).positions("D") == [(2, None)]
    e = align_words_timed(ref, hyp, rt, ht)
    assert e.positions("D") == [(1, None)]
    assert (e.S, e.D, e.I, e.method) == (2, 1, 0, "time")
    # same errors in total: time only decides where they fall
    assert e.errors == align_words(ref, hyp).errors


def test_time_moves_an_insertion_to_where_it_was_said():
    # reference: hand-worked: the hypothesis says "nine" twice; the reference's "nine"
    # was spoken at the time of the second one, so the first is the insertion (0.30 s
    # for the insertion + 0.05 s for the match, against 1.15 s + 0.30 s the other way)
    ref, hyp = "tram nine", "tram nine nine"
    rt = [(0.0, 0.3), (0.95, 1.3)]
    ht = [(0.0, 0.3), (0.4, 0.7), (1.0, 1.3)]
    assert align_words(ref, hyp).positions("I") == [(None, 2)]
    e = align_words_timed(ref, hyp, rt, ht)
    assert e.positions("I") == [(None, 1)]
    assert e.positions("C") == [(0, 0), (1, 2)]


def _random_timed_pair(rng):
    """Reference words with times and a hypothesis made by timed edits."""
    n = int(rng.integers(2, 9))
    durs = rng.uniform(0.15, 0.6, size=n)
    starts = np.concatenate([[0.0], np.cumsum(durs)[:-1]]).round(2)
    ends = (starts + durs).round(2)
    ref = [str(w) for w in rng.choice(WORDS, size=n)]
    hyp, ht = [], []
    k = 0
    while k < n:
        r = rng.random()
        jit = rng.uniform(-0.05, 0.05, size=2).round(2)
        s, e = starts[k] + jit[0], max(ends[k] + jit[1], starts[k] + jit[0] + 0.05)
        if r < 0.12:
            pass  # deletion
        elif r < 0.22 and k + 1 < n:
            hyp.append(ref[k] + ref[k + 1])  # merge of two words into one
            ht.append((s, ends[k + 1]))
            k += 1
        elif r < 0.4:
            hyp.append(str(rng.choice(WORDS)))
            ht.append((s, e))
        else:
            hyp.append(ref[k])
            ht.append((s, e))
        if rng.random() < 0.1:
            hyp.append(str(rng.choice(WORDS)))  # insertion just after
            ht.append((ht[-1][1] if ht else 0.0, (ht[-1][1] if ht else 0.0) + 0.1))
        k += 1
    rt = list(zip(starts, ends, strict=True))
    return ref, rt, hyp, [(round(a, 2), round(b, 2)) for a, b in ht]


def _write_ctm(path, rows):
    path.write_text(
        "".join(f"{f} 1 {s:.2f} {e - s:.2f} {w}\n" for f, w, s, e in rows), encoding="utf-8"
    )


def _sclite_time_ops(tmp_path, pairs):
    sclite = require_program(f"{SCTK}/sclite")
    ref_rows, hyp_rows = [], []
    for i, (ref, rt, hyp, ht) in enumerate(pairs):
        ref_rows += [(f"u{i:04d}", w, s, e) for w, (s, e) in zip(ref, rt, strict=True)]
        hyp_rows += [(f"u{i:04d}", w, s, e) for w, (s, e) in zip(hyp, ht, strict=True)]
    _write_ctm(tmp_path / "ref.ctm", ref_rows)
    _write_ctm(tmp_path / "hyp.ctm", hyp_rows)
    env = dict(os.environ, SCTK=os.path.dirname(SCTK))
    out = subprocess.run(
        [sclite, "-r", "ref.ctm", "ctm", "-h", "hyp.ctm", "ctm", "-T", "-o", "pralign", "stdout"],
        cwd=tmp_path,
        env=env,
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    result = {}
    for block in out.split("id: (")[1:]:
        uid = int(re.match(r"u(\d+)", block).group(1))
        refl = re.search(r"^REF:(.*)$", block, re.M).group(1).split()
        hypl = re.search(r"^HYP:(.*)$", block, re.M).group(1).split()
        ops = []
        for r, h in zip(refl, hypl, strict=True):
            if r.startswith("*"):
                ops.append(("I", None, h.lower()))
            elif h.startswith("*"):
                ops.append(("D", r.lower(), None))
            else:
                ops.append(("C" if r.lower() == h.lower() else "S", r.lower(), h.lower()))
        result[uid] = ops
    return result


def _time_cost(ops, rt, ht):
    """Total cost of an op list with words and times, sclite -T distances."""
    total = 0.0
    for op, r, h in ops:
        if op == "D":
            total += rt[r][1] - rt[r][0]
        elif op == "I":
            total += ht[h][1] - ht[h][0]
        else:
            total += abs(rt[r][0] - ht[h][0]) + abs(rt[r][1] - ht[h][1])
            total += 0.001 * (op == "S")
    return total


def _count_optimal(ref, rt, hyp, ht, tol=1e-6):
    """(minimal cost, number of minimal alignments) by memoised recursion over every
    alignment (brute force, polynomial form)."""

    @functools.cache
    def go(i, j):
        if i == len(ref) and j == len(hyp):
            return 0.0, 1
        options = []
        if i < len(ref) and j < len(hyp):
            c, n = go(i + 1, j + 1)
            d = abs(rt[i][0] - ht[j][0]) + abs(rt[i][1] - ht[j][1])
            options.append((c + d + 0.001 * (ref[i] != hyp[j]), n))
        if i < len(ref):
            c, n = go(i + 1, j)
            options.append((c + rt[i][1] - rt[i][0], n))
        if j < len(hyp):
            c, n = go(i, j + 1)
            options.append((c + ht[j][1] - ht[j][0], n))
        best = min(o[0] for o in options)
        return best, sum(n for c, n in options if c <= best + tol)

    return go(0, 0)


def _indexed(ops_words, ref, hyp):
    """sclite's (op, ref word, hyp word) list -> (op, ref index, hyp index)."""
    out, r, h = [], 0, 0
    for op, rw, hw in ops_words:
        out.append((op, None if rw is None else r, None if hw is None else h))
        r += rw is not None
        h += hw is not None
    return out


def test_time_mediated_alignment_equals_sclite_T(rng, tmp_path):
    pairs = [_random_timed_pair(rng) for _ in range(200)]
    pairs = [p for p in pairs if p[2]]  # sclite skips files with no hypothesis words
    # reference: NIST sclite -T (time-mediated alignment; option confirmed in
    # sclite's usage text: "Use time information ... to calculate word-to-word
    # distances based on times"), per-word operations from its pralign report
    theirs = _sclite_time_ops(tmp_path, pairs)
    moved = unique = 0
    for i, (ref, rt, hyp, ht) in enumerate(pairs):
        e = align_words_timed(ref, hyp, rt, ht, errors_first=False)
        ours = [
            (op, None if r is None else ref[r], None if h is None else hyp[h])
            for op, r, h in e.ops
        ]
        best, count = _count_optimal(ref, rt, hyp, ht)
        # both are minimal (reference: brute force); where the minimum is unique they
        # are the same alignment (ties fall either way: sclite's choice is its own)
        assert _time_cost(e.ops, rt, ht) == pytest.approx(best, abs=1e-6)
        assert _time_cost(_indexed(theirs[i], ref, hyp), rt, ht) == pytest.approx(best, abs=1e-6)
        if count == 1:
            unique += 1
            assert ours == theirs[i], (ref, rt, hyp, ht)
        moved += e.ops != align_words(ref, hyp).ops
    assert unique > 150
    # the set has cases where time moves an error away from the unit-cost place
    assert moved > 10


def _fewest_errors_then_time(ref, rt, hyp, ht):
    """(errors, time cost) of the best alignment compared in that order (brute force,
    memoised recursion over every alignment)."""

    @functools.cache
    def go(i, j):
        if i == len(ref) and j == len(hyp):
            return 0, 0.0
        options = []
        if i < len(ref) and j < len(hyp):
            e, c = go(i + 1, j + 1)
            d = abs(rt[i][0] - ht[j][0]) + abs(rt[i][1] - ht[j][1])
            options.append((e + (ref[i] != hyp[j]), c + d + 0.001 * (ref[i] != hyp[j])))
        if i < len(ref):
            e, c = go(i + 1, j)
            options.append((e + 1, c + rt[i][1] - rt[i][0]))
        if j < len(hyp):
            e, c = go(i, j + 1)
            options.append((e + 1, c + ht[j][1] - ht[j][0]))
        return min(options)

    return go(0, 0)


def test_errors_first_keeps_the_fewest_errors(rng):
    for _ in range(300):
        ref, rt, hyp, ht = _random_timed_pair(rng)
        e = align_words_timed(ref, hyp, rt, ht)
        errors, time_cost = _fewest_errors_then_time(ref, rt, hyp, ht)
        # reference: brute force - fewest errors first (the unit-cost WER), then time
        assert e.errors == errors == align_words(ref, hyp).errors
        assert _time_cost(e.ops, rt, ht) == pytest.approx(time_cost, abs=1e-6)


def test_an_hour_of_words_keeps_its_deletions():
    # reference: by construction - every 20th of 3,000 words (an hour) is deleted and
    # the rest are said at the reference's own times, so the alignment has exactly
    # those deletions and no other error; also the unit-cost count (jiwer-equal, see
    # test_errors.py). Folding the errors into one float cost made an hour's costs
    # ~1e9, and the tie test then lost the times and paired every word wrongly
    rng = np.random.default_rng(11)
    n = 3000
    ref = [f"w{k}" for k in rng.integers(0, 400, size=n)]
    edges = np.linspace(0.0, 3600.0, n + 1)
    rt = np.stack([edges[:-1], edges[1:]], axis=1)
    keep = np.arange(n) % 20 != 7
    hyp = [w for w, k in zip(ref, keep, strict=True) if k]
    e = align_words_timed(ref, hyp, rt, rt[keep])
    assert (e.S, e.D, e.I) == (0, n - int(keep.sum()), 0)
    assert [r for r, _ in e.positions("D")] == list(np.flatnonzero(~keep))
    assert e.errors == align_words(ref, hyp).errors


def test_times_must_fit_the_words():
    with pytest.raises(ParameterError, match=r"ref_times of shape \(1, 2\)"):
        align_words_timed("a b", "a", [(0, 1)], [(0, 1)])
    with pytest.raises(ParameterError, match="ending before it starts"):
        align_words_timed("a", "a", [(1, 0)], [(0, 1)])
    with pytest.raises(ParameterError, match="NaN"):
        align_words_timed("a", "a", [(0, np.nan)], [(0, 1)])
