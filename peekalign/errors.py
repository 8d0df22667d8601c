"""Recognition errors: word and character alignment, WER/CER and emission delay.

The alignment is the Levenshtein alignment with unit costs (correct 0, substitution,
deletion and insertion 1 each) and a backtrace. Where several alignments share the
minimal number of errors, the one with the most correct units (fewest substitutions)
is taken, and among those the one that puts edits last. The error totals
(``S + D + I``) never depend on that choice; the split between the three kinds can.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from numba import njit

from .exceptions import ParameterError, describe

__all__ = [
    "OPS",
    "ErrorAlignment",
    "ErrorTotals",
    "EmissionDelay",
    "WordErrors",
    "align_words",
    "align_words_timed",
    "align_chars",
    "wer",
    "cer",
    "error_totals",
    "emission_delay",
]

#: Operation codes of an alignment: correct, substitution, deletion, insertion.
OPS = ("C", "S", "D", "I")


@njit(cache=True, nogil=True)
def _levenshtein(a, b, w_sub, w_del, w_ins, sclite):
    """Weighted edit distance with backtrace; ops coded 0=C 1=S 2=D 3=I.

    Default rule (``sclite`` False): costs are ``K w_del`` per deletion, ``K w_ins`` per
    insertion and ``K w_sub + 1`` per substitution with ``K = n + m + 1``, so the total
    is ``K * weighted errors + S``: among the cheapest alignments the one with the
    fewest substitutions (the most correct units) wins; walking back, a deletion is
    taken before an insertion before a diagonal step (edits as late as possible).
    sclite's rule (``sclite`` True): the plain weights, and walking back a diagonal
    step before an insertion before a deletion (checked against sclite's output).
    """
    n = a.shape[0]
    m = b.shape[0]
    K = n + m + 1
    cd = K * w_del
    ci = K * w_ins
    cs = K * w_sub + (0 if sclite else 1)
    # two rows of costs and one int8 move per cell (the step the backtrace takes there,
    # decided as soon as the cell is known): (n + 1)(m + 1) bytes, not 8x that
    prev = np.empty(m + 1, np.int64)
    cur = np.empty(m + 1, np.int64)
    move = np.empty((n + 1, m + 1), np.int8)
    for j in range(m + 1):
        prev[j] = j * ci
        move[0, j] = 3
    move[0, 0] = 0
    for i in range(1, n + 1):
        ai = a[i - 1]
        cur[0] = i * cd
        move[i, 0] = 2
        for j in range(1, m + 1):
            dg = prev[j - 1] + (0 if ai == b[j - 1] else cs)
            up = prev[j] + cd
            left = cur[j - 1] + ci
            best = min(dg, up, left)
            cur[j] = best
            if sclite:  # walking back: diagonal, then insertion, then deletion
                move[i, j] = 1 if dg == best else (3 if left == best else 2)
            else:  # walking back: deletion, then insertion, then diagonal
                move[i, j] = 2 if up == best else (3 if left == best else 1)
        prev, cur = cur, prev
    total = prev[m]
    ops = np.empty(n + m, np.int8)
    ri = np.empty(n + m, np.int32)
    hj = np.empty(n + m, np.int32)
    k = 0
    i = n
    j = m
    while i > 0 or j > 0:
        step = move[i, j]
        if step == 2:
            ops[k] = 2
            ri[k] = i - 1
            hj[k] = -1
            i -= 1
        elif step == 3:
            ops[k] = 3
            ri[k] = -1
            hj[k] = j - 1
            j -= 1
        else:
            ops[k] = 0 if a[i - 1] == b[j - 1] else 1
            ri[k] = i - 1
            hj[k] = j - 1
            i -= 1
            j -= 1
        k += 1
    return total // K, ops[:k][::-1].copy(), ri[:k][::-1].copy(), hj[:k][::-1].copy()


@dataclass(frozen=True, eq=False)
class ErrorAlignment:
    """Levenshtein alignment of a reference and a hypothesis.

    Attributes
    ----------
    ref, hyp : tuple of str
        The aligned units (words or characters).
    ops : list of (op, ref_index, hyp_index)
        In order; ``op`` is one of ``"C"``, ``"S"``, ``"D"``, ``"I"``; ``ref_index`` is
        None for an insertion and ``hyp_index`` None for a deletion.
    unit : {"word", "char"}

    Examples
    --------
    >>> e = align_words("call depot four", "call the depot")
    >>> e.ops
    [('C', 0, 0), ('I', None, 1), ('C', 1, 2), ('D', 2, None)]
    >>> e.S, e.D, e.I, e.N, round(e.wer, 3)
    (0, 1, 1, 3, 0.667)
    """

    ref: tuple
    hyp: tuple
    ops: list
    unit: str = "word"
    #: ``"unit"`` (Levenshtein, unit costs) or ``"time"`` (:func:`align_words_timed`).
    method: str = "unit"

    def _count(self, op: str) -> int:
        return sum(1 for o in self.ops if o[0] == op)

    @property
    def C(self) -> int:
        return self._count("C")

    @property
    def S(self) -> int:
        return self._count("S")

    @property
    def D(self) -> int:
        return self._count("D")

    @property
    def I(self) -> int:  # noqa: E743 - the trade's name for insertions
        return self._count("I")

    @property
    def N(self) -> int:
        """Reference length."""
        return len(self.ref)

    @property
    def errors(self) -> int:
        return self.S + self.D + self.I

    @property
    def wer(self) -> float:
        """``(S + D + I) / N``; 0.0 when both are empty, inf for errors on an empty
        reference. (For characters this is the CER.)"""
        return _rate(self.errors, self.N)

    def positions(self, op: str) -> list[tuple[int | None, int | None]]:
        """``(ref_index, hyp_index)`` of every operation ``op``."""
        if op not in OPS:
            raise ParameterError(
                f"The 'op' parameter of positions must be one of {OPS}. Got {op!r} instead."
            )
        return [(r, h) for o, r, h in self.ops if o == op]

    def hyp_index_of_ref(self) -> np.ndarray:
        """(N,) hypothesis index each reference unit is aligned to; -1 if deleted."""
        out = np.full(self.N, -1, np.int64)
        for _, r, h in self.ops:
            if r is not None and h is not None:
                out[r] = h
        return out

    def op_of_ref(self) -> list[str]:
        """Operation per reference unit (``"C"``, ``"S"`` or ``"D"``)."""
        out = [""] * self.N
        for o, r, _ in self.ops:
            if r is not None:
                out[r] = o
        return out

    def __repr__(self) -> str:
        return (
            f"ErrorAlignment({self.unit}s: N={self.N}, S={self.S}, D={self.D}, I={self.I}, "
            f"rate={self.wer:.4f})"
        )


#: Word-level alignment (the same class; the name reads better in word tables).
WordErrors = ErrorAlignment


@dataclass(frozen=True)
class ErrorTotals:
    """Error counts summed over many pairs; ``rate = (S + D + I) / N``."""

    S: int
    D: int
    I: int  # noqa: E741
    N: int
    C: int
    pairs: int
    unit: str = "word"

    @property
    def errors(self) -> int:
        return self.S + self.D + self.I

    @property
    def rate(self) -> float:
        return _rate(self.errors, self.N)

    @property
    def wer(self) -> float:
        return self.rate


def _rate(errors: int, n: int) -> float:
    if n == 0:
        return 0.0 if errors == 0 else float("inf")
    return errors / n


def _as_words(x, name: str, func: str) -> tuple[str, ...]:
    if isinstance(x, str):
        return tuple(x.split())
    if isinstance(x, Iterable):
        seq = tuple(x)
        if all(isinstance(w, str) for w in seq):
            return seq
    raise ParameterError(
        f"The {name!r} parameter of {func} must be a str or a sequence of str. "
        f"Got {type(x).__name__} instead."
    )


def _as_chars(x, name: str, func: str) -> tuple[str, ...]:
    # jiwer's default CER transform (Strip, then every character): leading and trailing
    # white space dropped, every other character - each space, each tab - counts
    if isinstance(x, str):
        return tuple(x.strip())
    return tuple(" ".join(_as_words(x, name, func)))


#: Alignment weights (substitution, deletion, insertion; correct is 0): "unit" for the
#: Levenshtein distance, "sclite" for NIST sclite's defaults (DEVELOPERS.md, "Error
#: rates").
#: The last value picks the tie rule between equally weighted alignments (see
#: ``_levenshtein``): ours, or sclite's (checked against its output).
WEIGHTS = {"unit": (1, 1, 1, False), "sclite": (4, 3, 3, True)}


def _align(ref: tuple, hyp: tuple, unit: str, weights: str = "unit") -> ErrorAlignment:
    if weights not in WEIGHTS:
        raise ParameterError(
            f"The 'weights' parameter must be one of {tuple(WEIGHTS)}. Got {weights!r} instead."
        )
    # map units to ints so the kernel compares integers
    index: dict[str, int] = {}
    a = np.fromiter((index.setdefault(w, len(index)) for w in ref), np.int64, len(ref))
    b = np.fromiter((index.setdefault(w, len(index)) for w in hyp), np.int64, len(hyp))
    _, ops, ri, hj = _levenshtein(a, b, *WEIGHTS[weights])
    out = [
        (OPS[o], None if r < 0 else r, None if h < 0 else h)
        for o, r, h in zip(ops.tolist(), ri.tolist(), hj.tolist(), strict=True)
    ]
    return ErrorAlignment(ref, hyp, out, unit)


def align_words(
    ref: str | Sequence[str], hyp: str | Sequence[str], *, weights: str = "unit"
) -> ErrorAlignment:
    """Word alignment of ``ref`` and ``hyp`` (strings are split on white space).

    Any run of white space separates words (``str.split``), which is jiwer's default
    WER transform when the white space is spaces; jiwer splits on spaces only, so a
    tab or a newline stays inside its "word" there.

    Parameters
    ----------
    ref, hyp : str or sequence of str
        One utterance each: a string or its words.
    weights : {"unit", "sclite"}
        ``"unit"``: the Levenshtein alignment (every error costs 1; the error count is
        minimal). ``"sclite"``: NIST sclite's default weights (substitution 4, deletion
        3, insertion 3), whose counts can trade substitutions for deletion and
        insertion pairs; use it to reproduce sclite's per-utterance counts.

    Returns
    -------
    ErrorAlignment

    Examples
    --------
    >>> e = align_words("tram nine to depot", "tram five depot")
    >>> [op for op, _, _ in e.ops]
    ['C', 'S', 'D', 'C']
    >>> e = align_words("a b c d e", "d e x y z", weights="sclite")
    >>> e.S, e.D, e.I
    (0, 3, 3)
    """
    return _align(
        _as_words(ref, "ref", "align_words"),
        _as_words(hyp, "hyp", "align_words"),
        "word",
        weights,
    )


def align_chars(ref: str | Sequence[str], hyp: str | Sequence[str]) -> ErrorAlignment:
    """Character alignment, normalised as jiwer's default CER transform.

    A string loses its leading and trailing white space and every other character
    counts, each space and tab included ("a  b" is four characters, as in
    ``jiwer.cer``); a sequence of words is joined by single spaces first.

    Examples
    --------
    >>> align_chars("depot", "depto").errors
    2
    """
    return _align(
        _as_chars(ref, "ref", "align_chars"), _as_chars(hyp, "hyp", "align_chars"), "char"
    )


def wer(ref: str | Sequence[str], hyp: str | Sequence[str]) -> float:
    """Word error rate of one utterance: ``(S + D + I) / N``.

    For a corpus rate use :func:`error_totals` (errors and words summed first).

    Examples
    --------
    >>> wer("one two three four", "one three four five")
    0.5
    """
    return align_words(ref, hyp).wer


def cer(ref: str | Sequence[str], hyp: str | Sequence[str]) -> float:
    """Character error rate of one utterance, as ``jiwer.cer`` computes it.

    Leading and trailing white space is dropped and every other character counts,
    spaces and tabs included (jiwer's default CER transform; see :func:`align_chars`).

    Examples
    --------
    >>> cer("abcd", "abxd")
    0.25
    >>> round(cer("a  b", "ab"), 3)  # two spaces deleted of four characters
    0.5
    """
    return align_chars(ref, hyp).wer


def error_totals(pairs: Iterable[tuple], *, unit: str = "word") -> ErrorTotals:
    """Corpus totals over ``(ref, hyp)`` pairs: errors and reference lengths summed.

    Parameters
    ----------
    pairs : iterable of (ref, hyp)
        Strings or word sequences.
    unit : {"word", "char"}

    Returns
    -------
    ErrorTotals
        ``.rate`` is the corpus WER (or CER), the same as ``jiwer.wer(refs, hyps)``.

    Examples
    --------
    >>> t = error_totals([("a b", "a"), ("c d e", "c d e f")])
    >>> t.D, t.I, t.N, t.rate
    (1, 1, 5, 0.4)
    """
    if unit not in ("word", "char"):
        raise ParameterError(
            f"The 'unit' parameter of error_totals must be one of ('word', 'char'). "
            f"Got {unit!r} instead."
        )
    align = align_words if unit == "word" else align_chars
    S = D = I = N = C = n = 0  # noqa: E741
    for k, pair in enumerate(pairs):
        try:
            ref, hyp = pair
        except (TypeError, ValueError):
            raise ParameterError(
                describe(
                    f"pairs[{k}] of type {type(pair).__name__}",
                    "(ref, hyp) pairs",
                    "pass zip(refs, hyps)",
                )
            ) from None
        e = align(ref, hyp)
        S, D, I, N, C = S + e.S, D + e.D, I + e.I, N + e.N, C + e.C  # noqa: E741
        n += 1
    return ErrorTotals(S, D, I, N, C, n, unit)


@dataclass(frozen=True, eq=False)
class EmissionDelay:
    """Emission time of each word minus its start and end time, in seconds.

    The delay means something only when the word times come from a source independent
    of the posteriors (reference word times): against a forced alignment of the same
    posteriors it is near zero by construction (the alignment puts the word where its
    spike is). :func:`peekalign.analyze` therefore leaves it empty (NaN) without
    reference times and says why in ``reason`` (DEVELOPERS.md, "Emission delay").

    Attributes
    ----------
    after_start : ndarray, shape (W,)
        ``emit - start`` (NaN when not measured).
    after_end : ndarray, shape (W,)
        ``emit - end``: > 0 when the word is emitted after it ended.
    word_times : {"reference", "none"}
        Where the word times came from; "none": not measured.
    reason : str or None
        Why the delay was not measured (None when it was).
    """

    after_start: np.ndarray
    after_end: np.ndarray
    word_times: str = "reference"
    reason: str | None = None

    @classmethod
    def unmeasured(cls, n: int, reason: str) -> EmissionDelay:
        """``n`` words without a delay (NaN), and the reason."""
        nan = np.full(int(n), np.nan)
        return cls(nan, nan.copy(), word_times="none", reason=reason)

    def median(self, *, ref: str = "end") -> float:
        """Median delay after the word's ``"end"`` (or ``"start"``); NaN when empty.

        Examples
        --------
        >>> d = emission_delay([(0.1, 0.5), (0.6, 0.9)], [0.56, 0.92])
        >>> round(d.median(ref="start"), 3)
        0.39
        """
        if ref not in ("end", "start"):
            raise ParameterError(
                "The 'ref' parameter of EmissionDelay.median must be one of ('end', "
                f"'start'). Got {ref!r} instead."
            )
        x = self.after_end if ref == "end" else self.after_start
        x = x[np.isfinite(x)]
        return float(np.median(x)) if x.size else float("nan")


def emission_delay(word_times, emit_times) -> EmissionDelay:
    """Emission delay per word: emission time minus the word's start and end.

    Parameters
    ----------
    word_times : array-like, shape (W, 2)
        ``(start_s, end_s)`` per word (reference times when there are any).
    emit_times : array-like, shape (W,)
        When the recognizer emitted each word, e.g. the time of the CTC spike (or the
        trigger frame) of the word's last token.

    Returns
    -------
    EmissionDelay

    Examples
    --------
    >>> d = emission_delay([(0.1, 0.5), (0.6, 0.9)], [0.56, 0.92])
    >>> d.after_end.round(2).tolist()
    [0.06, 0.02]
    """
    wt = np.asarray(word_times, dtype=np.float64)
    wt = wt.reshape(-1, 2) if wt.size else np.zeros((0, 2))
    et = np.asarray(emit_times, dtype=np.float64).reshape(-1)
    if wt.shape[0] != et.shape[0]:
        raise ParameterError(
            describe(
                f"{wt.shape[0]} word times and {et.shape[0]} emission times",
                "one emission time per word",
                "pass the spike time of each word's last token",
            )
        )
    return EmissionDelay(et - wt[:, 0], et - wt[:, 1])


@njit(cache=True, nogil=True)
def _time_mediated(a, b, rt, ht, sub_extra, errors_first):
    """Alignment whose costs are times (seconds), as sclite's ``-T`` alignment.

    Pairing reference word ``i`` with hypothesis word ``j`` costs the distance of
    their starts plus the distance of their ends (``sub_extra`` more when the words
    differ); a deletion costs the reference word's duration and an insertion the
    hypothesis word's. With ``errors_first`` a cell's cost is the pair (errors, time)
    compared errors first, so time only chooses between alignments with the fewest
    errors; without it the errors count is left at 0 (sclite's distances). Ops coded
    0=C 1=S 2=D 3=I. Walking back, ties take the insertion, then the deletion, then
    the pairing: as sclite, a tie puts the pairing first and a deletion before an
    insertion.

    The errors are kept apart from the times (not folded into one float with a large
    unit) and each cell's step is recorded when the cell is known, in two rows of
    costs and one int8 per cell: folding made an hour's costs ~1e9 and lost the
    time resolution the tie test needs, and a full cost matrix was 8 bytes a cell.
    """
    n = a.shape[0]
    m = b.shape[0]
    eps = 1e-9
    one = 1 if errors_first else 0
    pe = np.zeros(m + 1, np.int64)  # previous row: errors
    pt = np.zeros(m + 1, np.float64)  # previous row: time
    ce = np.zeros(m + 1, np.int64)
    ct = np.zeros(m + 1, np.float64)
    move = np.empty((n + 1, m + 1), np.int8)
    move[0, 0] = 0
    for j in range(1, m + 1):
        pe[j] = pe[j - 1] + one
        pt[j] = pt[j - 1] + (ht[j - 1, 1] - ht[j - 1, 0])
        move[0, j] = 3
    for i in range(1, n + 1):
        dur = rt[i - 1, 1] - rt[i - 1, 0]
        ce[0] = pe[0] + one
        ct[0] = pt[0] + dur
        move[i, 0] = 2
        for j in range(1, m + 1):
            de = pe[j - 1]
            dt = pt[j - 1] + abs(rt[i - 1, 0] - ht[j - 1, 0]) + abs(rt[i - 1, 1] - ht[j - 1, 1])
            if a[i - 1] != b[j - 1]:
                de += one
                dt += sub_extra
            ue = pe[j] + one
            ut = pt[j] + dur
            le = ce[j - 1] + one
            lt = ct[j - 1] + (ht[j - 1, 1] - ht[j - 1, 0])
            be = min(de, ue, le)
            bt = np.inf
            if de == be:
                bt = dt
            if ue == be and ut < bt:
                bt = ut
            if le == be and lt < bt:
                bt = lt
            ce[j] = be
            ct[j] = bt
            if le == be and abs(lt - bt) <= eps:
                move[i, j] = 3
            elif ue == be and abs(ut - bt) <= eps:
                move[i, j] = 2
            else:
                move[i, j] = 1
        pe, ce = ce, pe
        pt, ct = ct, pt
    ops = np.empty(n + m, np.int8)
    ri = np.empty(n + m, np.int32)
    hj = np.empty(n + m, np.int32)
    k = 0
    i = n
    j = m
    while i > 0 or j > 0:
        step = move[i, j]
        if step == 3:
            ops[k] = 3
            ri[k] = -1
            hj[k] = j - 1
            j -= 1
        elif step == 2:
            ops[k] = 2
            ri[k] = i - 1
            hj[k] = -1
            i -= 1
        else:
            ops[k] = 0 if a[i - 1] == b[j - 1] else 1
            ri[k] = i - 1
            hj[k] = j - 1
            i -= 1
            j -= 1
        k += 1
    return ops[:k][::-1].copy(), ri[:k][::-1].copy(), hj[:k][::-1].copy()


def _as_times(x, count: int, name: str) -> np.ndarray:
    t = np.asarray(x, dtype=np.float64)
    if t.size == 0 and count == 0:
        return np.zeros((0, 2))
    if t.ndim != 2 or t.shape != (count, 2) or not np.all(np.isfinite(t)):
        raise ParameterError(
            describe(
                f"{name} of shape {t.shape}" + ("" if np.all(np.isfinite(t)) else " with NaN"),
                f"({count}, 2) finite (start_s, end_s) rows, one per word",
                "pass a time for every word, or use align_words without times",
            )
        )
    if np.any(t[:, 1] < t[:, 0]):
        raise ParameterError(
            describe(
                f"a word in {name} ending before it starts",
                "end_s >= start_s",
                "check the order of the two columns",
            )
        )
    return t


def align_words_timed(
    ref: str | Sequence[str],
    hyp: str | Sequence[str],
    ref_times,
    hyp_times,
    *,
    errors_first: bool = True,
    sub_extra: float = 0.001,
) -> ErrorAlignment:
    """Time-mediated word alignment: costs are distances in time, not unit edits.

    Pairing a reference and a hypothesis word costs ``|start_r - start_h| + |end_r -
    end_h|`` (plus ``sub_extra`` when the words differ); deleting a reference word
    costs its duration, inserting a hypothesis word its duration. So a deletion lands
    on the reference word that has no hypothesis word at its time, which the unit-cost
    alignment cannot tell when several placements have the same number of errors.
    These are the distances NIST sclite uses for its ``-T`` (time-mediated) option;
    by default they only choose among the alignments with the fewest errors.

    Parameters
    ----------
    ref, hyp : str or sequence of str
    ref_times, hyp_times : array-like, shape (W, 2)
        ``(start_s, end_s)`` per word.
    errors_first : bool
        True (default): among the alignments with the fewest errors (the WER stays
        that of :func:`align_words`), the one with the smallest time cost. False: the
        time cost alone, as sclite ``-T``, which may count more errors when a long
        reference word sits beside a short one.
    sub_extra : float
        Added to the time distance of a substitution, so an exact word match wins
        over a substitution at the same place.

    Returns
    -------
    ErrorAlignment
        With ``method == "time"``.

    Examples
    --------
    >>> ref, hyp = "lower the pressure", "lowrethe presure"
    >>> [o for o, _, _ in align_words(ref, hyp).ops]
    ['S', 'S', 'D']
    >>> e = align_words_timed(ref, hyp, [(0, .4), (.4, .55), (.55, 1.1)], [(0, .55), (.55, 1.1)])
    >>> e.ops, e.method
    ([('S', 0, 0), ('D', 1, None), ('S', 2, 1)], 'time')
    """
    r = _as_words(ref, "ref", "align_words_timed")
    h = _as_words(hyp, "hyp", "align_words_timed")
    rt = _as_times(ref_times, len(r), "ref_times")
    ht = _as_times(hyp_times, len(h), "hyp_times")
    index: dict[str, int] = {}
    a = np.fromiter((index.setdefault(w, len(index)) for w in r), np.int64, len(r))
    b = np.fromiter((index.setdefault(w, len(index)) for w in h), np.int64, len(h))
    ops, ri, hj = _time_mediated(a, b, rt, ht, float(sub_extra), bool(errors_first))
    out = [
        (OPS[o], None if x < 0 else x, None if y < 0 else y)
        for o, x, y in zip(ops.tolist(), ri.tolist(), hj.tolist(), strict=True)
    ]
    return ErrorAlignment(r, h, out, "word", "time")
