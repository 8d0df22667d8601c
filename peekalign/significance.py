"""Is system B better than system A? Significance of a WER difference on the same test set.

Three tests, all two-sided, all on the same utterances scored for both systems:

- :func:`matched_pairs`: the matched-pairs sentence-segment word error test
  (Gillick and Cox, 1989), as NIST's ``sc_stats`` runs it. Each utterance is cut
  into segments at every run of at least ``min_good`` (2) reference words that both
  systems got right; a segment holds the errors between two such runs. Segments
  where neither system erred are left out. With ``Z_i`` the difference of the two
  systems' errors in segment ``i``, ``W = mean(Z) / (sd(Z) / sqrt(n))`` is taken as
  standard normal (n large), ``p = P(|N(0, 1)| >= |W|)``.
- :func:`sign_test`: per segment (or per utterance), which system made fewer
  errors; ties dropped; exact binomial ``p`` with probability 1/2.
- :func:`paired_bootstrap`: resample utterances with replacement, both systems
  together (Bisani and Ney, 2004); the share of resamples in which the difference
  changes sign gives ``p`` and the percentiles the confidence interval.
  :func:`bootstrap_rate` gives the interval of one system's rate the same way.

:func:`plain_p` words a p-value for a slide: "would arise by chance about 3 times
in 100".
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .errors import ErrorAlignment
from .exceptions import ParameterError, describe

__all__ = [
    "Segment",
    "MatchedPairs",
    "SignTest",
    "PairedBootstrap",
    "RateInterval",
    "segments",
    "matched_pairs",
    "sign_test",
    "paired_bootstrap",
    "bootstrap_rate",
    "plain_p",
    "plain_difference",
    "significance_row",
    "SIGNIFICANCE_COLUMNS",
]


@dataclass(frozen=True)
class Segment:
    """One segment of the matched-pairs test.

    Attributes
    ----------
    utt : int
        Index of the utterance.
    start, stop : int
        Reference words ``start:stop`` (insertions before word ``start`` included).
    errors_a, errors_b : int
    """

    utt: int
    start: int
    stop: int
    errors_a: int
    errors_b: int


def _slot_errors(e: ErrorAlignment) -> tuple[np.ndarray, np.ndarray]:
    """Errors per reference word (S or D) and per gap (insertions before word i;
    gap N is after the last word)."""
    words = np.zeros(e.N, np.int64)
    gaps = np.zeros(e.N + 1, np.int64)
    next_ref = 0
    for op, r, _ in e.ops:
        if r is not None:
            words[r] = op != "C"
            next_ref = r + 1
        else:
            gaps[next_ref] += 1
    return words, gaps


def _utterance_segments(k: int, a: ErrorAlignment, b: ErrorAlignment, min_good: int):
    """Segments of one utterance (see :func:`segments`)."""
    if a.ref != b.ref:
        raise ParameterError(
            describe(
                f"different references in pair {k} ({' '.join(a.ref)!r} and {' '.join(b.ref)!r})",
                "both systems scored against the same reference",
                "pass the alignments of the same utterances in the same order",
            )
        )
    wa, ga = _slot_errors(a)
    wb, gb = _slot_errors(b)
    n = a.N
    out: list[Segment] = []
    cur = None  # [start, stop, ea, eb]
    good = min_good  # correct-by-both words since the last error (start counts as a boundary)
    for i in range(n + 1):
        if ga[i] or gb[i]:  # insertions before word i
            if cur is None or good >= min_good:
                cur = [i, i, 0, 0]
                out.append(cur)
            cur[1], cur[2], cur[3] = i, cur[2] + ga[i], cur[3] + gb[i]
            good = 0
        if i == n:
            break
        if wa[i] or wb[i]:
            if cur is None or good >= min_good:
                cur = [i, i, 0, 0]
                out.append(cur)
            cur[1], cur[2], cur[3] = i + 1, cur[2] + wa[i], cur[3] + wb[i]
            good = 0
        else:
            good += 1
    return [Segment(k, s, max(t, s), int(x), int(y)) for s, t, x, y in out]


def segments(
    a: Sequence[ErrorAlignment], b: Sequence[ErrorAlignment], *, min_good: int = 2
) -> list[Segment]:
    """Cut every utterance into the matched-pairs test's segments.

    Parameters
    ----------
    a, b : sequence of ErrorAlignment
        The two systems' word alignments of the same utterances, in the same order.
    min_good : int
        Reference words both systems got right that close a segment (NIST uses 2).

    Returns
    -------
    list of Segment
        Only segments where at least one system erred.

    Examples
    --------
    >>> from peekalign.errors import align_words
    >>> ref = "lower the pressure on track two"
    >>> a = [align_words(ref, "lower pressure on track too")]
    >>> b = [align_words(ref, "lower the pressure on track two")]
    >>> [(s.start, s.stop, s.errors_a, s.errors_b) for s in segments(a, b)]
    [(1, 2, 1, 0), (5, 6, 1, 0)]
    """
    if len(a) != len(b):
        raise ParameterError(
            describe(
                f"{len(a)} alignments for A and {len(b)} for B",
                "one alignment per utterance for each system",
                "score both systems on the same utterances",
            )
        )
    if min_good < 1:
        raise ParameterError(
            f"The 'min_good' parameter of segments must be >= 1. Got {min_good} instead."
        )
    out: list[Segment] = []
    for k, (x, y) in enumerate(zip(a, b, strict=True)):
        out += _utterance_segments(k, x, y, min_good)
    return out


def _normal_two_sided(w: float) -> float:
    return math.erfc(abs(w) / math.sqrt(2.0))


@dataclass(frozen=True)
class MatchedPairs:
    """Result of the matched-pairs sentence-segment word error test.

    Attributes
    ----------
    segments : list of Segment
    mean, sd : float
        Mean and sample standard deviation of ``Z = errors_a - errors_b``.
    w : float
        ``mean / (sd / sqrt(n))``; > 0 when A made more errors.
    p : float
        Two-sided p-value (standard normal).
    """

    segments: list
    mean: float
    sd: float
    w: float
    p: float

    @property
    def n(self) -> int:
        return len(self.segments)


def matched_pairs(
    a: Sequence[ErrorAlignment], b: Sequence[ErrorAlignment], *, min_good: int = 2
) -> MatchedPairs:
    """Matched-pairs sentence-segment word error test (Gillick and Cox, 1989).

    Parameters
    ----------
    a, b : sequence of ErrorAlignment
        The two systems' word alignments of the same utterances.
    min_good : int
        See :func:`segments`.

    Returns
    -------
    MatchedPairs
        With fewer than two segments, or no spread, ``p`` is 1 when the mean is 0
        and 0 otherwise (every segment favours the same system by the same amount).

    Examples
    --------
    >>> from peekalign.errors import align_words
    >>> refs = ["send tram nine to the north depot", "lower the pressure on track two"]
    >>> a = [align_words(refs[0], "send tram five to north depot"),
    ...      align_words(refs[1], "lower pressure on track too")]
    >>> b = [align_words(r, r) for r in refs]
    >>> t = matched_pairs(a, b)
    >>> t.n, t.mean, round(t.w, 3)
    (3, 1.3333333333333333, 4.0)
    """
    segs = segments(a, b, min_good=min_good)
    z = np.array([s.errors_a - s.errors_b for s in segs], np.float64)
    n = z.size
    mean = float(z.mean()) if n else 0.0
    sd = float(z.std(ddof=1)) if n > 1 else 0.0
    if sd > 0:
        w = mean / (sd / math.sqrt(n))
        p = _normal_two_sided(w)
    else:
        w = 0.0 if mean == 0 else math.copysign(math.inf, mean)
        p = 1.0 if mean == 0 else 0.0
    return MatchedPairs(segs, mean, sd, w, p)


@dataclass(frozen=True)
class SignTest:
    """Exact sign test: units where A or B made fewer errors, ties dropped."""

    a_better: int
    b_better: int
    ties: int
    p: float


def _binomial_two_sided(k: int, n: int) -> float:
    """Two-sided exact binomial p-value for ``k`` successes in ``n``, probability 1/2."""
    if n == 0:
        return 1.0
    lo = min(k, n - k)
    tail = sum(math.comb(n, i) for i in range(lo + 1)) / 2.0**n
    return min(1.0, 2.0 * tail)


def sign_test(errors_a: Sequence[int], errors_b: Sequence[int]) -> SignTest:
    """Sign test on paired error counts (per segment or per utterance).

    Examples
    --------
    >>> t = sign_test([2, 0, 1, 3, 1], [0, 0, 0, 1, 2])
    >>> t.a_better, t.b_better, t.ties, round(t.p, 3)
    (1, 3, 1, 0.625)
    """
    x = np.asarray(errors_a)
    y = np.asarray(errors_b)
    if x.shape != y.shape:
        raise ParameterError(
            describe(
                f"{x.size} counts for A and {y.size} for B",
                "one count per unit for each system",
                "pass counts of the same units",
            )
        )
    a_better = int((x < y).sum())
    b_better = int((x > y).sum())
    return SignTest(
        a_better,
        b_better,
        int((x == y).sum()),
        _binomial_two_sided(b_better, a_better + b_better),
    )


def _resample_sums(columns: Sequence[np.ndarray], resamples: int, seed: int) -> np.ndarray:
    """(resamples, len(columns)) sums of each column over utterances drawn with
    replacement; drawn in blocks so memory stays small."""
    rng = np.random.default_rng(seed)
    n = columns[0].size
    data = np.stack(columns, axis=1).astype(np.float64)
    out = np.empty((resamples, len(columns)))
    block = max(1, 2_000_000 // max(n, 1))
    for s in range(0, resamples, block):
        m = min(block, resamples - s)
        idx = rng.integers(0, n, size=(m, n))
        out[s : s + m] = data[idx].sum(axis=1)
    return out


def _check_counts(name: str, *arrays) -> list[np.ndarray]:
    arrs = [np.asarray(a, dtype=np.float64).reshape(-1) for a in arrays]
    n = arrs[0].size
    if n == 0 or any(a.size != n for a in arrs):
        raise ParameterError(
            describe(
                f"lengths {[a.size for a in arrs]}",
                "one non-empty count per utterance in every array",
                f"pass per-utterance counts to {name}",
            )
        )
    return arrs


@dataclass(frozen=True)
class RateInterval:
    """A rate with its bootstrap confidence interval (percentile method)."""

    rate: float
    lo: float
    hi: float
    level: float
    resamples: int


def bootstrap_rate(
    errors: Sequence[float],
    words: Sequence[float],
    *,
    resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> RateInterval:
    """Bootstrap interval of ``sum(errors) / sum(words)`` over utterances.

    Utterances are drawn with replacement (Bisani and Ney, 2004); the interval is
    the ``(1 - level) / 2`` and ``(1 + level) / 2`` percentiles of the resampled rates.

    Examples
    --------
    >>> r = bootstrap_rate([1, 0, 2, 0, 1, 3], [5, 4, 6, 3, 5, 7], seed=1)
    >>> round(r.rate, 4), r.lo <= r.rate <= r.hi
    (0.2333, True)
    """
    e, n = _check_counts("bootstrap_rate", errors, words)
    sums = _resample_sums([e, n], resamples, seed)
    with np.errstate(invalid="ignore", divide="ignore"):
        rates = sums[:, 0] / sums[:, 1]
    rates = rates[np.isfinite(rates)]
    q = (1 - level) / 2
    lo, hi = np.quantile(rates, [q, 1 - q]) if rates.size else (np.nan, np.nan)
    rate = e.sum() / n.sum() if n.sum() else float("nan")
    return RateInterval(float(rate), float(lo), float(hi), level, resamples)


@dataclass(frozen=True)
class PairedBootstrap:
    """Paired bootstrap of ``rate_b - rate_a``.

    Attributes
    ----------
    delta : float
        Observed ``rate_b - rate_a`` (negative: B is better).
    lo, hi : float
        Percentile interval of the difference.
    b_better : float
        Share of resamples in which B's rate is lower (Bisani and Ney's
        "probability of improvement").
    p : float
        Two-sided: twice the smaller share of resamples on either side of 0.
    """

    delta: float
    lo: float
    hi: float
    b_better: float
    p: float
    level: float
    resamples: int


def paired_bootstrap(
    errors_a: Sequence[float],
    errors_b: Sequence[float],
    words: Sequence[float],
    *,
    resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> PairedBootstrap:
    """Paired bootstrap test of two systems' rates on the same utterances.

    Examples
    --------
    >>> t = paired_bootstrap([2, 1, 3, 2, 2, 1], [1, 0, 1, 2, 1, 0], [8, 6, 9, 7, 8, 5])
    >>> round(t.delta, 4), t.b_better > 0.95, t.p < 0.1
    (-0.1395, True, True)
    """
    ea, eb, n = _check_counts("paired_bootstrap", errors_a, errors_b, words)
    sums = _resample_sums([eb - ea, n], resamples, seed)
    ok = sums[:, 1] > 0
    d = sums[ok, 0] / sums[ok, 1]
    q = (1 - level) / 2
    lo, hi = np.quantile(d, [q, 1 - q])
    below, above = float((d < 0).mean()), float((d > 0).mean())
    ties = 1.0 - below - above
    p = min(1.0, 2.0 * (min(below, above) + ties / 2))
    return PairedBootstrap(
        float((eb.sum() - ea.sum()) / n.sum()), float(lo), float(hi), below, p, level, resamples
    )


def plain_p(p: float) -> str:
    """A p-value in plain words.

    Examples
    --------
    >>> plain_p(0.031)
    'a difference this large would arise by chance about 3 times in 100'
    >>> plain_p(0.0004)
    'a difference this large would arise by chance less than once in 1000'
    >>> plain_p(0.004)
    'a difference this large would arise by chance about 4 times in 1000'
    >>> plain_p(0.6)
    'a difference this large would arise by chance about 6 times in 10'
    """
    head = "a difference this large would arise by chance"
    if not p == p:  # NaN
        return f"{head}: not known (too few utterances)"
    if p < 0.001:
        return f"{head} less than once in 1000"
    scale = 1000 if p < 0.01 else 100 if p < 0.1 else 10
    k = round(p * scale)
    if k >= scale:
        return f"{head} nearly every time"
    return f"{head} about {'once' if k == 1 else f'{k} times'} in {scale}"


def plain_difference(rate_a: float, rate_b: float, p: float, *, names=("A", "B")) -> str:
    """One sentence for a slide: which system is better, by how much, and ``p``.

    Examples
    --------
    >>> plain_difference(0.154, 0.142, 0.03)
    "B's WER is lower by 1.2 points; a difference this large would arise by chance about 3 times in 100"
    """
    a, b = names
    diff = 100 * (rate_b - rate_a)
    if diff == 0:
        return f"{a} and {b} have the same WER ({100 * rate_a:.1f} %)"
    better = b if diff < 0 else a
    return f"{better}'s WER is lower by {abs(diff):.1f} points; {plain_p(p)}"


#: Columns of :func:`significance_row` (and ``significance.csv`` of a comparison).
SIGNIFICANCE_COLUMNS = (
    "field",
    "value",
    "utterances",
    "words",
    "wer_a",
    "wer_b",
    "wer_delta",
    "segments",
    "mp_w",
    "mp_p",
    "sign_a_better",
    "sign_b_better",
    "sign_p",
    "boot_delta_lo",
    "boot_delta_hi",
    "boot_p",
    "boot_b_better",
    "verdict",
)


def significance_row(
    a: Sequence[ErrorAlignment],
    b: Sequence[ErrorAlignment],
    *,
    field: str = "all",
    value: str = "all",
    names: tuple[str, str] = ("A", "B"),
    resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> dict:
    """All three tests on one set of utterances, as one table row.

    The verdict sentence uses the matched-pairs p-value (the NIST test); the sign
    test counts utterances where one system made fewer errors.

    Examples
    --------
    >>> from peekalign.errors import align_words
    >>> refs = ["send tram nine to the north depot", "lower the pressure on track two"] * 5
    >>> a = [align_words(r, r.replace("the ", "")) for r in refs]
    >>> b = [align_words(r, r) for r in refs]
    >>> row = significance_row(a, b)
    >>> row["segments"], row["verdict"]
    (10, "B's WER is lower by 15.4 points; a difference this large would arise by chance less than once in 1000")
    """
    ea = np.array([e.errors for e in a], float)
    eb = np.array([e.errors for e in b], float)
    n = np.array([e.N for e in a], float)
    words = float(n.sum())
    wer_a = ea.sum() / words if words else math.nan
    wer_b = eb.sum() / words if words else math.nan
    mp = matched_pairs(a, b)
    st = sign_test(ea, eb)
    row = {
        "field": field,
        "value": value,
        "utterances": len(a),
        "words": int(words),
        "wer_a": wer_a,
        "wer_b": wer_b,
        "wer_delta": wer_b - wer_a,
        "segments": mp.n,
        "mp_w": mp.w,
        "mp_p": mp.p,
        "sign_a_better": st.a_better,
        "sign_b_better": st.b_better,
        "sign_p": st.p,
        "boot_delta_lo": math.nan,
        "boot_delta_hi": math.nan,
        "boot_p": math.nan,
        "boot_b_better": math.nan,
    }
    if len(a) and words:
        pb = paired_bootstrap(ea, eb, n, resamples=resamples, seed=seed, level=level)
        row.update(
            boot_delta_lo=pb.lo, boot_delta_hi=pb.hi, boot_p=pb.p, boot_b_better=pb.b_better
        )
    row["verdict"] = (
        plain_difference(wer_a, wer_b, mp.p, names=names) if words else "no scored words"
    )
    return row
