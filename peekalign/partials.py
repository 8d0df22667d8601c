"""Partial results over time: what a streaming recognizer shows while the audio arrives.

From a traced prefix search (:func:`peekalign.search.prefix_search`) the best partial
hypothesis after each frame, stamped with the time at which that frame can be
computed (:func:`partials`), or from a triggered decoding the decoder tokens emitted
so far (:func:`decoded_partials`); per word the time it is first shown, the time from which
it stays unchanged, its rewrites and its shown delay, and per utterance the rewrite
rate, the shown-delay percentiles and the endpoint (:func:`shown_words`). The
definitions are in DEVELOPERS.md, "Partial results and shown times". Plain numpy; no
plotting imports.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass

import numpy as np

from .clock import FrameClock
from .exceptions import ParameterError, describe
from .search import _require_trace
from .streaming import _check_float, _check_int, _encoder_frames, token_windows

__all__ = ["Partials", "ShownWords", "decoded_partials", "partials", "shown_words"]


# ---------------------------------------------------------------------------
# partials
# ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Partials:
    """The best partial hypothesis after each frame and when it can be shown.

    Attributes
    ----------
    frame : ndarray of int32, shape (T,)
        Frames ``0..T-1``.
    time_s : ndarray of float64, shape (T,)
        Centre of each frame (``clock.time``).
    ready_s : ndarray of float64, shape (T,)
        Time at which the partial after the frame can be computed: the time of the
        last input sample a token created on that frame hears (with the decoder
        look-ahead when a decoder took part), never later than the end of the input.
    shown_s : ndarray of float64, shape (T,)
        ``ready_s`` plus the stated compute time (see :func:`partials`).
    prefix : ndarray of int32, shape (T,)
        Prefix id (in the search trace) of each partial; the last one is the search's
        best hypothesis. Partials of a triggered decoding: the number of decoder
        tokens shown.
    words : tuple of tuple of str
        Words of each partial (its last word may still be growing).
    open_last : ndarray of bool, shape (T,)
        Whether the partial's last word may still grow (no word boundary after it).
    encoder_frames, decoder_lookahead : int
        Look-ahead the times include, in frames.
    compute_s : float
        Compute time per step.
    chunk : int
        Frames per step.
    clock : FrameClock
    utt : str or None
    """

    frame: np.ndarray
    time_s: np.ndarray
    ready_s: np.ndarray
    shown_s: np.ndarray
    prefix: np.ndarray
    words: tuple
    open_last: np.ndarray
    encoder_frames: int
    decoder_lookahead: int
    compute_s: float
    chunk: int
    clock: FrameClock
    utt: str | None = None

    def __len__(self) -> int:
        return int(self.frame.size)

    def text(self, i: int) -> str:
        """Text of the partial after frame ``i``."""
        return " ".join(self.words[i])

    @property
    def final_s(self) -> float:
        """Time the final result is shown (that of the last frame)."""
        return float(self.shown_s[-1]) if len(self) else math.nan

    def events(self) -> np.ndarray:
        """Frames whose partial is actually seen: the last frame of each distinct shown
        time (frames of one chunk are shown together, the last one wins)."""
        s = self.shown_s
        if s.size == 0:
            return np.zeros(0, np.int64)
        keep = np.ones(s.size, bool)
        keep[:-1] = s[1:] != s[:-1]
        return np.flatnonzero(keep)

    def rows(self) -> list[dict]:
        """One dict per frame: ``frame, time_s, shown_s, text`` (times rounded to 0.1 ms)."""
        return [
            {
                "frame": int(self.frame[i]),
                "time_s": round(float(self.time_s[i]), 4),
                "shown_s": round(float(self.shown_s[i]), 4),
                "text": self.text(i),
            }
            for i in range(len(self))
        ]

    def write_jsonl(self, path: str | os.PathLike, *, overwrite: bool = False) -> None:
        """Write :meth:`rows` as JSON lines (refuses to replace a file unless asked)."""
        from .io.atomic import atomic_write

        with atomic_write(path, overwrite=overwrite) as f:
            for row in self.rows():
                f.write(json.dumps(row, ensure_ascii=False))
                f.write("\n")

    def __repr__(self) -> str:
        last = self.text(len(self) - 1) if len(self) else ""
        if len(last) > 40:
            last = last[:37] + "..."
        return (
            f"Partials(utt={self.utt!r}, frames={len(self)}, final_s={self.final_s:.3f}, "
            f"final={last!r})"
        )


def _frame_prefixes(result) -> np.ndarray:
    """Best kept prefix after each frame; the last frame's is the best hypothesis."""
    tr = _require_trace(result)
    T = tr.num_frames
    counts = np.diff(tr.beam_offsets)
    if T == 0 or (counts[:-1] <= 0).any():
        raise ParameterError(
            describe(
                f"a trace of {T} frames with an empty beam",
                "a kept beam after every frame",
                "pass the result of a search that finished",
                utt=result.utt,
            ),
            utt=result.utt,
        )
    # the beam is stored best first
    best = tr.beam_prefix[tr.beam_offsets[:-1]].astype(np.int32)
    # end-of-utterance LM terms may reorder the last beam: the final result is the best
    best[-1] = result.best.prefix
    return best


