"""Slices by manifest meta: jiwer per slice, totals, bootstrap against scipy, CLI."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest
from conftest import require
from test_corpus import VOCAB, _hypothesis, _sentence, _utterance

from peekalign import (
    BundleError,
    ParameterError,
    Utterance,
    Vocabulary,
    WordBoundary,
    open_bundle,
)
from peekalign.analysis import analyze
from peekalign.cli import main
from peekalign.confusions import confusions
from peekalign.corpus import scan
from peekalign.io.bundle import BundleWriter
from peekalign.significance import bootstrap_rate
from peekalign.slices import SLICE_COLUMNS, slice_values

SPEAKERS = ("s1", "s2", "s3")


def make_meta_bundle(path, n=30, seed=5, hyp_seed=None):
    """Bundle whose lines carry meta: speaker (3 values), snr_db (many values), and
    no meta at all on every 10th line; ``hyp_seed`` draws other hypotheses over the
    same references (a second model)."""
    rng = np.random.default_rng(seed)
    hyp_rng = rng if hyp_seed is None else np.random.default_rng(hyp_seed)
    pairs = {}
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=0.04,
        word_boundary={"kind": "separator", "symbol": "|"},
        decoder={"lookahead": 1},
    ) as w:
        for k in range(n):
            uid = f"dispatch-{k:04d}"
            ref = _sentence(rng)
            lp, tokens, times, att = _utterance(rng, ref)
            hyp = " ".join(_hypothesis(ref, hyp_rng))
            meta = None
            if k % 10 != 9:
                meta = {"speaker": SPEAKERS[k % 3], "snr_db": round(float(rng.uniform(0, 30)), 1)}
            w.add(uid, lp, ref=" ".join(ref), hyp=hyp, words=times, meta=meta)
            pairs[uid] = (" ".join(ref), hyp, meta)
    return path, pairs


@pytest.fixture(scope="module")
def meta_scan(tmp_path_factory):
    path, pairs = make_meta_bundle(tmp_path_factory.mktemp("slices") / "b")
    return scan(path, workers=0, progress=False), pairs, path


def test_meta_round_trips_and_bad_meta_is_named(tmp_path, meta_scan):
    _, pairs, path = meta_scan
    b = open_bundle(path)
    # reference: hand-worked: what was written comes back
    assert b["dispatch-0001"].meta == pairs["dispatch-0001"][2]
    assert b["dispatch-0009"].meta == {}
    assert b.utterance_meta()["dispatch-0002"]["speaker"] == "s3"
    v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    lp = np.log(np.full((6, 4), 0.25))
    with pytest.raises(BundleError, match="meta field 'snr'"):
        Utterance.from_arrays(lp, ref="ab a", vocab=v, meta={"snr": [1]})
    with pytest.raises(ParameterError, match="meta="):
        with BundleWriter(
            tmp_path / "x",
            vocab=VOCAB,
            frame_shift_s=0.04,
            word_boundary={"kind": "separator", "symbol": "|"},
        ) as w:
            w.add("u", np.zeros((5, len(VOCAB))), ref="a", meta={"tags": ["a"]})


def test_slice_wer_equals_jiwer_and_counts_add_up(meta_scan):
    jiwer = require("jiwer")
    s, pairs, _ = meta_scan
    t = s.by("speaker")
    assert t.columns[: len(SLICE_COLUMNS)] == SLICE_COLUMNS
    assert [r["value"] for r in t] == ["s1", "s2", "s3", "(none)"]
    for r in t:
        ids = [
            u for u, (_, _, m) in pairs.items() if (m or {}).get("speaker", "(none)") == r["value"]
        ]
        refs = [pairs[u][0] for u in ids]
        hyps = [pairs[u][1] for u in ids]
        # reference: jiwer.wer over the slice's utterances
        assert r["wer"] == pytest.approx(jiwer.wer(refs, hyps))
        assert r["utterances"] == len(ids)
        assert r["wer_lo"] <= r["wer"] <= r["wer_hi"]
    totals = s.totals()
    # reference: the definition of a partition - slices add up to the totals
    assert sum(r["words"] for r in t) == totals["n_words"]
    assert sum(r["utterances"] for r in t) == totals["n_utterances"]
    assert sum(r["D"] for r in t) == totals["D"]


def test_numeric_field_is_binned_and_labelled(meta_scan):
    s, pairs, _ = meta_scan
    t = s.by("snr_db", bins=3)
    values = [r["value"] for r in t]
    assert len(values) == 4 and values[-1] == "(none)"
    assert values[0].startswith("[") and values[2].endswith("]")
    # reference: hand rule - each utterance falls in the interval its label states
    snr = [m["snr_db"] for _, _, m in pairs.values() if m]
    lo = float(values[0][1:].split(",")[0])
    hi = float(values[2].rstrip("]").split(",")[1])
    assert lo == min(snr) and hi == max(snr)
    assert sum(r["utterances"] for r in t) == len(pairs)


def test_slice_values_hand_worked():
    # reference: hand-worked quartiles of 1..8: 1, 2.75, 4.5, 6.25, 8
    labels, order = slice_values(list(range(1, 9)), bins=4)
    assert order == ["[1, 2.75)", "[2.75, 4.5)", "[4.5, 6.25)", "[6.25, 8]"]
    assert labels[:3] == ["[1, 2.75)", "[1, 2.75)", "[2.75, 4.5)"]
    # inner edges to 3 significant digits: halves of 0.1 .. 1.0 step 0.1 -> 0.55
    assert slice_values([k / 10 for k in range(1, 11)], bins=2)[1] == ["[0.1, 0.55)", "[0.55, 1]"]
    assert slice_values([3, 1, 3])[1] == ["1", "3"]


def test_bootstrap_interval_reproducible_and_close_to_scipy(meta_scan):
    stats = require("scipy.stats")
    s, _, _ = meta_scan
    a = s.by("speaker", seed=11, resamples=2000)
    b = s.by("speaker", seed=11, resamples=2000)
    assert a.equals(b)
    rows = [r for r in s.utterances]
    e = np.array([r["S"] + r["D"] + r["I"] for r in rows], float)
    n = np.array([r["n_words"] for r in rows], float)
    ours = bootstrap_rate(e, n, seed=11, resamples=4000)
    # reference: scipy.stats.bootstrap (percentile) on the same statistic, paired
    # resampling of utterances; equal within resampling noise
    ref = stats.bootstrap(
        (e, n),
        lambda x, y, axis=-1: x.sum(axis=axis) / y.sum(axis=axis),
        paired=True,
        vectorized=True,
        n_resamples=4000,
        method="percentile",
        random_state=np.random.default_rng(11),
    ).confidence_interval
    width = ours.hi - ours.lo
    assert ours.lo == pytest.approx(ref.low, abs=0.1 * width)
    assert ours.hi == pytest.approx(ref.high, abs=0.1 * width)


def test_scan_confusions_equal_the_analyses_alignments(meta_scan):
    jiwer = require("jiwer")
    s, pairs, path = meta_scan
    c = s.confusions()
    b = open_bundle(path)
    direct_alignments = {u: analyze(b[u]).errors for u in pairs}
    direct = confusions(direct_alignments.values())
    # reference: analyze's own alignments - rebuilt from the tables op for op
    rebuilt = s.alignments()
    assert all(rebuilt[u].ops == direct_alignments[u].ops for u in pairs)
    assert all(rebuilt[u].hyp == direct_alignments[u].hyp for u in pairs)
    # the hypotheses align to the frames, so the words table says "time" throughout
    assert set(s.words["alignment"].tolist()) == {"time"}
    assert {e.method for e in direct_alignments.values()} == {"time"}
    # reference: the per-utterance alignments of analyze (what the tables were built
    # from): rebuilding them from the tables loses no count
    assert c.substitutions == direct.substitutions
    assert c.deletions == direct.deletions
    assert c.insertions == direct.insertions
    assert c.occurrences == direct.occurrences
    # reference: jiwer - the same number of errors in total
    refs = [r for r, _, _ in pairs.values()]
    hyps = [h for _, h, _ in pairs.values()]
    out = jiwer.process_words(refs, hyps)
    total = sum(c.substitutions.values()) + sum(c.deletions.values())
    total += sum(c.insertions.values())
    assert total == out.substitutions + out.deletions + out.insertions


def test_unknown_field_is_named(meta_scan):
    s, _, _ = meta_scan
    with pytest.raises(ParameterError, match=r"no utterance with the meta field 'room'.*speaker"):
        s.by("room")


def test_cli_scan_by_writes_slices_csv(tmp_path, meta_scan, capsys):
    _, _, path = meta_scan
    out = tmp_path / "report"
    rc = main(
        ["scan", str(path), "--out", str(out), "--no-pages", "--workers", "0", "--by", "speaker"]
    )
    assert rc == 0
    text = capsys.readouterr().out
    assert "slices written to" in text and "s2" in text
    with open(out / "slices.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0])[:7] == [
        "field",
        "value",
        "utterances",
        "words",
        "wer",
        "wer_lo",
        "wer_hi",
    ]
    assert [r["value"] for r in rows] == ["s1", "s2", "s3", "(none)"]
    assert json.loads(json.dumps(rows))  # plain strings


def test_report_sections_escape_meta_and_list_files(tmp_path):
    path, _ = make_meta_bundle(tmp_path / "b", n=12)
    lines = (path / "utts.jsonl").read_text().splitlines()
    fixed = []
    for line in lines:
        obj = json.loads(line)
        if obj.get("meta"):
            obj["meta"]["speaker"] = '<img src=x onerror="alert(1)">'
        fixed.append(json.dumps(obj))
    (path / "utts.jsonl").write_text("\n".join(fixed) + "\n")
    from peekalign.report import write_report

    write_report(path, tmp_path / "rep", pages=False, workers=0, by=["speaker"])
    html = (tmp_path / "rep" / "index.html").read_text()
    # transcript and meta text is escaped in the new sections
    assert "<img src=x" not in html and "&lt;img src=x" in html
    assert "<h2>WER by speaker</h2>" in html and "<h2>Confusions</h2>" in html
    for name in ("slices.csv", "confusions.csv", "word_errors.csv"):
        assert (tmp_path / "rep" / name).is_file() and f'href="{name}"' in html


def test_cli_scan_review_options(tmp_path, meta_scan, capsys):
    s, pairs, path = meta_scan
    glm = tmp_path / "t.glm"
    glm.write_text(";; t\nTWO => { TWO / TOO } / [ ] __ [ ]\nTOO => { TWO / TOO } / [ ] __ [ ]\n")
    counts = tmp_path / "counts.txt"
    counts.write_text("tram 900\ndepot 40\nnine 3\nto 5000\n")
    ents = tmp_path / "entities.txt"
    ents.write_text("dunmere\npellow\n")
    out = tmp_path / "rep"
    args = ["scan", str(path), "--out", str(out), "--no-pages", "--workers", "0"]
    rc = main(args + ["--glm", str(glm), "--word-counts", str(counts), "--entities", str(ents)])
    assert rc == 0
    text = capsys.readouterr().out
    assert "clean scoring: WER" in text and "entities:" in text and "B-WER" in text
    t = s.frequency_bins(counts)
    # reference: the definition of a partition - the bins add up to the totals
    assert sum(t["words"]) == s.totals()["n_words"]
    assert sum(t["deleted"]) == s.totals()["D"]
    assert (out / "frequency_bins.csv").is_file()
    html = (out / "index.html").read_text()
    assert "<h2>Errors by word frequency</h2>" in html and "<h2>Entity list</h2>" in html
    assert "<h2>Scoring</h2>" in html and "errors removed" in html and "t.glm" in html
    assert 'href="frequency_bins.csv"' in html
    # raw scoring of the scan's own words has the scan's error count (jiwer agrees
    # with both: test_slice_wer_equals_jiwer_and_counts_add_up)
    assert s.scoring().raw.errors == s.totals()["errors"]
    e = s.entity_scores(ents)
    assert e.b_errors + e.u_errors == s.totals()["errors"]
    # a bad input file fails before the scan, naming the line
    glm.write_text("NO ARROW HERE\n")
    assert main(args + ["--overwrite", "--glm", str(glm)]) == 2
    assert "line 1" in capsys.readouterr().err


def test_scan_token_deletions_hand_checked(meta_scan):
    s, _, _ = meta_scan
    chars = {r["token"]: r for r in s.token_deletions("char")}
    pieces = {r["token"]: r for r in s.token_deletions("piece")}
    # reference: hand rule - this vocabulary's pieces are letters, so both units agree
    # (letters everywhere, separators and spaces dropped)
    assert chars == pieces
    # counts: every letter of every scored reference word
    n_letters = sum(len(w) for e in s.alignments().values() for w in e.ref)
    assert sum(r["count"] for r in chars.values()) == n_letters
    with pytest.raises(ParameterError, match="'unit'"):
        s.token_deletions("word")
