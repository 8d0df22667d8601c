"""compare: is B better than A? Tests agree with jiwer, scipy and the modules' own checks."""

from __future__ import annotations

import csv
import json

import pytest
from conftest import require
from test_corpus import make_bundle

from peekalign.cli import main
from peekalign.corpus import compare, scan
from peekalign.errors import align_words
from peekalign.report import write_comparison
from peekalign.significance import SIGNIFICANCE_COLUMNS, matched_pairs


def _pairs(path):
    lines = [json.loads(x) for x in (path / "utts.jsonl").read_text().splitlines() if x]
    return {x["id"]: (x["ref"], x["hyp"]) for x in lines}


@pytest.fixture(scope="module")
def two(tmp_path_factory):
    d = tmp_path_factory.mktemp("cmp")
    a = make_bundle(d / "a", n=24, seed=31)
    b = make_bundle(d / "b", n=24, seed=31, hyp_seed=5)
    c = compare(scan(a, workers=0, progress=False), scan(b, workers=0, progress=False))
    return c, _pairs(a), _pairs(b), a, b


def test_significance_overall_row(two):
    jiwer = require("jiwer")
    stats = require("scipy.stats")
    c, pa, pb, _, _ = two
    t = c.significance(seed=4)
    assert t.columns == SIGNIFICANCE_COLUMNS
    r = t.records()[0]
    ids = list(pa)
    # reference: jiwer over the same pairs
    assert r["wer_a"] == pytest.approx(jiwer.wer([pa[u][0] for u in ids], [pa[u][1] for u in ids]))
    assert r["wer_b"] == pytest.approx(jiwer.wer([pb[u][0] for u in ids], [pb[u][1] for u in ids]))
    assert r["utterances"] == 24 and (r["field"], r["value"]) == ("all", "all")
    # reference: scipy.stats.binomtest on the utterances where one model made fewer
    # errors (error counts from the unit-cost alignment: same totals per utterance)
    ea = [align_words(*pa[u]).errors for u in ids]
    eb = [align_words(*pb[u]).errors for u in ids]
    a_better = sum(x < y for x, y in zip(ea, eb, strict=True))
    b_better = sum(x > y for x, y in zip(ea, eb, strict=True))
    assert (r["sign_a_better"], r["sign_b_better"]) == (a_better, b_better)
    assert r["sign_p"] == pytest.approx(stats.binomtest(b_better, a_better + b_better).pvalue)
    # the matched-pairs row is the module's test on the scans' own alignments
    al_a, al_b = c.a.alignments(), c.b.alignments()
    mp = matched_pairs([al_a[u] for u in ids], [al_b[u] for u in ids])
    assert r["mp_p"] == pytest.approx(mp.p) and r["segments"] == mp.n
    assert r["boot_delta_lo"] <= r["wer_delta"] <= r["boot_delta_hi"]
    better = c.label_b if r["wer_b"] < r["wer_a"] else c.label_a
    assert r["verdict"].startswith(f"{better}'s WER is lower by")
    assert "would arise by chance" in r["verdict"]
    # the same seed gives the same table
    assert c.significance(seed=4).equals(t)


