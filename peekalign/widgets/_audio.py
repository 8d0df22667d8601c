"""Audio clips for the peek widget: a word, and what the decoder could hear."""

from __future__ import annotations

import io
import math

import numpy as np

__all__ = ["clip", "wav_bytes"]


def clip(y: np.ndarray, sr: int, start_s: float, end_s: float) -> np.ndarray:
    """Samples of ``y`` from ``start_s`` to ``end_s`` (clipped to the signal).

    Sample ``i`` lies at ``i / sr`` s; the clip holds samples ``floor(start_s * sr)``
    up to, not including, ``ceil(end_s * sr)``.

    Examples
    --------
    >>> clip(np.arange(10.0), 10, 0.2, 0.55).tolist()
    [2.0, 3.0, 4.0, 5.0]
    """
    n = y.shape[0]
    a = min(max(0, math.floor(start_s * sr)), n)
    b = min(max(a, math.ceil(end_s * sr)), n)
    return y[a:b]


def wav_bytes(y: np.ndarray, sr: int) -> bytes:
    """A 16-bit PCM WAV file of ``y`` (float in [-1, 1]) in memory."""
    import soundfile as sf

    buf = io.BytesIO()
    sf.write(
        buf, np.clip(np.asarray(y, np.float32), -1.0, 1.0), int(sr), format="WAV", subtype="PCM_16"
    )
    return buf.getvalue()
