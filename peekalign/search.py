"""Traced frame-synchronous CTC prefix beam search.

The search keeps, per prefix, the log-probabilities ``p_blank`` and ``p_nonblank`` of
all CTC paths over the frames seen so far that collapse to the prefix and end in a
blank or in the prefix's last token. Per frame every kept prefix is extended by the
frame's candidate tokens, repeats collapse unless a blank separates them, and the
``beam`` best prefixes by ranking score (within ``prune_gap`` of the best) are
kept:

``score = ctc + lm_weight * lm + token_bonus * n_tokens + decoder_weight * dec``

where ``ctc = logaddexp(p_blank, p_nonblank)`` and ``lm`` / ``dec`` are sums of
language-model and attention-decoder log-probabilities added when a prefix is created
(hybrid CTC/attention joint decoding (2017), with the decoder's window ending at the
prefix's trigger frame plus the look-ahead as in triggered attention (2019)); the
decoder is any :class:`peekalign.decoder.UtteranceDecoder`. Every prefix is an int id into a table of
``(parent, token, trigger_frame)``; the trace holds that table, the kept beam per frame
and one prune event per prefix that fell out of (or never entered) the beam.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numba import njit

from .exceptions import AlignmentError, ParameterError, describe

if TYPE_CHECKING:  # pragma: no cover
    from .decoder import UtteranceDecoder

__all__ = [
    "Hypothesis",
    "PruneEvents",
    "ReferenceMatch",
    "SearchResult",
    "SearchTrace",
    "prefix_search",
    "select_candidates",
]

NEG_INF = -np.inf
EOS = "</s>"


# ---------------------------------------------------------------------------
# numba kernels
# ---------------------------------------------------------------------------


@njit(cache=True, nogil=True, inline="always")
def _lae(a, b):
    """log(exp(a) + exp(b)), safe for -inf."""
    if a == -np.inf:
        return b
    if b == -np.inf:
        return a
    if a > b:
        return a + math.log1p(math.exp(b - a))
    return b + math.log1p(math.exp(a - b))


@njit(cache=True, nogil=True)
def _select_candidates(lp, blank, k, floor):
    """Top-``k`` non-blank tokens per frame with log-prob >= ``floor``, best first.

    One pass per row with an insertion-sorted buffer of ``k``; a token is inspected
    only if it beats the running threshold (max of the floor and the k-th best so
    far), so the cost is about one comparison per entry of ``lp``.
    """
    T, V = lp.shape
    cand = np.full((T, k), -1, np.int32)
    ncand = np.zeros(T, np.int32)
    vals = np.empty(k, np.float64)
    for t in range(T):
        row = lp[t]
        n = 0
        thr = floor
        for v in range(V):
            x = row[v]
            if x < thr or (n == k and x == thr) or v == blank or x == -np.inf:
                continue
            j = n if n < k else k - 1
            while j > 0 and vals[j - 1] < x:
                vals[j] = vals[j - 1]
                cand[t, j] = cand[t, j - 1]
                j -= 1
            vals[j] = x
            cand[t, j] = v
            if n < k:
                n += 1
            if n == k:
                thr = max(floor, vals[k - 1])
        ncand[t] = n
    return cand, ncand


@njit(cache=True, nogil=True, inline="always")
def _same_content(parent, token, a, b):
    """Whether prefixes ``a`` and ``b`` hold the same token sequence.

    Walks both parent chains in lockstep until they meet; usually ``a == b`` at once
    (only a sequence that was pruned and proposed again has two ids).
    """
    while a != b:
        if a == 0 or b == 0 or token[a] != token[b]:
            return False
        a = parent[a]
        b = parent[b]
    return True


@njit(cache=True, nogil=True)
def _expand(
    t, y, cand, n_c, blank,
    b_id, b_pb, b_pnb, nb,
    parent, token, trigger, n_inst,
    tok_stamp, tok_head, b_next,
    s_id, s_pb, s_pnb,
):  # fmt: skip
    """One frame: carry every kept prefix over (blank / repeat) and extend it.

    Slots ``0..nb-1`` are the kept prefixes. An extension ``l + k`` that equals a kept
    prefix (same last token ``k``, same content before it) adds its mass to that
    prefix; otherwise a new prefix id is created with trigger frame ``t``. Extensions
    of different kept prefixes are different sequences, so need no check among
    themselves. Returns (n_slots, n_inst).
    """
    tag = t + 1
    yb = y[blank]
    for i in range(nb):
        pid = b_id[i]
        s_id[i] = pid
        s_pb[i] = _lae(b_pb[i], b_pnb[i]) + yb
        last = token[pid]
        if last >= 0:
            s_pnb[i] = b_pnb[i] + y[last]
            # chain of kept prefixes by last token
            b_next[i] = tok_head[last] if tok_stamp[last] == tag else -1
            tok_stamp[last] = tag
            tok_head[last] = i
        else:
            s_pnb[i] = -np.inf
    n_slots = nb
    for i in range(nb):
        pid = b_id[i]
        last = token[pid]
        pb = b_pb[i]
        tot = _lae(pb, b_pnb[i])
        for j in range(n_c):
            k = cand[j]
            s = -1
            if tok_stamp[k] == tag:
                m = tok_head[k]
                while m >= 0:
                    if _same_content(parent, token, parent[b_id[m]], pid):
                        s = m
                        break
                    m = b_next[m]
            if s < 0:
                s = n_slots
                n_slots += 1
                parent[n_inst] = pid
                token[n_inst] = k
                trigger[n_inst] = t
                s_id[s] = n_inst
                n_inst += 1
                s_pb[s] = -np.inf
                s_pnb[s] = -np.inf
            # a repeat of the last token only extends paths that end in a blank
            p = (pb if k == last else tot) + y[k]
            s_pnb[s] = _lae(s_pnb[s], p)
    return n_slots, n_inst


@njit(cache=True, nogil=True)
def _select(
    t, n_slots, s_id, s_pb, s_pnb, ext, beam, threshold,
    b_id, b_pb, b_pnb,
    record, bt_prefix, bt_score, n_bt,
    pr_frame, pr_prefix, pr_rank, pr_gap, n_pr,
):  # fmt: skip
    """Keep the ``beam`` best slots within ``threshold`` of the best; log the kept
    beam and the pruned rest (gap: last kept score minus the slot's score).

    Slots with score -inf (no path) are dropped silently. Returns (nb, n_bt, n_pr).
    """
    score = np.empty(n_slots, np.float64)
    for s in range(n_slots):
        score[s] = _lae(s_pb[s], s_pnb[s]) + ext[s_id[s]]
    order = np.argsort(-score, kind="mergesort")
    n_fin = 0
    while n_fin < n_slots and score[order[n_fin]] > -np.inf:
        n_fin += 1
    nb = min(beam, n_fin)
    if nb > 0:
        floor = score[order[0]] - threshold
        while nb > 1 and score[order[nb - 1]] < floor:
            nb -= 1
    for r in range(nb):
        s = order[r]
        b_id[r] = s_id[s]
        b_pb[r] = s_pb[s]
        b_pnb[r] = s_pnb[s]
        if record:
            bt_prefix[n_bt] = s_id[s]
            bt_score[n_bt] = score[s]
            n_bt += 1
    if record and nb > 0:
        cut = score[order[nb - 1]]
        for r in range(nb, n_fin):
            s = order[r]
            pr_frame[n_pr] = t
            pr_prefix[n_pr] = s_id[s]
            pr_rank[n_pr] = r
            pr_gap[n_pr] = cut - score[s]
            n_pr += 1
    return nb, n_bt, n_pr


@njit(cache=True, nogil=True)
def _backtrack(parent, token, trigger, i):
    """Tokens and trigger frames of prefix ``i``, oldest first."""
    n = 0
    j = i
    while j > 0:
        n += 1
        j = parent[j]
    toks = np.empty(n, np.int32)
    trig = np.empty(n, np.int32)
    j = i
    while j > 0:
        n -= 1
        toks[n] = token[j]
        trig[n] = trigger[j]
        j = parent[j]
    return toks, trig


@njit(cache=True, nogil=True)
def _grow_i32(a, n, size):
    out = np.empty(size, np.int32)
    out[:n] = a[:n]
    return out


@njit(cache=True, nogil=True)
def _grow_f(a, n, size):
    out = np.empty(size, a.dtype)
    out[:n] = a[:n]
    return out


@njit(cache=True, nogil=True)
def _run(lp, cand, ncand, blank, beam, threshold, token_bonus, record, cap):
    """The whole search in one call (no Python scorers): ext = token_bonus * n_tokens."""
    T, V = lp.shape
    K = cand.shape[1]
    parent = np.empty(cap, np.int32)
    token = np.empty(cap, np.int32)
    trigger = np.empty(cap, np.int32)
    ext = np.empty(cap, np.float64)
    parent[0] = -1
    token[0] = -1
    trigger[0] = -1
    ext[0] = 0.0
    n_inst = 1
    tok_stamp = np.zeros(V, np.int32)
    tok_head = np.empty(V, np.int32)
    b_next = np.empty(beam, np.int32)
    b_id = np.zeros(beam, np.int32)
    b_pb = np.zeros(beam, np.float64)
    b_pnb = np.full(beam, -np.inf)
    nb = 1
    s_id = np.empty(beam * (K + 1), np.int32)
    s_pb = np.empty(beam * (K + 1), np.float64)
    s_pnb = np.empty(beam * (K + 1), np.float64)
    nbt = T * beam if record else 0
    bt_offsets = np.zeros(T + 1, np.int64)
    bt_prefix = np.empty(nbt, np.int32)
    bt_score = np.empty(nbt, np.float32)
    n_bt = 0
    pcap = cap if record else 0
    pr_frame = np.empty(pcap, np.int32)
    pr_prefix = np.empty(pcap, np.int32)
    pr_rank = np.empty(pcap, np.int32)
    pr_gap = np.empty(pcap, np.float32)
    n_pr = 0
    fail = -1
    for t in range(T):
        n_c = ncand[t]
        need = n_inst + nb * n_c
        if need > parent.size:
            size = max(2 * parent.size, need)
            parent = _grow_i32(parent, n_inst, size)
            token = _grow_i32(token, n_inst, size)
            trigger = _grow_i32(trigger, n_inst, size)
            ext = _grow_f(ext, n_inst, size)
        if record and n_pr + nb * (n_c + 1) > pr_frame.size:
            size = max(2 * pr_frame.size, n_pr + nb * (n_c + 1))
            pr_frame = _grow_i32(pr_frame, n_pr, size)
            pr_prefix = _grow_i32(pr_prefix, n_pr, size)
            pr_rank = _grow_i32(pr_rank, n_pr, size)
            pr_gap = _grow_f(pr_gap, n_pr, size)
        first_new = n_inst
        n_slots, n_inst = _expand(
            t, lp[t], cand[t], n_c, blank, b_id, b_pb, b_pnb, nb,
            parent, token, trigger, n_inst, tok_stamp, tok_head, b_next,
            s_id, s_pb, s_pnb,
        )  # fmt: skip
        for i in range(first_new, n_inst):
            ext[i] = ext[parent[i]] + token_bonus
        nb, n_bt, n_pr = _select(
            t, n_slots, s_id, s_pb, s_pnb, ext, beam, threshold, b_id, b_pb, b_pnb,
            record, bt_prefix, bt_score, n_bt, pr_frame, pr_prefix, pr_rank, pr_gap, n_pr,
        )  # fmt: skip
        bt_offsets[t + 1] = n_bt
        if nb == 0:
            fail = t
            break
    return (fail, parent, token, trigger, n_inst, b_id, b_pb, b_pnb, nb, bt_offsets,
            bt_prefix, bt_score, n_bt, pr_frame, pr_prefix, pr_rank, pr_gap, n_pr)  # fmt: skip


# ---------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Hypothesis:
    """One entry of the n-best list.

    Attributes
    ----------
    tokens : ndarray of int32, shape (U,)
        Token ids (blank-free, repeats collapsed).
    trigger_frames : ndarray of int32, shape (U,)
        Frame at which the search created the prefix ending in each token.
    score : float
        Ranking score ``ctc_score + lm_weight * lm_score + token_bonus
        + decoder_weight * decoder_score``.
    ctc_score : float
        ``log P(tokens | x)``: the CTC probability summed over all alignments.
    lm_score : float
        Sum of the (unweighted) LM log-probabilities, end-of-utterance terms included.
    decoder_score : float
        Sum of the (unweighted) decoder log-probabilities, end of sentence included
        when the search scored it.
    token_bonus : float
        ``token_bonus * U``.
    prefix : int
        Id of the hypothesis' prefix in the trace's prefix table.
    """

    tokens: np.ndarray
    trigger_frames: np.ndarray
    score: float
    ctc_score: float
    lm_score: float
    decoder_score: float
    token_bonus: float
    prefix: int

    def __repr__(self) -> str:
        return (
            f"Hypothesis(score={self.score:.3f}, ctc={self.ctc_score:.3f}, "
            f"lm={self.lm_score:.3f}, dec={self.decoder_score:.3f}, "
            f"token_bonus={self.token_bonus:.3f}, tokens={self.tokens.tolist()})"
        )


@dataclass(frozen=True, eq=False)
class PruneEvents:
    """Prune events: prefix ``prefix[i]`` left the beam at frame ``frame[i]``.

    ``rank`` is its 0-based rank among that frame's candidates (``>=`` the number
    kept) and ``gap`` the cut-off score (the last kept prefix's) minus its score
    (``>= 0``).
    """

    frame: np.ndarray
    prefix: np.ndarray
    rank: np.ndarray
    gap: np.ndarray

    def __len__(self) -> int:
        return int(self.frame.size)


@dataclass(frozen=True)
class ReferenceMatch:
    """How far the search followed a reference token sequence.

    Attributes
    ----------
    n_matched : int
        Length of the longest reference prefix ``ref[:n]`` ever held in the beam
        (0: only the empty prefix).
    complete : bool
        ``n_matched == len(ref)``.
    prefix : int
        Id of the prefix holding ``ref[:n_matched]`` (the one held last if the search
        created it more than once).
    first_frame_held, last_frame_held : int
        Frames at which that prefix was first / last in the kept beam (-1 for the
        empty prefix before frame 0).
    prune_frame : int
        Frame at which it fell out of the beam; -1 when it was kept to the end.
    prune_gap : float
        Score gap to the beam's cut-off at ``prune_frame`` (NaN when not pruned).
    next_frame : int
        Frame of the closest miss of ``ref[:n_matched + 1]``: the prune event of an
        extension by the next reference token with the smallest gap; -1 when that
        extension was never proposed (e.g. the token was never a candidate).
    next_gap : float
        Gap of that closest miss (NaN when none).
    """

    n_matched: int
    complete: bool
    prefix: int
    first_frame_held: int
    last_frame_held: int
    prune_frame: int
    prune_gap: float
    next_frame: int
    next_gap: float


@dataclass(eq=False)
class SearchTrace:
    """Compact record of a search.

    Attributes
    ----------
    parent, token, trigger_frame : ndarray of int32, shape (P,)
        Prefix table. Prefix 0 is the empty prefix (parent, token, trigger -1).
        Prefix ``i`` is ``tokens_of(parent[i]) + [token[i]]`` created at frame
        ``trigger_frame[i]``. A token sequence pruned and later proposed again gets a
        new id, so each id falls out of the beam at most once.
    beam_offsets : ndarray of int64, shape (T + 1,)
        CSR offsets: the beam kept after frame ``t`` is
        ``beam_prefix[beam_offsets[t]:beam_offsets[t + 1]]`` (best first).
    beam_prefix : ndarray of int32
    beam_score : ndarray of float32
        Ranking score of each kept prefix at that frame.
    prune_frame, prune_prefix, prune_rank : ndarray of int32, shape (E,)
    prune_gap : ndarray of float32, shape (E,)
        One event per candidate not kept: frame, prefix, rank among the frame's
        candidates and cut-off score minus its score. A prefix whose
        ``trigger_frame`` equals its prune frame was proposed and rejected at once; any
        other was held before.
    beam : int
        Beam size used.
    lm_part, dec_part : ndarray of float32, shape (P,), or None
        LM and decoder log-probabilities of each prefix's tokens, summed and unweighted
        (None when the search had no LM / no decoder): the beam list's score parts.
    """

    parent: np.ndarray
    token: np.ndarray
    trigger_frame: np.ndarray
    beam_offsets: np.ndarray
    beam_prefix: np.ndarray
    beam_score: np.ndarray
    prune_frame: np.ndarray
    prune_prefix: np.ndarray
    prune_rank: np.ndarray
    prune_gap: np.ndarray
    beam: int
    lm_part: np.ndarray | None = None
    dec_part: np.ndarray | None = None
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def num_frames(self) -> int:
        return int(self.beam_offsets.size - 1)

    @property
    def num_prefixes(self) -> int:
        return int(self.parent.size)

    @property
    def nbytes(self) -> int:
        """Bytes held by the trace's arrays."""
        return sum(
            getattr(self, n).nbytes
            for n in (
                "parent", "token", "trigger_frame", "beam_offsets", "beam_prefix",
                "beam_score", "prune_frame", "prune_prefix", "prune_rank", "prune_gap",
                "lm_part", "dec_part",
            )
            if getattr(self, n) is not None
        )  # fmt: skip

    def __repr__(self) -> str:
        return (
            f"SearchTrace(frames={self.num_frames}, prefixes={self.num_prefixes}, "
            f"prune_events={self.prune_frame.size}, {self.nbytes / 1e6:.1f} MB)"
        )

    def _check_prefix(self, prefix) -> int:
        if not isinstance(prefix, (int, np.integer)) or not 0 <= prefix < self.num_prefixes:
            raise ParameterError(
                f"The 'prefix' parameter must be an int in the range [0, {self.num_prefixes}). "
                f"Got {prefix!r} instead."
            )
        return int(prefix)

    def tokens_of(self, prefix: int) -> np.ndarray:
        """Token ids of prefix ``prefix`` (int32 array)."""
        return _backtrack(self.parent, self.token, self.trigger_frame, self._check_prefix(prefix))[
            0
        ]

    def trigger_frames_of(self, prefix: int) -> np.ndarray:
        """Trigger frame of each token of prefix ``prefix`` (int32 array)."""
        return _backtrack(self.parent, self.token, self.trigger_frame, self._check_prefix(prefix))[
            1
        ]

    def beam_at(self, frame: int) -> tuple[np.ndarray, np.ndarray]:
        """``(prefix ids, scores)`` kept after ``frame``, best first."""
        T = self.num_frames
        if not isinstance(frame, (int, np.integer)) or not -T <= frame < T:
            raise ParameterError(
                f"The 'frame' parameter of beam_at must be an int in the range [0, {T}). "
                f"Got {frame!r} instead."
            )
        frame = int(frame) % T
        a, b = self.beam_offsets[frame], self.beam_offsets[frame + 1]
        return self.beam_prefix[a:b], self.beam_score[a:b]

    # -- lookups -------------------------------------------------------------
    def _children(self) -> tuple[np.ndarray, np.ndarray]:
        if "children" not in self._cache:
            order = np.argsort(self.parent, kind="stable").astype(np.int32)
            offs = np.searchsorted(self.parent[order], np.arange(self.num_prefixes + 1))
            self._cache["children"] = (order, offs)
        return self._cache["children"]

    def _held_span(self) -> tuple[np.ndarray, np.ndarray]:
        """First and last frame each prefix was in the kept beam (-2 if never)."""
        if "held" not in self._cache:
            frames = np.repeat(
                np.arange(self.num_frames, dtype=np.int32), np.diff(self.beam_offsets)
            )
            first = np.full(self.num_prefixes, -2, np.int32)
            last = np.full(self.num_prefixes, -2, np.int32)
            # reversed assignment keeps the smallest frame for repeated indices
            first[self.beam_prefix[::-1]] = frames[::-1]
            last[self.beam_prefix] = frames
            first[0] = -1  # the empty prefix is held before frame 0
            if last[0] == -2:
                last[0] = -1
            self._cache["held"] = (first, last)
        return self._cache["held"]

    def _event_of(self) -> np.ndarray:
        """Index of each prefix's prune event (-1 if never pruned)."""
        if "event" not in self._cache:
            ev = np.full(self.num_prefixes, -1, np.int64)
            ev[self.prune_prefix] = np.arange(self.prune_prefix.size)
            self._cache["event"] = ev
        return self._cache["event"]

    def find(self, tokens) -> np.ndarray:
        """Ids of every prefix whose token sequence equals ``tokens``."""
        toks = np.asarray(tokens, dtype=np.int64).reshape(-1)
        order, offs = self._children()
        ids = np.zeros(1, np.int32)
        for k in toks:
            kids = [order[offs[i] : offs[i + 1]] for i in ids]
            kids = np.concatenate(kids) if kids else np.zeros(0, np.int32)
            ids = kids[self.token[kids] == k]
            if ids.size == 0:
                break
        return ids

    def events_for(self, prefix_or_tokens) -> PruneEvents:
        """Prune events of one prefix id, or of every prefix equal to a token list."""
        if isinstance(prefix_or_tokens, (int, np.integer)):
            ids = np.array([self._check_prefix(prefix_or_tokens)])
        else:
            ids = self.find(prefix_or_tokens)
        ev = self._event_of()[ids]
        ev = np.sort(ev[ev >= 0])
        return PruneEvents(
            self.prune_frame[ev], self.prune_prefix[ev], self.prune_rank[ev], self.prune_gap[ev]
        )

    def best_reference_prefix(self, ref_tokens) -> ReferenceMatch:
        """Longest reference prefix the beam ever held, and where it was lost.

        Walks the prefix table along ``ref_tokens``: ``ref[:n]`` counts as held when a
        prefix with exactly those tokens was in the kept beam after some frame. For the
        longest such ``n`` it reports the frames that prefix was held, the frame and
        score gap at which it was pruned (if it was), and the closest miss of the next
        reference token (the rejected extension ``ref[:n + 1]`` with the smallest gap).
        This is what the ``pruned`` deletion code reads.

        Parameters
        ----------
        ref_tokens : sequence of int
            Reference token ids (no blanks).

        Returns
        -------
        ReferenceMatch
        """
        ref = np.asarray(ref_tokens, dtype=np.int64).reshape(-1)
        order, offs = self._children()
        first, last = self._held_span()
        event = self._event_of()
        ids = np.zeros(1, np.int32)  # prefixes equal to ref[:n]
        n = 0
        while True:
            held = ids[last[ids] >= -1]
            best = held[np.argmax(last[held])] if held.size else None
            if best is not None:
                n_held, best_id = n, int(best)
            if n == ref.size or ids.size == 0:
                break
            kids = [order[offs[i] : offs[i + 1]] for i in ids]
            kids = np.concatenate(kids) if kids else np.zeros(0, np.int32)
            ids = kids[self.token[kids] == ref[n]]
            n += 1
        # closest miss of the next reference token
        next_frame, next_gap = -1, math.nan
        if n_held < ref.size:
            kids = order[offs[best_id] : offs[best_id + 1]]
            kids = kids[self.token[kids] == ref[n_held]]
            ev = event[kids]
            ev = ev[ev >= 0]
            if ev.size:
                e = ev[np.argmin(self.prune_gap[ev])]
                next_frame, next_gap = int(self.prune_frame[e]), float(self.prune_gap[e])
        e = event[best_id]
        return ReferenceMatch(
            n_matched=n_held,
            complete=n_held == ref.size,
            prefix=best_id,
            first_frame_held=int(first[best_id]),
            last_frame_held=int(last[best_id]),
            prune_frame=int(self.prune_frame[e]) if e >= 0 else -1,
            prune_gap=float(self.prune_gap[e]) if e >= 0 else math.nan,
            next_frame=next_frame,
            next_gap=next_gap,
        )


@dataclass(frozen=True, eq=False)
class SearchResult:
    """Result of :func:`prefix_search`.

    Attributes
    ----------
    hypotheses : list of Hypothesis
        The n-best, best first.
    trace : SearchTrace or None
        Prefix table, kept beam per frame and prune events (``trace=True``).
    params : dict
        The search settings (for reports).
    utt : str or None
    """

    hypotheses: list
    trace: SearchTrace | None
    params: dict
    utt: str | None = None

    @property
    def best(self) -> Hypothesis:
        return self.hypotheses[0]

    def __repr__(self) -> str:
        n_ev = "-" if self.trace is None else self.trace.prune_frame.size
        return (
            f"SearchResult(utt={self.utt!r}, nbest={len(self.hypotheses)}, "
            f"best={self.best.score:.3f}, prune_events={n_ev})"
        )


def _require_trace(result: SearchResult) -> SearchTrace:
    """The result's trace; :class:`ParameterError` naming the fix when it has none."""
    if result.trace is None:
        raise ParameterError(
            describe(
                "a search result without a trace",
                "a traced search (the kept beam per frame)",
                "run prefix_search(..., trace=True)",
                utt=result.utt,
            ),
            utt=result.utt,
        )
    return result.trace


# ---------------------------------------------------------------------------
# driver
# ---------------------------------------------------------------------------


def _param(name: str, value, expected: str) -> ParameterError:
    return ParameterError(
        f"The {name!r} parameter of prefix_search must be {expected}. Got {value!r} instead."
    )


def _check_int(name, value, lo, hi=None, *, none_ok=False):
    if value is None and none_ok:
        return None
    rng = f"[{lo}, {'inf' if hi is None else hi})"
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, np.integer))
        or value < lo
        or (hi is not None and value >= hi)
    ):
        raise _param(name, value, f"an int in the range {rng}" + (" or None" if none_ok else ""))
    return int(value)