def _word_step(vocab):
    """``step(state, token) -> state`` over ``(closed words, open word or None)``: the
    grouping of :meth:`peekalign.vocab.Vocabulary.words`, one token at a time."""
    tokens, blank, sym = vocab.tokens, vocab.blank, vocab.boundary.symbol
    if vocab.boundary.kind == "separator":
        sep = vocab.separator_id

        def step(st, tid):
            if tid == blank:
                return st
            closed, cur = st
            tok = tokens[tid]
            if tid == sep or tok == sym:
                return st if cur is None else (closed + (cur,), None)
            return closed, tok if cur is None else cur + tok

    else:
        cut = len(sym)

        def step(st, tid):
            if tid == blank:
                return st
            closed, cur = st
            tok = tokens[tid]
            if tok.startswith(sym):
                return closed if cur is None else closed + (cur,), tok[cut:]
            return closed, tok if cur is None else cur + tok

    return step


def _prefix_words(tr, vocab, ids: np.ndarray) -> tuple[tuple, np.ndarray]:
    """Words of each prefix id and whether its last word is still open.

    Each prefix's words extend its parent's by one token (memoised per prefix id), so
    a frame's partial costs one step, not a decoding of all its tokens.
    """
    sep = vocab.separator_id if vocab.boundary.kind == "separator" else None
    step = _word_step(vocab)
    parent, token = tr.parent, tr.token
    states: dict[int, tuple] = {0: ((), None)}
    cache: dict[int, tuple[tuple, bool]] = {}
    words, open_last = [], np.zeros(ids.size, bool)
    for i, pid in enumerate(ids.tolist()):
        hit = cache.get(pid)
        if hit is None:
            chain = []
            j = pid
            while j > 0 and j not in states:
                chain.append(j)
                j = int(parent[j])
            st = states[j] if j > 0 else states[0]
            for j in reversed(chain):
                st = states[j] = step(st, int(token[j]))
            closed, cur = st
            ws = closed if cur is None else closed + (cur,)
            # a word is closed by a separator after it (prefix-marked words close only
            # when the next word starts)
            hit = (ws, bool(ws) and not (sep is not None and pid > 0 and int(token[pid]) == sep))
            cache[pid] = hit
        words.append(hit[0])
        open_last[i] = hit[1]
    return tuple(words), open_last


def _ready_times(T: int, clock: FrameClock, enc: int, dec: int) -> np.ndarray:
    """Last input sample each frame's partial hears, capped at the end of the input."""
    frames = np.arange(T)
    ready = token_windows(
        frames, num_frames=T, clock=clock, lookahead=dec, encoder_lookahead=enc
    ).heard_until_s
    # past the last frame nothing more arrives: the rest is computed when the input ends
    end = token_windows([T - 1], num_frames=T, clock=clock, lookahead=0).heard_until_s[0]
    return np.minimum(ready, end)


