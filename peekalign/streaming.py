"""Streaming analyses: trigger windows, right context, word reach, cut attention
mass, window consistency, the latency budget and the look-ahead sweep.

Triggered attention (2019), CTC-triggered attention decoding, lets the decoder predict token
``u`` from encoder frames ``[0, n_u + lookahead]`` (optionally from ``n_u - look_back``
on), ``n_u`` being the token's trigger frame. Everything here is plain numpy over one
utterance's arrays; results are small dataclasses.
"""

from __future__ import annotations

import csv
import functools
import math
import os
import re
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass, field
from typing import NamedTuple

import numpy as np

from .align import Alignment, Greedy, align_tokens, greedy_decode
from .clock import FrameClock
from .exceptions import ParameterError, PeekalignError, describe
from .model import Bundle, Problem, Utterance

__all__ = [
    "TRIGGER_SOURCES",
    "Triggers",
    "causal_triggers",
    "match_triggers",
    "Consistency",
    "CutMass",
    "LatencyBudget",
    "Sweep",
    "SweepRow",
    "Windows",
    "WordReach",
    "attention_windows",
    "cut_mass",
    "cut_mass_and_consistency",
    "algorithmic_lookahead",
    "latency_budget",
    "sweep",
    "token_windows",
    "trigger_frames",
    "window_consistency",
    "word_reach",
]

#: Tolerance (seconds) of the reach test ``margin >= 0`` against float rounding.
MARGIN_TOL_S = 1e-9


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


def algorithmic_lookahead(
    clock: FrameClock, *, lookahead: int = 0, encoder_lookahead=None
) -> LatencyBudget:
    """The algorithmic look-ahead of a streaming set-up, from its frame clock.

    How far past the centre of a token's trigger frame the input reaches when the
    decoder emits the token: encoder look-ahead plus decoder look-ahead (frames times
    the frame shift) plus the front end's own look-ahead past a frame's centre
    (``clock.right_context_s``). It leaves out the emission delay (how late the
    trigger frame comes) and compute time. The one figure behind the view's right context,
    the sweep's and report's latency column and ``peekalign latency``
    (DEVELOPERS.md, "Look-ahead, right context and reach").

    Parameters
    ----------
    clock : FrameClock
    lookahead : int
        Decoder look-ahead in frames.
    encoder_lookahead : int or (layers, per_layer), optional
        Encoder look-ahead in frames, or the layers and per-layer look-ahead.

    Returns
    -------
    LatencyBudget

    Examples
    --------
    >>> from peekalign import FrameClock
    >>> c = FrameClock(0.04, right_context_s=0.025)
    >>> algorithmic_lookahead(c, lookahead=6, encoder_lookahead=(2, 1)).total_ms
    345.0
    """
    fn = "algorithmic_lookahead"
    if not isinstance(clock, FrameClock):
        raise ParameterError(
            f"The 'clock' parameter of {fn} must be a FrameClock. "
            f"Got {type(clock).__name__} instead."
        )
    return latency_budget(
        frame_shift_ms=clock.frame_shift_s * 1000,
        layers=_encoder_frames(encoder_lookahead, fn),
        per_layer=1,
        lookahead=_check_int("lookahead", _as_int(lookahead), fn),
        front_end_ms=clock.right_context_s * 1000,
    )


# ---------------------------------------------------------------------------
# trigger frames and windows
# ---------------------------------------------------------------------------

_RULES = ("first", "spike")


def trigger_frames(source, rule: str = "first") -> np.ndarray:
    """Trigger frame of each token.

    Parameters
    ----------
    source : Alignment, search Hypothesis or SearchResult
        A forced alignment (:func:`peekalign.align_tokens`), or the output of the
        prefix search (its best hypothesis when a whole result is given).
    rule : {"first", "spike"}
        For an alignment: the first frame of the token's CTC segment (the usual
        trigger of triggered attention) or its spike (frame of highest posterior in
        the segment). A search hypothesis carries the frame at which the search
        created the prefix ending in each token; it takes ``rule="first"`` (or
        ``"creation"``) only.

    Returns
    -------
    ndarray of int32, shape (U,)

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import align_tokens
    >>> lp = np.log(np.array([[.1, .8, .1], [.1, .8, .1], [.8, .1, .1], [.1, .1, .8]]))
    >>> a = align_tokens(lp, [1, 2])
    >>> trigger_frames(a).tolist(), trigger_frames(a, "spike").tolist()
    ([0, 3], [0, 3])
    """
    if isinstance(source, Alignment):
        if rule not in _RULES:
            raise ParameterError(
                f"The 'rule' parameter of trigger_frames must be one of {_RULES}. "
                f"Got {rule!r} instead."
            )
        return source.triggers(rule).astype(np.int32)
    hyp = source
    if hasattr(source, "hypotheses") and hasattr(source, "best"):
        hyp = source.best
    frames = getattr(hyp, "trigger_frames", None)
    if isinstance(frames, np.ndarray):
        if rule not in ("first", "creation"):
            raise ParameterError(
                "The 'rule' parameter of trigger_frames must be 'first' or 'creation' for a "
                f"search hypothesis (it holds creation frames only). Got {rule!r} instead; "
                "forced-align the hypothesis tokens to get spikes."
            )
        return frames.astype(np.int32)
    raise ParameterError(
        "The 'source' parameter of trigger_frames must be an Alignment, a search "
        f"Hypothesis or a SearchResult. Got {type(source).__name__} instead."
    )


#: Where trigger frames come from. ``"greedy"`` (the CTC branch's best path) and
#: ``"search"`` (the traced prefix search) are what a streaming system has while it
#: runs; ``"oracle"`` is a Viterbi forced alignment of the whole token sequence, which
#: needs the reference (or the finished hypothesis) in advance. See DEVELOPERS.md,
#: "Causal triggers".
TRIGGER_SOURCES = ("greedy", "search", "oracle")
_SOURCE_LABELS = {"greedy": "CTC greedy", "search": "prefix search", "oracle": "oracle"}


@dataclass(frozen=True, eq=False)
class Triggers:
    """Trigger frame of each token and where it came from.

    Attributes
    ----------
    frames : ndarray of int32, shape (U,)
    oracle : ndarray of bool, shape (U,)
        True where the frame is the forced alignment's (``source="oracle"``, or no
        emitted token was matched to this token).
    matched : ndarray of int64, shape (U,)
        Index of the emitted token whose trigger this token takes (-1: oracle).
    source : {"greedy", "search", "oracle"}
        The source asked for.
    """

    frames: np.ndarray
    oracle: np.ndarray
    matched: np.ndarray
    source: str

    def __len__(self) -> int:
        return int(self.frames.size)

    @property
    def n_oracle(self) -> int:
        """Tokens whose trigger is the forced alignment's."""
        return int(np.count_nonzero(self.oracle))

    @property
    def label(self) -> str:
        """``"CTC greedy"``, ``"CTC greedy; 2 of 9 tokens oracle"`` or ``"oracle"``."""
        name = _SOURCE_LABELS[self.source]
        if self.source == "oracle" or not self.n_oracle:
            return name
        return f"{name}; {self.n_oracle} of {len(self)} tokens oracle"

    def __repr__(self) -> str:
        return f"Triggers({self.label!r}, tokens={len(self)})"


def match_triggers(
    tokens, oracle_frames, emitted_tokens, emitted_frames, *, source: str = "greedy"
) -> Triggers:
    """Give each token the trigger of the emitted token aligned to it.

    ``tokens`` (e.g. the reference's) and the tokens a streaming system emitted (CTC
    greedy or the prefix search) are aligned by edit distance over token ids, as the
    word errors are. A token paired with an emitted token (the same id, or a
    substitution: the system fired there for that position) takes its frame; a token
    with none (deleted) keeps its oracle frame and is marked ``oracle``.

    Parameters
    ----------
    tokens : array-like of int, shape (U,)
    oracle_frames : array-like of int, shape (U,)
        The tokens' frames from a forced alignment, used where nothing was emitted.
    emitted_tokens, emitted_frames : array-like of int, shape (K,)
        What the system emitted and when (its trigger frames).
    source : {"greedy", "search"}

    Returns
    -------
    Triggers

    Examples
    --------
    Reference "hollin" against the emitted "olln": ``h`` and ``i`` were never emitted,
    so they keep their oracle frames.

    >>> ref = [8, 15, 12, 12, 9, 14]        # h o l l i n
    >>> t = match_triggers(ref, [10, 12, 14, 16, 18, 20], [15, 12, 12, 14], [13, 15, 17, 22])
    >>> t.frames.tolist(), t.oracle.tolist()
    ([10, 13, 15, 17, 18, 22], [True, False, False, False, True, False])
    """
    from .errors import _align

    tok = np.asarray(tokens, dtype=np.int64).reshape(-1)
    frames = np.asarray(oracle_frames, dtype=np.int64).reshape(-1)
    em_tok = np.asarray(emitted_tokens, dtype=np.int64).reshape(-1)
    em_fr = np.asarray(emitted_frames, dtype=np.int64).reshape(-1)
    if frames.size != tok.size or em_fr.size != em_tok.size:
        raise ParameterError(
            describe(
                f"{tok.size} tokens with {frames.size} oracle frames and {em_tok.size} "
                f"emitted tokens with {em_fr.size} frames",
                "one frame per token on each side",
                "pass the frames of the same token sequences",
            )
        )
    if source not in ("greedy", "search"):
        raise ParameterError(
            "The 'source' parameter of match_triggers must be 'greedy' or 'search'. "
            f"Got {source!r} instead."
        )
    ali = _align(tuple(map(str, tok.tolist())), tuple(map(str, em_tok.tolist())), "token")
    matched = np.full(tok.size, -1, dtype=np.int64)
    for op, ri, hj in ali.ops:
        if op in ("C", "S") and ri is not None and hj is not None:
            matched[ri] = hj
    oracle = matched < 0
    out = np.where(oracle, frames, em_fr[np.maximum(matched, 0)] if em_fr.size else frames)
    return Triggers(out.astype(np.int32), oracle, matched, source)


