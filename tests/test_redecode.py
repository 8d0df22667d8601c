"""peekalign.redecode: tables against jiwer, full context, bad utterances, executors."""

from __future__ import annotations

import concurrent.futures as cf
import json
import math

import numpy as np
import pytest
from conftest import require
from redecode_helpers import LateEcho
from test_corpus import make_bundle

from peekalign import ParameterError, open_bundle, prefix_search
from peekalign.cli import main
from peekalign.redecoding import REDECODE_COLUMNS, redecode

EPS = [0, 1, 2, 3]


@pytest.fixture(scope="module")
def bundle_path(tmp_path_factory):
    return make_bundle(tmp_path_factory.mktemp("rd") / "b", n=14, seed=5)


@pytest.fixture(scope="module")
def result(bundle_path):
    return redecode(bundle_path, LateEcho(), lookaheads=EPS, workers=0, progress=False)


def _written(r, tmp_path):
    path = r.write_hyps(tmp_path / "hyps.jsonl")
    rows = [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines()]
    by = {}
    for row in rows:
        assert set(row) == {"id", "lookahead_frames", "hyp"}
        by.setdefault(row["lookahead_frames"], {})[row["id"]] = row["hyp"]
    return by


def test_every_wer_equals_jiwer_on_the_written_hypotheses(bundle_path, result, tmp_path):
    jiwer = require("jiwer")
    refs = {u.id: u.ref for u in open_bundle(bundle_path)}
    by = _written(result, tmp_path)
    assert list(by) == [*EPS, None]
    assert result.table.columns[:8] == REDECODE_COLUMNS[:8]
    for row in result.table:
        e = None if row["lookahead_frames"] == math.inf else row["lookahead_frames"]
        ids = list(by[e])
        out = jiwer.process_words([refs[u] for u in ids], [by[e][u] for u in ids])
        # reference: jiwer
        assert row["wer"] == pytest.approx(out.wer, abs=1e-12)
        assert (row["S"], row["D"], row["I"]) == (
            out.substitutions,
            out.deletions,
            out.insertions,
        )
    wers = result.table["wer"]
    assert wers[0] > wers[3] == wers[-1]  # the decoder's late tokens come back with e


def test_words_lost_and_gained_against_full_context(bundle_path, result, tmp_path):
    jiwer = require("jiwer")
    refs = {u.id: u.ref for u in open_bundle(bundle_path)}
    by = _written(result, tmp_path)

    def correct(ref, hyp):
        # reference: jiwer's alignment; the reference words it aligns as equal
        out = jiwer.process_words(ref, hyp)
        ok = set()
        for c in out.alignments[0]:
            if c.type == "equal":
                ok.update(range(c.ref_start_idx, c.ref_end_idx))
        return ok

    for row in result.table:
        e = None if row["lookahead_frames"] == math.inf else row["lookahead_frames"]
        lost = gained = 0
        for u in by[e]:
            full, here = correct(refs[u], by[None][u]), correct(refs[u], by[e][u])
            lost += len(full - here)
            gained += len(here - full)
        assert (row["words_lost"], row["words_gained"]) == (lost, gained)
        # every deleted word has one cause (or counts as other)
        assert sum(row[c] for c in REDECODE_COLUMNS if c.startswith("del_")) == row["D"]


def test_all_windows_at_the_last_frame_equal_full_context(bundle_path, result):
    T = max(u.num_frames for u in open_bundle(bundle_path))
    wide = redecode(bundle_path, LateEcho(), lookaheads=[T], workers=0, progress=False)
    # reference: hand-worked: min(T - 1, n + T) = T - 1 for every trigger
    hyp = wide.utterances
    at_t = [r["hyp"] for r in hyp if r["lookahead_frames"] == T]
    full = [r["hyp"] for r in hyp if r["lookahead_frames"] == math.inf]
    assert at_t == full
    assert wide.table["wer"][0] == wide.table["wer"][1]
    # and the full-context row does not depend on the look-aheads asked
    assert full == [r["hyp"] for r in result.utterances if r["lookahead_frames"] == math.inf]


def test_latency_comes_from_the_bundle(bundle_path, result):
    from peekalign.streaming import latency_budget

    u = open_bundle(bundle_path)[open_bundle(bundle_path).ids[0]]
    layers, per = u.encoder_lookahead
    for row in result.table.rows[:-1]:
        want = latency_budget(
            frame_shift_ms=40.0, layers=layers * per, per_layer=1, lookahead=row[0],
            front_end_ms=u.clock.right_context_s * 1000,
        ).total_ms  # fmt: skip
        # reference: DEVELOPERS.md, Decoding under a look-ahead (latency_budget)
        assert row[1] == pytest.approx(want)
    assert result.table.rows[-1][1] == math.inf


