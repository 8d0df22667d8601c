"""The demo model's front end and tokens (numpy only).

80-band log-mel, 25 ms Hann window, 10 ms hop, no centring (Kaldi-style framing), then
two (kernel 3, stride 2) convolutions inside the model: encoder frames of 40 ms. Tokens
are characters with ``|`` between words; the attention decoder adds one start/end id
(``SOS_EOS``) after the CTC vocabulary. ``fixtures/make/README.md`` derives the clock.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "BLANK",
    "FRAME_OFFSET_S",
    "FRAME_SHIFT_S",
    "HOP",
    "N_FFT",
    "N_MELS",
    "RIGHT_CONTEXT",
    "SEP",
    "SOS_EOS",
    "SR",
    "SUBSAMPLING",
    "TOKEN_ID",
    "VOCAB",
    "WIN",
    "ids_to_text",
    "logmel",
    "n_encoder_frames",
    "n_feature_frames",
    "text_to_ids",
]

SR = 16000
HOP = 160  # 10 ms
WIN = 400  # 25 ms
N_FFT = 512
N_MELS = 80
SUBSAMPLING = 4  # two (kernel 3, stride 2) convolutions, no padding
RIGHT_CONTEXT = 6  # feature frames seen right of the first one by an encoder frame
FRAME_SHIFT_S = HOP * SUBSAMPLING / SR  # 0.04
# Centre of encoder frame i: it covers feature frames [4i, 4i + 6]; feature frame j
# (no centring, "snip edges") spans samples [j*HOP, j*HOP + WIN), centre j*hop + win/2.
# So t(i) = 4i*hop + (RIGHT_CONTEXT/2)*hop + win/2 = 0.04 i + 0.0425 s.
FRAME_OFFSET_S = (RIGHT_CONTEXT / 2) * HOP / SR + (WIN / 2) / SR  # 0.0425

# CTC vocabulary: blank, word separator, apostrophe, a-z. The attention decoder adds
# one more id (SOS_EOS, = len(VOCAB)) that is not part of the CTC vocabulary.
BLANK = 0
SEP = "|"
VOCAB = ["<blank>", SEP, "'"] + [chr(c) for c in range(ord("a"), ord("z") + 1)]
SOS_EOS = len(VOCAB)
TOKEN_ID = {t: i for i, t in enumerate(VOCAB)}


def text_to_ids(text: str) -> list[int]:
    """Characters of each word with ``|`` between words (none leading or trailing).

    Examples
    --------
    >>> text_to_ids("car one")
    [5, 3, 20, 1, 17, 16, 7]
    """
    ids: list[int] = []
    for k, word in enumerate(text.split()):
        if k:
            ids.append(TOKEN_ID[SEP])
        ids.extend(TOKEN_ID[c] for c in word)
    return ids


def ids_to_text(ids) -> str:
    """Inverse of :func:`text_to_ids`; empty words (doubled separators) vanish.

    Examples
    --------
    >>> ids_to_text([5, 3, 20, 1, 1, 17, 16, 7])
    'car one'
    """
    chars = "".join(SEP if i == TOKEN_ID[SEP] else VOCAB[i] for i in ids if 0 < i < len(VOCAB))
    return " ".join(w for w in chars.split(SEP) if w)


def n_feature_frames(n_samples: int) -> int:
    """Log-mel frames from ``n_samples`` without centring: 1 + (N - win) // hop.

    Examples
    --------
    >>> n_feature_frames(16000)
    98
    """
    return 1 + (n_samples - WIN) // HOP if n_samples >= WIN else 0


def n_encoder_frames(n_feat: int) -> int:
    """Encoder frames after two (3, 2) convolutions without padding.

    Examples
    --------
    >>> n_encoder_frames(98)
    23
    """
    return max(0, ((n_feat - 1) // 2 - 1) // 2)


def logmel(audio: np.ndarray) -> np.ndarray:
    """(T, 80) float32 log-mel features: 25 ms Hann window, 10 ms hop, no centring.

    Frame ``j`` is samples ``[j*HOP, j*HOP + WIN)``, zero-padded to ``N_FFT`` at the end
    (Kaldi-style framing), so its centre is at ``j*HOP + WIN/2``.

    Examples
    --------
    >>> logmel(np.zeros(16000, dtype=np.float32)).shape
    (98, 80)
    """
    import librosa

    audio = np.asarray(audio, dtype=np.float32)
    n = n_feature_frames(len(audio))
    frames = np.lib.stride_tricks.sliding_window_view(audio, WIN)[::HOP][:n]
    spec = np.abs(np.fft.rfft(frames * np.hanning(WIN + 1)[:-1], n=N_FFT, axis=1)) ** 2
    fb = librosa.filters.mel(sr=SR, n_fft=N_FFT, n_mels=N_MELS)
    return np.log(spec @ fb.T + 1e-6).astype(np.float32)
