"""The latency budget and the ``latency`` command."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from peekalign import ParameterError
from peekalign.cli import main
from peekalign.streaming import latency_budget

ARGS = ["latency", "--frame-shift-ms", "40", "--layers", "12", "--per-layer", "1"]


def table(text: str) -> dict[str, list[str]]:
    """Rows of the printed table keyed by part name."""
    rows = {}
    for line in text.splitlines()[1:]:
        for name in ("front end", "algorithmic look-ahead", "encoder", "decoder"):
            if line.startswith(name):
                rows[name] = line[len(name) :].split()
    return rows


def test_latency_command_table(capsys):
    assert main(ARGS + ["--lookahead", "18"]) == 0
    rows = table(capsys.readouterr().out)
    # reference: common practice, by hand - 12 layers x 1 frame x 40 ms = 480 ms of
    # encoder look-ahead, 18 frames x 40 ms = 720 ms of decoder look-ahead, 1200 ms total
    assert rows["encoder"] == ["12", "480"]
    assert rows["decoder"] == ["18", "720"]
    assert rows["front end"] == ["0"]
    assert rows["algorithmic look-ahead"] == ["1200"]


def test_latency_command_json(capsys):
    assert main(ARGS + ["--lookahead", "18", "--front-end-ms", "25", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert {"encoder_ms", "decoder_ms", "front_end_ms", "total_ms"} <= set(out)
    # reference: by hand, as above, plus 25 ms of front end
    assert (out["encoder_ms"], out["decoder_ms"], out["front_end_ms"], out["total_ms"]) == (
        480.0,
        720.0,
        25.0,
        1225.0,
    )


def test_two_layers_two_frames_each(capsys):
    # reference: common practice - 2 layers with 2 frames of look-ahead each see 4
    # frames ahead (each layer adds its own look-ahead to the one below)
    args = ["latency", "--frame-shift-ms", "40", "--layers", "2", "--per-layer", "2", "--json"]
    assert main(args) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["encoder_frames"] == 4 and out["encoder_ms"] == 160.0
    b = latency_budget(frame_shift_ms=40, layers=2, per_layer=2)
    assert b.encoder_frames == 4


def test_latency_as_a_program():
    # the installed entry point (python -m peekalign) prints the same JSON
    out = subprocess.run(
        [sys.executable, "-m", "peekalign", *ARGS, "--lookahead", "18", "--json"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    assert json.loads(out)["total_ms"] == 1200.0


def test_latency_linear_in_lookahead():
    # reference: the budget formula (encoder + lookahead * shift + front end), by hand
    totals = [
        latency_budget(
            frame_shift_ms=30, layers=6, per_layer=2, lookahead=e, front_end_ms=15
        ).total_ms
        for e in range(10)
    ]
    assert totals == [6 * 2 * 30 + e * 30 + 15 for e in range(10)]


def test_latency_bad_values(capsys):
    assert main(["latency", "--frame-shift-ms", "40", "--lookahead", "-3"]) == 2
    err = capsys.readouterr().err
    assert (
        "The 'lookahead' parameter of algorithmic_lookahead must be an int in the range [0, inf)"
        in err
    )
    assert "Got -3 instead." in err
    with pytest.raises(ParameterError, match="'frame_shift_ms'"):
        latency_budget(frame_shift_ms=0)


def test_latency_of_a_bundle_is_the_views_and_the_sweeps(capsys, tmp_path):
    # reference: DEVELOPERS.md, "Look-ahead, right context and reach" - the algorithmic
    # look-ahead is the heard-until time of a token minus the centre of its trigger frame, with
    # the front end bundle.json declares; by hand for the demo bundle: 4 layers x 1
    # frame + 6 frames of decoder look-ahead at 40 ms = 400 ms, plus the front end's
    # right context as the bundle's clock derives it (FrameClock.from_front_end)
    import numpy as np

    from peekalign import analyze, open_bundle
    from peekalign.streaming import sweep

    b = open_bundle("fixtures/demo/streaming")
    assert main(["latency", str(b.path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    rc_ms = b.clock.right_context_s * 1000
    assert rc_ms > 0  # the demo declares its front end
    assert out["encoder_frames"] == 4 and out["decoder_frames"] == 6
    assert out["front_end_ms"] == pytest.approx(rc_ms)
    assert out["total_ms"] == pytest.approx(10 * 40 + rc_ms)
    # the view's heard-until time for the same setting
    utt = b[b.ids[0]]
    a = analyze(utt, soft=False)
    w = a.windows
    ahead_ms = (w.heard_until_s - utt.clock.time(w.trigger)) * 1000
    np.testing.assert_allclose(ahead_ms, out["total_ms"], rtol=0, atol=1e-9)
    # the sweep's latency at the same look-ahead (on main it left the front end out)
    s = sweep([utt], max_lookahead=8)
    assert s.rows[6].latency_ms == pytest.approx(out["total_ms"], abs=1e-9)
    assert s.front_end_ms == pytest.approx(rc_ms)
    # and a CLI option still overrides the bundle's value
    assert main(["latency", str(b.path), "--front-end-ms", "0", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["total_ms"] == pytest.approx(400.0)


def test_latency_needs_a_bundle_or_a_frame_shift(capsys):
    assert main(["latency", "--lookahead", "3"]) == 2
    assert "give a BUNDLE or --frame-shift-ms" in capsys.readouterr().err


def test_latency_of_a_chunked_encoder_is_a_range(capsys, tmp_path):
    # reference: hand-worked (DEVELOPERS.md, "Bundle format v1": frame n of a chunk of C
    # sees C - 1 - (n mod C) frames ahead): C = 4, decoder look-ahead 2, 40 ms frames,
    # 25 ms front end -> the encoder part is 0..3 frames = 0..120 ms, in all 105..225 ms,
    # 165 ms on average over a chunk's four frames
    args = ["latency", "--frame-shift-ms", "40", "--lookahead", "2", "--front-end-ms", "25"]
    assert main(args + ["--chunk", "4"]) == 0
    out = capsys.readouterr().out
    rows = {ln.split("  ")[0]: ln.split() for ln in out.splitlines()[1:]}
    assert rows["encoder (chunks of 4)"][-2:] == ["0-3", "0-120"]
    assert rows["algorithmic look-ahead"][-1] == "105-225"
    assert rows["... mean over a chunk's frames"][-1] == "165"
    assert main(args + ["--chunk", "4", "--json"]) == 0
    js = json.loads(capsys.readouterr().out)
    assert (js["least"]["total_ms"], js["most"]["total_ms"], js["mean_total_ms"]) == (
        105.0, 225.0, 165.0)  # fmt: skip
    # a chunk of 1 is a plain causal encoder: the same figure as without --chunk
    assert main(args + ["--chunk", "1", "--json"]) == 0
    one = json.loads(capsys.readouterr().out)
    assert main(args + ["--json"]) == 0
    assert one["least"] == one["most"] == json.loads(capsys.readouterr().out)
    # a bundle declaring encoder.chunk_size is read as such
    from peekalign import BundleWriter

    with BundleWriter(tmp_path / "b", vocab=["-", "|", "a"], frame_shift_s=0.04,
                      word_boundary={"kind": "separator", "symbol": "|"},
                      encoder={"chunk_size": 4}, decoder={"lookahead": 2}) as w:  # fmt: skip
        w.add("u1", np.log(np.full((8, 3), 1 / 3)), ref="a")
    assert main(["latency", str(tmp_path / "b"), "--json"]) == 0
    js = json.loads(capsys.readouterr().out)
    assert js["chunk"] == 4 and (js["least"]["total_ms"], js["most"]["total_ms"]) == (
        80.0, 200.0)  # fmt: skip
    assert main(args + ["--chunk", "0"]) == 2
    assert "'chunk' parameter of latency" in capsys.readouterr().err
