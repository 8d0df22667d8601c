"""Toy torch encoders for ``peekalign probe --encoder`` in the tests (never part of the
package): their leaks are worked out by hand in tests/test_encoder_probe.py."""

from __future__ import annotations

import numpy as np


def leaky_conv(bundle):
    """Factory for ``--encoder encoder_helpers:leaky_conv``: 3 layers declared 1 frame
    ahead each, whose centred kernel-15 convolution sees 7 frames more in every layer;
    the input is 70 seeded frames whatever the utterance."""
    import torch
    from test_encoder_probe import D, _layer_cls

    torch.manual_seed(0)
    Layer = _layer_cls(torch)
    enc = torch.nn.Sequential(*[Layer(ahead=1, kernel=15) for _ in range(3)]).eval()
    x = np.random.default_rng(0).normal(size=(70, D))
    return {"encoder": enc, "features": lambda utt: x, "layers": list(enc), "declared": (3, 1)}
