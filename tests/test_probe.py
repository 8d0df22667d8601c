"""``peekalign probe`` and its page, on a bundle whose answers are worked out by hand
(a numpy decoder that echoes CTC greedy token u once its window reaches ``u``'s first
frame plus ``id % 4``: tests/redecode_helpers.py)."""

from __future__ import annotations

import csv

import numpy as np
import pytest
from conftest import require

from peekalign import BundleWriter
from peekalign.cli import main

# a | b | <i> | c: markup in a token, so in words, tables and the page
VOCAB = ["-", "|", "a", "b", "c", "<i>"]
REF_TOKENS = [2, 1, 3, 1, 5, 1, 4]
UID = "u<b>&1"


def _bundle(path):
    p = np.full((18, 6), 0.008)
    p[:, 0] = 0.96
    for k, tok in enumerate(REF_TOKENS):
        p[2 + 2 * k] = 0.008
        p[2 + 2 * k, tok] = 0.96
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=0.04,
                      word_boundary={"kind": "separator", "symbol": "|"},
                      decoder={"lookahead": 1}) as w:  # fmt: skip
        w.add(UID, np.log(p), ref="a b <i> c", ref_tokens=REF_TOKENS)
    return path


def _csv(path):
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def test_probe_command_hand_worked(tmp_path, capsys):
    b = _bundle(tmp_path / "b")
    out = tmp_path / "out"
    code = main(["probe", str(b), "--decoder", "redecode_helpers:late_echo", "--out", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    # reference: hand-worked. need = token id % 4 past its greedy trigger, except the
    # separators: the decoder emits "|" while unsure anyway, so they need 0
    need = [float(r["need_frames"]) for r in _csv(out / "need.csv")]
    assert need == [2, 0, 3, 0, 1, 0, 0]
    # at look-ahead 1, a (2) and b (3) come out as "|": both deleted; their spikes are
    # clear and reached: decoder-drop, brought back by decoder weight 0 (the CTC tokens)
    # and by full context
    words = _csv(out / "deleted_words.csv")
    assert [(w["word"], w["code"], w["confirmed"], w["fixed_by"]) for w in words] == [
        ("a", "decoder-drop", "yes", "full-context,no-decoder"),
        ("b", "decoder-drop", "yes", "full-context,no-decoder"),
    ]
    causes = _csv(out / "causes.csv")
    assert [(c["code"], c["tested"], c["confirmed"], c["share"]) for c in causes] == [
        ("decoder-drop", "2", "2", "1")
    ]
    assert "cause decoder-drop: 2 deleted, fix no-decoder: 2/2 confirmed" in text
    # the same dump as engine: no frame parts (reference: hand-worked, KL(p || p) = 0)
    code = main(["probe", str(b), "--decoder", "redecode_helpers:late_echo",
                 "--engine", str(b)])  # fmt: skip
    assert code == 0 and "mean KL 0 nats, labels agree on 100.00 % of frames, 0 part" in (
        capsys.readouterr().out
    )


def test_probe_page_escapes_transcript_text(tmp_path, capsys):
    b = _bundle(tmp_path / "b")
    out = tmp_path / "out"
    assert main(["probe", str(b), "--decoder", "redecode_helpers:late_echo", "--max-lookahead",
                 "5", "--out", str(out)]) == 0  # fmt: skip
    html = (out / "probe.html").read_text(encoding="utf-8")
    # reference: html.escape (standard library): no raw markup from the bundle
    assert "<i>" not in html and "<b>" not in html
    assert "&lt;i&gt;" in html and "u&lt;b&gt;&amp;1" in html
    # the page refuses to overwrite, and says so before any work
    code = main(["probe", str(b), "--decoder", "redecode_helpers:late_echo", "--out", str(out)])
    assert code == 2 and "existing file" in capsys.readouterr().err


def test_probe_page_in_chromium(tmp_path, tmp_path_factory):
    require("playwright")
    from browser import chromium, screenshot

    b = _bundle(tmp_path / "b")
    out = tmp_path / "out"
    assert main(["probe", str(b), "--decoder", "redecode_helpers:late_echo",
                 "--out", str(out)]) == 0  # fmt: skip
    # a short profile path: Chromium's socket path has a length limit
    with chromium(tmp_path_factory.mktemp("cr"), viewport={"width": 1300, "height": 900}) as ctx:
        page = ctx.new_page()
        page.goto((out / "probe.html").as_uri())
        heads = page.locator("h2").all_inner_texts()
        # every section is drawn (reference: DEVELOPERS.md, "Proof by intervention")
        assert heads[:4] == [
            "Encoder look-ahead, measured", "Dump against engine",
            "Look-ahead need per token", "Causes confirmed by their fix",
        ]  # fmt: skip
        assert page.locator("td", has_text="<i>").count() >= 1  # shown as text
        assert page.evaluate("document.querySelectorAll('i').length") == 0
        screenshot(page, tmp_path, "probe.png")


def test_bad_options(tmp_path, capsys):
    b = _bundle(tmp_path / "b")
    for bad in (["--delta", "-1"], ["--max-lookahead", "-2"], ["--beam", "0"]):
        assert main(["probe", str(b), "--decoder", "redecode_helpers:late_echo", *bad]) == 2
    assert "expected" in capsys.readouterr().err
    # an encoder factory that is not there is called an encoder factory (reference:
    # hand-worked, the module does not exist)
    code = main(["probe", str(b), "--decoder", "redecode_helpers:late_echo", "--encoder",
                 "no_such_module_here:encoder"])  # fmt: skip
    err = capsys.readouterr().err
    assert (
        code == 2 and "module of the encoder target factory 'no_such_module_here:encoder'" in err
    )
    with pytest.raises(SystemExit):
        main(["probe", str(b)])  # a decoder is required


def _same_tables(a, b) -> bool:
    """Every table of two probe results (the CSV files' contents) equal, row for row."""
    names = ("token_table", "need_table", "cause_table", "word_table")
    return all(getattr(a, n)().equals(getattr(b, n)()) for n in names)


def test_workers_give_the_same_tables_and_keep_the_good_utterances(tmp_path, capsys):
    from redecode_helpers import LateEcho
    from test_corpus import make_bundle

    from peekalign import open_bundle
    from peekalign.confirm import DecodeSetup
    from peekalign.probing import probe

    broken = {1: "missing", 4: "nan", 6: "unalignable"}
    p = make_bundle(tmp_path / "b", n=9, seed=2, broken=broken)
    ids = open_bundle(p).ids
    bad = [ids[k] for k in sorted(broken)]
    setup = DecodeSetup(lookahead=1)
    one = probe(p, LateEcho(), setup=setup, max_lookahead=4, workers=0, progress=False)
    # reference: hand-worked. every broken utterance is listed, in manifest order, and
    # the others are all in the tables, in manifest order
    assert [q.utt for q in one.problems] == bad
    good = [u for u in ids if u not in bad]
    assert [n.utt for n in one.needs] == good
    assert list(dict.fromkeys(one.token_table()["id"])) == good
    assert one.checks  # late echo at look-ahead 1 deletes words: the fixes were tried
    # 2 workers, batches of 1 utterance (finished in any order), by factory name: the
    # same tables, row for row (reference: hand-worked, the in-process run)
    two = probe(p, "redecode_helpers:late_echo", setup=setup, max_lookahead=4, workers=2,
                batch_size=1, progress=False)  # fmt: skip
    assert _same_tables(two, one)
    assert [(q.utt, q.message) for q in two.problems] == [(q.utt, q.message) for q in one.problems]
    # the good utterances alone give the same tables: a bad one took nothing with it
    alone = probe(p, LateEcho(), setup=setup, max_lookahead=4, ids=good, workers=0,
                  progress=False)  # fmt: skip
    assert _same_tables(alone, one) and not alone.problems
    # the command: exit 1, every bad utterance named, the tables of the rest written
    out = tmp_path / "out"
    code = main(["probe", str(p), "--decoder", "redecode_helpers:late_echo", "--lookahead",
                 "1", "--max-lookahead", "4", "--workers", "2", "--out", str(out)])  # fmt: skip
    text = capsys.readouterr()
    assert code == 1 and all(u in text.err for u in bad)
    assert [r["id"] for r in _csv(out / "need.csv")] == list(one.token_table()["id"])