def _shown_times(ready: np.ndarray, compute_s: float, chunk: int) -> np.ndarray:
    """Steps of ``chunk`` frames, each starting when its input is ready and the step
    before it is done, taking ``compute_s``; a step's frames are shown when it is done."""
    T = ready.size
    shown = np.empty(T)
    done = -math.inf
    for a in range(0, T, chunk):
        b = min(a + chunk, T)
        done = max(float(ready[b - 1]), done) + compute_s
        shown[a:b] = done
    return shown


def partials(
    result,
    vocab,
    clock: FrameClock,
    *,
    encoder_lookahead=None,
    decoder_lookahead: int | None = None,
    compute_s: float = 0.0,
    chunk: int = 1,
) -> Partials:
    """Best partial hypothesis after each frame of a traced search, with its shown time.

    The partial after frame ``t`` is the best prefix kept after that frame (after the
    last frame: the search's best hypothesis). It can be computed once the input its
    frames depend on has arrived: ``ready_s(t) = clock.time(t + e + d) +
    clock.right_context_s`` (the last input sample a token created at frame ``t`` hears,
    as :func:`peekalign.streaming.token_windows` computes it, with the encoder
    look-ahead ``e`` and, when a decoder took part, its look-ahead
    ``d``: a token created at frame ``t`` waits for its window up to ``t + d``), capped
    at the end of the input ``clock.time(T - 1) + clock.right_context_s``. The
    recognizer works in steps of ``chunk`` frames taking ``compute_s`` seconds each: a
    step starts when its last frame is ready and the step before it is done, and its
    frames are shown when it is done. Definitions: DEVELOPERS.md, "Partial results and
    shown times".

    Parameters
    ----------
    result : SearchResult
        A traced search (``trace=True``).
    vocab : Vocabulary
        Token strings and word boundary (``utt.vocab``).
    clock : FrameClock
        The utterance's clock (``utt.clock``).
    encoder_lookahead : int or (layers, per_layer), optional
        Encoder look-ahead (``utt.encoder_lookahead``); None: 0.
    decoder_lookahead : int, optional
        Decoder look-ahead in frames; default: the search's ``lookahead`` when a
        decoder scored its prefixes (the whole utterance when that look-ahead is
        None, full context), else 0.
    compute_s : float
        Compute time per step, in seconds.
    chunk : int
        Frames per step (1: one step per frame).

    Returns
    -------
    Partials

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import FrameClock, Vocabulary, WordBoundary
    >>> from peekalign.search import prefix_search
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((6, 4), 0.02); p[:, 0] = 0.94
    >>> p[1] = [0.02, 0.02, 0.94, 0.02]; p[3] = [0.02, 0.94, 0.02, 0.02]
    >>> p[4] = [0.02, 0.02, 0.02, 0.94]
    >>> res = prefix_search(np.log(p), beam=4, token_floor=-2.0)
    >>> pt = partials(res, v, FrameClock(0.04), encoder_lookahead=2)
    >>> [pt.text(i) for i in range(6)]
    ['', 'a', 'a', 'a', 'a b', 'a b']
    >>> pt.shown_s.round(2).tolist()  # 2 frames ahead, capped at the input's end (0.2 s)
    [0.08, 0.12, 0.16, 0.2, 0.2, 0.2]
    >>> slow = partials(res, v, FrameClock(0.04), encoder_lookahead=2, compute_s=0.05)
    >>> slow.shown_s.round(2).tolist()  # 50 ms a step: each step waits for the one before
    [0.13, 0.18, 0.23, 0.28, 0.33, 0.38]
    """
    fn = "partials"
    if not isinstance(clock, FrameClock):
        raise ParameterError(
            f"The 'clock' parameter of {fn} must be a FrameClock. Got "
            f"{type(clock).__name__} instead; pass utt.clock."
        )
    enc = _encoder_frames(encoder_lookahead, fn)
    ids = _frame_prefixes(result)
    T = ids.size
    if decoder_lookahead is None:
        params = getattr(result, "params", {}) or {}
        decoder_lookahead = 0
        if params.get("decoder") or params.get("attention_scorer"):
            la = params.get("lookahead")
            # no look-ahead stated (full context): every step waits for the input's end
            decoder_lookahead = T if la is None else int(la)
    dec = _check_int("decoder_lookahead", decoder_lookahead, fn)
    compute_s = _check_float("compute_s", compute_s, fn)
    chunk = _check_int("chunk", chunk, fn, lo=1)
    return _assemble(
        result.trace, vocab, clock, ids, enc=enc, dec=dec, wait=dec, compute_s=compute_s,
        chunk=chunk, utt=getattr(result, "utt", None),
    )  # fmt: skip


