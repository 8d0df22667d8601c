"""The decoder protocol, and decoding with the attention decoder under truncation.

A :class:`Decoder` is the user's attention decoder, opened once per utterance into an
:class:`UtteranceDecoder` bound to that utterance's encoder output. Its one method
returns the log-probabilities of the next token for a batch of (prefix, last visible
encoder frame) pairs; nothing here imports torch, so any framework (or plain numpy)
can implement it.

Two ways of decoding under a decoder look-ahead ``e`` use it:

- :func:`triggered_decode` (triggered attention (2019)): the CTC branch fixes one
  trigger frame ``n_u`` per output token (CTC greedy, or the traced prefix search's
  best hypothesis), and the decoder emits one token per trigger from encoder frames
  ``[0, n_u + e]``;
- joint decoding (hybrid CTC/attention joint decoding (2017)):
  :func:`peekalign.search.prefix_search` with ``decoder=`` adds
  ``decoder_weight * log P_dec(token | prefix, frames [0, n + e])`` when it creates a
  prefix at trigger frame ``n``.

``lookahead=None`` is full context: every window ends at the last frame.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol, runtime_checkable

import numpy as np

from .exceptions import ParameterError, describe

if TYPE_CHECKING:  # pragma: no cover
    from .model import Utterance

__all__ = [
    "Decoded",
    "Decoder",
    "UtteranceDecoder",
    "check_decoder",
    "ctc_triggers",
    "decoder_log_probs",
    "triggered_decode",
    "window_end",
]

TRIGGER_SOURCES = ("greedy", "search")


@runtime_checkable
class UtteranceDecoder(Protocol):
    """The decoder bound to one utterance's encoder output.

    It may keep state between calls (e.g. a cache per prefix); peekalign calls it
    with prefixes that grow by one token at a time.
    """

    def log_probs(
        self, prefixes: Sequence[Sequence[int]], last_frames: Sequence[int]
    ) -> np.ndarray:
        """Log-probabilities of the next token, one row per (prefix, last frame).

        Parameters
        ----------
        prefixes : sequence of sequence of int
            Token ids emitted so far (CTC ids, no blanks; no start symbol: add your
            own inside).
        last_frames : sequence of int
            Last encoder frame the decoder may see for that row (frames
            ``[0, last_frame]``); ``T - 1`` is full context.

        Returns
        -------
        ndarray, shape (B, V_dec)
            Row ``b``: ``log P(next token | prefixes[b], frames [0, last_frames[b]])``.
            Index ``k < V_ctc`` is CTC token ``k`` (the blank is never emitted);
            the decoder's ``eos`` index is end-of-sentence.
        """
        ...


@runtime_checkable
class Decoder(Protocol):
    """A model's attention decoder, opened once per utterance.

    Attributes
    ----------
    eos : int
        Index of end-of-sentence in the decoder's output vector (may be ``>= V_ctc``).
    """

    eos: int

    def open(self, utt: Utterance) -> UtteranceDecoder:
        """Bind the decoder to ``utt`` (its encoder output, its frame count)."""
        ...


def check_decoder(decoder, func: str = "redecode") -> None:
    """Raise a clear :class:`ParameterError` unless ``decoder`` follows :class:`Decoder`.

    Examples
    --------
    >>> check_decoder(object())
    Traceback (most recent call last):
    ...
    peekalign.exceptions.ParameterError: The 'decoder' parameter of redecode must ...
    """
    eos = getattr(decoder, "eos", None)
    ok = callable(getattr(decoder, "open", None)) and isinstance(eos, (int, np.integer))
    if not ok or isinstance(eos, bool) or eos < 0:
        raise ParameterError(
            f"The 'decoder' parameter of {func} must follow peekalign.decoder.Decoder "
            "(an int attribute 'eos' >= 0 and a method open(utt) returning an object with "
            f"log_probs(prefixes, last_frames)). Got {type(decoder).__name__} instead."
        )


def window_end(trigger: int, lookahead: int | None, num_frames: int) -> int:
    """Last encoder frame visible to the decoder: ``min(T - 1, trigger + lookahead)``.

    ``lookahead=None`` is full context (``T - 1``).

    Examples
    --------
    >>> window_end(3, 2, 10), window_end(8, 5, 10), window_end(0, None, 10)
    (5, 9, 9)
    """
    if lookahead is None:
        return num_frames - 1
    return min(num_frames - 1, int(trigger) + int(lookahead))


def decoder_log_probs(
    udec: UtteranceDecoder,
    prefixes: Sequence[Sequence[int]],
    last_frames: Sequence[int],
    *,
    utt: str | None = None,
) -> np.ndarray:
    """Call ``udec.log_probs`` and check what comes back.

    Returns a float64 array of shape ``(len(prefixes), V_dec)``. A wrong shape, NaN or
    ``+inf`` is a :class:`ParameterError` naming the utterance and the first bad row.

    Examples
    --------
    >>> import numpy as np
    >>> class Uniform:
    ...     def log_probs(self, prefixes, last_frames):
    ...         return np.full((len(prefixes), 4), np.log(0.25))
    >>> decoder_log_probs(Uniform(), [[], [2]], [0, 1]).shape
    (2, 4)
    """
    out = np.asarray(udec.log_probs(prefixes, last_frames), dtype=np.float64)
    B = len(prefixes)
    if out.ndim != 2 or out.shape[0] != B or out.shape[1] < 1:
        raise ParameterError(
            describe(
                f"the decoder's log_probs returned shape {out.shape} for {B} prefixes",
                f"a ({B}, V_dec) array, one row per prefix",
                "return one row of next-token log-probabilities per (prefix, last frame)",
                utt=utt,
            ),
            utt=utt,
        )
    bad = ~(out < np.inf)  # NaN and +inf
    if bad.any():
        b = int(np.argwhere(bad)[0][0])
        raise ParameterError(
            describe(
                f"{float(out[b][bad[b]][0])} from the decoder for prefix "
                f"{[int(x) for x in prefixes[b]]} with last frame {int(last_frames[b])}",
                "log-probabilities (finite or -inf)",
                "check the decoder (a log_softmax over its output layer)",
                utt=utt,
            ),
            utt=utt,
        )
    return out


def ctc_triggers(
    log_probs,
    *,
    blank: int = 0,
    source: str = "greedy",
    search_options: dict | None = None,
    utt: str | None = None,
) -> np.ndarray:
    """Trigger frames the CTC branch gives a streaming decoder, one per output token.

    ``source="greedy"``: the first frame of each token's run in CTC greedy decoding;
    ``"search"``: the trigger frames of the best hypothesis of the traced prefix search
    (:func:`peekalign.search.prefix_search` with ``search_options``). Both come from
    frames a streaming system has already seen.

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.array([[.1, .9, 0], [.9, .1, 0], [.1, 0, .9]]) + 1e-9)
    >>> ctc_triggers(lp).tolist()
    [0, 2]
    """
    if source not in TRIGGER_SOURCES:
        raise ParameterError(
            f"The 'triggers' parameter must be one of {TRIGGER_SOURCES}. Got {source!r} instead."
        )
    if source == "greedy":
        from .align import greedy_decode

        return greedy_decode(log_probs, blank=blank).first.astype(np.int32)
    from .search import prefix_search

    opts = dict(search_options or {})
    res = prefix_search(log_probs, blank=blank, trace=False, utt=utt, **opts)
    return res.best.trigger_frames.astype(np.int32)


@dataclass(frozen=True, eq=False)
class Decoded:
    """Triggered decoding of one utterance at one look-ahead.

    Attributes
    ----------
    tokens : ndarray of int32, shape (U,)
        One emitted token per trigger.
    trigger_frames : ndarray of int32, shape (U,)
    last_frames : ndarray of int32, shape (U,)
        Last encoder frame the decoder saw for each token.
    token_log_probs : ndarray of float64, shape (U,)
        The decoder's log-probability of each emitted token.
    lookahead : int or None
        ``None``: full context.
    """

    tokens: np.ndarray
    trigger_frames: np.ndarray
    last_frames: np.ndarray
    token_log_probs: np.ndarray
    lookahead: int | None

    @property
    def score(self) -> float:
        """Sum of the emitted tokens' log-probabilities."""
        return float(self.token_log_probs.sum())


