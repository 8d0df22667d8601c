"""The frame clock: one conversion between encoder frames and seconds per bundle."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .exceptions import ParameterError

__all__ = ["FrameClock", "FRONT_ENDS", "declared_lookahead", "encoder_frames", "kaldi_frames"]

# Common convolutional front ends without padding: (kernel, stride) per layer.
# Right context (feature frames) follows from the kernels: sum over layers of
# (kernel - 1) * product of the strides before it (common practice, worked by hand:
# 4x -> 2 + 2*2 = 6, 6x -> 2 + 4*2 = 10, 8x -> 2 + 4 + 8 = 14).
FRONT_ENDS: dict[int, tuple[tuple[int, int], ...]] = {
    4: ((3, 2), (3, 2)),
    6: ((3, 2), (5, 3)),
    8: ((3, 2), (3, 2), (3, 2)),
}


def _check_subsampling(subsampling: int) -> tuple[tuple[int, int], ...]:
    if subsampling not in FRONT_ENDS:
        raise ParameterError(
            f"The 'subsampling' parameter must be one of {sorted(FRONT_ENDS)}. "
            f"Got {subsampling!r} instead; for another front end pass frame_shift_s, "
            "frame_offset_s and right_context_s to FrameClock yourself."
        )
    return FRONT_ENDS[subsampling]


def encoder_frames(n_features: int, *, subsampling: int = 4, padded: bool = False) -> int:
    """Number of encoder frames a conv front end makes from ``n_features`` frames.

    Parameters
    ----------
    n_features : int
        Feature frames in.
    subsampling : {4, 6, 8}
        Total stride of the front end.
    padded : bool
        Padded convolutions give ``ceil(T / stride)`` per layer.

    Returns
    -------
    int

    Examples
    --------
    >>> encoder_frames(100, subsampling=4)
    24
    """
    t = int(n_features)
    for kernel, stride in _check_subsampling(subsampling):
        t = -(-t // stride) if padded else (t - kernel) // stride + 1
    return max(t, 0)


def kaldi_frames(n_samples: int, *, win: int = 400, hop: int = 160) -> int:
    """Frames of Kaldi-style features with ``snip_edges=true``: ``1 + (N - win) // hop``.

    Examples
    --------
    >>> kaldi_frames(16000)
    98
    """
    if n_samples < win:
        return 0
    return 1 + (int(n_samples) - win) // hop


def declared_lookahead(
    num_frames: int,
    *,
    layers: int = 0,
    per_layer: int = 0,
    chunk: int | None = None,
) -> np.ndarray:
    """Declared encoder look-ahead of every encoder frame, in frames.

    ``layers * per_layer`` for time-restricted layers; with ``chunk`` C, frame ``n``
    sees the rest of its chunk, ``C - 1 - (n mod C)``, plus ``layers * per_layer``
    (DEVELOPERS.md, "Measured encoder look-ahead"). A bundle declares the chunk
    as ``encoder.chunk_size``.

    Examples
    --------
    >>> declared_lookahead(6, layers=2, per_layer=1).tolist()
    [2, 2, 2, 2, 2, 2]
    >>> declared_lookahead(6, chunk=4).tolist()
    [3, 2, 1, 0, 3, 2]
    """
    for name, v, lo in (
        ("num_frames", num_frames, 0),
        ("layers", layers, 0),
        ("per_layer", per_layer, 0),
    ):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
            raise ParameterError(
                f"The '{name}' parameter of declared_lookahead must be an int >= {lo}. "
                f"Got {v!r} instead."
            )
    n = np.arange(int(num_frames), dtype=np.int64)
    out = np.full(n.size, int(layers) * int(per_layer), np.int64)
    if chunk is not None:
        if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
            raise ParameterError(
                f"The 'chunk' parameter of declared_lookahead must be an int >= 1 or None. "
                f"Got {chunk!r} instead."
            )
        out += int(chunk) - 1 - n % int(chunk)
    return out


@dataclass(frozen=True)
class FrameClock:
    """Encoder frame index <-> time in seconds.

    ``time(i) = frame_offset_s + i * frame_shift_s`` is the centre of frame ``i``.

    Parameters
    ----------
    frame_shift_s : float
        Seconds between encoder frames (feature hop times subsampling).
    frame_offset_s : float
        Time of the centre of frame 0.
    right_context_s : float
        How far past a frame's centre the front end reads input (its own look-ahead);
        part of the latency budget.

    Examples
    --------
    >>> clock = FrameClock(0.04)
    >>> float(clock.time(10))
    0.4
    >>> clock.frame(0.41)
    10
    """

    frame_shift_s: float = 0.04
    frame_offset_s: float = 0.0
    right_context_s: float = 0.0

    def __post_init__(self) -> None:
        if not (np.isfinite(self.frame_shift_s) and self.frame_shift_s > 0):
            raise ParameterError(
                "The 'frame_shift_s' parameter of FrameClock must be a float in the range "
                f"(0, inf). Got {self.frame_shift_s!r} instead."
            )
        if not np.isfinite(self.frame_offset_s):
            raise ParameterError(
                f"The 'frame_offset_s' parameter of FrameClock must be finite. "
                f"Got {self.frame_offset_s!r} instead."
            )
        if not (np.isfinite(self.right_context_s) and self.right_context_s >= 0):
            raise ParameterError(
                "The 'right_context_s' parameter of FrameClock must be a float in the range "
                f"[0, inf). Got {self.right_context_s!r} instead."
            )

    @classmethod
    def from_front_end(
        cls, *, hop_s: float = 0.01, win_s: float = 0.025, subsampling: int = 4
    ) -> FrameClock:
        """Clock of a common unpadded conv front end over features with ``hop_s``.

        Encoder frame ``i`` covers feature frames ``[i*s, i*s + right_context]``; its
        centre is put at the centre of that span, and the right context reaches to the
        end of the last feature window.

        Examples
        --------
        >>> c = FrameClock.from_front_end(subsampling=4)
        >>> round(c.frame_shift_s, 3), round(c.frame_offset_s, 4), round(c.right_context_s, 4)
        (0.04, 0.0425, 0.0425)
        """
        layers = _check_subsampling(subsampling)
        rc = 0
        stride = 1
        for kernel, s in layers:
            rc += (kernel - 1) * stride
            stride *= s
        # feature frame j spans [j*hop, j*hop + win]; encoder frame 0 spans features 0..rc
        start = 0.0
        end = rc * hop_s + win_s
        centre = (start + end) / 2
        return cls(
            frame_shift_s=hop_s * subsampling,
            frame_offset_s=centre,
            right_context_s=end - centre,
        )

    def time(self, frames):
        """Centre time(s) in seconds of encoder frame(s) ``frames``."""
        return self.frame_offset_s + np.asarray(frames, dtype=np.float64) * self.frame_shift_s

    def start(self, frames):
        """Start time(s) of the frame(s): centre minus half a shift."""
        return self.time(frames) - self.frame_shift_s / 2

    def end(self, frames):
        """End time(s) of the frame(s): centre plus half a shift."""
        return self.time(frames) + self.frame_shift_s / 2

    def frame(self, seconds: float) -> int:
        """Nearest frame index to time ``seconds`` (may be negative or past the end)."""
        return int(np.floor((seconds - self.frame_offset_s) / self.frame_shift_s + 0.5))

    def frames(self, seconds) -> np.ndarray:
        """Vectorised :meth:`frame`."""
        s = np.asarray(seconds, dtype=np.float64)
        return np.floor((s - self.frame_offset_s) / self.frame_shift_s + 0.5).astype(np.int64)
