"""Ordering of the peek widget's utterance picker (plain Python, no widgets)."""

from __future__ import annotations

import math

__all__ = ["SORT_KEYS", "order_ids", "picker_label"]

#: Picker orders: value -> label.
SORT_KEYS = {
    "manifest": "manifest order",
    "worst": "worst first",
    "wer": "WER (highest first)",
    "deletions": "deletions (most first)",
    "margin": "worst margin (smallest first)",
}


def _num(x) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return math.nan
    return v


def _key(m: dict | None, by: str) -> tuple:
    """Sort key of one utterance's summary; unknown values sort last."""
    if m is None:
        return (1,)
    wer = _num(m.get("wer"))
    D = _num(m.get("D"))
    margin = _num(m.get("worst_margin_s"))
    errs = sum(_num(m.get(k)) for k in ("S", "D", "I"))

    def hi(x):  # larger first, NaN last
        return (1, 0.0) if math.isnan(x) else (0, -x)

    def lo(x):  # smaller first, NaN last
        return (1, 0.0) if math.isnan(x) else (0, x)

    if by == "wer":
        return (0, hi(wer), lo(margin))
    if by == "deletions":
        return (0, hi(D), hi(wer), lo(margin))
    if by == "margin":
        return (0, lo(margin), hi(wer))
    # worst first: errors, then WER, then margin (as the corpus scan ranks)
    return (0, hi(errs), hi(wer), lo(margin))


def order_ids(ids: list[str], metrics: dict[str, dict], by: str = "manifest") -> list[str]:
    """``ids`` ordered by ``by`` (a key of :data:`SORT_KEYS`); ties and utterances not
    analysed yet keep their manifest order, the latter at the end.

    Examples
    --------
    >>> m = {"a": {"wer": 0.1, "D": 0}, "b": {"wer": 0.5, "D": 1}}
    >>> order_ids(["a", "b", "c"], m, "wer")
    ['b', 'a', 'c']
    """
    if by not in SORT_KEYS:
        from ..exceptions import ParameterError

        raise ParameterError(
            f"The 'sort' parameter of peek must be one of {tuple(SORT_KEYS)}. Got {by!r} instead."
        )
    if by == "manifest":
        return list(ids)
    # ties: manifest order, except "worst first", which breaks them by id as the corpus
    # scan ranks (Scan.worst)
    pos = {u: (u if by == "worst" else i) for i, u in enumerate(ids)}
    return sorted(ids, key=lambda u: (*_key(metrics.get(u), by), pos[u]))


def picker_label(uid: str, m: dict | None) -> str:
    """``id · WER · deletions · worst margin`` (just the id before analysis)."""
    if m is None:
        return uid
    parts = [uid]
    wer = _num(m.get("wer"))
    if not math.isnan(wer):
        parts.append(f"WER {wer:.2f}")
    D = m.get("D")
    if D is not None and not (isinstance(D, float) and math.isnan(D)):
        parts.append(f"D {int(D)}")
    margin = _num(m.get("worst_margin_s"))
    if not math.isnan(margin):
        parts.append(f"reach margin {margin * 1000:+.0f} ms")
    return " · ".join(parts)
