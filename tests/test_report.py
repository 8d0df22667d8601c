"""The scan and compare reports: files, CSV tables, links, escaping, atomic writing."""

from __future__ import annotations

import csv
import json
import re
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlsplit

import numpy as np
import pytest
from test_corpus import make_bundle

from peekalign.cli import main
from peekalign.corpus import scan
from peekalign.io.bundle import BundleWriter
from peekalign.report import write_report
from peekalign.report._html import page_name, page_names, script_json

XSS_IDS = [
    "<script>window.__pwned=1</script>",
    '<img src=x onerror="window.__pwned=2">',
    "plain-0001",
]
XSS_REF = "tram <script>window.__pwned=3</script> depot"
XSS_HYP = 'tram <img src=x onerror="window.__pwned=4"> depot'


def make_xss_bundle(path, hyp: str = XSS_HYP, meta=None, broken_id: str | None = None) -> Path:
    """Ids and words that are HTML: a report must show them as text (``meta`` on every
    line; ``broken_id``: one more utterance whose log-probs hold a NaN)."""
    vocab = ["<b>", "|", *"abcdefghijklmnopqrstuvwxyz<>/()1234=\"'._ "]
    rng = np.random.default_rng(4)
    with BundleWriter(
        path,
        vocab=vocab,
        frame_shift_s=0.04,
        word_boundary={"kind": "separator", "symbol": "|"},
        decoder={"lookahead": 1},
    ) as w:
        for uid in [*XSS_IDS, *([broken_id] if broken_id else [])]:
            toks = [1 if c == " " else vocab.index(c) for c in XSS_REF]
            T = 3 * len(toks) + 4
            logits = rng.normal(size=(T, len(vocab)))
            logits[:, 0] += 5
            for k, t in enumerate(toks):
                logits[2 + 3 * k, t] += 10
            lp = logits - np.log(np.exp(logits).sum(1, keepdims=True))
            if uid == broken_id:
                lp[3, 5] = np.nan
            w.add(uid, lp.astype(np.float32), ref=XSS_REF, hyp=hyp, meta=meta)
    return Path(path)


class Links(HTMLParser):
    """Every href/src of a page (reference: the standard library's HTML parser)."""

    def __init__(self):
        super().__init__()
        self.refs: list[str] = []
        self.scripts: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        for k in ("href", "src"):
            if a.get(k):
                self.refs.append(a[k])
        if tag == "script" and a.get("src"):
            self.scripts.append(a["src"])


def links(path: Path) -> Links:
    p = Links()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def resolve(page: Path, ref: str) -> Path:
    return (page.parent / unquote(urlsplit(ref).path)).resolve()


BROKEN = {4: "nan"}  # 1 of 10


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    b = make_bundle(d / "bundle", n=10, seed=21, broken=BROKEN)
    out = d / "out"
    code = main(["scan", str(b), "--out", str(out), "--workers", "2"])
    return b, out, code


def test_scan_command_writes_every_file(report, capsys):
    b, out, code = report
    assert code == 1  # one utterance was bad, the rest were processed
    names = sorted(p.name for p in out.iterdir())
    assert names == [
        "confusions.csv",
        "index.html",
        "problems.csv",
        "static",
        "sweep.csv",
        "token_deletions.csv",
        "utterances.csv",
        "utts",
        "word_errors.csv",
        "words.csv",
    ]
    ids = [f"dispatch-{k:04d}" for k in range(10)]
    good = [u for k, u in enumerate(ids) if k not in BROKEN]
    assert sorted(p.name for p in (out / "utts").iterdir()) == [f"{u}.html" for u in good]
    # BokehJS is stored once, in the report, and no page carries it inline
    js = sorted(p.name for p in (out / "static" / "js").iterdir())
    assert "bokeh.min.js" in js
    for p in (out / "utts").iterdir():
        text = p.read_text()
        assert "/* BEGIN bokeh.min.js */" not in text
        assert not re.search(r"""(src|href)=["']https?:""", text)  # no network


def test_tables_equal_a_fresh_scan(report):
    b, out, _ = report
    s = scan(b, workers=0, progress=False)
    assert (out / "utterances.csv").read_text() == s.utterances.csv_text()
    assert (out / "words.csv").read_text() == s.words.csv_text()
    # reference: the standard library's csv module reads the problems back
    rows = list(csv.reader((out / "problems.csv").open(encoding="utf-8")))
    assert rows[0] == ["id", "problem"]
    assert [r[0] for r in rows[1:]] == ["dispatch-0004"]
    assert "NaN" in rows[1][1]
    sweep = list(csv.reader((out / "sweep.csv").open()))
    assert sweep[0] == ["lookahead_frames", "latency_ms", "reach", "kept_attention"]
    assert len(sweep) == 32  # look-aheads 0..30


