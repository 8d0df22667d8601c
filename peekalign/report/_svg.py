"""Small static SVG charts for the report's overview (no script, no network).

Histograms of the reach margins and emission delays, a bar chart of deletion causes
and the look-ahead sweep curve, drawn straight as SVG so the overview page needs no
plotting library in the browser.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from ._html import esc, trusted

__all__ = ["histogram", "bars", "sweep_chart", "nice_ticks"]

INK = "#1b2430"
MUTED = "#5b6470"
GRID = "#e6e8eb"
BLUE = "#1f5fa8"
RED = "#b31b34"
GREEN = "#2f9a7f"
ORANGE = "#f08a24"
PURPLE = "#8d63c2"


def nice_ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    """About ``n`` round tick values covering [lo, hi] (steps of 1, 2, 2.5 or 5 x 10^k)."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / max(n, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    start = math.ceil(lo / step - 1e-9) * step
    out = []
    v = start
    while v <= hi + 1e-9 * step:
        out.append(round(v, 12))
        v += step
    return out


def _tick_label(v: float) -> str:
    s = f"{v:.3f}".rstrip("0").rstrip(".")
    return "0" if s in ("-0", "") else s.replace("-", "−")


class _Frame:
    """Maps data to pixels inside a plot box with margins."""

    def __init__(self, w, h, x0, x1, y0, y1, *, left=46, right=14, top=14, bottom=38):
        self.w, self.h = w, h
        self.left, self.right, self.top, self.bottom = left, right, top, bottom
        self.x0, self.x1, self.y0, self.y1 = x0, x1, y0, y1

    def x(self, v: float) -> float:
        span = (self.x1 - self.x0) or 1.0
        return self.left + (v - self.x0) / span * (self.w - self.left - self.right)

    def y(self, v: float) -> float:
        span = (self.y1 - self.y0) or 1.0
        return self.h - self.bottom - (v - self.y0) / span * (self.h - self.top - self.bottom)

    def axes(self, xticks, yticks, xlabel: str, ylabel: str, *, yfmt=_tick_label) -> list[str]:
        out = []
        for t in yticks:
            y = self.y(t)
            out.append(
                f'<line x1="{self.left}" x2="{self.w - self.right}" y1="{y:.1f}" y2="{y:.1f}" '
                f'stroke="{GRID}"/>'
                f'<text x="{self.left - 5}" y="{y + 3.5:.1f}" text-anchor="end">{yfmt(t)}</text>'
            )
        base = self.h - self.bottom
        out.append(
            f'<line x1="{self.left}" x2="{self.w - self.right}" y1="{base}" y2="{base}" '
            f'stroke="{MUTED}"/>'
        )
        for t in xticks:
            x = self.x(t)
            out.append(
                f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{base}" y2="{base + 4}" stroke="{MUTED}"/>'
                f'<text x="{x:.1f}" y="{base + 15}" text-anchor="middle">{_tick_label(t)}</text>'
            )
        out.append(
            f'<text x="{(self.left + self.w - self.right) / 2:.1f}" y="{base + 30}" '
            f'text-anchor="middle" fill="{MUTED}">{esc(xlabel)}</text>'
        )
        cy = (self.top + self.h - self.bottom) / 2
        out.append(
            f'<text transform="translate(12 {cy:.1f}) rotate(-90)" text-anchor="middle" '
            f'fill="{MUTED}">{esc(ylabel)}</text>'
        )
        return out


def _svg(w: int, h: int, parts: Sequence[str], label: str) -> str:
    """The chart as markup for a page's template (its text escaped with ``esc``)."""
    return trusted(
        f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {w} {h}" width="100%" '
        f'role="img" aria-label="{esc(label)}" style="max-width:{w}px">'
        + "".join(parts)
        + "</svg>"
    )


def _empty(w: int, h: int, label: str, text: str) -> str:
    return _svg(
        w,
        h,
        [f'<text x="{w / 2}" y="{h / 2}" text-anchor="middle" fill="{MUTED}">{esc(text)}</text>'],
        label,
    )


