"""The Jupyter peek widget without a browser: its state, controls and the bokeh models
they drive.

The utterances are built by hand: every token has one planned spike frame (posterior
0.9, or 0.2 for a "weak" word) and blank elsewhere, so the CTC Viterbi path puts each
token's one-frame segment on its spike and the trigger frames are known from the
construction. Expected windows come from :func:`peekalign.streaming.token_windows`
(an independent computation from the peek widget's path through the views) or from the
window formula worked by hand; error operations from ``jiwer``.
"""

from __future__ import annotations

import json
import math
import string
import subprocess
import sys

import numpy as np
import pytest
from browser import isolate_home, require_chromium
from conftest import require

import peekalign
from peekalign import FrameClock, ParameterError, open_bundle
from peekalign.io.bundle import BundleWriter
from peekalign.streaming import token_windows

VOCAB = ["<b>", "|", *string.ascii_lowercase]
SHIFT = 0.04
SR = 16000
ENCODER = (2, 1)  # layers, look-ahead frames per layer
LOOKAHEAD = 2
WEAK_PEAK = 0.2

# (id, reference, hypothesis, weak word, attention rows: "ref" | "hyp" | None)
UTTS = [
    ("synth-0", "call depot four now", "call depot now", "four", "ref"),
    ("synth-1", "tram nine to yard", "tram nine to yard", None, "hyp"),
    ("synth-2", "hold at gate two", "hold gate two", "at", None),
]


def plan(words, *, lead=4, per=2, gap=3):
    """Token ids, their spike frames, each word's (first, last) character frame and T."""
    toks, frames, spans = [], [], []
    f = lead
    for k, w in enumerate(words):
        if k:
            toks.append(1)
            frames.append(f)
            f += gap
        first = f
        for ch in w:
            toks.append(VOCAB.index(ch))
            frames.append(f)
            f += per
        spans.append((first, f - per))
        f += gap
    return toks, frames, spans, f + lead


def log_probs(toks, frames, T, *, weak_frames=()):
    p = np.full((T, len(VOCAB)), 1e-4)
    p[:, 0] = 1.0
    for t, f in zip(toks, frames, strict=True):
        peak = WEAK_PEAK if f in weak_frames else 0.9
        p[f] = 1e-4
        p[f, t] = peak
        p[f, 0] = 1.0 - peak
    p /= p.sum(axis=1, keepdims=True)
    return np.log(p).astype(np.float32)


def attention_rows(rng, centres, T):
    """(2, 2, U, T) weights peaked just after each row's centre frame."""
    att = rng.random((2, 2, len(centres), T)) * 0.02
    for u, c in enumerate(centres):
        att[:, :, u, max(0, c - 1) : c + 4] += rng.random((2, 2, 1)) + 0.5
    return (att / att.sum(-1, keepdims=True)).astype(np.float32)


def make_bundle(path, rng, *, audio=True, attention=True):
    """A bundle of the three UTTS; returns {id: plan} for the checks."""
    info = {}
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=SHIFT,
        word_boundary={"kind": "separator", "symbol": "|"},
        sample_rate=SR if audio else None,
        encoder={"layers": ENCODER[0], "lookahead_per_layer": ENCODER[1]},
        decoder={"lookahead": LOOKAHEAD},
    ) as bw:
        for uid, ref, hyp, weak, rows in UTTS:
            words = ref.split()
            toks, frames, spans, T = plan(words)
            weak_frames = ()
            if weak:
                a, b = spans[words.index(weak)]
                weak_frames = set(range(a, b + 1))
            lp = log_probs(toks, frames, T, weak_frames=weak_frames)
            times = [
                (w, a * SHIFT - SHIFT / 2, b * SHIFT + SHIFT / 2)
                for w, (a, b) in zip(words, spans, strict=True)
            ]
            kw = {}
            if attention and rows == "ref":
                kw["attention"] = attention_rows(rng, frames, T)
            elif attention and rows == "hyp":
                htoks, hframes, _, _ = plan(hyp.split())
                kw["attention"] = attention_rows(rng, frames[: len(htoks)], T)
                kw["attention_tokens"] = htoks
            if audio:
                y = 0.01 * rng.standard_normal(int(round(T * SHIFT * SR)))
                for w, a, b in times:
                    n = np.arange(int(a * SR), int(b * SR))
                    y[n] += 0.3 * np.sin(2 * np.pi * (180 + 40 * len(w)) * n / SR)
                kw["audio"] = y.astype(np.float32)
            bw.add(uid, lp, ref=ref, hyp=hyp, words=times, **kw)
            info[uid] = {"tokens": toks, "frames": frames, "spans": spans, "T": T, "times": times}
    return info


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    path = tmp_path_factory.mktemp("widgets") / "bundle"
    info = make_bundle(path, np.random.default_rng(20261202))
    return open_bundle(path), info