def _assemble(table, vocab, clock, ids, *, enc, dec, wait, compute_s, chunk, utt) -> Partials:
    """Partials of prefix ids ``ids`` (one a frame) of a prefix table: their words and
    their shown times (``wait``: decoder frames still to wait for after a frame)."""
    T = ids.size
    words, open_last = _prefix_words(table, vocab, ids)
    ready = _ready_times(T, clock, enc, wait)
    return Partials(
        frame=np.arange(T, dtype=np.int32),
        time_s=np.asarray(clock.time(np.arange(T)), dtype=np.float64),
        ready_s=ready,
        shown_s=_shown_times(ready, compute_s, chunk),
        prefix=ids,
        words=words,
        open_last=open_last,
        encoder_frames=enc,
        decoder_lookahead=dec,
        compute_s=compute_s,
        chunk=chunk,
        clock=clock,
        utt=utt,
    )


class _Chain:
    """The prefixes of one token sequence as a prefix table (prefix ``n`` is its first
    ``n`` tokens), so a decoding's partials decode to words as a search's do."""

    def __init__(self, tokens: np.ndarray) -> None:
        n = int(tokens.size)
        self.parent = np.arange(-1, n, dtype=np.int64)
        self.token = np.concatenate([[-1], tokens]).astype(np.int64)