def _check_float(name, value, *, none_ok=False, allow_neg_inf=False):
    if value is None and none_ok:
        return None
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    if ok:
        v = float(value)
        ok = math.isfinite(v) or (allow_neg_inf and v == -math.inf)
    if not ok:
        raise _param(name, value, "a finite float" + (" or None" if none_ok else ""))
    return float(value)


def _check_log_probs(log_probs, utt):
    lp = np.asarray(log_probs)
    if lp.ndim != 2 or lp.shape[0] == 0 or lp.shape[1] < 2:
        raise ParameterError(
            describe(
                f"log_probs of shape {lp.shape}",
                "a 2-D array (frames, vocabulary) with T >= 1 and V >= 2",
                "pass one utterance's (T, V) log-posteriors",
                utt=utt,
            ),
            utt=utt,
        )
    if lp.dtype not in (np.float32, np.float64):
        lp = lp.astype(np.float32)
    top = lp.max()  # NaN and +inf both propagate through max: one cheap pass
    if not top < np.inf:
        raise ParameterError(
            describe(
                "NaN or +inf in log_probs",
                "log-probabilities (finite or -inf)",
                "check the model's output or normalise with peekalign.scores.to_log_probs",
                utt=utt,
            ),
            utt=utt,
        )
    return np.ascontiguousarray(lp)


