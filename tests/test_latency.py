"""The latency budget and the ``latency`` command."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from peekalign import ParameterError
from peekalign.cli import main
from peekalign.streaming import latency_budget

ARGS = ["latency", "--frame-shift-ms", "40", "--layers", "12", "--per-layer", "1"]


def table(text: str) -> dict[str, list[str]]:
    """Rows of the printed table keyed by part name."""
    rows = {}
    for line in text.splitlines()[1:]:
        if line.startswith("front end"):
            rows["front end"] = line[len("front end") :].split()
        else:
            name, *rest = line.split()
            rows[name] = rest
    return rows


def test_latency_command_table(capsys):
    assert main(ARGS + ["--lookahead", "18"]) == 0
    rows = table(capsys.readouterr().out)
    # reference: common practice, by hand - 12 layers x 1 frame x 40 ms = 480 ms of
    # encoder look-ahead, 18 frames x 40 ms = 720 ms of decoder look-ahead, 1200 ms total
    assert rows["encoder"] == ["12", "480"]
    assert rows["decoder"] == ["18", "720"]
    assert rows["front end"] == ["0"]
    assert rows["total"] == ["1200"]


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
        "The 'lookahead' parameter of latency_budget must be an int in the range [0, inf)" in err
    )
    assert "Got -3 instead." in err
    with pytest.raises(ParameterError, match="'frame_shift_ms'"):
        latency_budget(frame_shift_ms=0)
