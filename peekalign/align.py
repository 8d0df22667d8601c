"""CTC alignment: Viterbi forced alignment, forward-backward occupancy, greedy decoding
and spikes.

All functions take frame log-posteriors ``log_probs`` of shape (T, V) (rows are
log-softmax outputs; see :func:`peekalign.scores.to_log_probs` for other kinds) and
token ids without blanks.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from . import _kernels
from .exceptions import AlignmentError, ParameterError, describe
from .vocab import Vocabulary

__all__ = [
    "Alignment",
    "TokenRun",
    "WordRun",
    "StateOccupancy",
    "Greedy",
    "Spikes",
    "align_tokens",
    "forward_backward",
    "greedy_decode",
    "find_spikes",
    "word_runs",
    "extend_labels",
    "required_frames",
    "OCCUPANCY_FLOOR",
]


class TokenRun(NamedTuple):
    """Frames of one reference token on the Viterbi path (inclusive)."""

    index: int
    token: int
    first: int
    last: int
    spike: int


class WordRun(NamedTuple):
    """Frames of one word: its tokens ``[first_token, last_token]`` and frame span."""

    word: str
    first_token: int
    last_token: int
    first: int
    last: int


@dataclass(frozen=True, eq=False)
class Alignment:
    """Result of :func:`align_tokens`.

    Attributes
    ----------
    score : float
        Log-probability of the best CTC path.
    tokens : ndarray, shape (U,)
        The aligned token ids.
    states : ndarray, shape (T,)
        Index into the extended label sequence (blank, l1, blank, ...) per frame;
        token ``u`` is state ``2u + 1``.
    first, last, spike : ndarray, shape (U,)
        First frame, last frame and frame of highest posterior of each token.
    blank : int
    """

    score: float
    tokens: np.ndarray
    states: np.ndarray
    first: np.ndarray
    last: np.ndarray
    spike: np.ndarray
    blank: int

    @property
    def num_frames(self) -> int:
        return int(self.states.shape[0])

    @property
    def runs(self) -> tuple[TokenRun, ...]:
        """One :class:`TokenRun` per token, in order."""
        return tuple(
            TokenRun(u, int(k), int(f), int(la), int(p))
            for u, (k, f, la, p) in enumerate(
                zip(self.tokens, self.first, self.last, self.spike, strict=True)
            )
        )

    def frame_labels(self) -> np.ndarray:
        """Token id per frame on the path (blank where the path sits on a blank)."""
        ext = extend_labels(self.tokens, self.blank)
        return ext[self.states]

    def triggers(self, rule: str = "first") -> np.ndarray:
        """Trigger frame per token: ``"first"`` frame of its run or its ``"spike"``."""
        if rule == "first":
            return self.first.copy()
        if rule == "spike":
            return self.spike.copy()
        raise ParameterError(
            "The 'rule' parameter of Alignment.triggers must be one of ('first', 'spike'). "
            f"Got {rule!r} instead."
        )

    def __repr__(self) -> str:
        return (
            f"Alignment(score={self.score:.3f}, frames={self.num_frames}, "
            f"tokens={len(self.tokens)})"
        )


#: Default occupancy floor of :func:`forward_backward`: entries at or below it are not
#: kept (DEVELOPERS.md, "State occupancy").
OCCUPANCY_FLOOR = 1e-6


@dataclass(frozen=True, eq=False)
class StateOccupancy:
    """Result of :func:`forward_backward`: the CTC state occupancy, stored sparse.

    For each extended state ``s`` (token ``u`` is state ``2u + 1``, blanks are the even
    states) the frames where its occupancy is above ``floor``, and those values: a
    peaky model puts almost all of a frame's mass on a few states, so an hour of input
    takes megabytes instead of a (T, 2U+1) array of gigabytes. The blank occupancy
    per frame and each token's largest occupancy are exact (taken before the floor).

    Attributes
    ----------
    log_likelihood : float
        ``log P(l | x)``, summed over all CTC paths.
    tokens : ndarray, shape (U,)
    num_frames : int
    floor : float
        Occupancies at or below it are not stored (read as 0).
    state_ptr : ndarray of int64, shape (2U+2,)
        Entries of state ``s`` are ``frames[state_ptr[s]:state_ptr[s+1]]`` (increasing)
        and the same slice of ``values``.
    frames : ndarray of int32, shape (N,)
    values : ndarray of float64, shape (N,)
    blank_occupancy : ndarray of float64, shape (T,)
        Posterior probability that frame t is on a blank (all blank states, exact).
    token_max : ndarray of float64, shape (U,)
        Largest occupancy of each token over all frames (exact).
    """

    log_likelihood: float
    tokens: np.ndarray
    num_frames: int
    floor: float
    state_ptr: np.ndarray
    frames: np.ndarray
    values: np.ndarray
    blank_occupancy: np.ndarray
    token_max: np.ndarray

    def token_frames(self, u: int) -> tuple[np.ndarray, np.ndarray]:
        """``(frames, values)`` of token ``u`` above the floor, frames increasing."""
        s = 2 * int(u) + 1
        a, b = int(self.state_ptr[s]), int(self.state_ptr[s + 1])
        return self.frames[a:b], self.values[a:b]

    def dense_states(self) -> np.ndarray:
        """(T, 2U+1) occupancy array, 0 at or below the floor (short inputs only)."""
        S = self.state_ptr.size - 1
        out = np.zeros((self.num_frames, S))
        states = np.repeat(np.arange(S), np.diff(self.state_ptr))
        out[self.frames, states] = self.values
        return out

    def dense_tokens(self, dtype=np.float64) -> np.ndarray:
        """(T, U) occupancy of each token per frame, 0 at or below the floor."""
        U = self.tokens.size
        out = np.zeros((self.num_frames, U), dtype)
        counts = np.diff(self.state_ptr)[1::2]
        ptr = self.state_ptr[1::2]
        for u in np.flatnonzero(counts):
            a = int(ptr[u])
            out[self.frames[a : a + counts[u]], u] = self.values[a : a + counts[u]]
        return out

    def confidence(self) -> np.ndarray:
        """Per-token confidence: the largest occupancy any frame gives the token."""
        return self.token_max.copy()


class Greedy(NamedTuple):
    """Best-path (greedy) CTC decoding: collapsed tokens and their frames."""

    tokens: np.ndarray
    first: np.ndarray
    last: np.ndarray
    spike: np.ndarray


class Spikes(NamedTuple):
    """Frames where a non-blank token wins the frame and tops its run."""

    frames: np.ndarray
    tokens: np.ndarray
    probs: np.ndarray


def extend_labels(tokens, blank: int = 0) -> np.ndarray:
    """Extended label sequence ``(b, l1, b, ..., lU, b)``.

    Examples
    --------
    >>> extend_labels([3, 3, 5], blank=0).tolist()
    [0, 3, 0, 3, 0, 5, 0]
    """
    tokens = np.asarray(tokens, dtype=np.int64).reshape(-1)
    ext = np.full(2 * tokens.shape[0] + 1, blank, dtype=np.int64)
    ext[1::2] = tokens
    return ext


def required_frames(tokens) -> tuple[int, int]:
    """Frames a CTC alignment needs: ``(U + repeats, repeats)``.

    Examples
    --------
    >>> required_frames([1, 1, 2, 2, 2])
    (8, 3)
    """
    t = np.asarray(tokens).reshape(-1)
    repeats = int(np.count_nonzero(t[1:] == t[:-1])) if t.size > 1 else 0
    return int(t.size) + repeats, repeats


# Bytes of int8 backpointers align_tokens keeps in one piece (T * (2U + 1)).
_BP_BUDGET = 1 << 27


# Bytes of float64 alpha rows forward_backward keeps in one piece (T * (2U + 1) * 8).
_FB_BUDGET = 1 << 27

#: Long inputs (beyond _FB_BUDGET): a frame carries only the states whose forward
#: variable is within this many nats of the frame's best (e^-200 ~ 1e-87), and those
#: reachable from them (DEVELOPERS.md, "State occupancy").
PRUNE_NATS = 200.0


def _checkpoint_interval(T: int) -> int:
    """K minimising T/K float64 columns plus K int8 rows: K = sqrt(8 T)."""
    return max(1, int(np.sqrt(8.0 * T)))


_NO_TABLE = np.zeros(1, np.float32)


@functools.cache
def _f16_table() -> np.ndarray:
    """float32 value of every float16 bit pattern (exact)."""
    return (
        np.arange(1 << 16, dtype=np.uint32).astype(np.uint16).view(np.float16).astype(np.float32)
    )


def _kernel_input(lp: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(data, tab)`` for the kernels: float16 is read as its bits, not copied."""
    if lp.dtype == np.float16:
        return lp.view(np.uint16), _f16_table()
    return lp, _NO_TABLE


