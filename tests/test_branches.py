"""Hypotheses per branch: reading (new and legacy manifests), scoring side by side,
and the branch the errors, ranking and diagnoses run against."""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import require
from test_corpus import _hypothesis, _sentence, _utterance

import peekalign
from peekalign import analyze, open_bundle
from peekalign.cli import main
from peekalign.corpus import scan
from peekalign.data import demo_path
from peekalign.exceptions import BundleError, ParameterError
from peekalign.io.bundle import BundleWriter
from peekalign.model import Utterance
from peekalign.vocab import Vocabulary, WordBoundary

VOCAB = ["-", "|", "a", "b"]
BOUNDARY = {"kind": "separator", "symbol": "|"}


def _peaky() -> np.ndarray:
    """Ten frames, clear spikes for "a", "|", "b" (the analyze docstring's example)."""
    p = np.full((10, 4), 0.01)
    p[:, 0] = 0.97
    p[2] = [0.04, 0.01, 0.94, 0.01]
    p[5] = [0.04, 0.94, 0.01, 0.01]
    p[7] = [0.04, 0.01, 0.01, 0.94]
    return np.log(p / p.sum(axis=1, keepdims=True))


def _write(path, lines: list[dict], meta: dict | None = None):
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=0.04, word_boundary=BOUNDARY) as w:
        for line in lines:
            w.add(
                line["id"], _peaky(), ref="a b", extra={k: v for k, v in line.items() if k != "id"}
            )
    if meta:
        m = json.loads((path / "bundle.json").read_text())
        m.update(meta)
        (path / "bundle.json").write_text(json.dumps(m))
    return path


# --- reading ------------------------------------------------------------------------


def test_system_branch_prefers_joint_then_decoder_then_ctc_then_legacy():
    # reference: DEVELOPERS.md, "Hypotheses per branch" (precedence rule)
    v = Vocabulary(VOCAB, boundary=WordBoundary("separator", "|"))
    cases = [
        ({"ctc": "a", "decoder": "b", "joint": "a b"}, None, "joint"),
        ({"ctc": "a", "decoder": "b"}, None, "decoder"),
        ({"ctc": "a"}, None, "ctc"),
        (None, "a", "hyp"),
        (None, None, None),
    ]
    for hyps, hyp, want in cases:
        u = Utterance.from_arrays(_peaky(), ref="a b", vocab=v, hyps=hyps, hyp=hyp)
        assert u.system_branch == want
        assert u.hyp == (None if want is None else u.hyps[want])


def test_manifest_branches_tokens_and_legacy_fields(tmp_path):
    # reference: DEVELOPERS.md, "Hypotheses per branch" (legacy mapping), hand-worked
    b = _write(
        tmp_path / "b",
        [
            {"id": "new", "hyps": {"ctc": "a", "decoder": "a b"}, "hyps_tokens": {"ctc": [2]}},
            {"id": "old", "hyp": "a", "hyp_tokens": [2]},
            {"id": "demo-like", "hyp": "a", "hyp_attention": "a b"},
            {"id": "tokens-only", "hyps_tokens": {"joint": [3, 1, 2]}},
        ],
    )
    bundle = open_bundle(b)
    new = bundle["new"]
    assert new.hyps == {"ctc": "a", "decoder": "a b"} and new.system_branch == "decoder"
    assert new.hyps_tokens["ctc"].tolist() == [2] and "decoder" not in new.hyps_tokens
    old = bundle["old"]  # no hyp_branch in bundle.json: branch not stated
    assert old.hyps == {"hyp": "a"} and old.system_branch == "hyp"
    assert old.hypothesis()[2].tolist() == [2]
    demo_like = bundle["demo-like"]
    assert demo_like.hyps == {"hyp": "a", "decoder": "a b"}
    assert demo_like.system_branch == "decoder"
    assert "hyp_attention" in demo_like.extra  # kept as given too
    assert bundle["tokens-only"].hyps == {"joint": "b a"}  # text decoded from the ids

    # bundle.json states the legacy hypothesis' branch
    meta = json.loads((b / "bundle.json").read_text())
    meta["hyp_branch"] = "ctc"
    (b / "bundle.json").write_text(json.dumps(meta))
    again = open_bundle(b)
    assert again["old"].hyps == {"ctc": "a"} and again["old"].system_branch == "ctc"
    assert again["demo-like"].hyps == {"ctc": "a", "decoder": "a b"}


