"""Command line: check and align end to end, exit codes, outputs."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from conftest import random_log_probs, require
from test_bundle import SEP, VOCAB

from peekalign import BundleWriter, align_tokens, open_bundle
from peekalign.cli import main


def peaky(rng, tokens, T, V, blank=0):
    """Log-probs whose best path emits ``tokens`` at evenly spaced frames."""
    lp = np.full((T, V), np.log(0.02 / (V - 1)), np.float32)
    lp[:, blank] = np.log(0.98)
    frames = np.linspace(1, T - 2, len(tokens)).astype(int)
    for f, k in zip(frames, tokens, strict=True):
        lp[f] = np.log(0.02 / (V - 1))
        lp[f, k] = np.log(0.98)
    lp += rng.normal(scale=0.01, size=lp.shape).astype(np.float32)
    return lp - np.logaddexp.reduce(lp, axis=1, keepdims=True)


@pytest.fixture
def bundle(tmp_path, rng):
    path = tmp_path / "b"
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        for i, ref in enumerate(["tram car", "car to bar", "act"]):
            toks = [VOCAB.index(c) for c in ref.replace(" ", "|")]
            w.add(f"d-{i}", peaky(rng, toks, 30, len(VOCAB)), ref=ref)
    return path


def test_check_clean_bundle(bundle, capsys):
    assert main(["check", str(bundle)]) == 0
    assert "3 utterances, no problem" in capsys.readouterr().out


def test_check_notes_missing_streaming_facts(tmp_path, capsys):
    """Missing look-aheads are notes (exit 0), and hearing really ends earlier."""
    import shutil

    from peekalign.analysis import analyze
    from peekalign.data import demo_path

    assert main(["check", str(demo_path("full"))]) == 0
    assert "note:" not in capsys.readouterr().out  # the demo gives all three facts
    path = tmp_path / "demo"
    shutil.copytree(demo_path("full"), path)
    meta = json.loads((path / "bundle.json").read_text())
    for key in ("encoder", "decoder", "front_end"):
        meta.pop(key)
    (path / "bundle.json").write_text(json.dumps(meta))
    assert main(["check", str(path)]) == 0
    notes = [x for x in capsys.readouterr().out.splitlines() if x.startswith("note:")]
    assert len(notes) == 3
    for key in ("decoder", "encoder", "front_end"):
        assert sum(f'no "{key}"' in n for n in notes) == 1
    # what the notes claim: at the same decoder look-ahead the hearing ends earlier
    # (reference: heard until = (trigger + look-ahead + encoder frames) x shift + front-end
    # right context, the triggered-attention (2019) window with the encoder's and front
    # end's look-ahead, hand-worked; every term dropped is >= 0)
    uid = open_bundle(path).ids[0]
    full = analyze(open_bundle(demo_path("full"))[uid], lookahead=6)
    bare = analyze(open_bundle(path)[uid], lookahead=6)
    hf, hb = full.words.heard_until_s, bare.words.heard_until_s
    assert np.all(hb < hf)


def test_align_writes_json_ctm_textgrid(bundle, tmp_path, capsys):
    praatio_tg = require("praatio.textgrid")
    out_json, out_ctm, tg = tmp_path / "a.jsonl", tmp_path / "a.ctm", tmp_path / "tg"
    rc = main(
        [
            "align",
            str(bundle),
            "--json",
            str(out_json),
            "--ctm",
            str(out_ctm),
            "--textgrid",
            str(tg),
        ]
    )
    assert rc == 0
    lines = [json.loads(x) for x in out_json.read_text().splitlines()]
    assert [x["id"] for x in lines] == ["d-0", "d-1", "d-2"]
    b = open_bundle(bundle)
    for line in lines:
        u = b[line["id"]]
        a = align_tokens(u.log_probs, u.ref_tokens)
        assert line["score"] == pytest.approx(a.score, abs=1e-3)
        assert [t["first"] for t in line["tokens"]] == a.first.tolist()
        assert [w["word"] for w in line["words"]] == u.ref.split()
        assert set(line["tokens"][0]) == {"id", "token", "first", "last", "spike"}
        assert set(line["words"][0]) == {"word", "first", "last", "start_s", "end_s"}
    # reference: NIST CTM field order <file> <channel> <begin> <duration> <word>
    ctm = [row.split() for row in out_ctm.read_text().splitlines()]
    assert [r[4] for r in ctm if r[0] == "d-1"] == ["car", "to", "bar"]
    w0 = lines[1]["words"][0]
    assert float(ctm[2][2]) == pytest.approx(w0["start_s"], abs=1e-3)
    assert float(ctm[2][2]) + float(ctm[2][3]) == pytest.approx(w0["end_s"], abs=2e-3)
    # reference: praatio reads our TextGrid tiers back
    t = praatio_tg.openTextgrid(str(tg / "d-1.TextGrid"), includeEmptyIntervals=False)
    assert [e.label for e in t.getTier("words").entries] == ["car", "to", "bar"]


def test_align_keeps_going_on_bad_utterances(bundle, tmp_path, rng, capsys):
    np.savez(bundle / "arrays" / "d-1.npz", log_probs=random_log_probs(rng, 4, len(VOCAB)))
    out = tmp_path / "a.jsonl"
    assert main(["align", str(bundle), "--json", str(out)]) == 1
    assert [json.loads(x)["id"] for x in out.read_text().splitlines()] == ["d-0", "d-2"]
    err = capsys.readouterr().err
    assert "d-1:" in err and "needs" in err


def test_align_refuses_to_overwrite(bundle, tmp_path, capsys):
    out = tmp_path / "a.jsonl"
    out.write_text("mine")
    assert main(["align", str(bundle), "--json", str(out)]) == 2
    assert out.read_text() == "mine"
    assert "--overwrite" in capsys.readouterr().err
    assert main(["align", str(bundle), "--json", str(out), "--overwrite"]) == 0


def test_bad_bundle_path_is_one_line(tmp_path):
    r = subprocess.run(
        [sys.executable, "-m", "peekalign", "check", str(tmp_path / "nope")],
        capture_output=True,
        text=True,
    )
    assert r.returncode == 1
    assert "Traceback" not in r.stderr + r.stdout
    assert "no folder" in r.stdout + r.stderr


def test_usage_error_exit_2():
    r = subprocess.run(
        [sys.executable, "-m", "peekalign", "align"], capture_output=True, text=True
    )
    assert r.returncode == 2


def test_word_on_frame_zero_starts_at_zero(tmp_path, rng):
    # frame 0 of a clock with no offset starts half a shift before the audio (hand-worked:
    # 0 - 0.04 / 2 = -0.02 s); CTM and TextGrid get 0.0 instead of a refusal
    path = tmp_path / "b"
    toks = [VOCAB.index(c) for c in "tram"]
    lp = peaky(rng, toks, 12, len(VOCAB))
    lp[0] = lp[1]  # token 't' already wins frame 0
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        w.add("z", lp, ref="tram")
    ctm, tg = tmp_path / "z.ctm", tmp_path / "tg"
    assert main(["align", str(path), "--ctm", str(ctm), "--textgrid", str(tg)]) == 0
    assert ctm.read_text().split()[2] == "0.000"


def test_refusal_leaves_no_partial_set(bundle, tmp_path, capsys):
    ctm, out_json = tmp_path / "a.ctm", tmp_path / "a.jsonl"
    ctm.write_text("mine")
    assert main(["align", str(bundle), "--json", str(out_json), "--ctm", str(ctm)]) == 2
    assert not out_json.exists() and ctm.read_text() == "mine"


def test_textgrid_folder_behind_a_file_is_a_clear_error(bundle, tmp_path, capsys):
    (tmp_path / "f").write_text("x")
    assert main(["align", str(bundle), "--textgrid", str(tmp_path / "f" / "tg")]) == 2
    assert "--textgrid" in capsys.readouterr().err


@pytest.mark.parametrize(
    "argv,closest",
    [
        (["align", "BUNDLE", "--jsonl", "x.jsonl"], "--json"),
        (["sweep", "BUNDLE", "--targte", "0.9"], "--target"),
        (["latency", "--frame-shift-ms", "40", "--layrs", "4"], "--layers"),
    ],
)
def test_mistyped_option_shows_the_subcommands_usage(argv, closest, capsys):
    # reference: argparse's own usage line of the subcommand (format_usage) and
    # difflib's closest match; on main the top-level usage was printed, which lists no
    # option of the subcommand
    from peekalign.cli import build_parser

    with pytest.raises(SystemExit) as exc:
        main(argv)
    assert exc.value.code == 2
    err = capsys.readouterr().err
    sub = build_parser().get_default("_commands")[argv[0]]
    assert err.startswith(sub.format_usage().splitlines()[0])
    assert f"peekalign {argv[0]}: error: unrecognized arguments" in err
    assert f"(did you mean {closest}?)" in err
