"""Measured encoder look-ahead (peekalign.encoder_probe) on toy torch encoders whose
leaks are worked out by hand."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import require

from peekalign.encoder_probe import declared_lookahead, measure_encoder_lookahead

D = 8


def _torch():
    require("torch")
    import torch

    torch.manual_seed(0)
    return torch


def _layer_cls(torch):
    class Layer(torch.nn.Module):
        """Self-attention where query i sees keys j <= i + ahead (chunk: its whole chunk
        and the past), then an optional depthwise conv along time of ``kernel`` with
        symmetric padding (non-causal: (kernel - 1) / 2 frames ahead)."""

        def __init__(self, ahead=1, kernel=None, chunk=None):
            super().__init__()
            self.ahead, self.chunk = ahead, chunk
            self.att = torch.nn.MultiheadAttention(D, 2, batch_first=True)
            self.conv = (
                torch.nn.Conv1d(D, D, kernel, padding=kernel // 2, groups=D) if kernel else None
            )

        def forward(self, x):
            T = x.shape[1]
            i = torch.arange(T)
            if self.chunk:
                blocked = (i[None, :] // self.chunk) > (i[:, None] // self.chunk)
            else:
                blocked = i[None, :] > i[:, None] + self.ahead
            y = x + self.att(x, x, x, attn_mask=blocked, need_weights=False)[0]
            if self.conv is not None:
                y = y + self.conv(y.transpose(1, 2)).transpose(1, 2)
            return y

    return Layer


def _encoder(torch, layers):
    enc = torch.nn.Sequential(*layers).eval()
    return enc, list(enc)


def test_noncausal_depthwise_conv_adds_seven_per_layer():
    torch = _torch()
    Layer = _layer_cls(torch)
    enc, layers = _encoder(torch, [Layer(ahead=1, kernel=15) for _ in range(3)])
    x = np.random.default_rng(0).normal(size=(70, D))
    m = measure_encoder_lookahead(enc, x, declared=(3, 1), layers=layers)
    # reference: hand-worked. each layer: attention 1 ahead, then a centred kernel-15
    # conv 7 ahead of that: 8 per layer against the declared 1, 24 after 3 layers;
    # frames 45-69 reach the last input frame (69 = 45 + 24): censored
    ok = ~m.censored
    assert ok[:40].all()
    assert set(m.measured[ok].tolist()) == {24}
    assert set(m.per_layer_increment[:, :40].ravel().tolist()) == {8}
    # in plain words: every frame sees 7 frames more than declared in every layer; the
    # frames whose look-ahead runs past the input's end are one line of lower bounds
    assert m.leaks() == [
        "frames 0-44: each sees 7 frames more than declared in every layer (8 per layer "
        "where 1 is declared), 21 more in all: 24 frames ahead, 3 declared",
        "frames 45-69: too near the end of the input to measure in full (at least 0-24 "
        "frames ahead, 3 declared)",
    ]


def test_off_by_one_mask_adds_one_per_layer():
    torch = _torch()
    Layer = _layer_cls(torch)
    enc, layers = _encoder(torch, [Layer(ahead=2) for _ in range(4)])  # declared 1
    m = measure_encoder_lookahead(enc, np.random.default_rng(1).normal(size=(40, D)),
                                  declared=(4, 1), layers=layers)  # fmt: skip
    ok = ~m.censored
    # reference: hand-worked. mask j <= i + 2 where i + 1 was declared: 2 per layer, 8 in all
    assert set(m.measured[ok].tolist()) == {8} and set(m.excess[ok].tolist()) == {4}
    assert m.leaks()[0] == (
        "frames 0-30: each sees 1 frame more than declared in every layer (2 per layer where "
        "1 is declared), 4 more in all: 8 frames ahead, 4 declared"
    )


def test_clean_encoder_unchanged_beyond_declared_lookahead():
    torch = _torch()
    Layer = _layer_cls(torch)
    enc, layers = _encoder(torch, [Layer(ahead=1) for _ in range(3)])
    rng = np.random.default_rng(2)
    x = rng.normal(size=(50, D)).astype(np.float32)
    y = x.copy()
    y[20:] = rng.normal(size=(30, D)) * 5  # only the future past frame 19 changes
    with torch.no_grad():
        a, b = enc(torch.tensor(x)[None])[0], enc(torch.tensor(y)[None])[0]
    # reference: hand-worked. declared 3 layers x 1: frames up to 16 see inputs <= 19
    assert float((a[:17] - b[:17]).abs().max()) <= 1e-6
    assert float((a[17] - b[17]).abs().max()) > 1e-5  # and frame 17 does see frame 20
    m = measure_encoder_lookahead(enc, x, declared=(3, 1), layers=layers)
    assert (m.excess == 0).all() and m.leaks()[0] == "frames 0-45: as declared (3 frames ahead)"


@pytest.mark.parametrize("C", [4, 5])
def test_chunked_encoder_shows_rest_of_chunk(C):
    torch = _torch()
    Layer = _layer_cls(torch)
    enc, _ = _encoder(torch, [Layer(chunk=C) for _ in range(2)])
    T = 6 * C + 2  # a partial last chunk
    m = measure_encoder_lookahead(enc, np.random.default_rng(3).normal(size=(T, D)),
                                  declared={"chunk": C})  # fmt: skip
    n = np.arange(T)
    full = n < (T // C) * C
    # reference: hand-worked. frame n sees the rest of its chunk, C - 1 - (n mod C)
    assert m.measured[full].tolist() == (C - 1 - n % C)[full].tolist()
    assert (m.excess[full] == 0).all()
    assert m.declared.tolist() == declared_lookahead(T, chunk=C).tolist()
    # the declared look-ahead varies along a run of frames as declared: its range
    assert m.leaks()[0] == f"frames 0-{6 * C - 1}: as declared (0-{C - 1} frames ahead)"


def test_subsampling_and_front_end_in_encoder_frames():
    torch = _torch()
    # 4x subsampling by two unpadded (3, 2) convs (common practice: right context 6
    # feature frames, DEVELOPERS.md, "Front-end frame arithmetic"), then nothing else
    conv = torch.nn.Sequential(torch.nn.Conv1d(D, D, 3, 2), torch.nn.Conv1d(D, D, 3, 2)).eval()

    def enc(x):
        return conv(x.transpose(1, 2)).transpose(1, 2)

    m = measure_encoder_lookahead(enc, np.random.default_rng(4).normal(size=(60, D)),
                                  declared=0, subsampling=4, front_end_frames=6)  # fmt: skip
    # reference: hand-worked. encoder frame i reads features [4i, 4i + 6]: 0 ahead. The
    # cuts start every 4 frames at 7 + 4m, so the reach is the grid point at or below
    # 4i + 6: 3, 7, 11 (ceil((3 - 6) / 4) = 0 frames ahead)
    assert set(m.measured.tolist()) == {0} and m.reach.tolist()[:3] == [3, 7, 11]


def test_streamed_dump_parts_where_the_encoder_leaks():
    torch = _torch()
    from peekalign.dumpdiff import frame_diff

    Layer = _layer_cls(torch)
    head = torch.nn.Linear(D, 5)

    def target(layers, declared):
        enc = torch.nn.Sequential(*layers).eval()
        return {
            "encoder": enc, "features": lambda utt: x, "declared": declared,
            "log_probs": lambda out: torch.log_softmax(head(out), -1).detach().numpy(),
        }  # fmt: skip

    from peekalign.encoder_probe import streamed_log_probs

    x = np.random.default_rng(5).normal(size=(30, D)).astype(np.float32)
    for layers, declared, part in (
        ([Layer(ahead=1) for _ in range(2)], (2, 1), -1),  # clean: never parts
        ([Layer(ahead=2) for _ in range(2)], (2, 1), 0),  # off by one: from frame 0
    ):
        t = target(layers, declared)
        with torch.no_grad():
            offline = t["log_probs"](t["encoder"](torch.tensor(x)[None])[0])
        # a KL tolerance above float rounding (1e-10): the leak moves frames by ~1e-6
        d = frame_diff(offline, streamed_log_probs(t, None), kl_tol=1e-10)
        # reference: hand-worked. the streamed frame n sees input up to n + 2 only; the
        # leaking encoder's offline frame n sees n + 4: every frame but the last few
        # differs (those see the same, the end of the input)
        assert d.part_frame == part
        if part < 0:
            assert float(d.kl.max()) <= 1e-10
        else:
            assert (d.kl[:26] > 1e-10).all() and float(d.kl[-2:].max()) <= 1e-10


def test_leak_per_layer_names_the_layers():
    torch = _torch()
    Layer = _layer_cls(torch)
    enc, layers = _encoder(torch, [Layer(ahead=1, kernel=5), Layer(ahead=1), Layer(ahead=3)])
    m = measure_encoder_lookahead(enc, np.random.default_rng(1).normal(size=(40, D)),
                                  declared=(3, 1), layers=layers)  # fmt: skip
    # reference: hand-worked. layer 1: a centred kernel-5 conv, 2 frames more; layer 3:
    # its mask lets it see 3 ahead, 2 more; layer 2 as declared: 7 against 3
    assert m.leaks()[0] == (
        "frames 0-31: each sees 4 frames more than declared (layer 1: 2 more, layer 3: "
        "2 more): 7 frames ahead, 3 declared"
    )


def test_probe_command_says_the_leak_in_plain_words(tmp_path, capsys):
    _torch()
    from test_probe import _bundle

    from peekalign.cli import main

    b = _bundle(tmp_path / "b")
    out = tmp_path / "out"
    code = main(["probe", str(b), "--decoder", "redecode_helpers:late_echo", "--encoder",
                 "encoder_helpers:leaky_conv", "--workers", "0", "--out", str(out)])  # fmt: skip
    text = capsys.readouterr().out
    assert code == 0, text
    # reference: hand-worked (test_noncausal_depthwise_conv_adds_seven_per_layer): the
    # printed lines and probe.html say it as the comparison does
    line = (
        "frames 0-44: each sees 7 frames more than declared in every layer (8 per layer "
        "where 1 is declared), 21 more in all: 24 frames ahead, 3 declared"
    )
    assert f"\n  {line}\n" in text
    html = (out / "probe.html").read_text(encoding="utf-8")
    assert f"<li>{line}</li>" in html
