"""Confusions and word slices: which words get lost, swapped or made up.

Built from word alignments (:class:`peekalign.errors.ErrorAlignment`), one per
utterance:

- :func:`confusions`: substitution pairs, deleted and inserted words, and per
  reference word its occurrences and how each came out (:class:`Confusions`).
- :func:`token_deletions`: deletion rate per token (characters or word pieces).
- :func:`read_word_counts` and :func:`frequency_bins`: errors of reference words
  binned by how often the word occurs in the training text; words it never has are
  out of vocabulary (OOV).
- :func:`entity_scores`: recall of a user's entity list and the biased and unbiased
  WER (B-WER / U-WER).

Rates per reference word count its substitutions and deletions over its
occurrences; an insertion belongs to no reference word and is reported apart (in
B-WER/U-WER, by whether the inserted word is on the list).
"""

from __future__ import annotations

import math
import os
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from .errors import ErrorAlignment, align_words
from .exceptions import ParameterError, describe
from .io._text import read_option_file

__all__ = [
    "Confusions",
    "WordBin",
    "EntityScores",
    "confusions",
    "token_deletions",
    "read_word_counts",
    "frequency_bins",
    "entity_scores",
    "DEFAULT_BIN_EDGES",
]


def _check_alignments(alignments, fn: str) -> list[ErrorAlignment]:
    out = list(alignments)
    for k, e in enumerate(out):
        if not isinstance(e, ErrorAlignment):
            raise ParameterError(
                describe(
                    f"item {k} of type {type(e).__name__}",
                    "word alignments (ErrorAlignment)",
                    f"pass align_words(ref, hyp) per utterance to {fn}",
                )
            )
    return out


@dataclass(frozen=True, eq=False)
class Confusions:
    """Error counts per word over many utterances.

    Attributes
    ----------
    substitutions : Counter
        ``(ref_word, hyp_word) -> count``.
    deletions, insertions : Counter
        Word -> count.
    occurrences, correct : Counter
        Reference word -> occurrences, and how many came out right.
    """

    substitutions: Counter
    deletions: Counter
    insertions: Counter
    occurrences: Counter
    correct: Counter

    def top_substitutions(self, n: int | None = 20) -> list[tuple[str, str, int]]:
        """Most frequent ``(ref, hyp, count)`` (all with ``n=None``); ties in word order."""
        items = sorted(self.substitutions.items(), key=lambda kv: (-kv[1], kv[0]))
        return [(r, h, c) for (r, h), c in items[:n]]

    def top_deleted(self, n: int | None = 20) -> list[tuple[str, int]]:
        return sorted(self.deletions.items(), key=lambda kv: (-kv[1], kv[0]))[:n]

    def top_inserted(self, n: int | None = 20) -> list[tuple[str, int]]:
        return sorted(self.insertions.items(), key=lambda kv: (-kv[1], kv[0]))[:n]

    def word_rows(self, *, min_count: int = 1) -> list[dict]:
        """One row per reference word: ``word, count, correct, substituted, deleted,
        deletion_rate, error_rate``, the most deleted first."""
        subs_by_ref: Counter = Counter()
        for (r, _), c in self.substitutions.items():
            subs_by_ref[r] += c
        rows = []
        for w, n in self.occurrences.items():
            if n < min_count:
                continue
            s, d = subs_by_ref[w], self.deletions[w]
            rows.append(
                {
                    "word": w,
                    "count": n,
                    "correct": self.correct[w],
                    "substituted": s,
                    "deleted": d,
                    "deletion_rate": d / n,
                    "error_rate": (s + d) / n,
                }
            )
        rows.sort(key=lambda r: (-r["deleted"], -r["deletion_rate"], r["word"]))
        return rows


def confusions(alignments: Iterable[ErrorAlignment]) -> Confusions:
    """Count substitutions, deletions and insertions per word.

    Parameters
    ----------
    alignments : iterable of ErrorAlignment
        Word alignments, one per utterance.

    Returns
    -------
    Confusions

    Examples
    --------
    >>> from peekalign.errors import align_words
    >>> c = confusions([align_words("tram nine to depot", "tram five depot"),
    ...                 align_words("nine to go", "five to go now")])
    >>> c.top_substitutions(1), c.top_deleted(), c.top_inserted()
    ([('nine', 'five', 2)], [('to', 1)], [('now', 1)])
    """
    subs: Counter = Counter()
    dels: Counter = Counter()
    ins: Counter = Counter()
    occ: Counter = Counter()
    cor: Counter = Counter()
    for e in _check_alignments(alignments, "confusions"):
        occ.update(e.ref)
        for op, r, h in e.ops:
            if op == "C":
                cor[e.ref[r]] += 1
            elif op == "S":
                subs[(e.ref[r], e.hyp[h])] += 1
            elif op == "D":
                dels[e.ref[r]] += 1
            else:
                ins[e.hyp[h]] += 1
    return Confusions(subs, dels, ins, occ, cor)