def histogram(
    values,
    *,
    xlabel: str,
    label: str,
    split_at: float | None = 0.0,
    colors: tuple[str, str] = (RED, GREEN),
    bins: int = 30,
    clip: tuple[float, float] = (1.0, 99.0),
    w: int = 460,
    h: int = 230,
    unit: str = "words",
    empty: str = "no values",
) -> str:
    """Histogram of ``values`` (NaN dropped); bars below ``split_at`` in ``colors[0]``;
    ``unit`` names what is counted (y axis, hover text).

    ``empty`` is the note drawn when no value is finite.

    The range is clipped to the given percentiles so one outlier cannot squash the
    rest; the clipped values fall into the edge bins (said in the caption by callers).
    """
    x = np.asarray(values, dtype=np.float64)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return _empty(w, h, label, empty)
    lo, hi = np.percentile(x, clip)
    if split_at is not None:
        lo, hi = min(lo, split_at), max(hi, split_at)
    if hi - lo < 1e-9:
        lo, hi = lo - 0.05, hi + 0.05
    edges = np.linspace(lo, hi, bins + 1)
    if split_at is not None:
        # put a bin edge exactly on the split so no bar straddles it
        k = int(np.argmin(np.abs(edges - split_at)))
        edges = edges + (split_at - edges[k])
        if edges[0] > lo:
            edges = np.concatenate([[edges[0] - (edges[1] - edges[0])], edges])
        if edges[-1] < hi:
            edges = np.concatenate([edges, [edges[-1] + (edges[1] - edges[0])]])
    counts, _ = np.histogram(np.clip(x, edges[0], edges[-1]), bins=edges)
    top = max(int(counts.max()), 1)
    yt = [t for t in nice_ticks(0, top, 4) if float(t).is_integer()] or [0, top]
    f = _Frame(w, h, float(edges[0]), float(edges[-1]), 0.0, max(top, yt[-1]) * 1.05)
    parts = f.axes(nice_ticks(float(edges[0]), float(edges[-1]), 6), yt, xlabel, unit)
    for c, a, b in zip(counts.tolist(), edges[:-1].tolist(), edges[1:].tolist(), strict=True):
        if not c:
            continue
        col = colors[0] if split_at is not None and b <= split_at + 1e-12 else colors[1]
        x0, x1 = f.x(a) + 0.5, f.x(b) - 0.5
        y = f.y(c)
        parts.append(
            f'<rect x="{x0:.1f}" y="{y:.1f}" width="{max(x1 - x0, 0.8):.1f}" '
            f'height="{f.h - f.bottom - y:.1f}" fill="{col}"><title>{_tick_label(a)} to '
            f"{_tick_label(b)}: {c} {unit}</title></rect>"
        )
    if split_at is not None:
        xs = f.x(split_at)
        parts.append(
            f'<line x1="{xs:.1f}" x2="{xs:.1f}" y1="{f.top}" y2="{f.h - f.bottom}" '
            f'stroke="{INK}" stroke-dasharray="3 3"/>'
        )
    return _svg(w, h, parts, label)


def bars(
    items: Sequence[tuple[str, int]],
    *,
    label: str,
    colors: dict[str, str] | None = None,
    w: int = 460,
    row_h: int = 24,
) -> str:
    """Horizontal bars, one per ``(name, count)``."""
    if not items:
        return _empty(w, 80, label, "nothing to show")
    h = 16 + row_h * len(items)
    top = max(max(c for _, c in items), 1)
    left, right = max(90, 16 + int(6.4 * max(len(n) for n, _ in items))), 50
    parts = []
    for k, (name, c) in enumerate(items):
        y = 8 + k * row_h
        bw = (w - left - right) * c / top
        col = (colors or {}).get(name, BLUE)
        parts.append(
            f'<text x="{left - 8}" y="{y + row_h / 2 + 3.5:.1f}" text-anchor="end">'
            f"{esc(name)}</text>"
            f'<rect x="{left}" y="{y + 3}" width="{max(bw, 0.0):.1f}" height="{row_h - 6}" '
            f'fill="{col}"><title>{esc(name)}: {c}</title></rect>'
            f'<text x="{left + bw + 6:.1f}" y="{y + row_h / 2 + 3.5:.1f}">{c}</text>'
        )
    return _svg(w, h, parts, label)