def _trellis(toks: np.ndarray, blank: int):
    """Kernel inputs for the extended labels: ``(cols, idx, pen)``.

    ``cols`` are the distinct ids of ``ext`` sorted and ``idx`` maps each state to
    its column (``ext == cols[idx]``); ``pen`` is 0 where the skip s-2 -> s is allowed
    (not blank, not a repeat), else -inf.
    """
    ext = extend_labels(toks, blank)
    cols, idx = np.unique(ext, return_inverse=True)
    pen = np.full(ext.size, -np.inf)
    if ext.size > 2:
        ok = (ext[2:] != blank) & (ext[2:] != ext[:-2])
        pen[2:][ok] = 0.0
    # unsigned indices: the kernels skip numba's negative-index wrap-around test
    return cols.astype(np.uint64), idx.astype(np.uint64).reshape(-1), pen


def _check_tokens(tokens, blank: int, V: int, utt: str | None) -> np.ndarray:
    """Token ids as int64: integers in ``[0, V)``, none of them the blank."""
    toks = np.asarray(tokens)
    if toks.size and not np.issubdtype(toks.dtype, np.integer):
        raise ParameterError(
            describe(
                f"tokens of dtype {toks.dtype}",
                "integer token ids",
                "encode the text first (Vocabulary.encode)",
                utt=utt,
            )
        )
    toks = toks.astype(np.int64).reshape(-1)
    if toks.size:
        bad = toks[(toks < 0) | (toks >= V)]
        if bad.size:
            raise ParameterError(
                describe(
                    f"token id {int(bad[0])}",
                    f"ids in [0, {V})",
                    "check that the vocabulary matches the model",
                    utt=utt,
                )
            )
        if np.any(toks == blank):
            raise ParameterError(
                describe(
                    f"the blank id {blank} among the tokens",
                    "no blank in the label sequence",
                    "drop blanks from the reference tokens",
                    utt=utt,
                )
            )
    return toks