@pytest.fixture
def app(bundle):
    b, _ = bundle
    return peekalign.peek(b, utt="synth-0", scan=False)


def expected_windows(info, lookahead):
    # reference: token_windows over the trigger frames known from the construction
    return token_windows(
        np.array(info["frames"]),
        num_frames=info["T"],
        clock=FrameClock(SHIFT),
        lookahead=lookahead,
        encoder_lookahead=ENCODER,
    )


def band(app):
    return app.view.state()


# -- construction ------------------------------------------------------------------


def test_import_does_not_load_widget_libraries():
    code = (
        "import sys, peekalign; "
        "print(any(m in sys.modules for m in ('ipywidgets', 'bokeh', 'jupyter_bokeh')))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_peek_opens_on_the_deleted_word(app, bundle):
    jiwer = require("jiwer")
    _, info = bundle
    import ipywidgets

    assert isinstance(app, ipywidgets.VBox)
    # reference: the DOM standard (DOMTokenList.add rejects a class with a space, and
    # the page then never draws the widget)
    assert "peekalign-peek" in app._dom_classes
    assert not [c for c in app._dom_classes if any(ch.isspace() for ch in c)]
    # reference: jiwer's word alignment names the deleted reference word
    out = jiwer.process_words("call depot four now", "call depot now")
    deleted = [c.ref_start_idx for c in out.alignments[0] if c.type == "delete"]
    assert deleted == [2]
    assert app.state.word == 2
    # hand-worked: 'four' is the 3rd word; its last token is 'r' after c,a,l,l,|,d,e,p,o,t,|,f,o,u
    assert app.state.token == 14
    w = expected_windows(info["synth-0"], LOOKAHEAD)
    assert band(app)["trigger"] == pytest.approx(SHIFT * info["synth-0"]["frames"][14])
    assert band(app)["window"] == pytest.approx(
        (SHIFT * (w.start[14] - 0.5), SHIFT * (w.end[14] + 0.5))
    )
    assert app.state.lookahead == LOOKAHEAD  # the bundle's own decoder look-ahead


def test_peek_on_one_utterance_disables_the_picker(bundle):
    b, info = bundle
    app = peekalign.peek(b["synth-1"])
    assert app.state.utt == "synth-1"
    assert app.controls["utt"].disabled and app.controls["scan"].disabled
    # no deletion: the word with the smallest margin is selected (hand-worked: every
    # word ends one half frame after its last spike, so margins differ only by
    # clipping at the end -> the minimum is the first word with the least look-ahead)
    margins = app.analysis.words.margin_s
    assert app.state.word == int(np.argmin(margins))


def test_peek_on_an_analysis_keeps_it(bundle):
    b, _ = bundle
    a = peekalign.analyze(b["synth-0"], lookahead=5)
    app = peekalign.peek(a)
    assert app.analysis is a
    assert app.state.lookahead == 5


def test_bad_sources_and_values_say_what_was_expected(app):
    with pytest.raises(ParameterError, match="'source' parameter of peek must be"):
        peekalign.peek(42)
    with pytest.raises(
        ParameterError,
        match=r"The 'lookahead' parameter of peek must be an int in the range \[0, inf\)\. "
        r"Got -3 instead\.",
    ):
        app.set_lookahead(-3)
    with pytest.raises(ParameterError, match="'mode' parameter of set_attention"):
        app.set_attention("L9H9")
    with pytest.raises(ParameterError, match="'floor' parameter"):
        app.set_floor(0.9)
    with pytest.raises(ParameterError, match="'sort' parameter of peek"):
        peekalign.peek(app.analysis.utt, sort="random")


# -- token stepper -----------------------------------------------------------------


def test_stepping_moves_the_window_marker_to_each_token(app, bundle):
    _, info = bundle
    frames = info["synth-0"]["frames"]
    w = expected_windows(info["synth-0"], LOOKAHEAD)
    app.select_token(0)
    assert app.controls["prev"].disabled
    for u in range(1, 6):
        app.controls["next"].click()
        assert app.state.token == u
        assert app.controls["token"].value == u
        s = band(app)
        assert s["trigger"] == pytest.approx(SHIFT * frames[u])
        assert s["window"][1] == pytest.approx(SHIFT * (w.end[u] + 0.5))
    app.controls["prev"].click()
    assert app.state.token == 4
    # the token picker does the same
    app.controls["token"].value = 9
    assert app.state.token == 9 and band(app)["trigger"] == pytest.approx(SHIFT * frames[9])
    # separators belong to no word
    app.select_token(4)
    assert app.state.word == -1


# -- look-ahead slider -------------------------------------------------------------


@pytest.mark.parametrize("eps", [0, 1, 7, 40])
def test_slider_moves_the_window_band(app, bundle, eps):
    _, info = bundle
    u = 14
    app.select_token(u)
    slider = app.controls["lookahead"]
    if eps <= slider.max:
        slider.value = eps  # as the page does
    else:
        app.set_lookahead(eps)  # past the slider's end: the method widens it
        assert slider.max == eps and slider.value == eps
    assert app.state.lookahead == eps
    w = expected_windows(info["synth-0"], eps)
    s = band(app)
    # reference: token_windows, and the hand-worked window formula [0, min(T-1, n+eps)]
    assert s["window"] == pytest.approx((SHIFT * (w.start[u] - 0.5), SHIFT * (w.end[u] + 0.5)))
    n, T = info["synth-0"]["frames"][u], info["synth-0"]["T"]
    assert w.end[u] == min(T - 1, n + eps)
    assert s["heard_until"] == pytest.approx(
        max(float(w.heard_until_s[u]), SHIFT * (w.end[u] + 0.5))
    )
    # every panel's band moved together
    for panel in app.view.panels.values():
        assert panel.band.window.right == pytest.approx(s["window"][1])


def test_slider_updates_margins_cut_mass_and_table(app, bundle):
    _, info = bundle
    times = info["synth-0"]["times"]
    app.select_word(2)
    before = app.analysis.summary()["mean_cut_mass"]
    app.set_lookahead(9)
    w = expected_windows(info["synth-0"], 9)
    # hand-worked margin: heard-until time of the word's last token minus its reference end
    last = app.analysis.words.last_token[2]
    want = float(w.heard_until_s[last]) - times[2][2]
    assert app.analysis.words.margin_s[2] == pytest.approx(want)
    assert f"{want * 1000:+.0f} ms" in app._status.value
    rows = app.table._grid.children
    assert any(f"{want * 1000:+.0f}" in getattr(c, "value", "") for c in rows)
    # a wider window cuts less attention (rows peak after their trigger)
    after = app.analysis.summary()["mean_cut_mass"]
    assert after < before
    # the cut mass matches a direct count over the bundle's raw attention rows
    att = np.load(open_bundle(app._bundle.path).path / "arrays" / "synth-0.npz")["attention"]
    mask = np.arange(info["synth-0"]["T"])[None, :] <= w.end[:, None]
    inside = (att * mask).sum(-1) / att.sum(-1)  # (L, H, U)
    assert after == pytest.approx(float(np.mean(1 - inside.mean(axis=(0, 1)))), rel=1e-5)


# -- word table --------------------------------------------------------------------


def test_clicking_a_word_selects_it(app, bundle):
    _, info = bundle
    buttons = app.table.buttons
    assert [b.description for b in buttons] == "call depot four now".split()
    buttons[1].click()
    # hand-worked: 'depot' is tokens 5..9 (c a l l | d e p o t)
    assert app.state.word == 1 and app.state.token == 9
    assert buttons[1].button_style == "info" and buttons[0].button_style == ""
    lanes = app.view.panels["lanes"]
    assert list(lanes.sources["tokens"].selected.indices) == [9]
    assert band(app)["trigger"] == pytest.approx(SHIFT * info["synth-0"]["frames"][9])


def test_table_lists_ops_and_diagnoses(app):
    jiwer = require("jiwer")
    text = " ".join(
        c.value for c in app.table._grid.children if hasattr(c, "value") and "<b>" not in c.value
    )
    # reference: jiwer counts one deletion for this pair
    assert jiwer.process_words("call depot four now", "call depot now").deletions == 1
    assert text.count(">deletion<") == 1
    assert app.analysis.diagnosis_of(2) is not None
    assert app.analysis.diagnosis_of(2).code in text


def test_tap_in_the_page_selects_the_token(app, bundle):
    """A tap on a token is synced back by jupyter_bokeh and selects it here."""
    sel = app.view.panels["lanes"].sources["tokens"].selected
    # the message jupyter_bokeh's page side sends for a changed model property
    content = {
        "event": "jsevent",
        "kind": "ModelChanged",
        "model": {"id": sel.id},
        "attr": "indices",
        "new": [6],
    }
    app._bokeh._sync_model(app._bokeh, content, [])
    assert app.state.token == 6 and app.state.word == 1
    assert app.controls["token"].value == 6


# -- floor, attention, audio -------------------------------------------------------


def test_floor_switches_weak_and_no_spike(app):
    app.set_lookahead(40)  # whole utterance audible: no cut-off
    app.controls["floor"].value = 0.1  # below the weak word's 0.2 peak
    assert app.analysis.diagnosis_of(2).code == "weak"
    app.controls["floor"].value = 0.3  # above it
    assert app.analysis.diagnosis_of(2).code == "no-spike"
    assert app._floor_line.location == pytest.approx(0.3)
    header = app.view.layout.select_one({"name": "header"}).text
    assert "no-spike" in header
    # the reference-word lane's label follows
    ref = app.view.panels["lanes"].sources["ref"].data
    assert ref["label"][2] == "four [no-spike]" and ref["label"][0] == "call"
    assert ref["diag"][2] == "[no-spike]" and ref["diag"][0] == ""


def test_scale_toggle_switches_the_posterior_axis(app, bundle):
    b, _ = bundle
    blank = np.exp(np.load(b.path / "arrays" / "synth-0.npz")["log_probs"][:, 0])
    app.set_floor(0.1)
    app.controls["scale"].value = "log"
    src = app.view.panels["posteriors"].sources["blank"]
    # reference: log10 of the dumped blank posterior, floored at 1e-4 (the views' floor)
    np.testing.assert_allclose(src.data["y"], np.log10(np.maximum(blank, 1e-4)), rtol=1e-5)
    assert app._floor_line.location == pytest.approx(-1.0)  # log10(0.1)
    app.set_scale("linear")
    np.testing.assert_allclose(
        app.view.panels["posteriors"].sources["blank"].data["y"], blank, rtol=1e-5
    )
    assert app._floor_line.location == pytest.approx(0.1)
    assert app.controls["scale"].value == "linear"


def test_attention_picker_shows_one_head(app, bundle):
    b, _ = bundle
    raw = np.load(b.path / "arrays" / "synth-0.npz")["attention"]
    labels = [v for _, v in app.controls["attention"].options]
    assert labels[0] == "mean" and "L1H0" in labels
    app.controls["attention"].value = "L1H0"
    img = app.view.panels["attention"].sources["image"].data["image"][0]
    np.testing.assert_allclose(np.asarray(img).reshape(raw.shape[2:]), raw[1, 0], rtol=1e-6)
    app.set_attention("mean")
    img = app.view.panels["attention"].sources["image"].data["image"][0]
    np.testing.assert_allclose(
        np.asarray(img).reshape(raw.shape[2:]), raw.mean(axis=(0, 1)), rtol=1e-5
    )


def test_hypothesis_rows_map_to_reference_words(bundle):
    b, info = bundle
    app = peekalign.peek(b, utt="synth-1", scan=False)
    # hand-worked: 'nine' is hypothesis word 1 (t r a m | n i n e): its last token is
    # attention row 8
    app.select_word(1)
    assert app._attention_row() == 8
    assert "attention row 8" in app._status.value


def test_audio_players_hold_the_word_and_what_was_heard(app, bundle):
    sf = require("soundfile")
    import io

    b, info = bundle
    y, sr = sf.read(str(b.path / "audio" / "synth-0.wav"), dtype="float32")
    app.set_lookahead(3)
    app.select_word(1)
    _, t0, t1 = info["synth-0"]["times"][1]
    # reference: soundfile reads back the WAV bytes of each player
    word, wsr = sf.read(io.BytesIO(app._word_audio.value), dtype="float32")
    assert wsr == sr
    a, z = math.floor(t0 * sr), math.ceil(t1 * sr)
    np.testing.assert_allclose(word, y[a:z], atol=1 / 32768)
    heard, _ = sf.read(io.BytesIO(app._hear_audio.value), dtype="float32")
    w = expected_windows(info["synth-0"], 3)
    h = float(w.heard_until_s[app.state.token])
    assert heard.shape[0] == min(math.ceil(h * sr), y.shape[0])
    np.testing.assert_allclose(heard, y[: heard.shape[0]], atol=1 / 32768)
    # a wider look-ahead lets the decoder hear more
    app.set_lookahead(6)
    longer, _ = sf.read(io.BytesIO(app._hear_audio.value), dtype="float32")
    assert longer.shape[0] == heard.shape[0] + 3 * round(SHIFT * sr)


def test_missing_audio_and_attention_hide_their_panels(tmp_path):
    make_bundle(tmp_path / "b", np.random.default_rng(7), audio=False, attention=False)
    app = peekalign.peek(tmp_path / "b", scan=False)
    assert app._audio_box.layout.display == "none"
    assert app.controls["attention"].disabled
    assert "No audio" in app._notes.value and "No decoder attention" in app._notes.value
    assert "attention" not in app.view.panels and "spectrogram" in app.view.panels
    assert app.audio_clips() == {}
    with pytest.raises(ParameterError, match="no attention"):
        app.set_attention("mean")
    app.set_lookahead(5)  # still works without them
    assert app.state.lookahead == 5


# -- picker, export ----------------------------------------------------------------


def test_picker_sorts_by_wer_deletions_and_margin_once_analysed(bundle):
    jiwer = require("jiwer")
    b, _ = bundle
    app = peekalign.peek(b, scan=True, sort="wer")
    ids = [v for _, v in app.controls["utt"].options]
    # reference: jiwer's WER per utterance, highest first (ties in manifest order)
    wers = {uid: jiwer.wer(ref, hyp) for uid, ref, hyp, _, _ in UTTS}
    assert ids == sorted(wers, key=lambda u: (-wers[u], [x[0] for x in UTTS].index(u)))
    app.controls["sort"].value = "margin"
    ids = [v for _, v in app.controls["utt"].options]
    margins = {u: app._metrics[u]["worst_margin_s"] for u in ids}
    assert [margins[u] for u in ids] == sorted(margins.values())
    app.controls["sort"].value = "manifest"
    assert [v for _, v in app.controls["utt"].options] == b.ids
    # picking an utterance shows it
    app.controls["utt"].value = "synth-2"
    assert app.state.utt == "synth-2" and app.view.vm.uid == "synth-2"
    assert app.state.word == 1  # 'at' was deleted


def test_picker_before_analysis_keeps_manifest_order(bundle):
    b, _ = bundle
    app = peekalign.peek(b, scan=False, sort="wer")
    ids = [v for _, v in app.controls["utt"].options]
    # only the shown utterance is analysed: it comes first, the rest in manifest order
    assert ids == ["synth-0", "synth-1", "synth-2"]
    assert "WER" in app.controls["utt"].options[0][0]
    assert "WER" not in app.controls["utt"].options[1][0]


def test_export_writes_the_standalone_page(app, tmp_path):
    app.set_lookahead(5)
    app.select_word(1)
    out = app.export(tmp_path / "v.html")
    text = out.read_text()
    assert "synth-0" in text and "Bokeh" in text
    # the page is built with the peek widget's look-ahead and token
    docs = text[text.index("docs_json") :]
    assert '"value":5' in docs.replace(" ", "") or "look-ahead 5" in docs
    with pytest.raises(Exception, match="exist"):
        app.export(tmp_path / "v.html")  # never overwrites unless asked
    app.export(tmp_path / "v.html", overwrite=True)
    with pytest.raises(ParameterError, match="'fmt' parameter of export"):
        app.export(tmp_path / "v.txt")
    # the export button does the same, reporting errors in the page
    app.controls["export_path"].value = str(tmp_path / "v.html")
    app.controls["export"].click()
    assert "exist" in app._export_status.value
    app.controls["export_path"].value = str(tmp_path / "w.html")
    app.controls["export"].click()
    assert "wrote" in app._export_status.value and (tmp_path / "w.html").is_file()


def test_state_is_plain_and_checked():
    from peekalign.widgets import PeekState

    s = PeekState("u")
    assert s.set(token=3, num_tokens=4).token == 3
    with pytest.raises(ParameterError, match=r"'token' parameter of peek .* \[-1, 3\]"):
        s.set(token=4, num_tokens=4)
    with pytest.raises(ParameterError, match="state field"):
        s.set(tokn=1)
    assert json.dumps(s.__dict__)  # plain values only


def test_a_broken_utterance_leaves_the_peek_usable(tmp_path):
    make_bundle(tmp_path / "b", np.random.default_rng(3), audio=False)
    (tmp_path / "b" / "arrays" / "synth-1.npz").unlink()
    app = peekalign.peek(tmp_path / "b", utt="synth-0", scan=False)
    app.controls["utt"].value = "synth-1"
    # the page says why, and keeps showing the utterance it had
    assert "cannot show synth-1" in app._notes.value and "synth-1.npz" in app._notes.value
    assert app.state.utt == "synth-0" and app.view.vm.uid == "synth-0"
    assert app.controls["utt"].value == "synth-0"
    app.controls["utt"].value = "synth-2"
    assert app.state.utt == "synth-2"


@pytest.mark.browser
def test_export_button_writes_png_and_svg(app, tmp_path, monkeypatch):
    require_chromium()
    isolate_home(monkeypatch, tmp_path / "env")  # Chromium's files stay out of the home
    PIL = require("PIL.Image")
    app.select_word(1)
    app.controls["export_format"].value = "png"
    app.controls["export_path"].value = str(tmp_path / "v.png")
    app.controls["export"].click()
    assert "wrote" in app._export_status.value, app._export_status.value
    # reference: Pillow reads the file back as a PNG of a plausible page size
    with PIL.open(tmp_path / "v.png") as im:
        assert im.format == "PNG" and im.width > 600 and im.height > 400
    out = app.export(tmp_path / "v.svg")
    text = out.read_text()
    assert text.lstrip().startswith("<svg") and "</svg>" in text