def token_deletions(pairs: Iterable[tuple[Sequence[str], Sequence[str]]]) -> list[dict]:
    """Deletion rate per token: characters or word pieces.

    Parameters
    ----------
    pairs : iterable of (ref_tokens, hyp_tokens)
        Token sequences (a string is read as its characters, spaces dropped).

    Returns
    -------
    list of dict
        ``token, count, deleted, deletion_rate``, highest rate first (ties: more
        occurrences first).

    Examples
    --------
    >>> token_deletions([("depot", "dept"), ("tram", "tam")])[:2]
    [{'token': 'o', 'count': 1, 'deleted': 1, 'deletion_rate': 1.0}, {'token': 'r', 'count': 1, 'deleted': 1, 'deletion_rate': 1.0}]
    """
    count: Counter = Counter()
    deleted: Counter = Counter()
    for ref, hyp in pairs:
        r = [c for c in ref if not c.isspace()] if isinstance(ref, str) else list(ref)
        h = [c for c in hyp if not c.isspace()] if isinstance(hyp, str) else list(hyp)
        e = align_words(r, h)
        count.update(e.ref)
        for op, i, _ in e.ops:
            if op == "D":
                deleted[e.ref[i]] += 1
    rows = [
        {"token": t, "count": n, "deleted": deleted[t], "deletion_rate": deleted[t] / n}
        for t, n in count.items()
    ]
    rows.sort(key=lambda r: (-r["deletion_rate"], -r["count"], r["token"]))
    return rows


def read_word_counts(source: str | os.PathLike | Mapping[str, int]) -> dict[str, int]:
    """Read a word-count file of the training text: ``word count`` per line.

    Lines starting with ``#`` and empty lines are skipped; ``count word`` (the order
    ``uniq -c`` writes) is accepted too. Words are lower-cased and counts of the same
    word added.

    Examples
    --------
    >>> read_word_counts({"Tram": 3, "tram": 2, "depot": 1})
    {'tram': 5, 'depot': 1}
    """
    if isinstance(source, Mapping):
        items = list(source.items())
        name = "the mapping"
    else:
        text = read_option_file(source, what="word-count file")
        name = str(Path(source))
        items = []
        for lineno, line in enumerate(text.splitlines(), 1):
            parts = line.split()
            if not parts or parts[0].startswith("#"):
                continue
            if len(parts) == 2 and parts[1].isdigit():
                items.append((parts[0], int(parts[1])))
            elif len(parts) == 2 and parts[0].isdigit():
                items.append((parts[1], int(parts[0])))
            else:
                raise ParameterError(
                    describe(
                        repr(line),
                        "'word count' on each line",
                        "write one word and its count a line",
                        where=f"{name}, line {lineno}",
                    )
                )
    out: dict[str, int] = {}
    for w, c in items:
        if not isinstance(c, int) or c < 0:
            raise ParameterError(
                describe(f"count {c!r} for {w!r}", "a count >= 0", "fix the count", where=name)
            )
        out[w.lower()] = out.get(w.lower(), 0) + c
    return out


#: Bin edges of :func:`frequency_bins`: OOV (0), 1-9, 10-99, 100-999, 1000 and more.
DEFAULT_BIN_EDGES = (1, 10, 100, 1000)


@dataclass(frozen=True)
class WordBin:
    """Reference words whose training count falls in ``[lo, hi)``."""

    label: str
    lo: float
    hi: float
    words: int
    substituted: int
    deleted: int
    causes: dict = field(default_factory=dict)

    @property
    def error_rate(self) -> float:
        """``(substituted + deleted) / words``; NaN for an empty bin."""
        return (self.substituted + self.deleted) / self.words if self.words else math.nan


def _bin_label(lo: float, hi: float) -> str:
    if lo == 0 and hi == 1:
        return "OOV (0)"
    if math.isinf(hi):
        return f">= {int(lo)}"
    return f"{int(lo)}-{int(hi) - 1}"