def _check_lookaheads(lookaheads, func: str) -> list[int | None]:
    if lookaheads is None or isinstance(lookaheads, (int, np.integer)):
        lookaheads = [lookaheads]
    out = []
    for e in lookaheads:
        if e is not None and (isinstance(e, bool) or not isinstance(e, (int, np.integer))):
            raise ParameterError(
                f"The 'lookaheads' parameter of {func} must hold ints >= 0 or None (full "
                f"context). Got {e!r} instead."
            )
        if e is not None and e < 0:
            raise ParameterError(
                f"The 'lookaheads' parameter of {func} must hold ints >= 0 or None (full "
                f"context). Got {e!r} instead."
            )
        out.append(None if e is None else int(e))
    return out


def triggered_decode(
    udec: UtteranceDecoder,
    triggers,
    *,
    num_frames: int,
    lookaheads=None,
    eos: int | None = None,
    blank: int | None = 0,
    utt: str | None = None,
) -> list[Decoded]:
    """Triggered decoding: one decoder token per CTC trigger, from frames ``[0, n_u + e]``.

    At step ``u`` the decoder sees the tokens it emitted so far and encoder frames
    ``[0, min(T - 1, n_u + e)]`` and emits its best token (the blank and ``eos``
    excluded: the CTC branch decides how many tokens there are, as in triggered
    attention (2019)). All look-aheads advance together, so each step is one batched
    call; rows with the same (prefix, last frame) are asked once.

    Parameters
    ----------
    udec : UtteranceDecoder
    triggers : sequence of int
        Trigger frame of each output token (non-decreasing), e.g. :func:`ctc_triggers`.
    num_frames : int
        Encoder frames ``T`` of the utterance.
    lookaheads : int, None or sequence of (int or None)
        Decoder look-aheads in frames; ``None`` is full context. Default: full context.
    eos : int, optional
        The decoder's end-of-sentence index (never emitted).
    blank : int or None
        CTC blank id (never emitted).
    utt : str, optional
        Utterance id for messages.

    Returns
    -------
    list of Decoded
        One per look-ahead, in the order given.

    Examples
    --------
    A decoder that reads the token off the last visible frame:

    >>> import numpy as np
    >>> frames = np.array([1, 1, 2, 2, 3])  # the "encoder": token heard at each frame
    >>> class LastFrame:
    ...     def log_probs(self, prefixes, last_frames):
    ...         out = np.full((len(prefixes), 5), np.log(0.01))
    ...         out[np.arange(len(prefixes)), frames[list(last_frames)]] = 0.0
    ...         return out
    >>> [d.tokens.tolist() for d in triggered_decode(LastFrame(), [0, 2], num_frames=5,
    ...                                              lookaheads=[0, 2, None])]
    [[1, 2], [2, 3], [3, 3]]
    """
    fn = "triggered_decode"
    T = int(num_frames)
    if T < 1:
        raise ParameterError(
            f"The 'num_frames' parameter of {fn} must be an int >= 1. Got {num_frames!r} instead."
        )
    trig = np.asarray(triggers, dtype=np.int64).reshape(-1)
    if trig.size and (trig.min() < 0 or trig.max() >= T or np.any(np.diff(trig) < 0)):
        raise ParameterError(
            describe(
                f"trigger frames {trig.tolist()[:8]}{'...' if trig.size > 8 else ''}",
                f"non-decreasing frames in [0, {T})",
                "take them from ctc_triggers() of the same utterance",
                utt=utt,
            ),
            utt=utt,
        )
    eps = _check_lookaheads(lookaheads, fn)
    E, U = len(eps), int(trig.size)
    toks = np.zeros((E, U), np.int32)
    ends = np.zeros((E, U), np.int32)
    lps = np.zeros((E, U), np.float64)
    for u in range(U):
        rows: dict[tuple, int] = {}
        order = []
        for j, e in enumerate(eps):
            key = (tuple(toks[j, :u].tolist()), window_end(int(trig[u]), e, T))
            ends[j, u] = key[1]
            if key not in rows:
                rows[key] = len(rows)
                order.append(key)
            order_ix = rows[key]
            toks[j, u] = order_ix  # row index for now, replaced below
        out = decoder_log_probs(udec, [k[0] for k in order], [k[1] for k in order], utt=utt)
        masked = out.copy()
        for k in (eos, blank):
            if k is not None and 0 <= k < masked.shape[1]:
                masked[:, k] = -math.inf
        best = masked.argmax(axis=1)
        for j in range(E):
            r = int(toks[j, u])
            toks[j, u] = int(best[r])
            lps[j, u] = float(out[r, best[r]])
    return [
        Decoded(toks[j].copy(), trig.astype(np.int32), ends[j].copy(), lps[j].copy(), e)
        for j, e in enumerate(eps)
    ]