def causal_triggers(
    utt: Utterance,
    alignment: Alignment,
    *,
    source: str = "greedy",
    rule: str = "first",
    greedy: Greedy | None = None,
    search=None,
) -> Triggers:
    """Trigger frames of ``alignment``'s tokens from a source a streaming system has.

    Parameters
    ----------
    utt : Utterance
    alignment : Alignment
        Forced alignment of the tokens (the reference's, or the attention rows'); its
        frames are the oracle triggers and the fallback for tokens nothing emitted.
    source : {"greedy", "search", "oracle"}
        ``"greedy"``: the first frame (``rule="first"``) or the spike (``"spike"``) of
        each run of the CTC best path; ``"search"``: the frame the traced prefix
        search created each token of its best hypothesis (``search`` needed);
        ``"oracle"``: the forced alignment's own frames.
    rule : {"first", "spike"}
    greedy : Greedy, optional
        The utterance's greedy decoding (computed when not given).
    search : SearchResult or Hypothesis, optional

    Returns
    -------
    Triggers

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary, align_tokens
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((8, 4), 0.02); p[:, 0] = 0.94
    >>> p[2] = p[3] = [0.04, 0.02, 0.9, 0.04]; p[6] = [0.04, 0.02, 0.04, 0.9]
    >>> u = Utterance.from_arrays(np.log(p), ref="a b", vocab=v)
    >>> a = align_tokens(u.log_probs, u.ref_tokens)
    >>> t = causal_triggers(u, a)           # "|" was never emitted: its trigger is oracle
    >>> t.frames.tolist(), t.oracle.tolist(), t.label
    ([2, 3, 6], [False, True, False], 'CTC greedy; 1 of 3 tokens oracle')
    """
    if source not in TRIGGER_SOURCES:
        raise ParameterError(
            f"The 'source' parameter of causal_triggers must be one of {TRIGGER_SOURCES}. "
            f"Got {source!r} instead."
        )
    oracle = trigger_frames(alignment, rule)
    if source == "oracle":
        U = oracle.size
        return Triggers(oracle, np.ones(U, bool), np.full(U, -1, np.int64), "oracle")
    if source == "search":
        if search is None:
            raise ParameterError(
                describe(
                    "trigger source 'search' without a search",
                    "the traced prefix search's result",
                    "run analyze(..., search=True) or pass search=",
                    utt=utt.id,
                )
            )
        hyp = search.best if hasattr(search, "best") else search
        em_tok, em_fr = hyp.tokens, trigger_frames(hyp, rule)
    else:
        g = greedy if greedy is not None else greedy_decode(utt.log_probs, blank=utt.blank)
        em_tok, em_fr = g.tokens, (g.first if rule == "first" else g.spike)
    return match_triggers(alignment.tokens, oracle, em_tok, em_fr, source=source)


def _encoder_frames(encoder_lookahead, func: str) -> int:
    """Encoder look-ahead in frames from None, an int, a (layers, per_layer) pair or a
    per-frame array (its largest value: the worst case, for latency figures)."""
    if encoder_lookahead is None:
        return 0
    if isinstance(encoder_lookahead, np.ndarray) and encoder_lookahead.ndim == 1:
        return int(encoder_lookahead.max()) if encoder_lookahead.size else 0
    if isinstance(encoder_lookahead, (tuple, list)) and len(encoder_lookahead) == 2:
        layers, per_layer = encoder_lookahead
        layers = _check_int("encoder_lookahead[0] (layers)", _as_int(layers), func)
        per_layer = _check_int("encoder_lookahead[1] (per_layer)", _as_int(per_layer), func)
        return layers * per_layer
    if isinstance(encoder_lookahead, (int, np.integer)) and not isinstance(
        encoder_lookahead, bool
    ):
        return _check_int("encoder_lookahead", int(encoder_lookahead), func)
    raise ParameterError(
        f"The 'encoder_lookahead' parameter of {func} must be an int (frames), a "
        f"(layers, per_layer) pair or None. Got {encoder_lookahead!r} instead."
    )


def _as_int(x):
    return int(x) if isinstance(x, np.integer) else x


def _heard_frames(last, encoder_lookahead, enc: int, T: int, func: str) -> np.ndarray:
    """Last front-end frame a decoder step reading encoder frames ``[0, last]`` depends
    on: ``last + enc``, or with a per-frame right context ``rc`` the largest ``j +
    rc[j]`` over ``j <= last`` (frames past the end add one each, as the uniform case
    does) (DEVELOPERS.md, "Measured encoder look-ahead")."""
    if not isinstance(encoder_lookahead, np.ndarray):
        return last + enc
    rc = np.asarray(encoder_lookahead)
    if rc.shape != (T,):
        raise ParameterError(
            f"The 'encoder_lookahead' parameter of {func} is a per-frame array of shape "
            f"{rc.shape}; expected ({T},), one right context per encoder frame of the utterance."
        )
    reach = np.maximum.accumulate(np.arange(T, dtype=np.int64) + rc.astype(np.int64))
    inside = np.minimum(last, T - 1)
    return reach[inside] + np.maximum(last - (T - 1), 0)


def _wait_frames(trig, lookaheads, encoder_lookahead, T: int, func: str) -> np.ndarray:
    """Per decoder look-ahead ``e``, the sum over tokens of the frames each token waits
    for past its trigger, ``H(n_u + e) - n_u`` (``e + enc`` each with a uniform encoder
    look-ahead; DEVELOPERS.md, "Latency with a per-frame right context"). int64, (E,)."""
    trig = np.asarray(trig, dtype=np.int64)
    frame_wise = isinstance(encoder_lookahead, np.ndarray)
    if not frame_wise:
        enc = _encoder_frames(encoder_lookahead, func)
        return (np.asarray(lookaheads, dtype=np.int64) + enc) * trig.size
    out = np.zeros(len(lookaheads), dtype=np.int64)
    for j, e in enumerate(lookaheads):
        heard = _heard_frames(trig + int(e), encoder_lookahead, 0, T, func)
        out[j] = int(np.sum(heard - trig))
    return out


def _mean_wait_ms(wait_frames: float, n_tokens: int, shift_ms: float, front_ms: float) -> float:
    """The latency of a look-ahead with per-frame right contexts: the mean over tokens
    of what each waits for past its trigger (frames times the shift) plus the front
    end's own look-ahead; NaN without tokens."""
    if not n_tokens:
        return float("nan")
    return float(wait_frames) / n_tokens * shift_ms + front_ms


@dataclass(frozen=True, eq=False)
class Windows:
    """Decoder windows of a token sequence (one entry per token ``u``).

    Attributes
    ----------
    trigger : ndarray of int32, shape (U,)
        Trigger frame ``n_u``.
    start : ndarray of int32, shape (U,)
        First visible encoder frame: ``max(0, n_u - look_back)``, or 0 (full history).
    end : ndarray of int32, shape (U,)
        Last visible encoder frame: ``min(T - 1, n_u + lookahead)``.
    heard_until_frame : ndarray of int64, shape (U,)
        ``n_u + lookahead + encoder_frames`` (not clamped to the utterance).
    heard_until_s : ndarray of float64, shape (U,)
        Time of the last input sample that can influence decoder step ``u``,
        ``clock.time(heard_until_frame) + clock.right_context_s``. How far that lies
        past the trigger is the token's right context (:attr:`right_context_ms`).
    lookahead : int
        Decoder look-ahead ``epsilon`` in encoder frames.
    look_back : int or None
    encoder_frames : int
        Encoder look-ahead ``layers * per_layer`` in frames.
    num_frames : int
        ``T``, the utterance's encoder frames.
    clock : FrameClock
    oracle : ndarray of bool, shape (U,), or None
        True where the trigger is an oracle one (forced alignment); None when the
        windows were built from bare frames (source unknown).
    trigger_source : str or None
        ``"greedy"``, ``"search"`` or ``"oracle"`` (see :class:`Triggers`).
    encoder_right_context : ndarray of int, shape (T,), or None
        The per-frame encoder right context the heard-until frames were taken from
        (``Utterance.encoder_ahead``); None with a uniform encoder look-ahead.
    """

    trigger: np.ndarray
    start: np.ndarray
    end: np.ndarray
    heard_until_frame: np.ndarray
    heard_until_s: np.ndarray
    lookahead: int
    look_back: int | None
    encoder_frames: int
    num_frames: int
    clock: FrameClock
    oracle: np.ndarray | None = None
    trigger_source: str | None = None
    encoder_right_context: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.trigger.size)

    @property
    def right_context_ms(self) -> np.ndarray:
        """Right context of each token in ms: how far past its trigger frame's centre
        the decoder step hears, ``(heard_until_s - clock.time(trigger)) * 1000``."""
        return (self.heard_until_s - self.clock.time(self.trigger)) * 1000.0

    @property
    def trigger_label(self) -> str:
        """Where the triggers came from, e.g. ``"CTC greedy; 2 of 9 tokens oracle"``."""
        if self.trigger_source is None:
            return "given frames"
        n = 0 if self.oracle is None else int(np.count_nonzero(self.oracle))
        name = _SOURCE_LABELS[self.trigger_source]
        if self.trigger_source == "oracle" or not n:
            return name
        return f"{name}; {n} of {len(self)} tokens oracle"

    def mask(self) -> np.ndarray:
        """(U, T) boolean: True where encoder frame t is inside window(u)."""
        t = np.arange(self.num_frames)
        return (t[None, :] >= self.start[:, None]) & (t[None, :] <= self.end[:, None])

    def __repr__(self) -> str:
        lb = "full history" if self.look_back is None else f"look_back={self.look_back}"
        return (
            f"Windows(tokens={len(self)}, lookahead={self.lookahead}, {lb}, "
            f"encoder_frames={self.encoder_frames}, frames={self.num_frames})"
        )