def _not_finite(utt: str | None, frame: int | None = None) -> ParameterError:
    """The error for NaN or +inf in the log-posteriors (at ``frame`` when known)."""
    at = "" if frame is None else f" (frame {frame})"
    return ParameterError(
        describe(
            f"NaN or +inf in log_probs{at}",
            "finite log-probabilities",
            "check the model's output (overflow) or the dump",
            utt=utt,
        )
    )


def _check_finite(lp: np.ndarray, utt: str | None) -> None:
    """No NaN or +inf in the log-posteriors (the kernels check as they read; this is
    for the paths that do not)."""
    # max() is NaN when any entry is NaN and +inf when any is +inf: one pass, no temporary
    if lp.dtype == np.float16:
        lp = np.ascontiguousarray(lp)
        bad = _kernels.has_nan_or_posinf16(lp.view(np.uint16).reshape(-1))
    else:
        bad = not lp.max() < np.inf
    if bad:
        raise _not_finite(utt)


def _check(log_probs, tokens, blank: int, utt: str | None):
    """Checked ``(log_probs, tokens)`` for the kernels: contiguous floats, int64 ids.

    NaN and +inf are left to the kernels, which scan each row as they read it (one
    pass over the input instead of two) and report the first bad frame.
    """
    lp = np.asarray(log_probs)
    if lp.ndim != 2:
        raise ParameterError(
            describe(
                f"log_probs of shape {lp.shape}",
                "a 2-D array (frames, vocabulary)",
                "pass one utterance's (T, V) log-posteriors",
                utt=utt,
            )
        )
    T, V = lp.shape
    if T == 0 or V == 0:
        raise ParameterError(
            describe(
                f"log_probs of shape {lp.shape}", "T >= 1 and V >= 1", "check the dump", utt=utt
            )
        )
    if not np.issubdtype(lp.dtype, np.floating):
        lp = lp.astype(np.float32)
    if not (isinstance(blank, (int, np.integer)) and 0 <= blank < V):
        raise ParameterError(
            f"The 'blank' parameter must be an int in the range [0, {V}). Got {blank!r} instead."
        )
    toks = _check_tokens(tokens, blank, V, utt)
    need, repeats = required_frames(toks)
    if need > T:
        prefix = f"utt {utt!r}: " if utt is not None else ""
        raise AlignmentError(
            prefix + f"reference needs {need} frames ({toks.size} tokens + {repeats} repeats) but "
            f"log_probs has {T}; check the frame shift or the subsampling, or the reference",
            utt=utt,
        )
    return np.ascontiguousarray(lp), toks