def frequency_bins(
    alignments: Iterable[ErrorAlignment],
    counts: Mapping[str, int],
    *,
    edges: Sequence[int] = DEFAULT_BIN_EDGES,
    causes: Iterable[Sequence[str | None]] | None = None,
) -> list[WordBin]:
    """Errors of reference words binned by their count in the training text.

    Parameters
    ----------
    alignments : iterable of ErrorAlignment
    counts : mapping word -> count
        From :func:`read_word_counts` (looked up lower-cased); a word it lacks is
        out of vocabulary and falls in the first bin ``[0, 1)``.
    edges : sequence of int
        Increasing bin edges after 0: bins ``[0, e0), [e0, e1), ..., [e_last, inf)``.
    causes : iterable of sequences, optional
        Per utterance, the deletion cause of each reference word (None when not
        deleted), e.g. the diagnosis codes; tallied per bin.

    Returns
    -------
    list of WordBin
        Their ``words``, ``substituted`` and ``deleted`` add up to the totals.

    Examples
    --------
    >>> from peekalign.errors import align_words
    >>> bins = frequency_bins([align_words("tram to dunmere", "tram to")],
    ...                       {"tram": 500, "to": 9000})
    >>> [(b.label, b.words, b.deleted) for b in bins]
    [('OOV (0)', 1, 1), ('1-9', 0, 0), ('10-99', 0, 0), ('100-999', 1, 0), ('>= 1000', 1, 0)]
    """
    e_list = list(edges)
    if not e_list or any(b <= a for a, b in zip([0] + e_list, e_list, strict=False)):
        raise ParameterError(
            describe(f"edges {e_list!r}", "increasing edges above 0", "pass e.g. (1, 10, 100)")
        )
    bounds = [0] + e_list + [math.inf]
    tallies = [[0, 0, 0, Counter()] for _ in range(len(bounds) - 1)]
    cause_iter = iter(causes) if causes is not None else None
    for e in _check_alignments(alignments, "frequency_bins"):
        why = list(next(cause_iter)) if cause_iter is not None else [None] * e.N
        ops = e.op_of_ref()
        for i, w in enumerate(e.ref):
            c = counts.get(w.lower(), 0)
            k = next(j for j in range(len(bounds) - 1) if bounds[j] <= c < bounds[j + 1])
            t = tallies[k]
            t[0] += 1
            t[1] += ops[i] == "S"
            if ops[i] == "D":
                t[2] += 1
                t[3][why[i] or "unknown"] += 1
    return [
        WordBin(_bin_label(lo, hi), lo, hi, t[0], t[1], t[2], dict(t[3]))
        for (lo, hi), t in zip(zip(bounds[:-1], bounds[1:], strict=True), tallies, strict=True)
    ]


@dataclass(frozen=True)
class EntityScores:
    """Entity recall and biased / unbiased WER.

    Attributes
    ----------
    entities, recalled : int
        Occurrences of list entries (whole phrases) in the references, and how
        many came out with every word correct.
    b_words, b_errors, u_words, u_errors : int
        Reference words on / off the list and their errors (S and D by the reference
        word; an insertion by whether the inserted word is on the list).
    """

    entities: int
    recalled: int
    b_words: int
    b_errors: int
    u_words: int
    u_errors: int
    missed: Counter = field(default_factory=Counter)

    @property
    def recall(self) -> float:
        return self.recalled / self.entities if self.entities else math.nan

    @property
    def b_wer(self) -> float:
        return self.b_errors / self.b_words if self.b_words else math.nan

    @property
    def u_wer(self) -> float:
        return self.u_errors / self.u_words if self.u_words else math.nan


def _phrase_hits(ref: tuple, ok: list[bool], phrases: list[tuple]) -> tuple[int, int, list]:
    """Occurrences of each phrase in ``ref`` (left to right, no overlap) and how many
    have every word correct."""
    found = recalled = 0
    missed = []
    k = 0
    while k < len(ref):
        hit = next((p for p in phrases if tuple(ref[k : k + len(p)]) == p), None)
        if hit is None:
            k += 1
            continue
        found += 1
        if all(ok[k : k + len(hit)]):
            recalled += 1
        else:
            missed.append(" ".join(hit))
        k += len(hit)
    return found, recalled, missed


def entity_scores(alignments: Iterable[ErrorAlignment], entities: Iterable[str]) -> EntityScores:
    """Recall of an entity list and B-WER / U-WER.

    The split of the WER follows the contextual-biasing literature (from memory:
    Le et al., 2021, trie-based deep biasing): reference words on the list make the
    biased part, the rest the unbiased part; a substitution or deletion counts where
    its reference word belongs, an insertion where the inserted word belongs. The
    two error counts add up to the total errors and the two word counts to the
    reference length. Matching is case-insensitive; multi-word entries count for
    recall as whole phrases and for B-WER word by word.

    Examples
    --------
    >>> from peekalign.errors import align_words
    >>> e = [align_words("hold at dunmere junction", "hold at dunmore junction now")]
    >>> s = entity_scores(e, ["Dunmere Junction"])
    >>> s.entities, s.recalled, s.b_words, s.b_errors, s.u_words, s.u_errors
    (1, 0, 2, 1, 2, 1)
    """
    phrases = sorted(
        {tuple(x.lower().split()) for x in entities if x.split()}, key=lambda p: -len(p)
    )
    vocab = {w for p in phrases for w in p}
    ent = rec = bw = be = uw = ue = 0
    missed: Counter = Counter()
    for e in _check_alignments(alignments, "entity_scores"):
        ref = tuple(w.lower() for w in e.ref)
        ops = e.op_of_ref()
        for w, op in zip(ref, ops, strict=True):
            on = w in vocab
            bw, uw = bw + on, uw + (not on)
            if op in ("S", "D"):
                be, ue = be + on, ue + (not on)
        for op, _, h in e.ops:
            if op == "I":
                on = e.hyp[h].lower() in vocab
                be, ue = be + on, ue + (not on)
        f, r, m = _phrase_hits(ref, [op == "C" for op in ops], phrases)
        ent, rec = ent + f, rec + r
        missed.update(m)
    return EntityScores(ent, rec, bw, be, uw, ue, missed)