def test_bad_branches_are_clear_errors(tmp_path):
    b = _write(
        tmp_path / "b",
        [
            {"id": "typo", "hyps": {"attention": "a"}},
            {"id": "clash", "hyp": "a", "hyps": {"ctc": "b"}},
            {"id": "list", "hyps": ["a"]},
        ],
        meta={"hyp_branch": "ctc"},
    )
    bundle = open_bundle(b)
    with pytest.raises(BundleError, match=r"utt 'typo'.*branch 'attention'.*ctc, decoder, joint"):
        bundle["typo"]
    with pytest.raises(BundleError, match=r"utt 'clash'.*hyp='a' and hyps\['ctc'\]='b'"):
        bundle["clash"]
    with pytest.raises(BundleError, match=r"utt 'list'.*object by branch"):
        bundle["list"]
    meta = json.loads((b / "bundle.json").read_text())
    meta["hyp_branch"] = "greedy"
    (b / "bundle.json").write_text(json.dumps(meta))
    with pytest.raises(BundleError, match=r"bundle.json.*hyp_branch='greedy'"):
        open_bundle(b)
    with pytest.raises(ParameterError, match=r"utt 'u'.*branch 'beam'"):
        with BundleWriter(
            tmp_path / "w", vocab=VOCAB, frame_shift_s=0.04, word_boundary=BOUNDARY
        ) as w:
            w.add("u", _peaky(), ref="a b", hyps={"beam": "a"})


def test_writer_round_trips_hyps(tmp_path):
    # reference: hand-worked (what was written is what is read)
    with BundleWriter(
        tmp_path / "w", vocab=VOCAB, frame_shift_s=0.04, word_boundary=BOUNDARY
    ) as w:
        w.add(
            "u", _peaky(), ref="a b", hyps={"ctc": "a", "joint": "a b"}, hyps_tokens={"ctc": [2]}
        )
    line = json.loads((tmp_path / "w" / "utts.jsonl").read_text())
    assert line["hyps"] == {"ctc": "a", "joint": "a b"} and line["hyps_tokens"] == {"ctc": [2]}
    u = open_bundle(tmp_path / "w")["u"]
    assert u.system_branch == "joint" and u.hyps_tokens["ctc"].tolist() == [2]


# --- the branch the analysis runs against ----------------------------------------------


def test_diagnoses_follow_the_picked_branch():
    # reference: hand-worked. CTC spikes clearly for "a" and "b"; the CTC branch emits
    # both, the decoder drops "b": the system output (decoder) has one deletion,
    # diagnosed decoder-drop; the CTC branch has none.
    v = Vocabulary(VOCAB, boundary=WordBoundary("separator", "|"))
    u = Utterance.from_arrays(_peaky(), ref="a b", vocab=v, hyps={"ctc": "a b", "decoder": "a"})
    a = analyze(u, lookahead=2)
    assert a.branch == "decoder"
    assert (a.summary()["D"], [d.code for d in a.diagnoses]) == (1, ["decoder-drop"])
    s = a.summary()
    assert (s["wer_decoder"], s["wer_ctc"], s["errors_ctc"]) == (0.5, 0.0, 0)
    assert np.isnan(s["wer_joint"]) and s["errors_joint"] is None
    c = analyze(u, lookahead=2, branch="ctc")
    assert c.branch == "ctc" and c.summary()["D"] == 0 and c.diagnoses == []
    with pytest.raises(
        ParameterError, match=r"no hypothesis of branch 'joint' \(branches: ctc, decoder\)"
    ):
        analyze(u, branch="joint")


def _branch_bundle(path, n: int = 10, seed: int = 3):
    """Synthetic bundle: every utterance has ctc and decoder hypotheses, some a joint one."""
    rng = np.random.default_rng(seed)
    refs, hyps = [], {"ctc": [], "decoder": [], "joint": []}
    with BundleWriter(
        path,
        vocab=["<b>", "|", *"abcdefghijklmnopqrstuvwxyz'"],
        frame_shift_s=0.04,
        word_boundary=BOUNDARY,
        decoder={"lookahead": 1},
    ) as w:
        for k in range(n):
            ref = _sentence(rng)
            lp, tokens, times, att = _utterance(rng, ref)
            h = {"ctc": _hypothesis(ref, rng), "decoder": _hypothesis(ref, rng)}
            if k % 2 == 0:
                h["joint"] = _hypothesis(ref, rng)
            h = {b: " ".join(x) for b, x in h.items()}
            w.add(f"u{k}", lp, ref=" ".join(ref), words=times, hyps=h)
            refs.append(" ".join(ref))
            for b in hyps:
                hyps[b].append(h.get(b))
    return path, refs, hyps


