"""The views' own colours ("tramline" palette): one meaning per colour, every colour in a
legend or a colour bar.

Hues were chosen so that the colours which share a panel stay apart under the common
colour-vision deficiencies (checked in ``tests/test_views.py`` with a published
simulation); where two colours still come close, a marker shape, a dash or a hatch
carries the difference as well.
"""

from __future__ import annotations

import numpy as np

__all__ = ["COLORS", "SEQUENTIAL", "sequential_ramp", "ERROR_OP_COLORS", "ERROR_OP_HATCH"]

#: Role -> colour. Every view draws a role with this colour and nothing else with it.
COLORS: dict[str, str] = {
    "ink": "#1b2430",  # text, trigger line, right-context hatch
    "paper": "#ffffff",
    "grid": "#e6e8eb",
    "blank": "#8b939c",  # CTC blank posterior
    "reference": "#1f5fa8",  # reference tokens' posteriors, spans in the lanes
    "top_tokens": "#b9a3d6",  # other most likely tokens per frame
    "spike": "#5a2d82",  # greedy CTC spikes
    "selected": "#f08a24",  # the selected token, everywhere
    "window": "#3a8fd9",  # decoder window of the selected token
    "span": "#dfe4ea",  # neutral span fill (forced words/tokens)
    "span_line": "#98a2ad",
    # error operations of the hypothesis
    "correct": "#2f9a7f",
    "substitution": "#e8c547",
    "insertion": "#8d63c2",
    "deletion": "#b31b34",
}

ERROR_OP_COLORS: dict[str, str] = {
    "correct": COLORS["correct"],
    "substitution": COLORS["substitution"],
    "insertion": COLORS["insertion"],
    "deletion": COLORS["deletion"],
}

#: Hatches repeat the error operation so it survives grey-scale printing.
ERROR_OP_HATCH: dict[str, str | None] = {
    "correct": None,
    "substitution": None,
    "insertion": "/",
    "deletion": "x",
}

#: Anchors of the sequential ramp used by every image (spectrogram, occupancy,
#: attention): white paper to ink, lightness strictly falling, a slight cool tint so
#: that the orange and blue overlays stand out.
SEQUENTIAL: tuple[str, ...] = ("#ffffff", "#d5dde6", "#8c9db3", "#445a78", "#1b2430")


def _hex_to_rgb(c: str) -> np.ndarray:
    c = c.lstrip("#")
    return np.array([int(c[i : i + 2], 16) for i in (0, 2, 4)], dtype=np.float64)


def sequential_ramp(n: int = 256, *, anchors: tuple[str, ...] = SEQUENTIAL) -> list[str]:
    """``n`` colours interpolated (in linear RGB) through ``anchors``.

    Examples
    --------
    >>> ramp = sequential_ramp(5)
    >>> ramp[0], ramp[-1]
    ('#ffffff', '#1b2430')
    """
    rgb = np.stack([_hex_to_rgb(a) for a in anchors]) / 255.0
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    pos = np.linspace(0.0, 1.0, len(anchors))
    q = np.linspace(0.0, 1.0, n)
    out = np.stack([np.interp(q, pos, lin[:, k]) for k in range(3)], axis=1)
    srgb = np.where(out <= 0.0031308, out * 12.92, 1.055 * out ** (1 / 2.4) - 0.055)
    ints = np.clip(np.round(srgb * 255), 0, 255).astype(int)
    return ["#{:02x}{:02x}{:02x}".format(*row) for row in ints]