def align_tokens(log_probs, tokens, blank: int = 0, *, utt: str | None = None) -> Alignment:
    """CTC Viterbi forced alignment of ``tokens`` to ``log_probs``.

    Parameters
    ----------
    log_probs : ndarray, shape (T, V)
        Frame log-posteriors (log-softmax).
    tokens : sequence of int, length U
        Reference token ids, no blanks. May be empty (all-blank path).
    blank : int
        Blank id.
    utt : str, optional
        Utterance id used in error messages.

    Returns
    -------
    Alignment
        Best path score, state per frame and per-token segments (first, last and
        spike frame). The spike is the frame of highest posterior of the token inside
        its segment.

    Raises
    ------
    AlignmentError
        When ``T < U + repeats`` or no path has finite probability.

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.array([[0.8, 0.1, 0.1], [0.1, 0.8, 0.1], [0.7, 0.2, 0.1],
    ...                       [0.1, 0.1, 0.8]]))
    >>> a = align_tokens(lp, [1, 2])
    >>> [(s.token, s.first, s.last) for s in a.runs]
    [(1, 1, 1), (2, 3, 3)]
    """
    lp, toks = _check(log_probs, tokens, blank, utt)
    cols, idx, pen = _trellis(toks, blank)
    T, S = lp.shape[0], idx.size
    # int8 backpointers up to _BP_BUDGET bytes; beyond, a checkpointed pass (every
    # K-th score column kept, one K-frame segment of backpointers at a time)
    interval = 0 if T * S <= _BP_BUDGET else _checkpoint_interval(T)
    data, tab = _kernel_input(lp)
    score, states, bad = _kernels.viterbi(data, tab, cols, idx, pen, interval)
    if bad >= 0:
        raise _not_finite(utt, bad)
    if not np.isfinite(score):
        raise AlignmentError(
            describe(
                "no CTC path with non-zero probability",
                "at least one path through the reference tokens",
                "some token has probability 0 at every frame it could take; check the "
                "vocabulary mapping",
                utt=utt,
            ),
            utt=utt,
        )
    # each token's state is visited in one contiguous run of frames
    first, last, spike = _kernels.segments(data, tab, states, toks)
    return Alignment(
        score=float(score),
        tokens=toks.astype(np.int32),
        states=states,
        first=first,
        last=last,
        spike=spike,
        blank=int(blank),
    )