def decoded_partials(
    decoded,
    vocab,
    clock: FrameClock,
    *,
    num_frames: int,
    encoder_lookahead=None,
    compute_s: float = 0.0,
    chunk: int = 1,
    utt: str | None = None,
) -> Partials:
    """Partial results of a triggered decoding: after frame ``t``, the decoder tokens
    emitted so far, with their shown time.

    In triggered decoding (:func:`peekalign.decoder.triggered_decode`) the decoder
    emits token ``u`` once it has seen its window: encoder frames ``[0, n_u + d]``
    (``n_u`` its CTC trigger, ``d`` the decoder look-ahead, capped at ``T - 1``), the
    token's ``last_frames``. The partial after frame ``t`` holds the tokens with
    ``last_frames[u] <= t``; the last frame's is the whole decoding. Shown times are
    those of :func:`partials` with the decoder's wait already in the frame index:
    ``ready_s(t) = clock.time(t + e) + clock.right_context_s`` (capped at the end of the
    input), then steps of ``chunk`` frames taking ``compute_s`` each. So a token
    triggered at ``n`` is shown at ``clock.time(n + d + e) + clock.right_context_s``
    (plus compute): the same time :func:`partials` gives a search token with a
    decoder. Definitions: DEVELOPERS.md, "Partial results and shown times".

    Parameters
    ----------
    decoded : Decoded
        One look-ahead's result of :func:`~peekalign.decoder.triggered_decode`.
    vocab : Vocabulary
    clock : FrameClock
    num_frames : int
        Encoder frames ``T`` of the utterance.
    encoder_lookahead : int or (layers, per_layer), optional
        Encoder look-ahead (``utt.encoder_lookahead``); None: 0.
    compute_s : float
        Compute time per step, in seconds.
    chunk : int
        Frames per step.
    utt : str, optional
        Utterance id.

    Returns
    -------
    Partials
        ``decoder_lookahead`` is the decoding's look-ahead (``T`` for full context).

    Examples
    --------
    A decoder that reads the token off the last frame it sees, triggered at frames 1,
    3 and 4, two frames of look-ahead: its tokens come at frames 3, 5 and 6.

    >>> import numpy as np
    >>> from peekalign import FrameClock, Vocabulary, WordBoundary
    >>> from peekalign.decoder import triggered_decode
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> heard = np.array([0, 0, 0, 2, 1, 1, 3, 3])  # token at each encoder frame
    >>> class LastFrame:
    ...     def log_probs(self, prefixes, last_frames):
    ...         out = np.full((len(prefixes), 4), -5.0)
    ...         out[np.arange(len(prefixes)), heard[list(last_frames)]] = 0.0
    ...         return out
    >>> d = triggered_decode(LastFrame(), [1, 3, 4], num_frames=8, lookaheads=2)[0]
    >>> d.last_frames.tolist()
    [3, 5, 6]
    >>> pt = decoded_partials(d, v, FrameClock(0.04), num_frames=8, encoder_lookahead=1)
    >>> [pt.text(i) for i in range(8)]
    ['', '', '', 'a', 'a', 'a', 'a b', 'a b']
    >>> pt.shown_s.round(2).tolist()  # frame t + 1 (encoder), capped at the end (0.28 s)
    [0.04, 0.08, 0.12, 0.16, 0.2, 0.24, 0.28, 0.28]
    """
    fn = "decoded_partials"
    if not isinstance(clock, FrameClock):
        raise ParameterError(
            f"The 'clock' parameter of {fn} must be a FrameClock. Got "
            f"{type(clock).__name__} instead; pass utt.clock."
        )
    T = _check_int("num_frames", num_frames, fn, lo=1)
    enc = _encoder_frames(encoder_lookahead, fn)
    compute_s = _check_float("compute_s", compute_s, fn)
    chunk = _check_int("chunk", chunk, fn, lo=1)
    tokens = np.asarray(decoded.tokens, dtype=np.int64).reshape(-1)
    last = np.asarray(decoded.last_frames, dtype=np.int64).reshape(-1)
    if last.size != tokens.size or (last.size and (np.diff(last) < 0).any() or last.max() >= T):
        raise ParameterError(
            describe(
                f"last frames {last.tolist()[:8]} for {tokens.size} tokens",
                f"one non-decreasing frame in [0, {T}) per token",
                "pass the triggered_decode result of the same utterance and num_frames",
                utt=utt,
            ),
            utt=utt,
        )
    # tokens shown after frame t: those whose window ends at or before t
    ids = np.searchsorted(last, np.arange(T), side="right").astype(np.int32)
    dec = T if decoded.lookahead is None else int(decoded.lookahead)
    # the decoder's wait is in the frame index already: nothing more to wait for
    return _assemble(
        _Chain(tokens), vocab, clock, ids, enc=enc, dec=dec, wait=0, compute_s=compute_s,
        chunk=chunk, utt=utt,
    )  # fmt: skip


# ---------------------------------------------------------------------------
# per word
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class _Positions:
    """Per word position of the shown text: first shown, final shown, rewrites."""

    first_s: np.ndarray
    final_s: np.ndarray
    rewrites: np.ndarray
    n_shown: int
    n_rewritten: int
    first_word_s: float


def _changed(old: str, new: str | None, old_open: bool) -> bool:
    """A rewrite: the text at a word changed, other than an open last word growing."""
    if new == old:
        return False
    return not (old_open and new is not None and new.startswith(old))


