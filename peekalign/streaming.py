"""Streaming analysis: latency budget (more streaming analyses build on it)."""

from __future__ import annotations

from dataclasses import asdict, dataclass

from .exceptions import ParameterError

__all__ = ["LatencyBudget", "latency_budget"]


def _check_int(name: str, value, func: str, lo: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < lo:
        raise ParameterError(
            f"The {name!r} parameter of {func} must be an int in the range [{lo}, inf). "
            f"Got {value!r} instead."
        )
    return value


def _check_float(name: str, value, func: str, *, positive: bool = False) -> float:
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    ok = (
        ok and (value > 0 if positive else value >= 0) and value == value and value != float("inf")
    )
    if not ok:
        rng = "(0, inf)" if positive else "[0, inf)"
        raise ParameterError(
            f"The {name!r} parameter of {func} must be a float in the range {rng}. "
            f"Got {value!r} instead."
        )
    return float(value)


@dataclass(frozen=True)
class LatencyBudget:
    """Algorithmic delay of a streaming recognizer, in milliseconds.

    ``encoder_ms = layers * per_layer * frame_shift``, ``decoder_ms = lookahead *
    frame_shift``, ``total_ms = encoder_ms + decoder_ms + front_end_ms``.
    """

    frame_shift_ms: float
    encoder_frames: int
    decoder_frames: int
    encoder_ms: float
    decoder_ms: float
    front_end_ms: float
    total_ms: float

    def as_dict(self) -> dict:
        return asdict(self)


def latency_budget(
    *,
    frame_shift_ms: float,
    layers: int = 0,
    per_layer: int = 0,
    lookahead: int = 0,
    front_end_ms: float = 0.0,
) -> LatencyBudget:
    """Latency budget of time-restricted encoder layers plus a decoder look-ahead.

    Each encoder layer sees ``per_layer`` future frames, so ``layers`` layers see
    ``layers * per_layer`` frames ahead; the decoder sees ``lookahead`` frames past
    the trigger frame (common practice; no single source).

    Examples
    --------
    >>> b = latency_budget(frame_shift_ms=40, layers=12, per_layer=1, lookahead=18)
    >>> b.encoder_ms, b.decoder_ms, b.total_ms
    (480.0, 720.0, 1200.0)
    """
    fn = "latency_budget"
    shift = _check_float("frame_shift_ms", frame_shift_ms, fn, positive=True)
    layers = _check_int("layers", layers, fn)
    per_layer = _check_int("per_layer", per_layer, fn)
    lookahead = _check_int("lookahead", lookahead, fn)
    front = _check_float("front_end_ms", front_end_ms, fn)
    enc_frames = layers * per_layer
    enc = enc_frames * shift
    dec = lookahead * shift
    return LatencyBudget(shift, enc_frames, lookahead, enc, dec, front, enc + dec + front)