def token_windows(
    trigger_frames,
    *,
    num_frames: int,
    clock: FrameClock,
    lookahead: int,
    look_back: int | None = None,
    encoder_lookahead=None,
) -> Windows:
    """Decoder window and right context of each token.

    The window of token ``u`` is ``[max(0, n_u - look_back) or 0, min(T - 1, n_u +
    lookahead)]`` (triggered attention (2019)). It hears input up to ``heard_until_s``, the
    time of the last input sample that can influence decoder step ``u``: the decoder reads encoder
    frames up to ``n_u + lookahead``; with time-restricted self-attention each of the
    encoder's ``L`` layers looks ``r`` frames ahead, so that frame depends on front-end
    frames up to ``n_u + lookahead + L * r``; and a front-end frame ``j`` reads input up
    to ``clock.time(j) + clock.right_context_s`` (its own look-ahead past the frame
    centre). Hence ``heard_until_s = clock.time(n_u + lookahead + L * r) +
    clock.right_context_s``; the right context is that time minus the trigger time
    (``Windows.right_context_ms``). The frame is not clamped to the utterance: past
    the last frame the input has ended and the whole utterance is audible.

    Parameters
    ----------
    trigger_frames : Triggers or array-like of int, shape (U,)
        Trigger frame per token (see :func:`causal_triggers`, :func:`trigger_frames`);
        a :class:`Triggers` also labels the windows with its source.
    num_frames : int
        ``T``, encoder frames of the utterance.
    clock : FrameClock
    lookahead : int
        Decoder look-ahead ``epsilon`` in frames.
    look_back : int, optional
        Frames before the trigger the decoder may see; None: the full history.
    encoder_lookahead : int, (layers, per_layer) or ndarray (T,), optional
        Encoder look-ahead in frames, the layers and per-layer look-ahead, or the
        right context of every encoder frame (``Utterance.encoder_ahead``).

    Returns
    -------
    Windows

    Examples
    --------
    >>> from peekalign import FrameClock
    >>> w = token_windows([2, 7], num_frames=10, clock=FrameClock(0.04), lookahead=3,
    ...                   encoder_lookahead=(2, 2))
    >>> w.start.tolist(), w.end.tolist(), w.heard_until_frame.tolist()
    ([0, 0], [5, 9], [9, 14])
    >>> w.heard_until_s.round(2).tolist()
    [0.36, 0.56]
    >>> w.right_context_ms.round().tolist()
    [280.0, 280.0]
    """
    fn = "token_windows"
    T = _check_int("num_frames", _as_int(num_frames), fn, lo=1)
    if not isinstance(clock, FrameClock):
        raise ParameterError(
            f"The 'clock' parameter of {fn} must be a FrameClock. "
            f"Got {type(clock).__name__} instead."
        )
    lookahead = _check_int("lookahead", _as_int(lookahead), fn)
    if look_back is not None:
        look_back = _check_int("look_back", _as_int(look_back), fn)
    enc = _encoder_frames(encoder_lookahead, fn)
    oracle = source = None
    if isinstance(trigger_frames, Triggers):  # keep where each trigger came from
        oracle, source = trigger_frames.oracle, trigger_frames.source
        trigger_frames = trigger_frames.frames
    trig = np.asarray(trigger_frames)
    if trig.size == 0:
        trig = trig.reshape(0).astype(np.int64)
    if trig.ndim != 1 or not np.issubdtype(trig.dtype, np.integer):
        raise ParameterError(
            describe(
                f"trigger_frames of shape {trig.shape} and dtype {trig.dtype}",
                "a 1-D array of integer frame indices",
                "pass Alignment.first or trigger_frames(alignment)",
            )
        )
    trig = trig.astype(np.int64)
    bad = trig[(trig < 0) | (trig >= T)]
    if bad.size:
        raise ParameterError(
            describe(
                f"trigger frame {int(bad[0])}",
                f"frames in [0, {T})",
                "use trigger frames of this utterance (num_frames is its encoder frames)",
            )
        )
    start = np.zeros_like(trig) if look_back is None else np.maximum(trig - look_back, 0)
    end = np.minimum(trig + lookahead, T - 1)
    heard = _heard_frames(trig + lookahead, encoder_lookahead, enc, T, fn)
    ahead_ms = algorithmic_lookahead(clock, lookahead=lookahead, encoder_lookahead=enc).total_ms
    # trigger centre + algorithmic look-ahead = clock.time(heard) + right context
    heard_s = np.asarray(clock.time(trig), dtype=np.float64) + ahead_ms / 1000
    if isinstance(encoder_lookahead, np.ndarray):  # per frame: from the heard frame
        heard_s = np.asarray(clock.time(heard), dtype=np.float64) + clock.right_context_s
    return Windows(
        trigger=trig.astype(np.int32),
        start=start.astype(np.int32),
        end=end.astype(np.int32),
        heard_until_frame=heard,
        heard_until_s=heard_s,
        lookahead=lookahead,
        look_back=look_back,
        encoder_frames=enc,
        num_frames=T,
        clock=clock,
        oracle=oracle,
        trigger_source=source,
        encoder_right_context=(
            encoder_lookahead if isinstance(encoder_lookahead, np.ndarray) else None
        ),
    )


# ---------------------------------------------------------------------------
# word reach
# ---------------------------------------------------------------------------


def _norm_word(w: str) -> str:
    return re.sub(r"\W+", "", w.casefold())


@dataclass(frozen=True, eq=False)
class _WordTimes:
    words: tuple
    first_token: np.ndarray
    last_token: np.ndarray
    first_frame: np.ndarray
    last_frame: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray
    source: str
    note: str | None


def _word_times(utt: Utterance, alignment: Alignment) -> _WordTimes:
    """Words of the aligned tokens with the best available times."""
    spans = utt.vocab.words(alignment.tokens)
    words = tuple(w for w, _, _ in spans)
    ft = np.array([a for _, a, _ in spans], dtype=np.int64)
    lt = np.array([b for _, _, b in spans], dtype=np.int64)
    f0 = alignment.first[ft].astype(np.int64) if ft.size else np.zeros(0, np.int64)
    f1 = alignment.last[lt].astype(np.int64) if lt.size else np.zeros(0, np.int64)
    note = None
    if utt.words is not None:
        given = [w for w, _, _ in utt.words]
        if len(given) != len(words):
            note = (
                f"reference word times list {len(given)} words but the reference has "
                f"{len(words)}; used the forced alignment instead"
            )
        else:
            diff = [
                i for i, (a, b) in enumerate(zip(given, words, strict=True))
                if _norm_word(a) != _norm_word(b)
            ]  # fmt: skip
            if diff:
                i = diff[0]
                note = (
                    f"reference word times differ from the reference at word {i} "
                    f"({given[i]!r} vs {words[i]!r}); used the forced alignment instead"
                )
        if note is None:
            times = np.array([(s, e) for _, s, e in utt.words], dtype=np.float64)
            times = times.reshape(-1, 2)
            return _WordTimes(words, ft, lt, f0, f1, times[:, 0], times[:, 1], "reference", None)
    c = utt.clock
    return _WordTimes(
        words,
        ft,
        lt,
        f0,
        f1,
        np.asarray(c.start(f0), dtype=np.float64),
        np.asarray(c.end(f1), dtype=np.float64),
        "alignment",
        note,
    )


@dataclass(frozen=True, eq=False)
class WordReach:
    """Reach margin of each reference word.

    Attributes
    ----------
    words : tuple of str
    first_token, last_token : ndarray of int64, shape (W,)
        Token indices (into the aligned tokens) of the word, inclusive.
    first_frame, last_frame : ndarray of int64, shape (W,)
        Frames of the word in the forced alignment.
    start_s, end_s : ndarray of float64, shape (W,)
        Word times from ``source``.
    source : {"reference", "alignment"}
        Reference word times given with the utterance, else the forced alignment
        (``start(first_frame)``, ``end(last_frame)``).
    source_note : str or None
        Why reference times were given but not used.
    heard_until_s : ndarray, shape (W,)
        End of what the word's last token hears (``Windows.heard_until_s``).
    margin_s : ndarray, shape (W,)
        ``heard_until_s - end_s``.
    reached : ndarray of bool, shape (W,)
        ``margin_s >= 0`` (within 1 ns of rounding): the whole word was audible when
        the decoder emitted its last token.
    """

    words: tuple
    first_token: np.ndarray
    last_token: np.ndarray
    first_frame: np.ndarray
    last_frame: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray
    source: str
    source_note: str | None
    heard_until_s: np.ndarray
    margin_s: np.ndarray
    reached: np.ndarray

    def __len__(self) -> int:
        return len(self.words)

    @property
    def reach(self) -> float:
        """Share of reached words (NaN for no words)."""
        return float(self.reached.mean()) if len(self) else float("nan")

    def rows(self) -> list[dict]:
        """One dict per word (word, tokens, times, source, heard-until, margin, reached)."""
        return [
            {
                "word": w,
                "first_token": int(self.first_token[i]),
                "last_token": int(self.last_token[i]),
                "start_s": float(self.start_s[i]),
                "end_s": float(self.end_s[i]),
                "source": self.source,
                "heard_until_s": float(self.heard_until_s[i]),
                "margin_s": float(self.margin_s[i]),
                "reached": bool(self.reached[i]),
            }
            for i, w in enumerate(self.words)
        ]

    def __repr__(self) -> str:
        return f"WordReach(words={len(self)}, reach={self.reach:.3f}, source={self.source!r})"