def _positions(pt: Partials) -> _Positions:
    """Walk the seen partials word position by word position."""
    ev = pt.events()
    final = pt.words[-1] if len(pt) else ()
    width = max((len(pt.words[i]) for i in ev), default=0)
    first = np.full(width, np.nan)
    final_s = np.full(width, np.nan)
    rewrites = np.zeros(width, np.int64)
    prev: tuple = ()
    prev_open = False
    for i in ev.tolist():
        cur = pt.words[i]
        if cur == prev:  # most frames: the same text, nothing to update
            prev_open = bool(pt.open_last[i])
            continue
        s = float(pt.shown_s[i])
        # positions before the first difference and past both ends change nothing
        k = 0
        while k < len(prev) and k < len(cur) and prev[k] == cur[k]:
            k += 1
        for j in range(k, max(len(prev), len(cur))):
            old = prev[j] if j < len(prev) else None
            new = cur[j] if j < len(cur) else None
            if new is not None and np.isnan(first[j]):
                first[j] = s
            if old is not None and _changed(old, new, prev_open and j == len(prev) - 1):
                rewrites[j] += 1
            if new != old:
                # shown unchanged from here on only if this is the final text
                final_s[j] = s if j < len(final) and new == final[j] else np.nan
        prev, prev_open = cur, bool(pt.open_last[i])
    shown = ~np.isnan(first)
    firsts = first[shown]
    return _Positions(
        first_s=first,
        final_s=final_s,
        rewrites=rewrites,
        n_shown=int(shown.sum()),
        n_rewritten=int((rewrites[shown] > 0).sum()),
        first_word_s=float(firsts.min()) if firsts.size else math.nan,
    )


@dataclass(frozen=True, eq=False)
class ShownWords:
    """Shown times of the reference words and the utterance's figures.

    Per reference word (arrays of shape (W,), NaN / -1 for a word the final result
    lacks): the final-result word it is aligned to (``hyp_index``), the time that word
    was first shown, the time from which it was shown unchanged, its rewrites and its
    shown delay (final-shown minus the reference word's end). Definitions:
    DEVELOPERS.md, "Partial results and shown times".

    Attributes
    ----------
    words : tuple of str
        Reference words.
    end_s : ndarray of float64
        Reference word ends.
    hyp_words : tuple of str
        Words of the final result.
    hyp_index : ndarray of int64
    first_shown_s, final_shown_s : ndarray of float64
    rewrites : ndarray of int64
        -1 for a word the final result lacks.
    shown_delay_s : ndarray of float64
    rewrite_rate : float
        Word positions ever shown that were rewritten at least once, over the word
        positions ever shown (NaN when nothing was shown).
    first_word_s : float
        Time the first word was shown (from the start of the input).
    final_s : float
        Time the final result was shown.
    endpoint_s : float
        ``final_s`` minus the end of the last reference word.
    trailing_missing : int
        Reference words at the end that the final result lacks.
    """

    words: tuple
    end_s: np.ndarray
    hyp_words: tuple
    hyp_index: np.ndarray
    first_shown_s: np.ndarray
    final_shown_s: np.ndarray
    rewrites: np.ndarray
    shown_delay_s: np.ndarray
    rewrite_rate: float
    first_word_s: float
    final_s: float
    endpoint_s: float
    trailing_missing: int

    def __len__(self) -> int:
        return len(self.words)

    def delay_percentile(self, q: float) -> float:
        """``q``-th percentile (0-100, linear interpolation) of the shown delays of the
        words the final result has (NaN when none)."""
        d = self.shown_delay_s[~np.isnan(self.shown_delay_s)]
        return float(np.percentile(d, q)) if d.size else math.nan

    def summary(self) -> dict:
        """Per utterance: ``rewrite_rate, first_word_s, shown_delay_p50_s,
        shown_delay_p90_s, final_s, endpoint_s, trailing_missing``."""
        return {
            "rewrite_rate": self.rewrite_rate,
            "first_word_s": self.first_word_s,
            "shown_delay_p50_s": self.delay_percentile(50),
            "shown_delay_p90_s": self.delay_percentile(90),
            "final_s": self.final_s,
            "endpoint_s": self.endpoint_s,
            "trailing_missing": self.trailing_missing,
        }

    def rows(self) -> list[dict]:
        """One dict per reference word: ``word, end_s, hyp_word, first_shown_s,
        final_shown_s, rewrites, shown_delay_s``."""
        return [
            {
                "word": w,
                "end_s": float(self.end_s[i]),
                "hyp_word": self.hyp_words[h] if (h := int(self.hyp_index[i])) >= 0 else "",
                "first_shown_s": float(self.first_shown_s[i]),
                "final_shown_s": float(self.final_shown_s[i]),
                "rewrites": int(self.rewrites[i]),
                "shown_delay_s": float(self.shown_delay_s[i]),
            }
            for i, w in enumerate(self.words)
        ]

    def __repr__(self) -> str:
        s = self.summary()
        return (
            f"ShownWords(words={len(self)}, rewrite_rate={s['rewrite_rate']:.3f}, "
            f"delay_p50={s['shown_delay_p50_s']:.3f}s, endpoint={s['endpoint_s']:.3f}s, "
            f"trailing_missing={self.trailing_missing})"
        )