def select_candidates(
    log_probs, *, blank: int = 0, candidates: int | None = 20, token_floor=-10.0
):
    """Candidate tokens per frame: the ``candidates`` best non-blank tokens above a floor.

    Parameters
    ----------
    log_probs : ndarray, shape (T, V)
    blank : int
    candidates : int or None
        Tokens per frame (None: all).
    token_floor : float or None
        Minimum log-probability (None: no floor).

    Returns
    -------
    cand : ndarray of int32, shape (T, K)
        Token ids per frame, best first, padded with -1.
    n_cand : ndarray of int32, shape (T,)

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.array([[0.5, 0.3, 0.2], [0.9, 0.02, 0.08]]))
    >>> cand, n = select_candidates(lp, candidates=1, token_floor=-3.0)
    >>> cand.tolist(), n.tolist()
    ([[1], [2]], [1, 1])
    """
    lp = _check_log_probs(log_probs, None)
    V = lp.shape[1]
    blank = _check_int("blank", blank, 0, V)
    candidates = _check_int("candidates", candidates, 1, none_ok=True)
    floor = _check_float("token_floor", token_floor, none_ok=True, allow_neg_inf=True)
    k = V - 1 if candidates is None else min(candidates, V - 1)
    return _select_candidates(lp, blank, k, -math.inf if floor is None else floor)