def test_index_lists_problems_and_links_resolve(report):
    b, out, _ = report
    index = out / "index.html"
    text = index.read_text()
    assert "dispatch-0004" in text and "NaN" in text  # the broken one with its reason
    for ref in links(index).refs:
        assert resolve(index, ref).exists(), ref
    for page in (out / "utts").iterdir():
        lk = links(page)
        for ref in lk.refs:
            assert resolve(page, ref).exists(), (page.name, ref)
        assert any(s.endswith("static/js/bokeh.min.js") for s in lk.scripts)
    summary = re.search(
        r'<script type="application/json" id="peekalign-summary">(.*?)</script>', text, re.S
    )
    data = json.loads(summary.group(1))
    assert data["totals"]["n_utterances"] == 9
    assert data["problems"][0][0] == "dispatch-0004"


def test_pages_stay_small(report):
    _, out, _ = report
    pages = list((out / "utts").iterdir())
    shared = sum(p.stat().st_size for p in (out / "static").rglob("*") if p.is_file())
    own = sum(p.stat().st_size for p in pages)
    # the shared BokehJS counts once; pages are what grows with the test set
    assert own / len(pages) < 250_000
    assert shared > own / len(pages)


def test_refuses_non_empty_folder_unless_overwrite(tmp_path, capsys):
    b = make_bundle(tmp_path / "b", n=3, seed=2)
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    code = main(["scan", str(b), "--out", str(out), "--workers", "0", "--no-pages"])
    assert code == 2
    assert "non-empty folder" in capsys.readouterr().err
    assert (out / "keep.txt").read_text() == "mine"
    code = main(["scan", str(b), "--out", str(out), "--workers", "0", "--overwrite"])
    assert code == 0
    assert not (out / "keep.txt").exists() and (out / "index.html").exists()
    # an empty folder is fine
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["scan", str(b), "--out", str(empty), "--workers", "0", "--no-pages"]) == 0


def test_crash_leaves_the_old_report(tmp_path, monkeypatch):
    import peekalign.report._scan as rs

    b = make_bundle(tmp_path / "b", n=3, seed=2)
    out = tmp_path / "out"
    write_report(b, out, workers=0, pages=False, progress=False)
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}

    def boom(*a, **k):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(rs, "render_index", boom)
    with pytest.raises(RuntimeError, match="disk on fire"):
        write_report(b, out, workers=0, overwrite=True, progress=False)
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    assert after == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b", "out"]  # no temp left


def test_html_escaping(tmp_path):
    b = make_xss_bundle(tmp_path / "b")
    out = tmp_path / "out"
    s = write_report(b, out, workers=0, progress=False)
    assert not s.problems
    index = (out / "index.html").read_text()
    page_files = sorted((out / "utts").iterdir())
    json_block = re.compile(r'(<script type="application/json"[^>]*>)(.*?)(</script>)', re.S)
    for text in [index] + [p.read_text() for p in page_files]:
        # inside a JSON block only '</' could end the script: it must not occur there
        for _, body, _ in json_block.findall(text):
            assert "</" not in body and "<!--" not in body
        text = json_block.sub("", text)
        assert "<script>window.__pwned" not in text
        assert '<img src=x onerror="window' not in text
    assert "&lt;script&gt;window.__pwned=1&lt;/script&gt;" in index
    # JSON in <script>: '</' written as '<\/' (the HTML parser ends a script at '</')
    assert "window.__pwned=1<\\/script>" in index
    # page names are plain file names, never paths or markup
    for p in page_files:
        assert re.fullmatch(r"[A-Za-z0-9._-]+\.html", p.name)


def test_script_json_and_page_names():
    # reference: HTML's script data state ends at '</' followed by 'script' (from memory)
    text = script_json({"a": "</script><!-- x"})
    assert "</" not in text and "<!--" not in text
    assert json.loads(text) == {"a": "</script><!-- x"}
    assert page_name("utt-1") == "utt-1.html"
    assert page_name("a/b") != page_name("a_b") and "/" not in page_name("a/b")
    names = page_names(["Utt1", "utt1", "x"])
    assert len({n.lower() for n in names.values()}) == 3  # case-insensitive file systems
    assert names["x"] == "x.html"


