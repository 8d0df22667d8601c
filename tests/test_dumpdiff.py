"""Dump against engine (peekalign.dumpdiff): two dumps compared frame by frame."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
from conftest import require

from peekalign.data import demo_path
from peekalign.dumpdiff import compare_dumps, frame_diff
from peekalign.exceptions import ParameterError


def _copy(tmp_path, name="engine"):
    dst = tmp_path / name
    shutil.copytree(demo_path("full"), dst)
    return dst


def _edit(bundle, uid, fn, keep=None):
    path = bundle / "arrays" / f"{uid}.npz"
    with np.load(path) as z:
        arrays = {k: z[k] for k in z.files if keep is None or k in keep}
    arrays["log_probs"] = fn(arrays["log_probs"].copy())
    np.savez(path, **arrays)


def test_identical_dumps_differ_by_zero(tmp_path):
    d = compare_dumps(demo_path("full"), _copy(tmp_path))
    t = d.totals()
    # reference: hand-worked, KL(p || p) = 0 and a label agrees with itself
    assert t["utterances"] == 24 and t["kl_mean"] == 0.0 and t["agreement"] == 1.0
    assert t["parted"] == 0 and t["same_text"] == 24 and not d.problems
    assert all(float(x.kl.max()) == 0.0 for x in d.diffs)
    assert set(d.table["part_frame"].tolist()) == {-1}


def test_one_frame_swapped_reports_that_frame(tmp_path):
    eng = _copy(tmp_path)

    def swap(lp, t=37):
        k = int(np.argmax(lp[t]))
        lp[t, [0, k if k else 1]] = lp[t, [k if k else 1, 0]]
        return lp

    _edit(eng, "tram-004", swap)
    d = compare_dumps(demo_path("full"), eng)
    rows = {r["id"]: r for r in d.table}
    r = rows["tram-004"]
    # reference: hand-worked. only frame 37 changed: it is the first (and only) frame
    # that parts, and the only one whose KL is not 0
    assert r["part_frame"] == 37 and r["first_kl_frame"] == 37 and r["kl_max_frame"] == 37
    diff = next(x for x in d.diffs if x.utt == "tram-004")
    assert np.flatnonzero(diff.kl).tolist() == [37]
    assert d.totals()["parted"] == 1
    assert r["part_s"] == pytest.approx(0.0425 + 37 * 0.04)  # DEVELOPERS.md, "Bundle format v1"


def test_kl_and_agreement_against_scipy():
    require("scipy")
    from scipy.special import rel_entr

    rng = np.random.default_rng(3)
    a = np.log(rng.dirichlet(np.ones(6) * 0.3, size=50))
    b = np.log(rng.dirichlet(np.ones(6) * 0.3, size=50))
    d = frame_diff(a, b)
    # reference: scipy (relative entropy summed over the vocabulary)
    want = rel_entr(np.exp(a), np.exp(b)).sum(axis=1)
    assert np.allclose(d.kl, want, rtol=1e-9, atol=1e-12)
    agree = a.argmax(1) == b.argmax(1)
    assert d.agreement == pytest.approx(agree.mean())  # reference: hand-worked (numpy argmax)
    assert d.first_label_frame == int(np.flatnonzero(~agree)[0])


def test_missing_and_mismatched_utterances_are_problems(tmp_path):
    eng = _copy(tmp_path)
    _edit(eng, "tram-002", lambda lp: lp[:-3], keep={"log_probs"})
    lines = (eng / "utts.jsonl").read_text().splitlines()
    (eng / "utts.jsonl").write_text("\n".join(x for x in lines if '"tram-003"' not in x) + "\n")
    d = compare_dumps(demo_path("full"), eng)
    msgs = {p.utt: p.message for p in d.problems}
    assert "only in the first dump" in msgs["tram-003"]
    assert "shapes (106, 29) and (103, 29)" in msgs["tram-002"]
    assert len(d.diffs) == 22  # the other 22 are compared, nothing lost
    with pytest.raises(ParameterError, match="kl_tol"):
        compare_dumps(demo_path("full"), eng, kl_tol=-1)


def test_frame_diff_on_logits_is_shift_invariant():
    # logits and log-posteriors of the same frame compare equal (renormalised first)
    lp = np.log(np.array([[0.7, 0.2, 0.1], [0.1, 0.1, 0.8]]))
    d = frame_diff(lp, lp + 5.0)
    assert np.allclose(d.kl, 0.0, atol=1e-12) and d.part_frame == -1  # reference: hand-worked
    assert json.dumps(d.agree.tolist()) == "[true, true]"


def test_second_dump_computed_by_a_function():
    # the engine as a function of the utterance: here the dump itself with frame 5 of
    # tram-002 scaled (renormalised: a different posterior at that frame only)
    def engine(utt):
        lp = np.asarray(utt.log_probs, dtype=np.float64).copy()
        if utt.id == "tram-002":
            lp[5] *= 2.0
        if utt.id == "tram-003":
            raise RuntimeError("engine crashed")
        return lp

    d = compare_dumps(demo_path("full"), engine, ids=["tram-001", "tram-002", "tram-003"])
    rows = {r["id"]: r for r in d.table}
    # reference: hand-worked. only frame 5 of tram-002 changed
    assert rows["tram-001"]["part_frame"] == -1 and rows["tram-002"]["first_kl_frame"] == 5
    assert [p.utt for p in d.problems] == ["tram-003"] and "engine crashed" in d.problems[
        0
    ].message