class _Scorer:
    """Python-side extension scores: the LM callable and the decoder, cached by content.

    Live prefixes carry a content id from a trie of ``(content id of parent, token)``,
    so a token sequence proposed again (after a prune) reuses its LM score. Decoder rows
    are cached per (content id of the parent, window end); window ends never decrease
    from frame to frame, so rows of an earlier end are dropped.
    """

    def __init__(self, *, lm, lm_weight, word_separator, vocab, lm_eos, decoder,
                 decoder_weight, decoder_eos, lookahead, token_bonus, T, utt):  # fmt: skip
        self.lm = lm
        self.lm_weight = lm_weight
        self.sep = word_separator
        self.vocab = vocab
        self.lm_eos = lm_eos
        self.dec = decoder
        self.dec_weight = decoder_weight
        self.dec_eos = decoder_eos
        self.lookahead = lookahead
        self.token_bonus = token_bonus
        self.T = T
        self.utt = utt
        self.trie: dict[tuple[int, int], int] = {}
        self.lm_cache: dict[int, float] = {}
        self.dec_rows: dict[tuple[int, int], np.ndarray] = {}
        self.dec_end = -1
        # per live prefix: content id, token tuple, (completed words, partial word)
        self.cid: dict[int, int] = {0: 0}
        self.toks: dict[int, tuple] = {0: ()}
        self.words: dict[int, tuple] = {0: ((), ())}

    def _unit(self, k):
        return self.vocab[k] if self.vocab is not None else int(k)

    def _word(self, partial):
        if self.vocab is not None:
            return "".join(self.vocab[k] for k in partial)
        return tuple(int(k) for k in partial)

    def _value(self, what, value, tokens, frame):
        try:
            v = float(value)
        except (TypeError, ValueError):
            v = math.nan
        if math.isnan(v) or v == math.inf:
            raise ParameterError(
                f"the {what} returned {value!r} for prefix {list(tokens)} at frame {frame}; "
                "expected a log-probability (a float <= 0, or -inf); check the callable"
            )
        return v

    def _call_lm(self, history, unit, tokens, frame):
        return self._value("lm", self.lm(history, unit), tokens, frame)

    def _lm_step(self, i, p, k, c, tup, t):
        if self.sep is None:
            lm_s = self.lm_cache.get(c)
            if lm_s is None:
                hist = tuple(self._unit(x) for x in tup[:-1])
                lm_s = self.lm_cache[c] = self._call_lm(hist, self._unit(k), tup, t)
            return lm_s
        done, partial = self.words[p]
        if k != self.sep:
            self.words[i] = (done, partial + (k,))
            return 0.0
        if not partial:  # leading or doubled separator: no word closes
            self.words[i] = (done, ())
            return 0.0
        word = self._word(partial)
        self.words[i] = (done + (word,), ())
        lm_s = self.lm_cache.get(c)
        if lm_s is None:
            lm_s = self.lm_cache[c] = self._call_lm(done, word, tup, t)
        return lm_s

    def _window_end(self, t: int) -> int:
        if self.lookahead is None:
            return self.T - 1
        return min(self.T - 1, t + self.lookahead)

    def _decoder_scores(self, ids, parent, token, trigger) -> list[float]:
        """Decoder log-prob of each new prefix's last token: one batched call per frame."""
        from .decoder import decoder_log_probs

        keys = []
        ask: dict[tuple[int, int], tuple] = {}
        for i in ids:
            p = int(parent[i])
            end = self._window_end(int(trigger[i]))
            if end > self.dec_end:  # windows only move forward: old rows are done
                self.dec_rows.clear()
                self.dec_end = end
            key = (self.cid[p], end)
            keys.append(key)
            if key not in self.dec_rows and key not in ask:
                ask[key] = self.toks[p]
        if ask:
            rows = decoder_log_probs(
                self.dec,
                [list(v) for v in ask.values()],
                [k[1] for k in ask],
                utt=self.utt,
            )
            for key, row in zip(ask, rows, strict=True):
                self.dec_rows[key] = row
        out = []
        for i, key in zip(ids, keys, strict=True):
            row = self.dec_rows[key]
            k = int(token[i])
            out.append(float(row[k]) if k < row.size else -math.inf)
        return out

    def score_new(self, ids, parent, token, trigger, ext, lm_part, dec_part):
        ids = list(ids)
        dec_s = self._decoder_scores(ids, parent, token, trigger) if self.dec is not None else None
        for n, i in enumerate(ids):
            p = int(parent[i])
            k = int(token[i])
            t = int(trigger[i])
            key = (self.cid[p], k)
            c = self.trie.get(key)
            if c is None:
                c = self.trie[key] = len(self.trie) + 1
            self.cid[i] = c
            tup = self.toks[p] + (k,)
            self.toks[i] = tup
            lm_s = self._lm_step(i, p, k, c, tup, t) if self.lm is not None else 0.0
            d_s = dec_s[n] if dec_s is not None else 0.0
            lm_part[i] = lm_part[p] + lm_s
            dec_part[i] = dec_part[p] + d_s
            ext[i] = ext[p] + self.token_bonus + self.lm_weight * lm_s + self.dec_weight * d_s

    def keep(self, live):
        self.cid = {i: self.cid[i] for i in live}
        self.toks = {i: self.toks[i] for i in live}
        if self.lm is not None and self.sep is not None:
            self.words = {i: self.words[i] for i in live}

    def decoder_end_terms(self, ids) -> list[float]:
        """``log P_dec(eos | prefix, all frames)`` of each final prefix (0 without eos)."""
        if self.dec is None or self.dec_eos is None or not len(ids):
            return [0.0] * len(ids)
        from .decoder import decoder_log_probs

        rows = decoder_log_probs(
            self.dec, [list(self.toks[i]) for i in ids], [self.T - 1] * len(ids), utt=self.utt
        )
        eos = self.dec_eos
        return [float(r[eos]) if eos < r.size else -math.inf for r in rows]

    def end_terms(self, i) -> float:
        """LM terms at the end of the utterance: the unfinished last word and ``</s>``."""
        if self.lm is None:
            return 0.0
        tup = self.toks[i]
        T = self.T - 1
        total = 0.0
        if self.sep is None:
            hist = tuple(self._unit(x) for x in tup)
        else:
            done, partial = self.words[i]
            if partial:
                word = self._word(partial)
                total += self._call_lm(done, word, tup, T)
                done = done + (word,)
            hist = done
        if self.lm_eos:
            total += self._call_lm(hist, EOS, tup, T)
        return total