def test_scan_scores_every_branch_like_jiwer(tmp_path):
    jiwer = require("jiwer")
    path, refs, hyps = _branch_bundle(tmp_path / "b")
    s = scan(path, workers=0, progress=False)
    t = s.totals()
    for b, texts in hyps.items():
        pairs = [(r, h) for r, h in zip(refs, texts, strict=True) if h is not None]
        want = jiwer.wer([r for r, _ in pairs], [h for _, h in pairs])  # reference: jiwer
        assert t["branches"][b]["wer"] == pytest.approx(want, abs=1e-12)
        assert t["branches"][b]["n_utterances"] == len(pairs)
        for row, (r, h) in zip(s.utterances, zip(refs, texts, strict=True), strict=True):
            if h is None:
                assert np.isnan(row[f"wer_{b}"]) and row[f"errors_{b}"] is None
            else:
                assert row[f"wer_{b}"] == pytest.approx(jiwer.wer(r, h), abs=1e-12)
    # the system output: joint where present, else decoder
    assert s.utterances["branch"].tolist() == ["joint", "decoder"] * 5
    assert t["branch"] == "mixed: decoder, joint"
    sys_hyps = [
        j if j is not None else d for j, d in zip(hyps["joint"], hyps["decoder"], strict=True)
    ]
    assert t["wer"] == pytest.approx(jiwer.wer(refs, sys_hyps), abs=1e-12)  # reference: jiwer
    # a picked branch: headline, ranking and diagnoses use it
    c = scan(path, workers=0, progress=False, branch="ctc")
    assert c.totals()["branch"] == "ctc"
    assert c.totals()["wer"] == pytest.approx(jiwer.wer(refs, hyps["ctc"]), abs=1e-12)
    errs = [jiwer.process_words(r, h) for r, h in zip(refs, hyps["ctc"], strict=True)]
    n_err = {f"u{k}": e.substitutions + e.deletions + e.insertions for k, e in enumerate(errs)}
    worst = c.worst()["id"].tolist()
    assert [n_err[u] for u in worst] == sorted(n_err.values(), reverse=True)
    assert c.totals()["D"] == sum(e.deletions for e in errs)
    assert sum(c.totals()["deletions"].values()) == c.totals()["D"]
    # a branch some utterances lack: those are problems, the rest are scanned
    j = scan(path, workers=0, progress=False, branch="joint")
    assert [p.utt for p in j.problems] == [f"u{k}" for k in range(1, 10, 2)]
    assert "no hypothesis of branch 'joint'" in j.problems[0].message
    with pytest.raises(ParameterError, match="'branch' parameter of scan"):
        scan(path, workers=0, progress=False, branch="beam")


def test_demo_scan_scores_both_branches_like_jiwer():
    jiwer = require("jiwer")
    bundle = open_bundle(demo_path("full"))
    refs = [u.ref for u in bundle]
    s = scan(bundle, workers=0, progress=False)
    t = s.totals()
    assert t["branch"] == "decoder"
    for b in ("ctc", "decoder"):
        want = jiwer.wer(refs, [u.hyps[b] for u in bundle])  # reference: jiwer
        assert t["branches"][b]["wer"] == pytest.approx(want, abs=1e-12)
    assert t["wer"] == t["branches"]["decoder"]["wer"]
    assert t["branches"]["decoder"]["wer"] < t["branches"]["ctc"]["wer"]


def test_commands_name_the_branch(tmp_path, capsys):
    jiwer = require("jiwer")
    path, refs, hyps = _branch_bundle(tmp_path / "b")
    out = tmp_path / "r"
    assert (
        main(
            [
                "scan",
                str(path),
                "--out",
                str(out),
                "--workers",
                "0",
                "--no-pages",
                "--branch",
                "ctc",
            ]
        )
        == 0
    )
    printed = capsys.readouterr().out
    wer = jiwer.wer(refs, hyps["ctc"])  # reference: jiwer
    assert f"WER {wer * 100:.2f} % (ctc)" in printed
    assert "WER by branch: ctc" in printed
    index = (out / "index.html").read_text()
    assert "WER (ctc)" in index and "WER (decoder)" in index and "WER (joint)" in index
    header = (out / "utterances.csv").read_text().splitlines()[0].split(",")
    assert {"branch", "wer_ctc", "wer_decoder", "wer_joint", "errors_ctc"} <= set(header)
    # check: a branch missing from some utterances is a problem there
    assert main(["check", str(path), "--branch", "joint"]) == 1
    err = capsys.readouterr()
    assert "u1: found no hypothesis of branch 'joint'" in err.err
    assert "hypotheses: ctc 10, decoder 10, joint 5" in err.out
    assert main(["check", str(path), "--branch", "decoder"]) == 0


def test_view_names_the_branch():
    from peekalign.views import utterance_view
    from peekalign.views._document import _header_html
    from peekalign.views._model import view_model

    b = open_bundle(demo_path("full"))
    a = analyze(b["tram-004"], branch="ctc")
    vm = view_model(a, audio=False)
    # reference: hand-worked (the CTC branch's own words are the ones shown)
    assert vm.hyp_branch == "ctc" and vm.hyp == b["tram-004"].hyps["ctc"]
    assert "<b>HYP</b> <i>(ctc)</i>" in _header_html(vm, 6)
    ticks = utterance_view(a, width=600).panels["lanes"].figure.yaxis.major_label_overrides
    assert "hypothesis\n(ctc)" in ticks.values()
    # default: the system's output
    vm = view_model(analyze(b["tram-004"]), audio=False)
    assert vm.hyp_branch == "decoder" and "<b>HYP</b> <i>(decoder)</i>" in _header_html(vm, 6)


def test_peek_header_names_the_branch():
    require("ipywidgets")
    app = peekalign.peek(demo_path("full"), utt="tram-004", branch="ctc", scan=False)
    assert app.analysis.branch == "ctc"
    assert "(ctc; S" in app._header.value and "other branches: decoder" in app._header.value
    # reference: DEVELOPERS.md, "Causal triggers" (the label names the source)
    assert f"triggers: {app.analysis.windows.trigger_label}" in app._header.value
    assert app.analysis.windows.trigger_label.startswith("CTC greedy")
