"""The overview's look-ahead choice: the recommendation card and the sweep figure with
the proxy curves (reach, kept attention) and, when a re-decoding is given, the measured
WER on the same plot (DEVELOPERS.md, "Look-ahead recommendation")."""

from __future__ import annotations

import math

import numpy as np

from ..recommend import DEFAULT_TOLERANCE, Recommendation, choose
from . import _svg
from ._html import card

__all__ = ["lookahead_card", "measured_series", "sweep_figure"]


def measured_series(table, tolerance: float = DEFAULT_TOLERANCE) -> dict:
    """The measured WER of a re-decoding table as the sweep chart draws it: per look-ahead
    the WER and its 95 % interval (full context's WER plus the interval of the
    difference), full context's WER and the tolerance (fractions)."""
    e = np.asarray(table["lookahead_frames"], dtype=np.float64)
    wer = np.asarray(table["wer"], dtype=np.float64)
    part = np.isfinite(e)
    full = float(wer[~part][-1]) if (~part).any() else math.nan
    cols = table.columns

    def delta(name):
        if name not in cols:
            return np.full(int(part.sum()), math.nan)
        return full + np.asarray(table[name], dtype=np.float64)[part]

    return {
        "lookahead": e[part].astype(int).tolist(),
        "wer": wer[part],
        "low": delta("wer_delta_low"),
        "high": delta("wer_delta_high"),
        "full": full,
        "tolerance": float(tolerance),
    }


def _table(measured):
    return getattr(measured, "table", measured)


def lookahead_card(sweep, measured=None, tolerance: float = DEFAULT_TOLERANCE) -> dict:
    """The "recommended look-ahead" card: frames, latency and the deciding criterion."""
    rec, every = choose(sweep, measured, tolerance=tolerance)
    if rec.lookahead is None:
        return card("recommended look-ahead", "none", rec.line(), bad=True)
    others = "; ".join(
        f"{name}: {_frames(r)}" for name, r in every.items() if name != rec.criterion
    )
    detail = (
        f"{rec.latency_ms:.0f} ms {sweep.latency_name}; criterion: {rec.criterion} (rule "
        "under the sweep figure)" + (f"; by {others}" if others else "")
    )
    return card("recommended look-ahead", f"{rec.lookahead} frames", detail)


def _frames(r: Recommendation) -> str:
    return "none" if r.lookahead is None else f"{r.lookahead} frames"


def sweep_figure(
    sweep, measured=None, tolerance: float = DEFAULT_TOLERANCE, *, current=None
) -> dict:
    """What the overview's sweep figure shows (template ``index.html``): its caption, the
    note on the measured curve (empty without one), the deciding ``criterion:`` line and
    the chart, with reach and kept attention per look-ahead, the measured WER on a
    right-hand axis when a re-decoding is given and the recommendation marked."""
    rec, _ = choose(sweep, measured, tolerance=tolerance)
    cols = sweep.columns()
    series = None if measured is None else measured_series(_table(measured), tolerance)
    chart = _svg.sweep_chart(
        cols["lookahead_frames"],
        cols["reach"],
        cols["kept_attention"],
        cols["latency_ms"],
        target=sweep.target,
        recommended=rec.lookahead,
        criterion=rec.criterion,
        current=current,
        measured=series,
    )
    return {
        "caption": "Look-ahead sweep" + (" and measured WER" if series is not None else ""),
        "measured": (
            "measured WER: the decoder re-run at each look-ahead (band: 95 % paired-bootstrap "
            "interval of its difference to full context, added to full context's WER)"
            if series is not None
            else ""
        ),
        "criterion": rec.line(),
        "chart": chart,
    }