def prefix_search(
    log_probs,
    *,
    blank: int = 0,
    beam: int = 16,
    candidates: int | None = 20,
    token_floor: float | None = -10.0,
    prune_gap: float | None = 10.0,
    token_bonus: float = 0.0,
    lm: Callable[[tuple, Any], float] | None = None,
    lm_weight: float = 0.0,
    word_separator: int | None = None,
    vocab: Sequence[str] | None = None,
    lm_eos: bool = False,
    decoder: UtteranceDecoder | None = None,
    decoder_weight: float = 0.0,
    lookahead: int | None = 0,
    decoder_eos: int | None = None,
    nbest: int = 5,
    trace: bool = True,
    utt: str | None = None,
) -> SearchResult:
    """Frame-synchronous CTC prefix beam search with a trace of every decision.

    Per frame ``t`` and kept prefix ``l`` with CTC log-probabilities
    ``(p_b, p_nb)``: staying on a blank gives ``p_b' = logaddexp(p_b, p_nb) + y[t, blank]``,
    repeating the last token ``p_nb' = p_nb + y[t, l[-1]]`` (both always evaluated, so
    no path is lost by token pruning); extending by a candidate token ``k`` adds
    ``(p_b if k == l[-1] else logaddexp(p_b, p_nb)) + y[t, k]`` to ``p_nb`` of
    ``l + k``. Candidates are the ``candidates`` best non-blank tokens of the frame with
    log-prob ``>= token_floor``. Then the ``beam`` best prefixes by

    ``score = logaddexp(p_b, p_nb) + lm_weight * lm + token_bonus * len(l)
    + decoder_weight * dec``

    are kept. ``lm`` and ``dec`` are fixed when a prefix is created: the search adds the
    new token's (or word's) LM log-prob and the decoder's log-prob of the new token
    then (hybrid CTC/attention joint decoding (2017), frame-synchronous). If an
    extension reaches a token sequence already in the beam, its probability mass
    merges into that prefix, which keeps its id, trigger frames and LM/decoder
    parts. A token sequence pruned earlier and proposed again is a new
    prefix with a new trigger frame.

    A prefix's trigger frame is the frame of its creation, so a token proposed (and
    kept) on a frame where it has a small posterior triggers early: ``token_floor``
    decides which frames may trigger. On peaky posteriors the default floor (-10,
    posterior ~4.5e-5) keeps off-spike frames out.

    Parameters
    ----------
    log_probs : ndarray, shape (T, V)
        Frame log-posteriors (log-softmax).
    blank : int
        Blank id.
    beam : int
        Prefixes kept per frame.
    candidates : int or None
        Candidate tokens per frame (None: all).
    token_floor : float or None
        Candidate tokens need log-prob ``>= token_floor`` (None: no floor).
    prune_gap : float or None
        Prefixes scoring more than this below the frame's best are pruned even when
        the beam has room (None: off). Keeps faint extensions (e.g. a repeat through
        a blank of posterior 1e-6) from being created, and so triggering, early.
    token_bonus : float
        Added per token.
    lm : callable, optional
        ``lm(history, unit) -> float``, the natural-log probability of ``unit`` after
        ``history`` (a tuple of earlier units). Token mode (``word_separator`` None):
        called for every new token, units are tokens. Word mode: called when the
        separator token closes a non-empty word, units are words; the separator itself
        gets no LM score. Units are strings from ``vocab`` when given (a word is its
        tokens' strings joined), else token ids (a word is a tuple of ids). History
        starts at the utterance start (an :class:`~peekalign.lm.ArpaLM` puts ``<s>``
        before it). At the end of the utterance, the unfinished last word is scored
        (word mode) and, with ``lm_eos``, ``lm(history, "</s>")``; these terms enter
        the n-best's scores only.
    lm_weight : float
        Weight of the LM score.
    word_separator : int, optional
        Token id that separates words; switches the LM to word mode.
    vocab : sequence of str, optional
        Token strings (``vocab[i]`` is token ``i``) to pass strings to ``lm``.
    lm_eos : bool
        Score the end of sentence ``"</s>"`` at the end of the utterance.
    decoder : UtteranceDecoder, optional
        The attention decoder bound to this utterance (see
        :mod:`peekalign.decoder`). When a prefix ``l + k`` is created at trigger frame
        ``n``, its decoder part grows by ``log P_dec(k | l, frames [0, end])`` with
        ``end = min(T - 1, n + lookahead)``. Per frame, the new prefixes' parents are
        asked in one batched call (one row per distinct parent and window end).
    decoder_weight : float
        Weight ``lambda`` of the decoder score (0 leaves every decision to CTC, LM and
        token bonus).
    lookahead : int or None
        Decoder look-ahead ``epsilon`` in frames; None is full context (every window
        ends at the last frame).
    decoder_eos : int, optional
        The decoder's end-of-sentence index: when given, ``log P_dec(eos | hypothesis,
        all frames)`` is added to each n-best entry's decoder score at the end (the
        ranking of the kept beam is unaffected).
    nbest : int
        Hypotheses returned (at most ``beam``).
    trace : bool
        Record the kept beam per frame and the prune events.
    utt : str, optional
        Utterance id for messages.

    Returns
    -------
    SearchResult

    Raises
    ------
    ParameterError
        For bad settings, or a callable returning NaN / +inf.
    AlignmentError
        When every prefix has probability zero at some frame.

    Examples
    --------
    >>> import numpy as np
    >>> lp = np.log(np.array([[0.1, 0.8, 0.1], [0.8, 0.1, 0.1], [0.1, 0.1, 0.8]]))
    >>> res = prefix_search(lp, beam=4, token_floor=-2.0)
    >>> res.best.tokens.tolist(), res.best.trigger_frames.tolist()
    ([1, 2], [0, 2])
    >>> # paths (1, blank, 2) and (1, 1, 2); the floor drops tokens with p = 0.1
    >>> round(float(np.exp(res.best.ctc_score)), 3)
    0.576
    """
    lp = _check_log_probs(log_probs, utt)
    T, V = lp.shape
    opts = _check_search_options(
        V, blank=blank, beam=beam, nbest=nbest, candidates=candidates,
        token_floor=token_floor, prune_gap=prune_gap, token_bonus=token_bonus,
        lm_weight=lm_weight, decoder_weight=decoder_weight, lookahead=lookahead,
        decoder_eos=decoder_eos, word_separator=word_separator, lm=lm, decoder=decoder,
        vocab=vocab, utt=utt,
    )  # fmt: skip
    blank, beam, nbest = opts["blank"], opts["beam"], opts["nbest"]
    token_bonus, lm_weight = opts["token_bonus"], opts["lm_weight"]
    decoder_weight = opts["decoder_weight"]
    k = V - 1 if opts["candidates"] is None else min(opts["candidates"], V - 1)
    floor = opts["token_floor"]
    cand, ncand = _select_candidates(lp, blank, k, -math.inf if floor is None else floor)
    beam_alloc = _beam_allocation(T, k, beam)
    scorer = None
    if lm is not None or decoder is not None:
        scorer = _Scorer(
            lm=lm, lm_weight=lm_weight, word_separator=opts["word_separator"],
            vocab=None if vocab is None else list(vocab), lm_eos=bool(lm_eos),
            decoder=decoder, decoder_weight=decoder_weight, decoder_eos=opts["decoder_eos"],
            lookahead=opts["lookahead"], token_bonus=token_bonus, T=T, utt=utt,
        )  # fmt: skip
    out = _run_frames(
        lp, cand, ncand, blank, beam_alloc, opts["threshold"], token_bonus, bool(trace), k,
        scorer,
    )  # fmt: skip
    _raise_if_lost(out["fail"], utt)
    nb = out["nb"]
    hyps = _nbest(
        out["parent"], out["token"], out["trigger"], out["b_id"][:nb], out["b_pb"][:nb],
        out["b_pnb"][:nb], nbest, token_bonus, lm_weight, decoder_weight, out["lm_part"],
        out["dec_part"], scorer,
    )  # fmt: skip
    tr = (
        _search_trace(out, beam, lm=lm is not None, decoder=decoder is not None) if trace else None
    )
    params = {
        "blank": blank, "beam": beam, "candidates": opts["candidates"], "token_floor": floor,
        "prune_gap": prune_gap,
        "token_bonus": token_bonus, "lm": lm is not None, "lm_weight": lm_weight,
        "word_separator": opts["word_separator"], "lm_eos": bool(lm_eos),
        "decoder": decoder is not None, "decoder_weight": decoder_weight,
        "decoder_eos": opts["decoder_eos"], "lookahead": opts["lookahead"], "nbest": nbest,
    }  # fmt: skip
    return SearchResult(hypotheses=hyps, trace=tr, params=params, utt=utt)