def shown_words(pt: Partials, words, end_s) -> ShownWords:
    """Shown times, rewrites and delays of the reference words; the utterance's figures.

    Reference words are matched to the words of the final result by a word-level
    Levenshtein alignment (:func:`peekalign.errors.align_words`); a matched word
    (correct or substituted) takes the figures of the final-result word at its place.

    Parameters
    ----------
    pt : Partials
    words : sequence of str
        Reference words.
    end_s : array-like of float, shape (W,)
        Their end times (reference word times or the forced alignment's).

    Returns
    -------
    ShownWords

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import FrameClock, Vocabulary, WordBoundary
    >>> from peekalign.search import prefix_search
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((6, 4), 0.02); p[:, 0] = 0.94
    >>> p[1] = [0.02, 0.02, 0.94, 0.02]; p[3] = [0.02, 0.94, 0.02, 0.02]
    >>> p[4] = [0.02, 0.02, 0.02, 0.94]
    >>> pt = partials(prefix_search(np.log(p), beam=4, token_floor=-2.0), v, FrameClock(0.04))
    >>> sw = shown_words(pt, ["a", "b", "a"], [0.06, 0.18, 0.2])
    >>> sw.first_shown_s.tolist(), sw.shown_delay_s.round(2).tolist(), sw.trailing_missing
    ([0.04, 0.16, nan], [-0.02, -0.02, nan], 1)
    """
    from .errors import align_words

    words = tuple(str(w) for w in words)
    end = np.asarray(end_s, dtype=np.float64).reshape(-1)
    if end.size != len(words):
        raise ParameterError(
            describe(
                f"{end.size} word end times for {len(words)} words",
                "one end time per reference word",
                "pass the reference words and their end times together",
                utt=pt.utt,
            ),
            utt=pt.utt,
        )
    pos = _positions(pt)
    final = pt.words[-1] if len(pt) else ()
    ali = align_words(list(words), list(final)) if words or final else None
    h = ali.hyp_index_of_ref() if ali is not None else np.zeros(0, np.int64)
    have = h >= 0
    first = np.full(len(words), np.nan)
    last = np.full(len(words), np.nan)
    rew = np.full(len(words), -1, np.int64)
    first[have] = pos.first_s[h[have]]
    last[have] = pos.final_s[h[have]]
    rew[have] = pos.rewrites[h[have]]
    trailing = 0
    for k in h[::-1].tolist():
        if k >= 0:
            break
        trailing += 1
    final_s = pt.final_s
    return ShownWords(
        words=words,
        end_s=end,
        hyp_words=tuple(final),
        hyp_index=h,
        first_shown_s=first,
        final_shown_s=last,
        rewrites=rew,
        shown_delay_s=last - end,
        rewrite_rate=pos.n_rewritten / pos.n_shown if pos.n_shown else math.nan,
        first_word_s=pos.first_word_s,
        final_s=final_s,
        endpoint_s=final_s - float(end[-1]) if end.size else math.nan,
        trailing_missing=trailing,
    )