def sweep_chart(
    lookahead: Sequence[int],
    reach: Sequence[float],
    kept: Sequence[float],
    latency_ms: Sequence[float],
    *,
    target: float,
    recommended: int | None,
    current: int | None = None,
    measured: dict | None = None,
    criterion: str | None = None,
    w: int = 620,
    h: int = 300,
) -> str:
    """Reach (and kept attention) against decoder look-ahead, latency on top.

    ``measured`` adds the measured WER on a right-hand axis: a dict of arrays
    ``lookahead``, ``wer``, ``low``, ``high`` (the 95 % interval of the WER difference
    to full context, added to the full-context WER) and the numbers ``full`` (full
    context's WER) and ``tolerance``, all fractions. ``criterion`` names what decided
    ``recommended`` in its label.
    """
    e = np.asarray(lookahead, dtype=np.float64)
    cov = np.asarray(reach, dtype=np.float64) * 100
    kep = np.asarray(kept, dtype=np.float64) * 100
    lat = np.asarray(latency_ms, dtype=np.float64)
    if e.size == 0 or not np.isfinite(cov).any():
        return _empty(w, h, "look-ahead sweep", "no words to sweep")
    if measured is not None:
        h += 30  # a second legend row
    lo = np.nanmin(np.concatenate([cov[np.isfinite(cov)], kep[np.isfinite(kep)]]))
    y0 = max(0.0, math.floor(min(lo, target * 100) / 10) * 10)
    f = _Frame(
        w,
        h,
        float(e[0]),
        float(max(e[-1], e[0] + 1)),
        y0,
        100.0,
        top=40,
        right=24 if measured is None else 50,
        bottom=62 if measured is None else 92,
    )
    xt = [t for t in nice_ticks(f.x0, f.x1, 8) if float(t).is_integer()]
    ylabel = "%" if measured is None else "reach, kept attention (%)"
    parts = f.axes(xt, nice_ticks(y0, 100.0, 5), "decoder look-ahead (frames)", ylabel)
    parts += _latency_axis(f, xt, e, lat)
    parts.append(_target_line(f, target))

    def path(x, y, color, dash="", ymap=f.y):
        pts = [(f.x(a), ymap(b)) for a, b in zip(x, y, strict=True) if np.isfinite(b)]
        if not pts:
            return ""
        d = " ".join(f"{'M' if i == 0 else 'L'}{x:.1f},{yy:.1f}" for i, (x, yy) in enumerate(pts))
        da = f' stroke-dasharray="{dash}"' if dash else ""
        dots = "".join(
            f'<circle cx="{x:.1f}" cy="{yy:.1f}" r="2.2" fill="{color}"/>' for x, yy in pts
        )
        return f'<path d="{d}" fill="none" stroke="{color}" stroke-width="2"{da}/>{dots}'

    if current is not None and e[0] <= current <= e[-1]:
        xc = f.x(current)
        parts.append(
            f'<line x1="{xc:.1f}" x2="{xc:.1f}" y1="{f.top}" y2="{f.h - f.bottom}" '
            f'stroke="{MUTED}" stroke-dasharray="2 3"/>'
        )
    wer_y = None
    if measured is not None:
        wer_y, wer_parts = _measured_wer(f, measured, path)
        parts += wer_parts
    parts.append(path(e, kep, PURPLE, "6 3"))
    parts.append(path(e, cov, BLUE))
    if recommended is not None:
        on = kep if criterion == "attention" else cov
        parts += _recommended_marker(f, e, on, lat, recommended, criterion, measured, wer_y)
    legend = _sweep_legend(measured is not None, current is not None)
    parts += _legend(legend, f.left, w - 10, h - 10 - (30 if measured is not None else 0))
    return _svg(w, h, parts, "look-ahead sweep")


def _latency_axis(f: _Frame, xt, e: np.ndarray, lat: np.ndarray) -> list:
    """The latency at each look-ahead tick, written along the top axis."""
    parts = []
    for t in xt:
        k = int(t) - int(e[0])
        if 0 <= k < lat.size and np.isfinite(lat[k]):
            parts.append(
                f'<text x="{f.x(t):.1f}" y="{f.top - 6}" text-anchor="middle" '
                f'fill="{MUTED}">{lat[k]:.0f}</text>'
            )
    parts.append(
        f'<text x="{(f.left + f.w - f.right) / 2:.1f}" y="{f.top - 22}" text-anchor="middle" '
        f'fill="{MUTED}">latency (ms)</text>'
    )
    return parts


def _target_line(f: _Frame, target: float) -> str:
    """The dashed line of the reach target, labelled on the right."""
    ty = f.y(target * 100)
    return (
        f'<line x1="{f.left}" x2="{f.w - f.right}" y1="{ty:.1f}" y2="{ty:.1f}" stroke="{MUTED}" '
        f'stroke-dasharray="5 4"/><text x="{f.w - f.right - 4}" y="{ty + 13:.1f}" '
        f'text-anchor="end" fill="{MUTED}">target {target * 100:g} %</text>'
    )


def _sweep_legend(measured: bool, current: bool) -> list:
    """The sweep chart's legend entries (colour, dash, label)."""
    legend = [(BLUE, "", "word reach"), (PURPLE, "6 3", "kept attention")]
    if measured:
        legend += [
            (GREEN, "", "measured WER (right axis; band: 95 % interval)"),
            (GREEN, "5 4", "full context + tolerance"),
        ]
    legend.append((ORANGE, "", "recommended"))
    if current:
        legend.append((MUTED, "2 3", "scan look-ahead"))
    return legend