def test_joint_mode_with_weight_zero_is_the_plain_search(bundle_path):
    b = open_bundle(bundle_path)
    ids = b.ids[:4]
    r = redecode(
        bundle_path, LateEcho(), lookaheads=[0, 2], mode="joint", decoder_weight=0.0,
        search_options={"beam": 6}, workers=0, progress=False, ids=ids,
    )  # fmt: skip
    for row in r.utterances:
        utt = b[row["id"]]
        best = prefix_search(utt.log_probs, blank=utt.blank, beam=6, trace=False).best
        # reference: hand-worked (lambda = 0 leaves the plain search)
        assert row["hyp"] == " ".join(w for w, _, _ in utt.vocab.words(best.tokens))


def test_recommendation_is_the_smallest_lookahead_within_tolerance(result):
    from peekalign.significance import paired_bootstrap

    for tol in (0.0, 0.02, 0.2, 1.0):
        rec = result.recommend(tolerance=tol)
        highs = [
            paired_bootstrap(result.errors[-1], result.errors[j], result.words, resamples=2000).hi
            for j in range(len(EPS))
        ]
        # reference: DEVELOPERS.md, Look-ahead recommendation; brute force over the rows
        want = next((e for e, h in zip(EPS, highs, strict=True) if h <= tol + 1e-12), None)
        assert rec.lookahead == want
        assert rec.line().startswith("criterion: measured WER")
    assert result.recommend(tolerance=10.0).lookahead == 0
    with pytest.raises(ParameterError, match="'tolerance'"):
        result.recommend(tolerance=-1)


def test_bad_utterances_are_listed_and_the_rest_kept(tmp_path, capsys):
    broken = {1: "missing", 4: "nan", 6: "unalignable"}
    p = make_bundle(tmp_path / "b", n=9, seed=2, broken=broken)
    ids = open_bundle(p).ids
    bad = {ids[k] for k in broken}
    r = redecode(p, LateEcho(), lookaheads=[0, 2], workers=0, progress=False)
    assert {q.utt for q in r.problems} == bad
    assert r.ids == [u for u in ids if u not in bad]
    alone = redecode(p, LateEcho(), lookaheads=[0, 2], workers=0, progress=False, ids=r.ids)
    # reference: hand-worked (the good utterances alone give the same tables)
    assert r.table.equals(alone.table) and r.utterances.equals(alone.utterances)
    code = main(["redecode", str(p), "--decoder", "redecode_helpers:late_echo",
                 "--lookaheads", "0:2", "--workers", "0", "--csv", str(tmp_path / "t.csv")])  # fmt: skip
    out = capsys.readouterr()
    assert code == 1
    assert all(u in out.err for u in bad)
    assert "criterion: measured WER" in out.out
    header = (tmp_path / "t.csv").read_text().splitlines()[0].split(",")
    assert header[:8] == ["lookahead_frames", "latency_ms", "wer", "S", "D", "I", "n_words",
                          "words_lost"]  # fmt: skip


def test_process_pool_gives_the_same_tables(bundle_path, result):
    with cf.ProcessPoolExecutor(max_workers=2) as ex:
        r = redecode(bundle_path, LateEcho(), lookaheads=EPS, executor=ex, progress=False)
    # reference: hand-worked (the in-process run)
    assert r.table.equals(result.table) and r.utterances.equals(result.utterances)
    by_name = redecode(
        bundle_path, "redecode_helpers:late_echo", lookaheads=EPS, workers=2, progress=False
    )
    assert by_name.table.equals(result.table)


def test_parameter_errors(bundle_path, tmp_path, capsys):
    with pytest.raises(ParameterError, match="'mode'"):
        redecode(bundle_path, LateEcho(), mode="fast")
    with pytest.raises(ParameterError, match="'lookaheads'"):
        redecode(bundle_path, LateEcho(), lookaheads=[-1])
    with pytest.raises(ParameterError, match="must follow peekalign.decoder.Decoder"):
        redecode(bundle_path, "redecode_helpers:not_a_decoder", workers=0)
    with pytest.raises(ParameterError, match="MODULE:FACTORY"):
        redecode(bundle_path, "no_colon", workers=0)
    assert main(["redecode", str(bundle_path), "--decoder", "x:y", "--lookaheads", "3:1"]) == 2
    assert "A:B" in capsys.readouterr().err


def test_demo_decoder_without_torch_says_how_to_get_it(bundle_path, monkeypatch, capsys):
    import sys

    monkeypatch.setitem(sys.modules, "torch", None)  # import torch now fails
    code = main(["redecode", str(bundle_path), "--demo-decoder", "--workers", "0"])
    err = capsys.readouterr().err
    assert code == 2
    assert 'pip install "peekalign[torch]"' in err
    assert np.isfinite(code)