def _check_search_options(
    V, *, blank, beam, nbest, candidates, token_floor, prune_gap, token_bonus, lm_weight,
    decoder_weight, lookahead, decoder_eos, word_separator, lm, decoder, vocab, utt,
) -> dict:  # fmt: skip
    """Check :func:`prefix_search`'s settings against a vocabulary of ``V`` tokens.

    Returns the checked values by name (ints and floats normalised, ``threshold`` the
    prune gap with None as infinity); raises :class:`ParameterError` naming the first
    bad one.
    """
    opts = {
        "blank": _check_int("blank", blank, 0, V),
        "beam": _check_int("beam", beam, 1),
        "nbest": _check_int("nbest", nbest, 1),
        "candidates": _check_int("candidates", candidates, 1, none_ok=True),
        "token_floor": _check_float("token_floor", token_floor, none_ok=True, allow_neg_inf=True),
    }
    threshold = _check_float("prune_gap", prune_gap, none_ok=True)
    if threshold is not None and threshold < 0:
        raise _param("prune_gap", prune_gap, "a float >= 0 or None")
    opts["threshold"] = math.inf if threshold is None else threshold
    opts["token_bonus"] = _check_float("token_bonus", token_bonus)
    opts["lm_weight"] = _check_float("lm_weight", lm_weight)
    opts["decoder_weight"] = _check_float("decoder_weight", decoder_weight)
    opts["lookahead"] = _check_int("lookahead", lookahead, 0, none_ok=True)
    opts["decoder_eos"] = _check_int("decoder_eos", decoder_eos, 0, none_ok=True)
    if word_separator is not None:
        word_separator = _check_int("word_separator", word_separator, 0, V)
        if word_separator == opts["blank"]:
            raise _param("word_separator", word_separator, "a token id other than the blank")
    opts["word_separator"] = word_separator
    if lm is not None and not callable(lm):
        raise _param("lm", lm, "a callable lm(history, unit) -> float or None")
    if decoder is not None and not callable(getattr(decoder, "log_probs", None)):
        raise _param(
            "decoder",
            decoder,
            "an UtteranceDecoder (a method log_probs(prefixes, last_frames)) or None",
        )
    if vocab is not None and len(vocab) != V:
        raise ParameterError(
            describe(
                f"a vocab of {len(vocab)} tokens",
                f"{V} (the width of log_probs)",
                "pass the model's token list",
                utt=utt,
            ),
            utt=utt,
        )
    return opts