def forward_backward(
    log_probs,
    tokens,
    blank: int = 0,
    *,
    floor: float = OCCUPANCY_FLOOR,
    utt: str | None = None,
) -> StateOccupancy:
    """CTC forward-backward: ``log P(l|x)`` and the state occupancy above ``floor``.

    ``gamma[t, s] = alpha[t, s] + beta[t, s] - y[t, l'_s] - log P`` (Graves et al.,
    2006), returned as probabilities. Long inputs (over 128 MB of alpha rows) are
    checkpointed like the Viterbi (alpha kept every K frames and recomputed one segment
    at a time), so memory grows with ``sqrt(T) * U`` plus the kept entries, not with
    ``T * U``; there each frame also carries only the states whose forward variable is
    within :data:`PRUNE_NATS` (200) nats of the frame's best, which makes an hour take
    seconds instead of minutes. The recursion is the scaled probability-domain one
    (Rabiner, 1989), with the log-domain one as the fallback on near-degenerate input
    (DEVELOPERS.md, "State occupancy").

    Parameters
    ----------
    log_probs : ndarray, shape (T, V)
    tokens : sequence of int, length U
    blank : int
    floor : float
        Occupancies at or below it are not kept (default :data:`OCCUPANCY_FLOOR`,
        1e-6); 0 keeps every non-zero entry. The blank occupancy and the per-token
        confidence are exact whatever the floor.
    utt : str, optional
        Utterance id used in error messages.

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.full((3, 2), 0.5))
    >>> sa = forward_backward(lp, [1])
    >>> round(float(np.exp(sa.log_likelihood)), 4)  # 6 of the 8 paths emit "1"
    0.75
    >>> np.allclose(sa.dense_states().sum(axis=1), 1)
    True
    >>> sa.token_frames(0)[0].tolist()  # frames where the token can sit
    [0, 1, 2]
    """
    lp, toks = _check(log_probs, tokens, blank, utt)
    if not (isinstance(floor, (int, float, np.floating)) and 0 <= floor < 1):
        raise ParameterError(
            f"The 'floor' parameter of forward_backward must be a float in the range "
            f"[0, 1). Got {floor!r} instead."
        )
    cols, idx, pen = _trellis(toks, blank)
    T, S = lp.shape[0], idx.size
    # every alpha row up to _FB_BUDGET bytes; beyond, rows every K frames and one
    # K-frame segment recomputed at a time (K = sqrt(T): T/K + K rows)
    long = T * S * 8 > _FB_BUDGET
    interval = max(1, int(np.sqrt(T))) if long else 0
    margin = PRUNE_NATS if long else np.inf
    data, tab = _kernel_input(lp)
    skip = (pen == 0.0).astype(np.float64)
    ok, bad, total, n, rs, rt, rv, blank_occ, token_max = _kernels.occupancy_scaled(
        data, tab, cols, idx, skip, interval, float(floor), margin
    )
    if bad >= 0:
        raise _not_finite(utt, bad)
    if not ok:
        # near-degenerate input (states the scaled recursion cannot hold without
        # underflow matter): the log-domain recursion, 5-10x slower, is exact there
        if bad == -2:
            _check_finite(lp, utt)
        total, n, rs, rt, rv, blank_occ, token_max = _kernels.occupancy_sparse(
            data, tab, cols, idx, pen, interval, float(floor), margin
        )
    if not np.isfinite(total):
        raise AlignmentError(
            describe(
                "log P(l|x) = -inf",
                "a finite likelihood",
                "some token has probability 0 wherever it could sit; check the vocabulary",
                utt=utt,
            ),
            utt=utt,
        )
    # records come in decreasing frame order: reversed, a stable sort by state leaves
    # each state's frames increasing
    rs, rt, rv = rs[:n][::-1], rt[:n][::-1], rv[:n][::-1]
    order = np.argsort(rs, kind="stable")
    ptr = np.zeros(S + 1, np.int64)
    np.cumsum(np.bincount(rs, minlength=S), out=ptr[1:])
    return StateOccupancy(
        log_likelihood=float(total),
        tokens=toks.astype(np.int32),
        num_frames=int(T),
        floor=float(floor),
        state_ptr=ptr,
        frames=np.ascontiguousarray(rt[order]),
        values=np.ascontiguousarray(rv[order]),
        blank_occupancy=blank_occ,
        token_max=token_max,
    )