def test_write_comparison_has_section_and_csv(tmp_path, two):
    _, _, _, a, b = two
    out = tmp_path / "rep"
    c = write_comparison(a, b, out, labels=("<b>base</b>", "wide"), pages=False, workers=0)
    html = (out / "index.html").read_text()
    # markup in a label is escaped in the new section too
    assert "Is wide better than &lt;b&gt;base&lt;/b&gt;?" in html
    assert "<b>base</b>" not in html
    assert 'href="significance.csv"' in html
    with open(out / "significance.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert tuple(rows[0]) == SIGNIFICANCE_COLUMNS
    assert rows[0]["verdict"] == c.significance().records()[0]["verdict"]


def test_compare_command_prints_verdict(tmp_path, two, capsys):
    _, _, _, a, b = two
    rc = main(["compare", str(a), str(b), "--out", str(tmp_path / "o"), "--no-pages"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "WER is lower by" in out and "matched-pairs p =" in out


def test_compare_by_slice(tmp_path, capsys):
    from test_slices import make_meta_bundle

    a, pa = make_meta_bundle(tmp_path / "a", n=30, seed=5, hyp_seed=1)
    b, pb = make_meta_bundle(tmp_path / "b", n=30, seed=5, hyp_seed=2)
    out = tmp_path / "o"
    glm = tmp_path / "t.glm"
    glm.write_text(";; t\nTWO => { TWO / TOO } / [ ] __ [ ]\n")
    args = ["compare", str(a), str(b), "--out", str(out), "--no-pages", "--by", "speaker"]
    assert main(args + ["--glm", str(glm)]) == 0
    text = capsys.readouterr().out
    assert "speaker = s2: " in text
    assert "clean scoring A: WER" in text and "clean scoring B: WER" in text
    with open(out / "significance.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert [(r["field"], r["value"]) for r in rows] == [
        ("all", "all"),
        ("speaker", "s1"),
        ("speaker", "s2"),
        ("speaker", "s3"),
        ("speaker", "(none)"),
    ]
    # reference: the definition of a partition - slice utterances and words add up
    assert sum(int(r["utterances"]) for r in rows[1:]) == int(rows[0]["utterances"]) == 30
    assert sum(int(r["words"]) for r in rows[1:]) == int(rows[0]["words"])
    jiwer = require("jiwer")
    ids = [u for u, (_, _, m) in pa.items() if (m or {}).get("speaker") == "s2"]
    # reference: jiwer over the slice's pairs
    assert float(rows[2]["wer_b"]) == pytest.approx(
        jiwer.wer([pb[u][0] for u in ids], [pb[u][1] for u in ids])
    )


def test_comparison_report_per_slice(tmp_path):
    jiwer = require("jiwer")
    stats = require("scipy.stats")
    from html.parser import HTMLParser

    from test_slices import make_meta_bundle

    a, pa = make_meta_bundle(tmp_path / "a", n=30, seed=5, hyp_seed=1)
    b, pb = make_meta_bundle(tmp_path / "b", n=30, seed=5, hyp_seed=2)
    out = tmp_path / "o"
    write_comparison(a, b, out, pages=False, workers=0, by="speaker")
    with open(out / "significance.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    values = [r["value"] for r in rows[1:]]
    assert values == ["s1", "s2", "s3", "(none)"]

    class Cells(HTMLParser):  # reference: the standard library's HTML parser
        def __init__(self):
            super().__init__()
            self.rows, self.table = [], None

        def handle_starttag(self, tag, attrs):
            a = dict(attrs)
            if tag == "table":
                self.table = a.get("id")
            if tag == "tr" and self.table == "significance-speaker":
                self.rows.append([])
            if tag == "td" and self.table == "significance-speaker":
                self.rows[-1].append(a.get("data-v"))

    p = Cells()
    p.feed((out / "index.html").read_text())
    body = [r for r in p.rows if r]
    assert [r[0] for r in body] == values  # one row per slice, in the CSV's order
    for r, row in zip(rows[1:], body, strict=True):
        ids = [
            u
            for u, (_, _, m) in pa.items()
            if ((m or {}).get("speaker") or "(none)") == r["value"]
        ]
        assert int(r["utterances"]) == len(ids)
        # reference: jiwer's word alignment counts each utterance's errors
        ea = [jiwer.process_words(pa[u][0], pa[u][1]) for u in ids]
        eb = [jiwer.process_words(pb[u][0], pb[u][1]) for u in ids]
        na = [o.substitutions + o.deletions + o.insertions for o in ea]
        nb = [o.substitutions + o.deletions + o.insertions for o in eb]
        a_better = sum(x < y for x, y in zip(na, nb, strict=True))
        b_better = sum(x > y for x, y in zip(na, nb, strict=True))
        assert (int(r["sign_a_better"]), int(r["sign_b_better"])) == (a_better, b_better)
        # reference: scipy.stats.binomtest, two-sided, on the utterances with a winner
        ref_p = (
            stats.binomtest(b_better, a_better + b_better).pvalue if a_better + b_better else 1.0
        )
        assert float(r["sign_p"]) == pytest.approx(ref_p)
        assert float(row[9]) == pytest.approx(ref_p)  # the page's "sign test p" cell
        # reference: jiwer over the slice's pairs
        assert float(r["wer_a"]) == pytest.approx(
            jiwer.wer([pa[u][0] for u in ids], [pa[u][1] for u in ids])
        )
        assert row[1] == r["verdict"]


def test_compare_command_runs_the_bootstrap_once_per_row(tmp_path, capsys, monkeypatch):
    from test_slices import make_meta_bundle

    import peekalign.significance as sig

    a, _ = make_meta_bundle(tmp_path / "a", n=30, seed=5, hyp_seed=1)
    b, _ = make_meta_bundle(tmp_path / "b", n=30, seed=5, hyp_seed=2)
    calls = []
    real = sig.paired_bootstrap

    def counted(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(sig, "paired_bootstrap", counted)
    out = tmp_path / "o"
    args = ["compare", str(a), str(b), "--out", str(out), "--no-pages", "--by", "speaker"]
    assert main(args + ["--workers", "0"]) == 0
    text = capsys.readouterr().out
    with open(out / "significance.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    # reference: hand-worked. the page, significance.csv and the printed verdicts share
    # one table: one bootstrap per row (overall and 4 speakers), not one per use
    assert len(rows) == 5 and len(calls) == len(rows)
    # what is printed is what the CSV holds
    for r in rows[1:]:
        assert f"speaker = {r['value']}: {r['verdict']}" in text