def _measured_wer(f: _Frame, m: dict, path) -> tuple:
    """The measured WER on its own right-hand axis: curve, interval band, the line at
    full context + tolerance; returns the WER-to-pixel map and the SVG parts."""
    x = np.asarray(m["lookahead"], dtype=np.float64)
    wer = np.asarray(m["wer"], dtype=np.float64) * 100
    lo = np.asarray(m["low"], dtype=np.float64) * 100
    hi = np.asarray(m["high"], dtype=np.float64) * 100
    limit = (m["full"] + m["tolerance"]) * 100
    keep = (x >= f.x0) & (x <= f.x1)
    x, wer, lo, hi = x[keep], wer[keep], lo[keep], hi[keep]
    top = max([limit, *wer[np.isfinite(wer)], *hi[np.isfinite(hi)], 1.0])
    ticks = nice_ticks(0.0, top * 1.1, 5)
    w1 = max(ticks[-1], top)
    base, span = f.h - f.bottom, f.h - f.top - f.bottom

    def ymap(v: float) -> float:
        return base - v / w1 * span

    parts = []
    for t in ticks:
        parts.append(
            f'<text x="{f.w - f.right + 5}" y="{ymap(t) + 3.5:.1f}" fill="{GREEN}">'
            f"{_tick_label(t)}</text>"
        )
    cy = (f.top + f.h - f.bottom) / 2
    parts.append(
        f'<text transform="translate({f.w - 8} {cy:.1f}) rotate(90)" text-anchor="middle" '
        f'fill="{GREEN}">measured WER (%)</text>'
    )
    ok = np.isfinite(lo) & np.isfinite(hi)
    if ok.any():
        up = [f"{f.x(a):.1f},{ymap(b):.1f}" for a, b in zip(x[ok], hi[ok], strict=True)]
        down = [f"{f.x(a):.1f},{ymap(b):.1f}" for a, b in zip(x[ok], lo[ok], strict=True)]
        parts.append(
            f'<polygon points="{" ".join(up + down[::-1])}" fill="{GREEN}" fill-opacity="0.15"/>'
        )
    yl = ymap(limit)
    parts.append(
        f'<line x1="{f.left}" x2="{f.w - f.right}" y1="{yl:.1f}" y2="{yl:.1f}" '
        f'stroke="{GREEN}" stroke-dasharray="5 4"/>'
        f'<text x="{f.left + 4}" y="{yl - 4:.1f}" fill="{GREEN}">full context '
        f"{100 * m['full']:.1f} % + {100 * m['tolerance']:g} points</text>"
    )
    parts.append(path(x, wer, GREEN, ymap=ymap))
    return ymap, parts


def _recommended_marker(f, e, on, lat, recommended, criterion, measured, wer_y) -> list[str]:
    """The recommended look-ahead: a vertical line, a dot on the curve that decided it
    (``on``, in %; the measured WER's own axis for that criterion) and its label."""
    xr = f.x(recommended)
    k = int(recommended - e[0])
    y = f.y(on[k]) if 0 <= k < on.size and np.isfinite(on[k]) else f.y(f.y0)
    if criterion == "measured WER" and measured is not None and wer_y is not None:
        at = [i for i, a in enumerate(measured["lookahead"]) if a == recommended]
        if at:
            y = wer_y(100 * float(measured["wer"][at[0]]))
    ms = f" = {lat[k]:.0f} ms" if 0 <= k < lat.size and np.isfinite(lat[k]) else ""
    label = f"{recommended} frames{ms}" + (f" ({criterion})" if criterion else "")
    anchor = "start" if xr < (f.left + f.w - f.right) / 2 else "end"
    dx = 6 if anchor == "start" else -6
    ly = y + 18 if y < f.h - f.bottom - 24 else y - 10
    return [
        f'<line x1="{xr:.1f}" x2="{xr:.1f}" y1="{f.top}" y2="{f.h - f.bottom}" '
        f'stroke="{ORANGE}" stroke-width="2"/>'
        f'<circle cx="{xr:.1f}" cy="{y:.1f}" r="5" fill="{ORANGE}"/>'
        f'<text x="{xr + dx:.1f}" y="{ly:.1f}" text-anchor="{anchor}" '
        f'font-weight="600">{esc(label)}</text>'
    ]


def _legend(items, x0: float, x_max: float, y: float) -> list[str]:
    """Legend entries left to right, wrapping onto a row 18 px lower."""
    parts = []
    x = x0
    for col, dash, name in items:
        width = 36 + 6.6 * len(name)
        if x > x0 and x + width - 14 > x_max:
            x, y = x0, y + 18
        da = f' stroke-dasharray="{dash}"' if dash else ""
        parts.append(
            f'<line x1="{x}" x2="{x + 18}" y1="{y - 4}" y2="{y - 4}" stroke="{col}" '
            f'stroke-width="2"{da}/><text x="{x + 22}" y="{y}">{esc(name)}</text>'
        )
        x += width
    return parts