def test_compare_command(tmp_path, capsys):
    a = make_bundle(tmp_path / "a", n=4, seed=8)
    b = make_bundle(tmp_path / "b", n=4, seed=8, hyp_seed=1)
    out = tmp_path / "cmp"
    code = main(
        [
            "compare",
            str(a),
            str(b),
            "--out",
            str(out),
            "--workers",
            "2",
            "--labels",
            "stream",
            "full",
        ]
    )
    assert code == 0
    assert "4 common utterances" in capsys.readouterr().out
    for n in ("index.html", "utterances.csv", "changed_words.csv", "problems.csv"):
        assert (out / n).is_file()
    index = out / "index.html"
    for ref in links(index).refs:
        assert resolve(index, ref).exists(), ref
    side = out / "utts" / "dispatch-0002.html"
    frames = re.findall(r'<iframe src="([^"]+)"', side.read_text())
    assert frames == ["a/dispatch-0002.html", "b/dispatch-0002.html"]
    for f in frames:
        assert resolve(side, f).exists()
        assert links(resolve(side, f)).scripts[0].startswith("../../static/js/")
    rows = list(csv.DictReader((out / "utterances.csv").open()))
    assert [r["id"] for r in rows] == [f"dispatch-{k:04d}" for k in range(4)]
    for r in rows:
        assert float(r["wer_delta"]) == pytest.approx(float(r["wer_b"]) - float(r["wer_a"]))


def test_edge_sets_still_give_a_report(tmp_path, capsys):
    # every utterance broken: no table rows, every reason listed, exit 1
    b = make_bundle(tmp_path / "bad", n=2, seed=3, broken={0: "nan", 1: "missing"})
    out = tmp_path / "out-bad"
    assert main(["scan", str(b), "--out", str(out), "--workers", "0"]) == 1
    text = (out / "index.html").read_text()
    assert "dispatch-0000" in text and "dispatch-0001" in text
    assert (out / "utterances.csv").read_text().count("\n") == 1  # header only
    err = capsys.readouterr().err
    assert "dispatch-0000: found 1 NaN" in err
    # no hypotheses: no WER anywhere, the rest is there
    b = make_bundle(tmp_path / "nohyp", n=3, seed=3, hyps=False)
    s = write_report(b, tmp_path / "out-nohyp", workers=0, progress=False)
    assert s.totals()["n_scored"] == 0 and s.utterances["S"].tolist() == [None] * 3
    rows = list(csv.DictReader((tmp_path / "out-nohyp" / "utterances.csv").open()))
    assert [r["wer"] for r in rows] == ["", "", ""]


def test_pages_of_the_worst_only(tmp_path, capsys):
    b = make_bundle(tmp_path / "b", n=6, seed=12)
    out = tmp_path / "out"
    assert main(["scan", str(b), "--out", str(out), "--workers", "0", "--pages", "2"]) == 0
    s = scan(b, workers=0, progress=False)
    worst = s.worst(2)["id"].tolist()
    assert sorted(p.name for p in (out / "utts").iterdir()) == sorted(f"{u}.html" for u in worst)
    index = out / "index.html"
    refs = [r for r in links(index).refs if r.startswith("utts/")]
    assert sorted(refs) == sorted(f"utts/{u}.html" for u in worst)
    for ref in links(index).refs:
        assert resolve(index, ref).exists(), ref
    assert main(["scan", str(b), "--out", str(tmp_path / "x"), "--pages", "-1"]) == 2
    assert "'pages' parameter of write_report" in capsys.readouterr().err


def test_killed_run_leaves_the_old_report(tmp_path):
    import os
    import signal
    import subprocess
    import sys
    import time

    b = make_bundle(tmp_path / "b", n=12, seed=6)
    out = tmp_path / "out"
    write_report(b, out, workers=0, pages=False, progress=False)
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    cmd = [sys.executable, "-m", "peekalign", "scan", str(b), "--out", str(out)]
    proc = subprocess.Popen(
        [*cmd, "--overwrite", "--workers", "1"],
        start_new_session=True,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        # wait until the new report is half drawn in its temporary folder
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            tmp = [p for p in tmp_path.glob(".out.*.tmp") if (p / "utts").is_dir()]
            if tmp and any((tmp[0] / "utts").iterdir()):
                break
            assert proc.poll() is None, "the scan ended before it could be killed"
            time.sleep(0.05)
        else:
            pytest.fail("no half-written report appeared")
    finally:
        os.killpg(proc.pid, signal.SIGKILL)  # the scan and its workers, as a crash would
        proc.wait()
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    assert after == before


def test_index_shows_shown_delay_and_rewrite_rate(report):
    _, out, _ = report
    text = (out / "index.html").read_text()
    section = text.split("<h2>What a listener sees</h2>")[1].split("<h2>")[0]
    assert section.count("<svg") == 2
    assert "shown delay distribution" in section and "rewrite rate distribution" in section
    rows = list(csv.DictReader((out / "words.csv").open(encoding="utf-8")))
    delays = [
        (float(r["final_shown_s"]) - float(r["end_s"])) * 1000 for r in rows if r["final_shown_s"]
    ]
    # reference: numpy's median of the words.csv columns (DEVELOPERS.md, partial results)
    med = f"{float(np.median(delays)):+.0f}".replace("-", "\u2212")
    assert f"median {med} ms" in section
    assert f"over {len(delays)} words" in section