def word_reach(utt: Utterance, alignment: Alignment, windows: Windows) -> WordReach:
    """Reach margin per reference word: where its last token's hearing ends minus its end.

    Word times come from the utterance's reference word times (``utt.words``) when
    they list the same words as the reference (compared case-insensitively, ignoring
    punctuation); otherwise, or when there are none, from the forced alignment. When
    given times are not used, ``source_note`` says why (count or first differing word).

    Forced-alignment times are frame edges (``clock.start(first)``,
    ``clock.end(last)``, as ``peekalign align`` writes them). What a token hears reaches past
    a frame's centre by the clock's ``right_context_s`` only, so with a clock that
    leaves it at 0 (front end not stated) a word whose last frame is the trigger frame
    misses the second half of that frame (margin ``-shift / 2``); state the front end
    (``FrameClock.from_front_end`` or bundle.json ``front_end``) to avoid that.

    Parameters
    ----------
    utt : Utterance
    alignment : Alignment
        Forced alignment of ``utt.ref_tokens``.
    windows : Windows
        Windows of the same tokens (e.g. ``token_windows(alignment.first, ...)``).

    Returns
    -------
    WordReach

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary, align_tokens
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> lp = np.log(np.full((8, 4), 0.25))
    >>> u = Utterance.from_arrays(lp, ref="ab ba", vocab=v, words=[("ab", 0, .1), ("ba", .2, .3)])
    >>> a = align_tokens(u.log_probs, u.ref_tokens)
    >>> w = token_windows(a.first, num_frames=8, clock=u.clock, lookahead=0)
    >>> cov = word_reach(u, a, w)
    >>> cov.source, cov.words
    ('reference', ('ab', 'ba'))
    """
    if len(windows) != alignment.tokens.size:
        raise ParameterError(
            describe(
                f"windows for {len(windows)} tokens",
                f"{alignment.tokens.size} (the aligned tokens)",
                "build the windows from this alignment's trigger frames",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    wt = _word_times(utt, alignment)
    heard = windows.heard_until_s[wt.last_token] if wt.last_token.size else np.zeros(0)
    margin = heard - wt.end_s
    return WordReach(
        words=wt.words,
        first_token=wt.first_token,
        last_token=wt.last_token,
        first_frame=wt.first_frame,
        last_frame=wt.last_frame,
        start_s=wt.start_s,
        end_s=wt.end_s,
        source=wt.source,
        source_note=wt.note,
        heard_until_s=heard,
        margin_s=margin,
        reached=margin >= -MARGIN_TOL_S,
    )


# ---------------------------------------------------------------------------
# attention
# ---------------------------------------------------------------------------


def _attention4(attention, windows: Windows, func: str, *, cast: bool = True) -> np.ndarray:
    att = np.asarray(attention)
    if att.ndim == 2:
        att = att[None, None]
    elif att.ndim == 3:
        att = att[None]
    if att.ndim != 4:
        raise ParameterError(
            describe(
                f"attention of shape {att.shape}",
                "(L, H, U, T), (H, U, T) or (U, T)",
                "pass decoder cross-attention with one row per token",
            )
        )
    if att.shape[2] != len(windows) or att.shape[3] != windows.num_frames:
        raise ParameterError(
            describe(
                f"attention with {att.shape[2]} rows over {att.shape[3]} frames",
                f"{len(windows)} rows (one per window) over {windows.num_frames} frames",
                "compute the windows for the attention rows' tokens (attention_windows)",
            )
        )
    return att.astype(np.float64, copy=False) if cast else att


@dataclass(frozen=True, eq=False)
class CutMass:
    """Attention mass outside each token's window.

    Attributes
    ----------
    per_head : ndarray, shape (L, H, U)
        Share of row ``u``'s attention mass (per layer and head) outside window(u);
        NaN for an all-zero row.
    mean : ndarray, shape (U,)
        Mean over layers and heads.
    kept : ndarray, shape (U,)
        ``1 - mean``: the share a decoder restricted to the window still sees.
    """

    per_head: np.ndarray
    mean: np.ndarray
    kept: np.ndarray

    @property
    def per_layer(self) -> np.ndarray:
        """(L, U) mean over heads."""
        return np.nanmean(self.per_head, axis=1) if self.per_head.size else self.per_head[:, 0]

    def __repr__(self) -> str:
        m = float(np.nanmean(self.mean)) if self.mean.size else float("nan")
        return f"CutMass(layers={self.per_head.shape[0]}, heads={self.per_head.shape[1]}, tokens={self.mean.size}, mean={m:.4f})"


def cut_mass(attention, windows: Windows) -> CutMass:
    """Share of attention mass that falls outside each token's window.

    Rows of ``attention`` must be for the window's tokens, in order: row ``u`` is the
    decoder step that predicts token ``u``. A bundle's attention rows are for
    ``utt.attention_tokens`` (often the hypothesis, teacher-forced): compute their
    windows from a forced alignment of those tokens (:func:`attention_windows`), not
    from the reference's. With full-context attention this is the mass a truncated
    decoder would lose; rows are normalised by their own sum first (rows of a float16
    dump do not sum exactly to 1).

    Parameters
    ----------
    attention : ndarray, shape (L, H, U, T), (H, U, T) or (U, T)
    windows : Windows

    Returns
    -------
    CutMass

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import FrameClock
    >>> att = np.array([[0.5, 0.5, 0.0, 0.0], [0.0, 0.2, 0.4, 0.4]])
    >>> w = token_windows([0, 1], num_frames=4, clock=FrameClock(), lookahead=1)
    >>> cut_mass(att, w).mean.round(3).tolist()
    [0.0, 0.4]
    """
    att = _attention4(attention, windows, "cut_mass", cast=False)
    if att.dtype not in (np.float32, np.float64) or not att.dtype.isnative:
        att = att.astype(np.float64)  # the kernel reads float32/64 only
    L, H, U, T = att.shape
    rows = np.ascontiguousarray(att).reshape(L * H, U, T)
    start = np.clip(windows.start.astype(np.int64), 0, T)
    end = np.clip(windows.end.astype(np.int64), -1, T - 1)
    total, inside = _row_mass()(rows, start, end)
    return _cut_mass_of(total.reshape(L, H, U), inside.reshape(L, H, U))


def _cut_mass_of(total: np.ndarray, inside: np.ndarray) -> CutMass:
    """:class:`CutMass` from each (L, H, U) row's total mass and its mass inside."""
    with np.errstate(invalid="ignore", divide="ignore"):
        cut = np.where(total > 0, np.clip(total - inside, 0.0, None) / total, np.nan)
    cut = np.clip(cut, 0.0, 1.0)
    L, H = cut.shape[:2]
    if L * H and cut.shape[2]:
        valid = ~np.isnan(cut)
        n = valid.sum(axis=(0, 1))
        mean = np.where(n > 0, np.nansum(cut, axis=(0, 1)) / np.maximum(n, 1), np.nan)
    else:
        mean = np.full(cut.shape[2], np.nan)
    return CutMass(per_head=cut, mean=mean, kept=1.0 - mean)


@dataclass(frozen=True, eq=False)
class Consistency:
    """Does attention dumped from a streaming run stay inside the computed windows?

    Attributes
    ----------
    ok : bool
        ``max_outside <= tol``.
    max_outside, mean_outside : float
        Largest and mean (over tokens) share of a row's mass outside its window
        (max over layers and heads per token).
    tol : float
    outside : ndarray, shape (U,)
        Per token, the largest share outside over layers and heads.
    frames_past, frames_before : ndarray of int, shape (U,)
        How many frames past the window's end (before its start) the mass reaches:
        the smallest ``k`` such that at most ``tol`` of every head's row lies after
        frame ``end + k`` (before ``start - k``).
    first_token : int
        First token with mass outside (-1 when ``ok``).
    """

    ok: bool
    max_outside: float
    mean_outside: float
    tol: float
    outside: np.ndarray
    frames_past: np.ndarray
    frames_before: np.ndarray
    first_token: int

    @property
    def first_frames_past(self) -> int:
        """``frames_past`` of the first offending token (0 when ``ok``)."""
        return int(self.frames_past[self.first_token]) if self.first_token >= 0 else 0

    def message(self) -> str:
        """One line for reports."""
        if self.ok:
            return f"attention stays inside the windows (max {self.max_outside:.2g} outside)"
        u = self.first_token
        parts = [f"token {u}: {self.outside[u]:.3f} of its attention mass outside the window"]
        if self.frames_past[u]:
            parts.append(f"reaching {int(self.frames_past[u])} frame(s) past its end")
        if self.frames_before[u]:
            parts.append(f"reaching {int(self.frames_before[u])} frame(s) before its start")
        hint = (
            "; an off-by-one in the truncation or in the trigger frames?"
            if max(self.frames_past[u], self.frames_before[u]) == 1
            else "; is this attention from a streaming run with these windows?"
        )
        return ", ".join(parts) + hint

    def __repr__(self) -> str:
        return f"Consistency(ok={self.ok}, max_outside={self.max_outside:.3g}, first_token={self.first_token})"


@functools.cache
def _row_mass():
    """Compile (once, cached on disk) the one-pass kernel behind cut_mass."""
    from numba import njit

    @njit(cache=True, nogil=True)
    def row_mass(att, start, end):
        # Per row, in float64 without a float64 copy of the input: the row's total
        # and its sum over frames [start[u], end[u]] (empty when end < start).
        R, U, T = att.shape
        total = np.zeros((R, U))
        inside = np.zeros((R, U))
        for r in range(R):
            for u in range(U):
                row = att[r, u]
                a, b = start[u], end[u] + 1
                s0 = 0.0
                for t in range(0, min(a, T)):
                    s0 += np.float64(row[t])
                s1 = 0.0
                for t in range(a, max(a, b)):
                    s1 += np.float64(row[t])
                s2 = 0.0
                for t in range(max(a, b), T):
                    s2 += np.float64(row[t])
                total[r, u] = s0 + s1 + s2
                inside[r, u] = s1
        return total, inside

    return row_mass


@functools.cache
def _both_rows():
    """Compile (once, cached on disk) the one-pass kernel behind window_consistency,
    which also gives cut_mass' figures (the ones :func:`_row_mass` gives, summed in the
    same order)."""
    from numba import njit

    # Per row: the running sum in float64, added frame by frame in order exactly as
    # np.cumsum does, so every figure equals the cumsum-based definition: share
    # outside = (total - (cs[end] - cs[start - 1])) / total; n = frames with
    # cs < (1 - tol) * total; m = 1 + frames t < T - 1 with cs <= tol * total. Beside
    # it the sums before, inside and after [cut_start, cut_end]. A running sum waits
    # for the add before it, so four heads of one token (the same window) are summed
    # side by side: each row's sums stay in its own order.

    @njit(cache=True, nogil=True, inline="always")
    def span(row, cs, t0, t1, acc, s):
        for t in range(t0, t1):
            x = np.float64(row[t])
            acc += x
            cs[t] = acc
            s += x
        return acc, s

    @njit(cache=True, nogil=True, inline="always")
    def span4(att, r, u, cs, t0, t1, acc, s):
        a0, a1, a2, a3 = acc
        s0, s1, s2, s3 = s
        for t in range(t0, t1):
            x0 = np.float64(att[r, u, t])
            x1 = np.float64(att[r + 1, u, t])
            x2 = np.float64(att[r + 2, u, t])
            x3 = np.float64(att[r + 3, u, t])
            a0 += x0
            a1 += x1
            a2 += x2
            a3 += x3
            cs[0, t] = a0
            cs[1, t] = a1
            cs[2, t] = a2
            cs[3, t] = a3
            s0 += x0
            s1 += x1
            s2 += x2
            s3 += x3
        return (a0, a1, a2, a3), (s0, s1, s2, s3)

    @njit(cache=True, nogil=True)
    def finish(cs, r, u, start, end, tol, share, n, m, zero):
        T = cs.shape[0]
        full = cs[T - 1]
        if not full <= 0:
            zero[u] = False
        inside = cs[end[u]]
        if start[u] > 0:
            inside = inside - cs[start[u] - 1]
        if full > 0:
            share[r, u] = (full - inside) / full
        upper = (1.0 - tol) * full
        lower = tol * full
        k = 0
        j = 0
        for t in range(T - 1):  # counts without branches: the loop vectorises
            k += cs[t] < upper
            j += cs[t] <= lower
        k += cs[T - 1] < upper
        n[r, u] = k
        m[r, u] = 1 + j

    @njit(cache=True, nogil=True)
    def both_kernel(att, start, end, tol, cut_start, cut_end):
        R, U, T = att.shape
        total = np.zeros((R, U))
        inside_cut = np.zeros((R, U))
        share = np.zeros((R, U))
        n = np.zeros((R, U), np.int64)
        m = np.zeros((R, U), np.int64)
        zero = np.ones(U, np.bool_)
        cs = np.empty((4, T))
        z4 = (0.0, 0.0, 0.0, 0.0)
        for u in range(U):
            a, b = cut_start[u], cut_end[u] + 1
            lo, hi = min(a, T), max(a, b)
            r = 0
            while r + 4 <= R:
                acc, s_before = span4(att, r, u, cs, 0, lo, z4, z4)
                acc, s_inside = span4(att, r, u, cs, lo, hi, acc, z4)
                acc, s_after = span4(att, r, u, cs, hi, T, acc, z4)
                for k in range(4):
                    total[r + k, u] = s_before[k] + s_inside[k] + s_after[k]
                    inside_cut[r + k, u] = s_inside[k]
                    finish(cs[k], r + k, u, start, end, tol, share, n, m, zero)
                r += 4
            while r < R:
                row = att[r, u]
                acc, s_before = span(row, cs[0], 0, lo, 0.0, 0.0)
                acc, s_inside = span(row, cs[0], lo, hi, acc, 0.0)
                acc, s_after = span(row, cs[0], hi, T, acc, 0.0)
                total[r, u] = s_before + s_inside + s_after
                inside_cut[r, u] = s_inside
                finish(cs[0], r, u, start, end, tol, share, n, m, zero)
                r += 1
        return total, inside_cut, share, n, m, zero

    return both_kernel


def cut_mass_and_consistency(
    attention, windows: Windows, *, tol: float = 1e-3
) -> tuple[CutMass, Consistency]:
    """``(cut_mass(attention, windows), window_consistency(attention, windows, tol=tol))``
    from one pass over the attention (it is the largest array of a bundle).

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import FrameClock
    >>> att = np.array([[0.5, 0.5, 0.0, 0.0], [0.0, 0.2, 0.4, 0.4]])
    >>> w = token_windows([0, 1], num_frames=4, clock=FrameClock(), lookahead=1)
    >>> cm, c = cut_mass_and_consistency(att, w)
    >>> cm.mean.round(3).tolist(), c.first_token
    ([0.0, 0.4], 1)
    """
    tol = _check_float("tol", tol, "cut_mass_and_consistency")
    att = _attention4(attention, windows, "cut_mass_and_consistency", cast=False)
    L, H, U, T = att.shape
    start = windows.start.astype(np.int64)
    end = windows.end.astype(np.int64)
    bad_bounds = ((end < 0) | (end >= T) | (start < 0) | (start > T)).any()
    if L * H == 0 or U == 0 or bad_bounds:  # the two passes say (or raise) it
        return cut_mass(att, windows), window_consistency(att, windows, tol=tol)
    if att.dtype not in (np.float32, np.float64) or not att.dtype.isnative:
        att = att.astype(np.float64)  # the kernel reads float32/64 only
    rows = np.ascontiguousarray(att).reshape(L * H, U, T)
    cut_start = np.clip(start, 0, T)
    cut_end = np.clip(end, -1, T - 1)
    total, inside, share, n, m, zero = _both_rows()(rows, start, end, tol, cut_start, cut_end)
    cm = _cut_mass_of(total.reshape(L, H, U), inside.reshape(L, H, U))
    return cm, _consistency_of(share, n, m, zero, (L, H, U), start, end, tol)


def window_consistency(attention, windows: Windows, *, tol: float = 1e-3) -> Consistency:
    """Check that attention from a streaming run has (almost) no mass outside windows.

    A decoder truncated to window(u) puts zero weight outside it; a non-zero share
    reveals windows that differ from the run's (an off-by-one in the user's
    truncation, another look-ahead, other trigger frames). ``frames_past`` says by
    how many frames the mass overshoots the window end.

    Parameters
    ----------
    attention : ndarray, shape (L, H, U, T), (H, U, T) or (U, T)
        Rows for the window's tokens (see :func:`cut_mass`).
    windows : Windows
    tol : float
        Largest share of a row allowed outside.

    Returns
    -------
    Consistency

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import FrameClock
    >>> att = np.array([[0.5, 0.5, 0.0, 0.0], [0.0, 0.2, 0.4, 0.4]])
    >>> w = token_windows([0, 1], num_frames=4, clock=FrameClock(), lookahead=1)
    >>> c = window_consistency(att, w)
    >>> c.ok, c.first_token, int(c.frames_past[1])
    (False, 1, 1)
    """
    tol = _check_float("tol", tol, "window_consistency")
    att = _attention4(attention, windows, "window_consistency", cast=False)
    L, H, U, T = att.shape
    if L * H == 0 or U == 0:
        outside = np.zeros(U)
        frames_past = frames_before = np.zeros(U, np.int64)
    else:
        end = windows.end.astype(np.int64)
        start = windows.start.astype(np.int64)
        if ((end < 0) | (end >= T) | (start < 0) | (start > T)).any():
            # the compiled pass reads cs[end] and cs[start - 1] unchecked
            raise ParameterError(
                describe(
                    f"window bounds outside the {T} attention frames",
                    f"0 <= start <= end < {T}",
                    "build the windows with token_windows or attention_windows",
                )
            )
        if att.dtype not in (np.float32, np.float64) or not att.dtype.isnative:
            att = att.astype(np.float64)  # the kernel reads float32/64 only
        rows = np.ascontiguousarray(att).reshape(L * H, U, T)
        share, n, m, zero = _both_rows()(rows, start, end, tol, start, end)[2:]
        return _consistency_of(share, n, m, zero, (L, H, U), start, end, tol)
    return _consistency_result(outside, frames_past, frames_before, tol)


def _consistency_of(share, n, m, zero, shape, start, end, tol: float) -> Consistency:
    """:class:`Consistency` from the compiled pass' per-row figures (rows ``L*H``)."""
    share, n, m = (a.reshape(shape) for a in (share, n, m))
    outside = np.clip(share.max(axis=(0, 1)), 0.0, 1.0)
    frames_past = np.maximum(n - end, 0).max(axis=(0, 1))
    frames_before = np.maximum(start - m + 1, 0).max(axis=(0, 1))
    frames_past = np.where(zero, 0, frames_past)
    frames_before = np.where(zero, 0, frames_before)
    return _consistency_result(outside, frames_past, frames_before, tol)


def _consistency_result(outside, frames_past, frames_before, tol: float) -> Consistency:
    """:class:`Consistency` from each token's share outside and frames past / before."""
    U = outside.size
    bad = np.flatnonzero(outside > tol)
    return Consistency(
        ok=bad.size == 0,
        max_outside=float(outside.max()) if U else 0.0,
        mean_outside=float(outside.mean()) if U else 0.0,
        tol=tol,
        outside=outside,
        frames_past=frames_past.astype(np.int64),
        frames_before=frames_before.astype(np.int64),
        first_token=int(bad[0]) if bad.size else -1,
    )


def attention_windows(
    utt: Utterance,
    windows_like: Windows,
    *,
    trigger_rule: str = "first",
    alignment: Alignment | None = None,
    greedy: Greedy | None = None,
    search=None,
) -> tuple[Windows, Alignment]:
    """Windows for the attention rows of ``utt`` (one per ``utt.attention_tokens``).

    The attention rows are decoder steps predicting ``utt.attention_tokens`` (often the
    hypothesis). Their trigger frames come from the same source as ``windows_like``'s
    (:func:`causal_triggers`: CTC greedy or the search, matched to the rows' tokens,
    with a forced alignment of those tokens to ``utt.log_probs`` as the oracle
    fallback; the forced alignment alone when ``windows_like`` has no source); the
    look-ahead, look-back and encoder look-ahead are taken from ``windows_like``.
    When the bundle recorded the trigger of each row (``utt.attention_triggers``, a
    streaming run's own), those frames are used instead (labelled with the asked
    source; an explicit ``"oracle"`` still asks for the forced alignment). ``alignment`` is reused
    when it aligns the same tokens.

    Returns
    -------
    (Windows, Alignment)

    Raises
    ------
    ParameterError
        When the utterance has no attention.
    AlignmentError
        When the attention tokens cannot be aligned.

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary, align_tokens
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((8, 4), 0.01); p[:, 0] = 0.97; p[2, 2] = p[5, 3] = 0.9
    >>> u = Utterance.from_arrays(np.log(p / p.sum(1, keepdims=True)), ref="a b", vocab=v,
    ...                           attention=np.full((2, 8), 1 / 8), attention_tokens=[2, 3])
    >>> a = align_tokens(u.log_probs, u.ref_tokens)
    >>> w = token_windows(a.first, num_frames=8, clock=u.clock, lookahead=1)
    >>> aw, _ = attention_windows(u, w)
    >>> aw.trigger.tolist(), aw.end.tolist()
    ([2, 5], [3, 6])
    """
    if utt.attention is None or utt.attention_tokens is None:
        raise ParameterError(
            describe(
                "no attention",
                "an 'attention' array in the utterance",
                "dump decoder cross-attention into the bundle",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    toks = np.asarray(utt.attention_tokens)
    if alignment is None or not np.array_equal(alignment.tokens, toks):
        alignment = align_tokens(utt.log_probs, toks, utt.blank, utt=utt.id)
    asked = windows_like.trigger_source
    source = asked or "oracle"
    recorded = utt.attention_triggers
    if recorded is not None and asked != "oracle":
        # a streaming run that recorded its rows' triggers: those are the windows it used
        n = int(recorded.size)
        triggers = (
            recorded
            if asked is None
            else Triggers(recorded, np.zeros(n, bool), np.arange(n, dtype=np.int64), asked)
        )
    else:
        triggers = causal_triggers(
            utt, alignment, source=source, rule=trigger_rule, greedy=greedy, search=search
        )
    w = token_windows(
        triggers,
        num_frames=utt.num_frames,
        clock=utt.clock,
        lookahead=windows_like.lookahead,
        look_back=windows_like.look_back,
        encoder_lookahead=windows_like.encoder_frames,
    )
    return w, alignment


# ---------------------------------------------------------------------------
# look-ahead sweep
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class SweepRow:
    """One look-ahead of the sweep.

    ``reach`` is the share of reached words over the whole set, ``kept_attention``
    the mean (over all attention rows) share of attention mass inside the window
    (NaN without attention), ``latency_ms`` the algorithmic look-ahead
    (:func:`algorithmic_lookahead`: encoder + decoder look-ahead + front end; no
    emission delay, no compute; with per-frame encoder right contexts the mean over
    tokens of what each waits for past its trigger, DEVELOPERS.md, "Latency with a
    per-frame right context").
    """

    lookahead_frames: int
    latency_ms: float
    reach: float
    kept_attention: float
    n_words: int
    n_reached: int


COLUMNS = ("lookahead_frames", "latency_ms", "reach", "kept_attention")


@dataclass(eq=False)
class Sweep:
    """Result of :func:`sweep`.

    Attributes
    ----------
    rows : list of SweepRow
        One per look-ahead 0..max_lookahead.
    recommended : int or None
        Smallest look-ahead whose reach reaches ``target``; None if none does.
    target : float
    problems : list of Problem
        Utterances skipped (or whose attention was skipped) and why.
    n_utterances, n_words : int
        Utterances and words that entered the reach.
    frame_shift_ms, front_end_ms : float
    encoder_frames : int
    word_sources : dict
        How many utterances used reference word times / the forced alignment.
    triggers : {"greedy", "search", "oracle"}
        Source of the trigger frames (:func:`causal_triggers`).
    n_oracle_words : int
        Words whose last token's trigger is an oracle one (all of them with
        ``triggers="oracle"``; with a causal source, the words whose last token the
        system never emitted).
    per_frame_right_context : bool
        Whether some utterance carried a per-frame encoder right context
        (``Utterance.encoder_right_context``); the latency column is then the mean over
        tokens of what each waits for.
    wait_frames : ndarray of int64, shape (N + 1,), optional
        Per look-ahead, the sum over the ``n_tokens`` tokens of the frames each waits for
        past its trigger (what the latency column's mean is taken from).
    n_tokens : int
    """

    rows: list[SweepRow]
    recommended: int | None
    target: float
    problems: list[Problem] = field(default_factory=list)
    n_utterances: int = 0
    n_words: int = 0
    frame_shift_ms: float = float("nan")
    front_end_ms: float = 0.0
    encoder_frames: int = 0
    word_sources: dict = field(default_factory=dict)
    triggers: str = "greedy"
    n_oracle_words: int = 0
    per_frame_right_context: bool = False
    wait_frames: np.ndarray | None = None
    n_tokens: int = 0

    @property
    def triggers_label(self) -> str:
        """One line saying where the triggers came from (oracle ones named so)."""
        if self.triggers == "oracle":
            return (
                "oracle triggers (Viterbi forced alignment of the whole reference; a "
                "streaming system does not have them)"
            )
        name = _SOURCE_LABELS[self.triggers]
        if not self.n_oracle_words:
            return f"{name} triggers (causal)"
        return (
            f"{name} triggers (causal); {self.n_oracle_words} of {self.n_words} words, "
            "whose last token CTC never emitted, use oracle triggers (forced alignment)"
        )

    @property
    def latency_name(self) -> str:
        """What the latency column measures, for printouts and pages: the algorithmic
        look-ahead, or with per-frame right contexts the tokens' mean wait."""
        if self.per_frame_right_context:
            return "mean token wait"
        return "algorithmic look-ahead"

    @property
    def recommended_row(self) -> SweepRow | None:
        return None if self.recommended is None else self.rows[self.recommended]

    def columns(self) -> dict[str, np.ndarray]:
        """The four table columns as arrays."""
        return {c: np.array([getattr(r, c) for r in self.rows]) for c in COLUMNS}

    def write_csv(self, path: str | os.PathLike, *, overwrite: bool = False) -> None:
        """Write ``lookahead_frames, latency_ms, reach, kept_attention`` as CSV."""
        from .io.atomic import atomic_write

        with atomic_write(path, overwrite=overwrite, encoding="utf-8") as f:
            w = csv.writer(f, lineterminator="\n")
            w.writerow(COLUMNS)
            for r in self.rows:
                w.writerow(
                    [
                        r.lookahead_frames,
                        f"{r.latency_ms:.6g}",
                        f"{r.reach:.6f}",
                        "" if math.isnan(r.kept_attention) else f"{r.kept_attention:.6f}",
                    ]
                )

    def __repr__(self) -> str:
        return (
            f"Sweep(lookaheads=0..{len(self.rows) - 1}, utterances={self.n_utterances}, "
            f"words={self.n_words}, triggers={self.triggers}, target={self.target}, "
            f"recommended={self.recommended}, "
            f"problems={len(self.problems)})"
        )


def _kept_by_lookahead(att: np.ndarray, trig: np.ndarray, start: np.ndarray, lookaheads):
    """(E, U) head-mean share of each row's mass inside [start, min(T-1, trig + e)].

    One pass over the attention for the mass in ``[start, trig)``; the look-aheads
    only need the ``N + 1`` frames from the trigger on, summed cumulatively.
    """
    L, H, U, T = att.shape
    total = att.sum(axis=-1)  # (L, H, U)
    t = np.arange(T)
    pre_mask = (t[None, :] >= start[:, None]) & (t[None, :] < trig[:, None])
    pre = np.einsum("lhut,ut->lhu", att, pre_mask.astype(att.dtype))
    frames = trig[:, None] + np.arange(int(lookaheads[-1]) + 1)[None, :]  # (U, N + 1)
    win = att[:, :, np.arange(U)[:, None], np.minimum(frames, T - 1)]  # (L, H, U, N + 1)
    win = np.where(frames <= T - 1, win, 0.0)
    inside = pre[..., None] + np.cumsum(win, axis=-1)[..., lookaheads]  # (L, H, U, E)
    with np.errstate(invalid="ignore", divide="ignore"):
        kept = np.where(total[..., None] > 0, inside / total[..., None], np.nan)
    kept = np.clip(kept, 0.0, 1.0)
    with np.errstate(invalid="ignore"):
        n = (~np.isnan(kept)).sum(axis=(0, 1))
        mean = np.where(n > 0, np.nansum(kept, axis=(0, 1)) / np.maximum(n, 1), np.nan)
    return mean.T  # (E, U)


def _iter_utterances(source, problems: list[Problem]):
    if isinstance(source, Bundle):
        problems.extend(Problem(u, m) for u, m in source.manifest_problems)
        for uid in source.ids:
            try:
                yield source[uid]
            except PeekalignError as exc:
                problems.append(Problem(uid, str(exc)))
        return
    if isinstance(source, Utterance):
        yield source
        return
    if not isinstance(source, Iterable):
        raise ParameterError(
            "The 'utterances_or_bundle' parameter of sweep must be a Bundle, an Utterance "
            f"or an iterable of Utterance. Got {type(source).__name__} instead."
        )
    for k, utt in enumerate(source):
        if not isinstance(utt, Utterance):
            raise ParameterError(
                f"The 'utterances_or_bundle' parameter of sweep must hold Utterance "
                f"objects. Got {type(utt).__name__} at position {k} instead."
            )
        yield utt


def sweep(
    utterances_or_bundle,
    *,
    max_lookahead: int = 30,
    target: float = 0.95,
    encoder_lookahead=None,
    front_end_ms: float | None = None,
    trigger_rule: str = "first",
    look_back: int | None = None,
    triggers: str = "greedy",
) -> Sweep:
    """Word reach, kept attention and latency for decoder look-aheads 0..N.

    For each look-ahead ``e``: the share of reference words whose reach margin is
    ``>= 0`` (see :func:`word_reach`; the margin grows by one frame shift per frame
    of look-ahead), the mean share of attention mass inside the windows (when the
    utterances carry attention; rows are mapped to their tokens as in
    :func:`attention_windows`) and the algorithmic look-ahead
    (:func:`algorithmic_lookahead`: ``encoder + e * frame_shift + front_end``, the same
    figure as the view's right context past the trigger; with a per-frame encoder right
    context, ``Utterance.encoder_right_context``, the mean over tokens of what each
    waits for past its trigger). The recommended look-ahead
    is the smallest one whose reach reaches ``target``.

    Parameters
    ----------
    utterances_or_bundle : Bundle, Utterance or iterable of Utterance
    max_lookahead : int
        Largest look-ahead ``N`` in frames.
    target : float
        Reach to reach, in (0, 1].
    encoder_lookahead : int or (layers, per_layer), optional
        Encoder look-ahead; default: the utterances' own (bundle.json ``encoder``).
    front_end_ms : float, optional
        Front end's own look-ahead; default: the utterances' frame clock
        (``right_context_s``, from bundle.json ``front_end``), as the view uses it.
    trigger_rule : {"first", "spike"}
    look_back : int, optional
        Decoder look-back for the attention windows (None: full history).
    triggers : {"greedy", "oracle"}
        Source of the trigger frames (:func:`causal_triggers`): the CTC greedy path
        (causal; reference tokens it never emitted fall back to the forced alignment,
        counted in ``n_oracle_words``), or the forced alignment of the whole
        reference (oracle).

    Returns
    -------
    Sweep
        Utterances that fail (e.g. cannot be aligned) are skipped and listed in
        ``problems``.

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> lp = np.log(np.full((12, 4), 0.25))
    >>> u = Utterance.from_arrays(lp, ref="ab ba", vocab=v)
    >>> s = sweep([u], max_lookahead=4, target=1.0)
    >>> [r.latency_ms for r in s.rows]
    [0.0, 40.0, 80.0, 120.0, 160.0]
    """
    N, front, look_back, fixed_enc = _check_sweep_options(
        max_lookahead, target, front_end_ms, trigger_rule, look_back, triggers, encoder_lookahead
    )
    lookaheads = np.arange(N + 1)
    acc = _SweepSums(
        kept_sum=np.zeros(N + 1), kept_n=np.zeros(N + 1), wait=np.zeros(N + 1, np.int64)
    )
    problems: list[Problem] = []
    options = (fixed_enc, front, trigger_rule, look_back, triggers)
    for utt in _iter_utterances(utterances_or_bundle, problems):
        _sweep_utterance(acc, utt, options, lookaheads, problems)
    shift_s = 0.0 if acc.shift_s is None else acc.shift_s
    enc_used = acc.enc_used
    if front is None:
        front = (acc.front_s or 0.0) * 1000
    n_cov, n_words = _reached_counts(acc, lookaheads, shift_s)
    latency = _sweep_latency(acc, shift_s, front)
    rows, recommended = _sweep_rows(n_cov, n_words, acc.kept_sum, acc.kept_n, latency, target)
    n_utts, sources, n_oracle = acc.n_utts, acc.sources, acc.n_oracle
    return Sweep(
        rows=rows,
        recommended=recommended,
        target=float(target),
        problems=problems,
        n_utterances=n_utts,
        n_words=n_words,
        frame_shift_ms=shift_s * 1000 if shift_s else float("nan"),
        front_end_ms=front,
        encoder_frames=int(enc_used or 0),
        word_sources=sources,
        triggers=triggers,
        n_oracle_words=n_oracle,
        per_frame_right_context=acc.per_frame_rc,
        wait_frames=acc.wait,
        n_tokens=acc.n_tokens,
    )


class _UtteranceCounts(NamedTuple):
    """One utterance's share of a set's sweep (what a corpus scan adds up): words and
    those reached per look-ahead, kept attention per look-ahead (NaN without rows),
    frames waited per look-ahead, tokens, and the model facts the latency needs."""

    n_words: int
    n_oracle_words: int
    n_reached: np.ndarray
    kept: np.ndarray
    wait_frames: np.ndarray
    n_tokens: int
    per_frame_right_context: bool
    encoder_frames: int
    problems: list


def _utterance_counts(
    utt,
    *,
    max_lookahead: int,
    front_end_ms: float | None,
    triggers: str = "greedy",
    alignment=None,
    greedy=None,
) -> _UtteranceCounts:
    """The counts :func:`sweep` gathers, for one utterance, without the set's rows.

    ``sweep([utt], ...)`` gives the same numbers (its rows' ``n_reached`` and
    ``kept_attention``); here the forced alignment and greedy path an analysis already
    made are reused, and no latency is computed (the set's is, once).
    """
    N, front, look_back, fixed_enc = _check_sweep_options(
        max_lookahead, 0.5, front_end_ms, "first", None, triggers, None
    )
    lookaheads = np.arange(N + 1)
    acc = _SweepSums(
        kept_sum=np.zeros(N + 1), kept_n=np.zeros(N + 1), wait=np.zeros(N + 1, np.int64)
    )
    problems: list[Problem] = []
    options = (fixed_enc, front, "first", look_back, triggers)
    _sweep_utterance(acc, utt, options, lookaheads, problems, (alignment, greedy))
    n_cov, n_words = _reached_counts(acc, lookaheads, 0.0 if acc.shift_s is None else acc.shift_s)
    with np.errstate(invalid="ignore", divide="ignore"):
        kept = np.where(acc.kept_n > 0, acc.kept_sum / acc.kept_n, np.nan)
    return _UtteranceCounts(
        n_words, acc.n_oracle, np.asarray(n_cov, dtype=np.int64), kept, acc.wait,
        acc.n_tokens, acc.per_frame_rc, int(acc.enc_used or 0), problems,
    )  # fmt: skip


def _check_sweep_options(
    max_lookahead, target, front_end_ms, trigger_rule, look_back, triggers, encoder_lookahead
) -> tuple:
    """Check :func:`sweep`'s options.

    Returns ``(N, front_end_ms, look_back, encoder_frames)``, None where not given.
    """
    fn = "sweep"
    N = _check_int("max_lookahead", _as_int(max_lookahead), fn)
    ok = isinstance(target, (int, float)) and not isinstance(target, bool) and 0 < target <= 1
    if not ok:
        raise ParameterError(
            f"The 'target' parameter of {fn} must be a float in the range (0, 1]. "
            f"Got {target!r} instead; write 0.95 for 95 %."
        )
    front = None if front_end_ms is None else _check_float("front_end_ms", front_end_ms, fn)
    if trigger_rule not in _RULES:
        raise ParameterError(
            f"The 'trigger_rule' parameter of {fn} must be one of {_RULES}. "
            f"Got {trigger_rule!r} instead."
        )
    if look_back is not None:
        look_back = _check_int("look_back", _as_int(look_back), fn)
    if triggers not in ("greedy", "oracle"):
        raise ParameterError(
            f"The 'triggers' parameter of {fn} must be 'greedy' or 'oracle'. "
            f"Got {triggers!r} instead."
        )
    fixed_enc = None if encoder_lookahead is None else _encoder_frames(encoder_lookahead, fn)
    return N, front, look_back, fixed_enc


@dataclass
class _SweepSums:
    """What :func:`sweep` gathers over the utterances: the model's clock (from the first
    utterance), reach margins at look-ahead 0 and kept attention per look-ahead."""

    kept_sum: np.ndarray
    kept_n: np.ndarray
    wait: np.ndarray  # per e, frames the tokens wait for past their triggers (summed)
    shift_s: float | None = None
    enc_used: int | None = None
    front_s: float | None = None
    n_utts: int = 0
    n_oracle: int = 0
    margins: list = field(default_factory=list)
    sources: dict = field(default_factory=lambda: {"reference": 0, "alignment": 0})
    per_frame: np.ndarray | None = None  # words reached per e, per-frame right contexts
    per_frame_words: int = 0
    per_frame_rc: bool = False
    n_tokens: int = 0

    def check_same_model(self, utt, enc: int, front: float | None, frame_wise=False) -> None:
        """Take the first utterance's frame shift, encoder look-ahead and front end;
        raise :class:`ParameterError` for a later one that differs (the front end only
        when ``front`` is not fixed by the caller)."""
        rc = utt.clock.right_context_s
        if self.shift_s is None:
            self.shift_s, self.enc_used, self.front_s = utt.clock.frame_shift_s, enc, rc
        elif (
            not math.isclose(utt.clock.frame_shift_s, self.shift_s)
            or (enc != self.enc_used and not frame_wise)
            or (front is None and not math.isclose(rc, self.front_s))
        ):
            raise ParameterError(
                describe(
                    f"frame shift {utt.clock.frame_shift_s * 1000:g} ms, encoder "
                    f"look-ahead {enc} frames and front end {rc * 1000:g} ms",
                    f"{self.shift_s * 1000:g} ms, {self.enc_used} frames and "
                    f"{self.front_s * 1000:g} ms like the first utterance",
                    "sweep utterances of one model (one bundle) at a time",
                    utt=utt.id,
                ),
                utt=utt.id,
            )


def _sweep_utterance(
    acc: _SweepSums, utt, options: tuple, lookaheads, problems: list, paths: tuple = (None, None)
) -> None:
    """One utterance's share of :func:`sweep`, added to ``acc``: its reach margins (or,
    with a per-frame right context, its words reached per look-ahead), what its tokens
    wait for and its kept attention; a failure is listed in ``problems`` instead.

    ``paths``: the utterance's forced alignment of the reference and greedy decoding
    when the caller has them already (a scan's analysis), else computed here."""
    fn = "sweep"
    fixed_enc, front, trigger_rule, look_back, triggers = options
    enc = fixed_enc if fixed_enc is not None else _encoder_frames(utt.encoder_lookahead, fn)
    ahead = utt.encoder_ahead if fixed_enc is None else fixed_enc
    frame_wise = isinstance(ahead, np.ndarray)  # a per-frame right context
    acc.check_same_model(utt, enc, front, frame_wise)
    try:
        a, g, w, cov = _reach_at_zero(
            utt, ahead if frame_wise else enc, trigger_rule, look_back, triggers, *paths
        )
        if frame_wise:
            reached = _reached_by_lookahead(utt, a, w, ahead, lookaheads)
    except PeekalignError as exc:
        problems.append(Problem(utt.id, str(exc)))
        return
    acc.n_utts += 1
    acc.sources[cov.source] += 1
    if frame_wise:  # margins do not grow by one shift per frame: counted per e
        acc.per_frame = reached if acc.per_frame is None else acc.per_frame + reached
        acc.per_frame_words += len(cov)
    else:
        acc.margins.append(cov.margin_s)
    acc.n_oracle += int(np.count_nonzero(w.oracle[cov.last_token]))
    acc.per_frame_rc |= frame_wise
    acc.wait += _wait_frames(w.trigger, lookaheads, ahead if frame_wise else enc, w.num_frames, fn)
    acc.n_tokens += len(w.trigger)
    if utt.attention is None:
        return
    try:
        aw, _ = attention_windows(utt, w, trigger_rule=trigger_rule, alignment=a, greedy=g)
    except PeekalignError as exc:
        problems.append(Problem(utt.id, f"attention not used: {exc}"))
        return
    kept = _kept_by_lookahead(
        np.asarray(utt.attention, dtype=np.float64), aw.trigger.astype(np.int64),
        aw.start.astype(np.int64), lookaheads,
    )  # fmt: skip
    good = ~np.isnan(kept)
    acc.kept_sum += np.where(good, kept, 0.0).sum(axis=1)
    acc.kept_n += good.sum(axis=1)


def _reached_counts(acc: _SweepSums, lookaheads, shift_s: float) -> tuple[list[int], int]:
    """Words reached per look-ahead over the sweep's utterances, and the words."""
    m0 = np.sort(np.concatenate(acc.margins)) if acc.margins else np.zeros(0)
    n_words = int(m0.size) + acc.per_frame_words
    extra = acc.per_frame if acc.per_frame is not None else np.zeros(len(lookaheads), np.int64)
    # margin(e) = margin(0) + e * shift: reached when margin(0) >= -tol - e * shift
    n_cov = [
        int(m0.size - np.searchsorted(m0, -MARGIN_TOL_S - e * shift_s, side="left"))
        + int(extra[e])
        for e in lookaheads.tolist()
    ]
    return n_cov, n_words


def _sweep_latency(acc: _SweepSums, shift_s: float, front: float) -> Callable | None:
    """The sweep's latency in ms per look-ahead (None without a frame shift): the
    algorithmic look-ahead, or the tokens' mean wait with per-frame right contexts."""
    if not shift_s:
        return None

    def latency(e: int) -> float:
        if acc.per_frame_rc:  # what the tokens wait for, on average
            return _mean_wait_ms(acc.wait[e], acc.n_tokens, shift_s * 1000, front)
        clock = FrameClock(shift_s, right_context_s=front / 1000)
        return algorithmic_lookahead(
            clock, lookahead=e, encoder_lookahead=int(acc.enc_used or 0)
        ).total_ms

    return latency


def _reached_by_lookahead(utt, alignment, windows: Windows, ahead, lookaheads) -> np.ndarray:
    """Words reached at each decoder look-ahead with a per-frame encoder right context
    (the windows' triggers, the margins recomputed for every look-ahead)."""
    out = np.zeros(len(lookaheads), np.int64)
    for j, e in enumerate(lookaheads.tolist()):
        w = token_windows(
            windows.trigger, num_frames=windows.num_frames, clock=windows.clock, lookahead=e,
            look_back=windows.look_back, encoder_lookahead=ahead,
        )  # fmt: skip
        out[j] = int(np.count_nonzero(word_reach(utt, alignment, w).margin_s >= -MARGIN_TOL_S))
    return out


def _reach_at_zero(utt, enc, trigger_rule, look_back, triggers, a=None, g=None) -> tuple:
    """Forced alignment, greedy path, windows at look-ahead 0 and word reach of one
    utterance: ``(alignment, greedy, windows, reach)``; ``a`` and ``g``, when given,
    are the alignment and greedy path already computed for it."""
    if a is None:
        a = align_tokens(utt.log_probs, utt.ref_tokens, utt.blank, utt=utt.id)
    if g is None:
        g = greedy_decode(utt.log_probs, blank=utt.blank)
    w = token_windows(
        causal_triggers(utt, a, source=triggers, rule=trigger_rule, greedy=g),
        num_frames=utt.num_frames,
        clock=utt.clock,
        lookahead=0,
        look_back=look_back,
        encoder_lookahead=enc,
    )
    return a, g, w, word_reach(utt, a, w)


def _sweep_rows(
    n_reached, n_words: int, kept_sum, kept_n, latency: Callable | None, target: float
) -> tuple[list[SweepRow], int | None]:
    """A sweep's rows from its counts per look-ahead ``e = 0, 1, ...``, and the
    recommended look-ahead.

    ``n_reached[e]`` words of ``n_words`` reached, kept attention
    ``kept_sum[e] / kept_n[e]`` (NaN without rows), latency ``latency(e)`` in ms (NaN
    when ``latency`` is None: no frame shift known). The recommendation is the
    smallest ``e`` whose reach is at least ``target`` (None if none is).
    """
    rows = []
    recommended = None
    for e in range(len(n_reached)):
        n_cov = int(n_reached[e])
        reach = n_cov / n_words if n_words else float("nan")
        kept = float(kept_sum[e] / kept_n[e]) if kept_n[e] else float("nan")
        lat = latency(e) if latency is not None else float("nan")
        rows.append(SweepRow(e, lat, reach, kept, n_words, n_cov))
        if recommended is None and n_words and reach >= target:
            recommended = e
    return rows, recommended
