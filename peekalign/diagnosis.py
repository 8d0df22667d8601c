"""Why was a reference word deleted? One code per deleted word, with its evidence.

Codes, in order of precedence (the first that applies is reported; the others that
also apply are listed in ``Diagnosis.also``):

``cut-off``
    The word's reach margin is negative: when the decoder emitted the word's last
    token, the input had not yet reached the end of the word.
``no-spike``
    None of the word's tokens rises to ``floor`` posterior anywhere inside the word's
    forced-aligned span: the CTC branch gives the word no evidence.
``weak``
    The word's best token peaks at or above ``floor`` but below ``spike_threshold``.
``repeat-collapsed``
    The word's first (last) token is the same token as the last (first) token of the
    word before (after) it, and the best path holds one unbroken run of it over both
    tokens' frames: CTC's collapse of repeats emits the two words' token once.
``glued``
    A missing word separator (separator vocabularies): the best path emits the word's
    tokens but never the separator between them and the neighbouring word's, so the
    word survives glued to its neighbour (a spacing error, not lost audio).
``overlap``
    A token of a neighbouring word owns the frame where this word's token peaks on the
    best path: the word's evidence is read as the other word's (in effect a
    substitution).
``pruned``
    The prefix search held (or proposed) the prefix that continues its final
    hypothesis with this word (or with the first tokens of it), and pruned it; the
    frame and score gap of the closest call are reported.
``decoder-drop``
    CTC fired clearly for the word, nothing above explains it, and the final
    hypothesis still lacks it (attention decoder, language model or rescoring).

A neighbour is always a token of another word: repeats and overlaps inside the deleted
word itself (a doubled letter) explain nothing about why the word went missing.
The definitions and their order are DEVELOPERS.md, "Deletion codes".

Why this order: it follows a streaming recognizer from input to output. Audio that had
not arrived cannot be recognised (cut-off); without acoustic evidence (no-spike) or with
too little (weak) nothing downstream can emit the word; a clear spike can still be
lost in the CTC collapse (repeat-collapsed, glued, overlap), then in the beam (pruned), then in the final
decision (decoder-drop). Each later stage presupposes that the earlier ones worked, so
the earliest failing stage is the best explanation, and the fix it points at (more
look-ahead, acoustic model, spike thresholds, beam, decoder) is the one to try first.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .align import Alignment
from .errors import ErrorAlignment, align_words
from .exceptions import ParameterError, describe
from .model import Utterance
from .streaming import MARGIN_TOL_S, WordReach, _check_float

__all__ = ["COLLAPSE_CODES", "DELETION_CODES", "Diagnosis", "diagnose_deletions"]

#: Deletion codes in order of precedence.
DELETION_CODES = (
    "cut-off",
    "no-spike",
    "weak",
    "repeat-collapsed",
    "glued",
    "overlap",
    "pruned",
    "decoder-drop",
)
#: The codes of a clear spike lost in the CTC collapse (one stage, three causes).
COLLAPSE_CODES = ("repeat-collapsed", "glued", "overlap")


@dataclass(frozen=True)
class Diagnosis:
    """Diagnosis of one deleted reference word.

    Attributes
    ----------
    ref_index : int
        Index of the word among the reference words.
    word : str
    code : str
        One of :data:`DELETION_CODES`.
    evidence : dict
        Plain values: ``frames`` (first and last frame of the word's aligned span),
        ``peak`` (best posterior of its tokens inside the span) and ``peak_frame``,
        ``reach_margin_ms`` when known (with ``heard_until_s`` and ``end_s``, absolute
        times in s, for ``cut-off``), and per code: ``repeat-collapsed``, ``glued`` and
        ``overlap`` -> ``neighbour`` (index of the other word's token),
        ``neighbour_token`` and ``between`` frames; ``pruned`` ->
        ``prune_frame`` and ``score_gap`` of the closest call (a prefix the beam held
        first, then the smallest gap), ``held``, ``rank``, ``tokens_held`` (how many of
        the word's tokens the pruned prefix had), ``prune_events``;
        ``decoder-drop`` -> ``in_greedy``, ``in_search``.
    also : tuple of str
        Other codes whose conditions hold too.
    """

    ref_index: int
    word: str
    code: str
    evidence: dict = field(default_factory=dict)
    also: tuple = ()

    def as_row(self) -> dict:
        """Flat dict for tables."""
        row = {"ref_index": self.ref_index, "word": self.word, "code": self.code}
        row["also"] = ",".join(self.also)
        for k, v in self.evidence.items():
            row[k] = v
        return row


def _neighbours(tokens, u0, u1, sep) -> tuple[int, int]:
    """Indices of the tokens of the words before and after tokens ``[u0, u1]``.

    The last token of the previous word and the first of the next (-1 where there is
    none), skipping a separator between them: a neighbour is a token of another word.
    """
    U = tokens.size
    before = u0 - 1
    if before >= 0 and sep is not None and tokens[before] == sep:
        before -= 1
    after = u1 + 1
    if after < U and sep is not None and tokens[after] == sep:
        after += 1
    return before, (after if after < U else -1)


def _repeat_evidence(labels, tokens, first, last, u0, u1, sep) -> dict | None:
    """Repeat of a neighbouring word's token lost in the collapse, or None."""
    for u, v in ((u0, u0 - 1), (u1, u1 + 1)):
        if not 0 <= v < tokens.size or tokens[v] != tokens[u] or tokens[v] == sep:
            continue
        # over both tokens' segments the best path has a single run of the token (no
        # blank or other label splits it), so CTC emits it once
        a, b = min(first[u], first[v]), max(last[u], last[v])
        on = labels[a : b + 1] == tokens[u]
        runs = int(np.count_nonzero(on[1:] & ~on[:-1]) + on[0]) if on.size else 0
        if runs == 1:
            return {"neighbour": int(v), "between": [int(a), int(b)]}
    return None


def _glued_evidence(labels, tokens, spike, u0, u1, sep) -> dict | None:
    """The separator between the word and a neighbour never emitted, or None."""
    if sep is None:
        return None
    U = tokens.size
    # the word glues onto its neighbour when the best path never emits the separator
    # between the neighbouring tokens' spikes while it does emit the word
    for s_idx, other, own in ((u0 - 1, u0 - 2, u0), (u1 + 1, u1 + 2, u1)):
        if not (0 <= other < U and tokens[s_idx] == sep):
            continue
        a, b = sorted((int(spike[other]), int(spike[own])))
        seg = labels[a : b + 1]
        word_emitted = np.any(np.isin(seg, tokens[u0 : u1 + 1]))
        if word_emitted and not np.any(seg == sep):
            return {"neighbour": int(other), "between": [a, b]}
    return None


def _overlap_evidence(labels, tokens, spike, u0, u1, sep) -> dict | None:
    """A neighbouring word's token owning the frame of one of the word's spikes."""
    for v in _neighbours(tokens, u0, u1, sep):
        if v < 0:
            continue
        for u in range(u0, u1 + 1):
            if tokens[v] != tokens[u] and labels[spike[u]] == tokens[v]:
                a, b = sorted((int(spike[u]), int(spike[v])))
                return {"neighbour": int(v), "between": [a, b]}
    return None


def _collapse_evidence(labels, tokens, first, last, spike, u0, u1, sep) -> dict:
    """Each collapse code that applies to the word, with its evidence."""
    found = {
        "repeat-collapsed": _repeat_evidence(labels, tokens, first, last, u0, u1, sep),
        "glued": _glued_evidence(labels, tokens, spike, u0, u1, sep),
        "overlap": _overlap_evidence(labels, tokens, spike, u0, u1, sep),
    }
    return {c: ev for c, ev in found.items() if ev is not None}


def _search_alignment(search, vocab, ref_words):
    """The search's best hypothesis as words, aligned to the reference words."""
    best = np.asarray(search.best.tokens)
    hyp_spans = vocab.words(best)
    return best, hyp_spans, align_words(list(ref_words), [w for w, _, _ in hyp_spans])


def _search_evidence(search, vocab, aligned, ref_tokens, spans, i) -> dict:
    """Prune evidence for reference word ``i`` in the search trace (None: not pruned).

    The prefix looked for is the search's own best hypothesis up to where word ``i``
    belongs, followed by the word's tokens (with a separator in between on separator
    vocabularies); the longest part of it the search ever created is reported.
    """
    trace = search.trace
    best, hyp_spans, e = aligned
    if e.op_of_ref()[i] == "C":
        return {"in_search": True}
    # last hypothesis word aligned before reference word i
    prev_h = -1
    for _op, r, h in e.ops:
        if r == i:
            break
        if h is not None:
            prev_h = h
    context = best[: hyp_spans[prev_h][2] + 1].tolist() if prev_h >= 0 else []
    if context and vocab.separator_id is not None:
        context.append(int(vocab.separator_id))
    u0, u1 = spans[i]
    word = ref_tokens[u0 : u1 + 1].tolist()
    for j in range(len(word), 0, -1):
        ids = trace.find(context + word[:j])
        if ids.size == 0:
            continue
        ev = trace.events_for(context + word[:j])
        if len(ev) == 0:
            return {"in_search": False, "tokens_held": j, "pruned": False}
        # report the closest call: events of prefixes the beam held first, then the
        # smallest score gap
        held_ev = np.isin(ev.prefix, trace.beam_prefix)
        pool = np.flatnonzero(held_ev) if held_ev.any() else np.arange(len(ev))
        k = int(pool[np.argmin(ev.gap[pool])])
        held = bool(held_ev[k])
        return {
            "in_search": False,
            "pruned": True,
            "prune_frame": int(ev.frame[k]),
            "score_gap": float(ev.gap[k]),
            "rank": int(ev.rank[k]),
            "held": held,
            "tokens_held": j,
            "tokens_in_word": len(word),
            "prune_events": len(ev),
        }
    return {"in_search": False, "tokens_held": 0, "pruned": False}


def diagnose_deletions(
    utt: Utterance,
    alignment: Alignment,
    errors: ErrorAlignment,
    *,
    words: WordReach | None = None,
    search=None,
    floor: float = 0.05,
    spike_threshold: float = 0.5,
    cut_off: bool = True,
) -> list[Diagnosis]:
    """One deletion code per deleted reference word (see the module notes).

    Parameters
    ----------
    utt : Utterance
    alignment : Alignment
        Forced alignment of ``utt.ref_tokens``.
    errors : ErrorAlignment
        Word alignment of the reference words (the words of ``alignment.tokens``, as
        ``utt.vocab.words`` groups them) against the hypothesis.
    words : WordReach, optional
        Reach margins of the reference words; without it ``cut-off`` is never
        diagnosed.
    search : SearchResult, optional
        A traced prefix search (``trace=True``) over ``utt.log_probs``; without it
        ``pruned`` is never diagnosed.
    floor : float
        Posterior a token must reach for a spike to count as existing.
    spike_threshold : float
        Posterior of a clear spike (default 0.5: a token above it wins its frame on the
        best path whatever the others do).
    cut_off : bool
        Diagnose ``cut-off`` (turn off for offline models with no look-ahead limit).

    Returns
    -------
    list of Diagnosis
        In reference order.

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary, align_tokens
    >>> from peekalign.errors import align_words
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((9, 4), 0.01); p[:, 0] = 0.97
    >>> p[2] = [0.04, 0.01, 0.94, 0.01]; p[6] = [0.97, 0.01, 0.01, 0.01]
    >>> u = Utterance.from_arrays(np.log(p), ref="a b", vocab=v, hyp="a")
    >>> a = align_tokens(u.log_probs, u.ref_tokens)
    >>> [(d.word, d.code) for d in diagnose_deletions(u, a, align_words("a b", "a"))]
    [('b', 'no-spike')]
    """
    floor, spike_threshold, word_runs = _check_diagnosis_inputs(
        utt, alignment, errors, words, search, floor, spike_threshold
    )
    deleted = [r for op, r, _ in errors.ops if op == "D"]
    if not deleted:
        return []
    vocab = utt.vocab
    ref_words = [w for w, _, _ in word_runs]
    ctx = _WordContext(
        utt=utt,
        alignment=alignment,
        tokens=alignment.tokens.astype(np.int64),
        labels=np.asarray(utt.log_probs).argmax(axis=1),
        spans=[(a, b) for _, a, b in word_runs],
        words=words,
        search=search,
        aligned=_search_alignment(search, vocab, ref_words) if search is not None else None,
        floor=floor,
        spike_threshold=spike_threshold,
        cut_off=cut_off,
    )
    out = []
    for i in deleted:
        code, ev, applies = _diagnose_word(ctx, i)
        out.append(Diagnosis(i, ref_words[i], code, ev, tuple(c for c in applies if c != code)))
    return out


def _check_diagnosis_inputs(utt, alignment, errors, words, search, floor, spike_threshold):
    """Check :func:`diagnose_deletions`' inputs agree with each other.

    Returns ``(floor, spike_threshold, word_runs)``, the word runs of the aligned
    reference tokens as the vocabulary groups them.
    """
    fn = "diagnose_deletions"
    floor = _check_float("floor", floor, fn)
    spike_threshold = _check_float("spike_threshold", spike_threshold, fn)
    if not floor <= spike_threshold <= 1:
        raise ParameterError(
            f"The 'spike_threshold' parameter of {fn} must be a float in the range "
            f"[floor, 1] = [{floor}, 1]. Got {spike_threshold!r} instead."
        )
    word_runs = utt.vocab.words(alignment.tokens.astype(np.int64))
    ref_words = [w for w, _, _ in word_runs]
    if errors.N != len(ref_words):
        raise ParameterError(
            describe(
                f"an error alignment over {errors.N} reference words",
                f"{len(ref_words)} (the words of the aligned reference tokens)",
                "align the reference words as the vocabulary groups them (UtteranceAnalysis "
                "does this)",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    if words is not None and len(words) != len(ref_words):
        raise ParameterError(
            describe(
                f"reach for {len(words)} words",
                f"{len(ref_words)}",
                "pass word_reach() of the same alignment",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    if search is not None and getattr(search, "trace", None) is None:
        raise ParameterError(
            describe(
                "a search result without a trace",
                "prefix_search(..., trace=True)",
                "rerun the search with trace=True",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    return floor, spike_threshold, word_runs


@dataclass(frozen=True)
class _WordContext:
    """What the diagnosis of each deleted word reads: the utterance, its forced
    alignment (token ids, greedy labels per frame, token span per word) and the
    options of :func:`diagnose_deletions`."""

    utt: Utterance
    alignment: Alignment
    tokens: np.ndarray
    labels: np.ndarray
    spans: list
    words: WordReach | None
    search: Any
    aligned: Any
    floor: float
    spike_threshold: float
    cut_off: bool


def _diagnose_word(c: _WordContext, i: int) -> tuple[str, dict, list]:
    """The code, evidence and every code that applies to deleted reference word ``i``."""
    utt, alignment, tokens, labels, spans = c.utt, c.alignment, c.tokens, c.labels, c.spans
    words, search, aligned, cut_off = c.words, c.search, c.aligned, c.cut_off
    floor, spike_threshold = c.floor, c.spike_threshold
    vocab = utt.vocab
    lp = utt.log_probs
    sep = vocab.separator_id
    u0, u1 = spans[i]
    f0, f1 = int(alignment.first[u0]), int(alignment.last[u1])
    word_toks = tokens[u0 : u1 + 1]
    # best posterior of each token anywhere in the word's span (vectorised)
    post = np.exp(np.asarray(lp[f0 : f1 + 1][:, word_toks], dtype=np.float64))
    k = int(np.argmax(post.max(axis=0)))
    peak = float(post[:, k].max())
    ev: dict = {
        "frames": [f0, f1],
        "peak": round(peak, 6),
        "peak_frame": f0 + int(np.argmax(post[:, k])),
        "peak_token": vocab.token(word_toks[k]),
    }
    applies = []
    if words is not None:
        ev["reach_margin_ms"] = round(float(words.margin_s[i]) * 1000.0, 3)
        if cut_off and words.margin_s[i] < -MARGIN_TOL_S:
            applies.append("cut-off")
            ev["heard_until_s"] = round(float(words.heard_until_s[i]), 6)
            ev["end_s"] = round(float(words.end_s[i]), 6)
            ev["word_times"] = words.source
    if peak < floor:
        applies.append("no-spike")
    elif peak < spike_threshold:
        applies.append("weak")
    if peak >= floor:
        lost = _collapse_evidence(
            labels, tokens, alignment.first, alignment.last, alignment.spike, u0, u1, sep
        )
        applies.extend(lost)
        if lost:  # evidence of the first (highest-precedence) collapse code
            m = next(iter(lost.values()))
            ev.update(m)
            ev["neighbour_token"] = vocab.token(tokens[m["neighbour"]])
    if search is not None:
        s = _search_evidence(search, vocab, aligned, tokens, spans, i)
        ev["in_search"] = s.pop("in_search")
        if s.pop("pruned", False):
            applies.append("pruned")
        ev.update(s)
    if peak >= spike_threshold and not {*COLLAPSE_CODES, "pruned"} & set(applies):
        applies.append("decoder-drop")
        ev["in_greedy"] = bool(np.all(np.isin(word_toks, labels[f0 : f1 + 1])))
    code = next(x for x in DELETION_CODES if x in applies)
    ev["floor"] = floor
    ev["spike_threshold"] = spike_threshold
    return code, ev, applies
