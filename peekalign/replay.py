"""Decoding replay: the beam of a traced search frame by frame, in compact arrays.

:func:`beam_replay` turns a :class:`~peekalign.search.SearchResult` into what the beam
lane of the views and the widget's replay need: the kept prefixes per frame with their
scores, a prefix table restricted to the prefixes ever kept (and their ancestors), the
token strings those prefixes use, the prune events of prefixes that had been kept, the
reference's best-held prefix per frame (on-track or off-track) and where the reference
was lost. Texts are not stored per frame: a prefix id decodes to its tokens through
the table, so the data grows with the beam, not with the text. Plain numpy.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .search import _require_trace

__all__ = ["BeamReplay", "beam_replay"]


@dataclass(frozen=True, eq=False)
class BeamReplay:
    """The beam per frame, compactly.

    Prefix ids here are compact ids (``0`` is the empty prefix) into ``parent`` /
    ``token`` / ``trigger``; token ids are compact ids into ``tokens``.

    Attributes
    ----------
    offsets : ndarray of int32, shape (T + 1,)
        Frame ``t`` kept ``prefix[offsets[t]:offsets[t + 1]]``, best first.
    prefix : ndarray of int32, shape (N,)
    score : ndarray of float32, shape (N,)
        Ranking score of each kept prefix after that frame.
    parent, token, trigger : ndarray of int32, shape (P,)
        Prefix table (parent ``-1`` and token ``-1`` for the empty prefix).
    length : ndarray of int32, shape (P,)
        Tokens in each prefix.
    ext : ndarray of float32, shape (P,)
        Score parts fixed at creation: ``score - ctc`` (LM, decoder and token bonus).
    lm, dec : ndarray of float32, shape (P,) or None
        The LM and decoder parts (weighted) when the trace holds them.
    tokens : tuple of str
        Token strings of the compact token ids.
    separator : int
        Compact id of the word separator token (-1 for words marked by a prefix).
    boundary : str
        The word boundary symbol (``"▁"`` or the separator's text).
    partial : ndarray of int32, shape (T,)
        Compact prefix id of the partial result after each frame (the final one is the
        best hypothesis).
    prune_frame, prune_prefix, prune_rank : ndarray of int32, shape (E,)
        Prune events of prefixes that had been kept before (fell out of the beam).
    prune_gap : ndarray of float32, shape (E,)
        Score gap to the beam's cut-off at that frame.
    ref_held : ndarray of int32, shape (T,)
        Per frame: length of the longest reference prefix in the kept beam (-1 without
        a reference).
    ref_rank : ndarray of int32, shape (T,)
        Its rank in the beam (-1 when not held or no reference).
    ref_due : ndarray of int32, shape (T,)
        Reference tokens the forced alignment has started by that frame.
    on_track : ndarray of bool, shape (T,)
        ``ref_held >= ref_due``: the beam holds the reference as far as the forced
        alignment has got.
    lost : dict or None
        Where the reference was lost (from
        :meth:`~peekalign.search.SearchTrace.best_reference_prefix`): ``prefix``
        (compact), ``n_matched``, ``last_frame_held``, ``prune_frame``, ``prune_gap``,
        ``next_frame``, ``next_gap``, ``complete``.
    token_bonus : float
    beam : int
    parts_known : bool
        False when an LM or a decoder scored the prefixes but the trace does not hold
        their parts: ``ext`` is then the token bonus only and ``ctc`` includes them.
    """

    offsets: np.ndarray
    prefix: np.ndarray
    score: np.ndarray
    parent: np.ndarray
    token: np.ndarray
    trigger: np.ndarray
    length: np.ndarray
    ext: np.ndarray
    lm: np.ndarray | None
    dec: np.ndarray | None
    tokens: tuple
    separator: int
    boundary: str
    partial: np.ndarray
    prune_frame: np.ndarray
    prune_prefix: np.ndarray
    prune_rank: np.ndarray
    prune_gap: np.ndarray
    ref_held: np.ndarray
    ref_rank: np.ndarray
    ref_due: np.ndarray
    on_track: np.ndarray
    lost: dict | None
    token_bonus: float
    beam: int
    parts_known: bool = True

    @property
    def num_frames(self) -> int:
        return int(self.offsets.size - 1)

    @property
    def nbytes(self) -> int:
        """Bytes of the arrays (what a page stores, before encoding)."""
        n = sum(
            a.nbytes
            for a in (
                self.offsets, self.prefix, self.score, self.parent, self.token, self.trigger,
                self.length, self.ext, self.partial, self.prune_frame, self.prune_prefix,
                self.prune_rank, self.prune_gap, self.ref_held, self.ref_rank, self.ref_due,
                self.on_track,
            )
        )  # fmt: skip
        n += sum(a.nbytes for a in (self.lm, self.dec) if a is not None)
        return n + sum(len(t.encode()) + 1 for t in self.tokens)

    def token_ids(self, prefix: int) -> list[int]:
        """Compact token ids of a prefix, oldest first."""
        out = []
        j = int(prefix)
        while j > 0:
            out.append(int(self.token[j]))
            j = int(self.parent[j])
        return out[::-1]

    def text(self, prefix: int) -> str:
        """Words of a prefix joined by spaces (how the views decode it in the browser)."""
        words: list[str] = []
        cur = ""
        for k in self.token_ids(prefix):
            tok = self.tokens[k]
            if self.separator >= 0:
                if k == self.separator:
                    if cur:
                        words.append(cur)
                    cur = ""
                else:
                    cur += tok
            elif tok.startswith(self.boundary):
                if cur:
                    words.append(cur)
                cur = tok[len(self.boundary) :]
            else:
                cur += tok
        if cur:
            words.append(cur)
        return " ".join(words)

    def beam_at(self, frame: int) -> list[dict]:
        """The kept beam after ``frame``: rank, prefix, text, score and its parts."""
        a, b = int(self.offsets[frame]), int(self.offsets[frame + 1])
        rows = []
        for r, (p, s) in enumerate(zip(self.prefix[a:b], self.score[a:b], strict=True)):
            p = int(p)
            rows.append(
                {
                    "rank": r,
                    "prefix": p,
                    "text": self.text(p),
                    "score": float(s),
                    "ctc": float(s) - float(self.ext[p]),
                    "lm": float(self.lm[p]) if self.lm is not None else 0.0,
                    "decoder": float(self.dec[p]) if self.dec is not None else 0.0,
                    "token_bonus": self.token_bonus * int(self.length[p]),
                }
            )
        return rows

    def __repr__(self) -> str:
        return (
            f"BeamReplay(frames={self.num_frames}, kept={self.prefix.size}, "
            f"prefixes={self.parent.size}, prune_events={self.prune_frame.size}, "
            f"{self.nbytes / 1e3:.0f} kB)"
        )


def _closure(parent: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """``ids`` and all their ancestors (sorted; always holds 0)."""
    keep = np.zeros(parent.size, bool)
    keep[0] = True
    cur = np.unique(ids)
    while cur.size:
        cur = cur[~keep[cur]]
        keep[cur] = True
        cur = parent[cur]
        cur = np.unique(cur[cur >= 0])
    return np.flatnonzero(keep)


def _lengths(parent: np.ndarray) -> np.ndarray:
    """Tokens per prefix; parents always have smaller ids than their children."""
    n = np.zeros(parent.size, np.int32)
    for i in range(1, parent.size):
        n[i] = n[parent[i]] + 1
    return n


def _reference_track(tr, keep_map, ref, due):
    """Per frame: longest reference prefix held, its rank, and where it was lost."""
    T = tr.num_frames
    held = np.full(T, -1, np.int32)
    rank = np.full(T, -1, np.int32)
    if ref is None:
        return held, rank, None
    # reference prefix ids: every prefix equal to ref[:n], any n
    order, offs = tr._children()
    ref_len = np.full(tr.num_prefixes, -1, np.int32)
    ref_len[0] = 0
    ids = np.zeros(1, np.int32)
    for n, k in enumerate(ref.tolist(), start=1):
        kids = [order[offs[i] : offs[i + 1]] for i in ids]
        kids = np.concatenate(kids) if kids else np.zeros(0, np.int32)
        ids = kids[tr.token[kids] == k]
        if ids.size == 0:
            break
        ref_len[ids] = n
    held[:] = 0
    for t in range(T):
        a, b = tr.beam_offsets[t], tr.beam_offsets[t + 1]
        lens = ref_len[tr.beam_prefix[a:b]]
        if lens.size and lens.max() >= 0:
            r = int(np.argmax(lens))
            held[t], rank[t] = lens[r], r
    m = tr.best_reference_prefix(ref)
    lost = {
        "prefix": int(keep_map[m.prefix]) if keep_map[m.prefix] >= 0 else 0,
        "n_matched": m.n_matched,
        "complete": m.complete,
        "last_frame_held": m.last_frame_held,
        "prune_frame": m.prune_frame,
        "prune_gap": m.prune_gap,
        "next_frame": m.next_frame,
        "next_gap": m.next_gap,
    }
    return held, rank, lost


def _scored(params: dict) -> bool:
    """Whether an LM or a decoder added to the search's scores."""
    return bool(params.get("lm") or params.get("attention_scorer") or params.get("decoder"))


def beam_replay(
    result,
    vocab,
    *,
    partials=None,
    ref_tokens=None,
    ref_first_frames=None,
) -> BeamReplay:
    """Compact replay data of a traced search (the beam lane's data).

    Parameters
    ----------
    result : SearchResult
        A traced search (``trace=True``).
    vocab : Vocabulary
    partials : Partials, optional
        Its partial results (:func:`peekalign.partials.partials`); default: the best
        kept prefix per frame, the best hypothesis after the last.
    ref_tokens : array-like of int, optional
        Reference token ids, to follow the reference through the beam.
    ref_first_frames : array-like of int, optional
        First frame of each reference token in the forced alignment
        (``Alignment.first``); with it a frame is on-track when the beam holds the
        reference up to the tokens the alignment has started by then.

    Returns
    -------
    BeamReplay

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Vocabulary, WordBoundary
    >>> from peekalign.search import prefix_search
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((5, 4), 0.02); p[:, 0] = 0.94
    >>> p[1] = [0.02, 0.02, 0.94, 0.02]; p[3] = [0.02, 0.02, 0.02, 0.94]
    >>> res = prefix_search(np.log(p), beam=3, token_floor=-5.0)
    >>> rp = beam_replay(res, v, ref_tokens=[2, 3], ref_first_frames=[1, 3])
    >>> [rp.text(int(p)) for p in rp.partial]
    ['', 'a', 'a', 'ab', 'ab']
    >>> rp.ref_held.tolist(), rp.ref_due.tolist()  # 'a' is in the beam early (p = .02)
    ([1, 1, 1, 2, 2], [0, 1, 1, 2, 2])
    >>> bool(rp.on_track.all()), [r["text"] for r in rp.beam_at(4)]
    (True, ['ab', 'a', 'b'])
    """
    tr = _require_trace(result)
    T = tr.num_frames
    if partials is not None:
        part = np.asarray(partials.prefix, dtype=np.int64)
    else:
        part = tr.beam_prefix[tr.beam_offsets[:-1]].astype(np.int64)
        part[-1] = result.best.prefix
    # prune events of prefixes that had been kept (entered the beam, then fell out)
    first, _ = tr._held_span()  # -2: never kept; -1: the empty prefix before frame 0
    was_kept = (first[tr.prune_prefix] > -2) & (first[tr.prune_prefix] < tr.prune_frame)
    ev = np.flatnonzero(was_kept)
    keep = _closure(tr.parent, np.concatenate([tr.beam_prefix, part, tr.prune_prefix[ev]]))
    keep_map = np.full(tr.num_prefixes, -1, np.int32)
    keep_map[keep] = np.arange(keep.size, dtype=np.int32)
    parent = np.where(tr.parent[keep] >= 0, keep_map[np.maximum(tr.parent[keep], 0)], -1)
    used, tok_c = np.unique(tr.token[keep][1:], return_inverse=True)
    token = np.concatenate([[-1], tok_c]).astype(np.int32)
    length = _lengths(parent.astype(np.int64))
    per_token = float(result.params.get("token_bonus", 0.0) or 0.0)
    # LM / decoder parts (unweighted in the trace when it holds them), weighted here
    params = result.params
    lm = getattr(tr, "lm_part", None)
    dec = getattr(tr, "dec_part", None)
    ext = per_token * length.astype(np.float64)
    if lm is not None:
        lm = (float(params.get("lm_weight", 0.0)) * np.asarray(lm)[keep]).astype(np.float32)
        ext = ext + lm
    if dec is not None:
        w = params.get("decoder_weight", params.get("attention_weight", 0.0))
        dec = (float(w) * np.asarray(dec)[keep]).astype(np.float32)
        ext = ext + dec
    sep = vocab.separator_id if vocab.boundary.kind == "separator" else None
    sep_c = int(np.searchsorted(used, sep)) if sep is not None and sep in used else -1
    ref = None if ref_tokens is None else np.asarray(ref_tokens, dtype=np.int64).reshape(-1)
    due = np.zeros(T, np.int32)
    if ref_first_frames is not None:
        ff = np.asarray(ref_first_frames, dtype=np.int64).reshape(-1)
        due = np.searchsorted(np.sort(ff), np.arange(T), side="right").astype(np.int32)
    held, rank, lost = _reference_track(tr, keep_map, ref, due)
    return BeamReplay(
        offsets=tr.beam_offsets.astype(np.int32),
        prefix=keep_map[tr.beam_prefix],
        score=tr.beam_score.astype(np.float32),
        parent=parent.astype(np.int32),
        token=token,
        trigger=tr.trigger_frame[keep].astype(np.int32),
        length=length,
        ext=ext.astype(np.float32),
        lm=lm,
        dec=dec,
        tokens=tuple(vocab.tokens[int(k)] for k in used),
        separator=sep_c,
        boundary=vocab.boundary.symbol,
        partial=keep_map[part],
        prune_frame=tr.prune_frame[ev].astype(np.int32),
        prune_prefix=keep_map[tr.prune_prefix[ev]],
        prune_rank=tr.prune_rank[ev].astype(np.int32),
        prune_gap=tr.prune_gap[ev].astype(np.float32),
        ref_held=held,
        ref_rank=rank,
        ref_due=due,
        on_track=held >= due if ref is not None else np.zeros(T, bool),
        lost=lost,
        token_bonus=per_token,
        parts_known=bool(lm is not None or dec is not None or not _scored(params)),
        beam=int(tr.beam),
    )
