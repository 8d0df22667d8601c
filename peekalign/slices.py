"""Slices: error rates per speaker, condition or any other manifest ``meta`` field.

A manifest line may carry ``"meta": {"speaker": "s07", "snr_db": 12.5, ...}``.
:func:`slice_rows` groups a scan's utterances by one field and gives per slice the
utterances, words, WER, deletion rate and reach, each with a bootstrap confidence
interval (utterances resampled with replacement, Bisani and Ney, 2004), the
deletions by cause and the median emission delay.

A numeric field with more than ``max_levels`` distinct values is binned into
``bins`` intervals at its quantiles (the labels say the bounds: ``[5, 12.5)``); an
utterance without the field falls in the slice ``(none)``.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np

from .exceptions import ParameterError, describe
from .significance import bootstrap_rate

__all__ = ["SLICE_COLUMNS", "slice_rows", "slice_values"]

#: Leading columns of a slice table (the ``del_*`` cause columns follow).
SLICE_COLUMNS = (
    "field",
    "value",
    "utterances",
    "words",
    "wer",
    "wer_lo",
    "wer_hi",
    "S",
    "D",
    "I",
    "del_rate",
    "del_rate_lo",
    "del_rate_hi",
    "reach",
    "reach_lo",
    "reach_hi",
    "median_emission_delay_ms",
)

NONE_LABEL = "(none)"


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _fmt(x: float) -> str:
    return f"{x:g}"


def slice_values(
    values: Sequence[Any], *, bins: int = 4, max_levels: int = 6
) -> tuple[list[str], list[str]]:
    """Slice label of each value, and the labels in display order.

    Strings (and booleans) are their own labels, sorted. Numbers with at most
    ``max_levels`` distinct values too (sorted by value); with more they are binned
    into ``bins`` intervals at the quantiles (inner edges rounded to 3 significant
    digits), ``[lo, hi)`` with the last closed.

    Examples
    --------
    >>> slice_values(["s1", "s2", None, "s1"])
    (['s1', 's2', '(none)', 's1'], ['s1', 's2', '(none)'])
    >>> labels, order = slice_values([0, 5, 10, 15, 20, 25, 30, 35], bins=2)
    >>> order
    ['[0, 17.5)', '[17.5, 35]']
    """
    present = [v for v in values if v is not None]
    numeric = bool(present) and all(_is_number(v) for v in present)
    if numeric and len(set(present)) > max_levels:
        q = np.quantile(np.asarray(present, float), np.linspace(0, 1, bins + 1))
        # inner edges to 3 significant digits (readable labels; membership follows them)
        q[1:-1] = [float(f"{x:.3g}") for x in q[1:-1]]
        edges = np.unique(q)
        names = [
            f"[{_fmt(lo)}, {_fmt(hi)}{']' if k == len(edges) - 2 else ')'}"
            for k, (lo, hi) in enumerate(zip(edges[:-1], edges[1:], strict=True))
        ]

        def label(v):
            if v is None:
                return NONE_LABEL
            k = int(np.searchsorted(edges, v, side="right")) - 1
            return names[min(max(k, 0), len(names) - 1)]

        labels = [label(v) for v in values]
        order = names
    else:
        labels = [NONE_LABEL if v is None else str(v) for v in values]
        keyed = {str(v): v for v in present}
        order = sorted(keyed, key=lambda s: (0, keyed[s], "") if numeric else (0, 0, s))
    if any(v is None for v in values):
        order = order + [NONE_LABEL]
    used = set(labels)
    return labels, [o for o in order if o in used]


def _per_utterance(utterances: Iterable[Mapping], words: Iterable[Mapping]) -> dict:
    """Per utterance id: reached and timed words, and the emission delays."""
    out: dict[str, list] = {}
    for w in words:
        rec = out.setdefault(w["id"], [0, 0, []])
        m = w.get("reach_margin_ms")
        if m is not None and m == m:
            rec[0] += m >= -1e-6
            rec[1] += 1
        d = w.get("emission_delay_ms")
        if d is not None and d == d:
            rec[2].append(d)
    return out


def _ci(errors, words, resamples: int, seed: int, level: float):
    if not len(errors) or sum(words) == 0:
        return math.nan, math.nan, math.nan
    r = bootstrap_rate(errors, words, resamples=resamples, seed=seed, level=level)
    return r.rate, r.lo, r.hi


def _one_slice(field, value, rows, per_utt, causes, resamples, seed, level) -> dict:
    """The row of one slice (see :data:`SLICE_COLUMNS`)."""
    scored = [r for r in rows if r.get("S") is not None]
    n_words = [r["n_words"] for r in scored]
    errs = [r["S"] + r["D"] + r["I"] for r in scored]
    wer, wlo, whi = _ci(errs, n_words, resamples, seed, level)
    dr, dlo, dhi = _ci([r["D"] for r in scored], n_words, resamples, seed, level)
    reach_n = [per_utt.get(r["id"], [0, 0, []])[0] for r in rows]
    reach_d = [per_utt.get(r["id"], [0, 0, []])[1] for r in rows]
    rr, rlo, rhi = _ci(reach_n, reach_d, resamples, seed, level)
    delays = [d for r in rows for d in per_utt.get(r["id"], [0, 0, []])[2]]
    out = {
        "field": field,
        "value": value,
        "utterances": len(rows),
        "words": int(sum(r["n_words"] for r in rows)),
        "wer": wer,
        "wer_lo": wlo,
        "wer_hi": whi,
        "S": sum(r["S"] for r in scored) if scored else None,
        "D": sum(r["D"] for r in scored) if scored else None,
        "I": sum(r["I"] for r in scored) if scored else None,
        "del_rate": dr,
        "del_rate_lo": dlo,
        "del_rate_hi": dhi,
        "reach": rr,
        "reach_lo": rlo,
        "reach_hi": rhi,
        "median_emission_delay_ms": float(np.median(delays)) if delays else math.nan,
    }
    for c in causes:
        out[c] = int(sum(r.get(c) or 0 for r in rows))
    return out


def slice_rows(
    utterances: Iterable[Mapping],
    meta: Mapping[str, Mapping[str, Any]],
    field: str,
    *,
    words: Iterable[Mapping] = (),
    bins: int = 4,
    max_levels: int = 6,
    resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> list[dict]:
    """Per-slice rates with bootstrap confidence intervals.

    Parameters
    ----------
    utterances : iterable of mapping
        Rows of a scan's utterance table (``id, n_words, S, D, I, del_*``; ``S`` None
        for an utterance without a hypothesis).
    meta : mapping id -> mapping
        Each utterance's ``meta`` (from the manifest).
    field : str
        The meta field to slice by.
    words : iterable of mapping, optional
        Rows of the scan's word table (``id, reach_margin_ms, emission_delay_ms``) for reach
        and emission delay.
    bins, max_levels : int
        Binning of numeric fields (see :func:`slice_values`).
    resamples, seed, level :
        Bootstrap settings; the same seed gives the same intervals.

    Returns
    -------
    list of dict
        One row per slice (:data:`SLICE_COLUMNS` then the ``del_*`` columns); the
        slices' ``utterances`` and ``words`` add up to the totals.

    Examples
    --------
    >>> utts = [
    ...     {"id": "a", "n_words": 4, "S": 1, "D": 0, "I": 0},
    ...     {"id": "b", "n_words": 5, "S": 0, "D": 1, "I": 1},
    ...     {"id": "c", "n_words": 3, "S": 0, "D": 0, "I": 0},
    ... ]
    >>> rows = slice_rows(utts, {"a": {"spk": "s1"}, "b": {"spk": "s2"}, "c": {"spk": "s1"}}, "spk")
    >>> [(r["value"], r["utterances"], r["words"], round(r["wer"], 3)) for r in rows]
    [('s1', 2, 7, 0.143), ('s2', 1, 5, 0.4)]
    """
    rows = list(utterances)
    if not isinstance(field, str) or not field:
        raise ParameterError(
            describe(f"field {field!r}", "the name of a meta field", "pass e.g. 'speaker'")
        )
    values = [(meta.get(r["id"]) or {}).get(field) for r in rows]
    if rows and all(v is None for v in values):
        known = sorted({k for m in meta.values() for k in (m or {})})
        raise ParameterError(
            describe(
                f"no utterance with the meta field {field!r}",
                "a field of the manifest's 'meta' objects"
                + (f" (these have: {', '.join(known)})" if known else ""),
                'add "meta": {"' + field + '": ...} to the manifest lines',
            )
        )
    labels, order = slice_values(values, bins=bins, max_levels=max_levels)
    per_utt = _per_utterance(rows, words)
    causes = [c for c in (rows[0].keys() if rows else ()) if str(c).startswith("del_")]
    out = []
    for value in order:
        members = [r for r, lab in zip(rows, labels, strict=True) if lab == value]
        out.append(_one_slice(field, value, members, per_utt, causes, resamples, seed, level))
    return out