def _beam_allocation(T: int, k: int, beam: int) -> int:
    """Beam slots to allocate: ``beam``, or fewer when ``T`` frames of ``k`` candidate
    tokens cannot make that many distinct token sequences (length <= T)."""
    beam_alloc, layer = 1, 1
    for _ in range(T):
        layer *= k
        beam_alloc += layer
        if beam_alloc >= beam:
            break
    return min(beam, beam_alloc)


_RUN_FIELDS = (
    "fail", "parent", "token", "trigger", "n_inst", "b_id", "b_pb", "b_pnb", "nb",
    "bt_offsets", "bt_prefix", "bt_score", "n_bt",
    "pr_frame", "pr_prefix", "pr_rank", "pr_gap", "n_pr",
)  # fmt: skip


def _run_frames(lp, cand, ncand, blank, beam_alloc, threshold, token_bonus, record, k, scorer):
    """Run the frame loop: all in numba without Python scorers, else :func:`_run_python`.

    Returns the loop's arrays and counts by name (``_RUN_FIELDS``, plus ``lm_part`` and
    ``dec_part``, None without a scorer).
    """
    T = lp.shape[0]
    cap = int(min(1 + T * beam_alloc * k, max(1 << 12, 8 * T * beam_alloc)))
    if scorer is None:
        out = _run(lp, cand, ncand, blank, beam_alloc, threshold, token_bonus, record, cap)
        return dict(zip(_RUN_FIELDS, out, strict=True), lm_part=None, dec_part=None)
    out = _run_python(lp, cand, ncand, blank, beam_alloc, threshold, record, cap, scorer)
    return dict(zip((*_RUN_FIELDS, "lm_part", "dec_part"), out, strict=True))