def greedy_decode(log_probs, *, blank: int = 0) -> Greedy:
    """Best-path CTC decoding: arg-max per frame, merge repeats, drop blanks.

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.array([[.1, .9, 0], [.1, .9, 0], [.9, .1, 0], [.1, .1, .8]]) + 1e-9)
    >>> g = greedy_decode(lp)
    >>> g.tokens.tolist(), g.first.tolist(), g.last.tolist()
    ([1, 2], [0, 3], [1, 3])
    """
    lp = np.asarray(log_probs)
    best = lp.argmax(axis=1)
    T = best.size
    if T == 0:
        empty = np.zeros(0, np.int32)
        return Greedy(empty, empty, empty, empty)
    change = np.r_[True, best[1:] != best[:-1]]
    starts = np.flatnonzero(change)
    ends = np.r_[starts[1:], T] - 1
    # spike = first frame of the run where the run's token peaks; inside a run the
    # token wins every frame, so its log-prob there is the row maximum
    frames = np.arange(T)
    top = lp[frames, best]
    run_top = np.maximum.reduceat(top, starts)[np.cumsum(change) - 1]
    at_top = (top == run_top) | (np.isnan(top) & np.isnan(run_top))  # argmax picks NaN
    spikes = np.minimum.reduceat(np.where(at_top, frames, T), starts)
    keep = best[starts] != blank
    starts, ends, spikes = starts[keep], ends[keep], spikes[keep]
    toks = best[starts].astype(np.int32)
    return Greedy(toks, starts.astype(np.int32), ends.astype(np.int32), spikes.astype(np.int32))


def find_spikes(log_probs, *, blank: int = 0, floor: float = 0.0) -> Spikes:
    """CTC spikes: per run of frames won by one non-blank token, its peak frame.

    Parameters
    ----------
    log_probs : ndarray, shape (T, V)
    blank : int
    floor : float
        Keep spikes whose posterior probability is at least ``floor``.

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.array([[.1, .9], [.2, .8], [.9, .1], [.4, .6]]))
    >>> s = find_spikes(lp, floor=0.7)
    >>> s.frames.tolist(), s.tokens.tolist()
    ([0], [1])
    """
    g = greedy_decode(log_probs, blank=blank)
    lp = np.asarray(log_probs)
    probs = np.exp(lp[g.spike, g.tokens]) if g.tokens.size else np.zeros(0)
    keep = probs >= floor
    return Spikes(g.spike[keep], g.tokens[keep], probs[keep].astype(np.float32))


def word_runs(alignment: Alignment, vocab: Vocabulary) -> list[WordRun]:
    """Group an alignment's token segments into words by the vocabulary's rule.

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign.vocab import Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> lp = np.log(np.full((6, 4), 0.25))
    >>> a = align_tokens(lp, v.encode("ab a"))
    >>> [(w.word, w.first_token, w.last_token) for w in word_runs(a, v)]
    [('ab', 0, 1), ('a', 3, 3)]
    """
    out = []
    for word, u0, u1 in vocab.words(alignment.tokens):
        out.append(WordRun(word, u0, u1, int(alignment.first[u0]), int(alignment.last[u1])))
    return out