def _raise_if_lost(fail: int, utt) -> None:
    """Raise :class:`AlignmentError` when the frame loop lost every prefix at ``fail``."""
    if fail >= 0:
        raise AlignmentError(
            describe(
                f"no prefix with non-zero probability after frame {fail}",
                "at least one CTC path with finite log-probability",
                "lower 'token_floor' or raise 'candidates' (or check log_probs for -inf rows)",
                utt=utt,
            ),
            utt=utt,
        )


def _search_trace(out: dict, beam: int, *, lm: bool, decoder: bool) -> SearchTrace:
    """The :class:`SearchTrace` of a frame loop's output, trimmed to the used lengths
    (with the LM / decoder score parts when they took part)."""
    n_inst, n_bt, n_pr = out["n_inst"], out["n_bt"], out["n_pr"]
    return SearchTrace(
        parent=out["parent"][:n_inst].copy(),
        token=out["token"][:n_inst].copy(),
        trigger_frame=out["trigger"][:n_inst].copy(),
        beam_offsets=out["bt_offsets"],
        beam_prefix=out["bt_prefix"][:n_bt].copy(),
        beam_score=out["bt_score"][:n_bt].copy(),
        prune_frame=out["pr_frame"][:n_pr].copy(),
        prune_prefix=out["pr_prefix"][:n_pr].copy(),
        prune_rank=out["pr_rank"][:n_pr].copy(),
        prune_gap=out["pr_gap"][:n_pr].copy(),
        beam=beam,
        lm_part=_part(out["lm_part"], n_inst) if lm else None,
        dec_part=_part(out["dec_part"], n_inst) if decoder else None,
    )


def _part(part, n: int) -> np.ndarray | None:
    """A score part per prefix for the trace (float32: display precision, half the
    bytes)."""
    return None if part is None else part[:n].astype(np.float32)


def _run_python(lp, cand, ncand, blank, beam, threshold, record, cap, scorer):
    """Frame loop with Python scorers between the numba expand and select steps."""
    T, V = lp.shape
    K = cand.shape[1]
    i32 = np.int32
    parent = np.empty(cap, i32)
    token = np.empty(cap, i32)
    trigger = np.empty(cap, i32)
    ext = np.empty(cap)
    lm_part = np.empty(cap)
    dec_part = np.empty(cap)
    parent[0] = token[0] = trigger[0] = -1
    ext[0] = lm_part[0] = dec_part[0] = 0.0
    n_inst = 1
    tok_stamp = np.zeros(V, i32)
    tok_head = np.empty(V, i32)
    b_next = np.empty(beam, i32)
    b_id = np.zeros(beam, i32)
    b_pb = np.zeros(beam)
    b_pnb = np.full(beam, -np.inf)
    nb = 1
    s_id = np.empty(beam * (K + 1), i32)
    s_pb = np.empty(beam * (K + 1))
    s_pnb = np.empty(beam * (K + 1))
    nbt = T * beam if record else 0
    bt_offsets = np.zeros(T + 1, np.int64)
    bt_prefix = np.empty(nbt, i32)
    bt_score = np.empty(nbt, np.float32)
    n_bt = 0
    pcap = cap if record else 0
    pr = [
        np.empty(pcap, i32),
        np.empty(pcap, i32),
        np.empty(pcap, i32),
        np.empty(pcap, np.float32),
    ]
    n_pr = 0
    fail = -1

    def grow(a, n, size):
        out = np.empty(size, a.dtype)
        out[:n] = a[:n]
        return out

    for t in range(T):
        n_c = int(ncand[t])
        need = n_inst + nb * n_c
        if need > parent.size:
            size = max(2 * parent.size, need)
            parent, token, trigger, ext, lm_part, dec_part = (
                grow(a, n_inst, size) for a in (parent, token, trigger, ext, lm_part, dec_part)
            )
        if record and n_pr + nb * (n_c + 1) > pr[0].size:
            size = max(2 * pr[0].size, n_pr + nb * (n_c + 1))
            pr = [grow(a, n_pr, size) for a in pr]
        first_new = n_inst
        # intended: _run's expand and select calls, with the Python scorers between them
        n_slots, n_inst = _expand(
            t, lp[t], cand[t], n_c, blank, b_id, b_pb, b_pnb, nb,
            parent, token, trigger, n_inst, tok_stamp, tok_head, b_next,
            s_id, s_pb, s_pnb,
        )  # fmt: skip
        scorer.score_new(range(first_new, n_inst), parent, token, trigger, ext, lm_part, dec_part)
        nb, n_bt, n_pr = _select(
            t, n_slots, s_id, s_pb, s_pnb, ext, beam, threshold, b_id, b_pb, b_pnb,
            record, bt_prefix, bt_score, n_bt, pr[0], pr[1], pr[2], pr[3], n_pr,
        )  # fmt: skip
        bt_offsets[t + 1] = n_bt
        if nb == 0:
            fail = t
            break
        scorer.keep(b_id[:nb].tolist())
    return (fail, parent, token, trigger, n_inst, b_id, b_pb, b_pnb, nb, bt_offsets,
            bt_prefix, bt_score, n_bt, pr[0], pr[1], pr[2], pr[3], n_pr, lm_part, dec_part)  # fmt: skip


def _nbest(parent, token, trigger, ids, pb, pnb, nbest, token_bonus, lm_weight, dec_weight,
           lm_part, dec_part, scorer):  # fmt: skip
    rows = []
    ids = ids.tolist()
    dec_end = scorer.decoder_end_terms(ids) if scorer is not None else [0.0] * len(ids)
    for i, a, b, d_end in zip(ids, pb.tolist(), pnb.tolist(), dec_end, strict=True):
        ctc = float(np.logaddexp(a, b))
        toks, trig = _backtrack(parent, token, trigger, i)
        lm_s = float(lm_part[i]) if lm_part is not None else 0.0
        dec_s = (float(dec_part[i]) if dec_part is not None else 0.0) + d_end
        if scorer is not None:
            lm_s += scorer.end_terms(i)
        b = token_bonus * len(toks)
        score = ctc + lm_weight * lm_s + b + dec_weight * dec_s
        rows.append((score, ctc, lm_s, dec_s, b, i, toks, trig))
    # stable: ties keep the beam's order
    rows.sort(key=lambda r: -r[0])
    return [
        Hypothesis(
            tokens=r[6],
            trigger_frames=r[7],
            score=r[0],
            ctc_score=r[1],
            lm_score=r[2],
            decoder_score=r[3],
            token_bonus=r[4],
            prefix=r[5],
        )
        for r in rows[:nbest]
    ]
