"""The need lane: each reference token's look-ahead need against the decoder's look-ahead.

One small panel on the shared time axis. Each reference token is a stem with a dot at
its trigger frame (the frame its need is counted from), as tall as its need in frames (a
need past the largest look-ahead tried is drawn at the top, hatched). A dashed line
marks the view's decoder look-ahead; tokens whose need exceeds it are drawn in their own
strong colour (grey otherwise), and follow the look-ahead slider in the browser
(DEVELOPERS.md, "Look-ahead need").
"""

from __future__ import annotations

import numpy as np

from ..exceptions import ParameterError
from ._model import ViewModel
from ._palette import COLORS
from ._panels import _NAN, Panel, _add, _band, _figure, _legend, _scatter, _swatch
from ._static import models as _kit

# bokeh models, or static records inside views._static.static()
ColumnDataSource = _kit.ColumnDataSource
CustomJS = _kit.CustomJS
HoverTool = _kit.HoverTool
Line = _kit.Line
Quad = _kit.Quad
Scatter = _kit.Scatter
Range1d = _kit.Range1d
Span = _kit.Span

__all__ = ["NEED_JS", "need_exceeds", "need_panel", "need_values", "recolour_need"]

# the lane's own two colours: a quiet grey for needs the look-ahead meets, a dark
# magenta (apart from the error colours, and much darker than the grey) for the rest
WITHIN = "#a3adb8"
EXCEEDS = "#9c1f6e"

#: Browser side of :func:`recolour_need`: on a look-ahead change, recolour the bars and
#: move the line (args ``src``, ``line``, ``slider``).
NEED_JS = """
const eps = slider.value, d = src.data, n = d.need.length;
const over = new Array(n), c = new Array(n);
for (let i = 0; i < n; i++) { over[i] = d.need[i] > eps ? 1 : 0; c[i] = over[i] ? d.c_over[0] : d.c_within[0]; }
src.data = {...d, over: over, c: c};
line.location = eps;
"""


def need_values(need, vm: ViewModel) -> tuple[np.ndarray, np.ndarray]:
    """Need per reference token (frames, float, ``inf`` possible) and the frame it is
    counted from, checked against the view model.

    ``need`` is a :class:`peekalign.need.LookaheadNeed` of the same utterance (its own
    trigger frames) or an array of one need per reference token (the view's triggers).

    Examples
    --------
    >>> import numpy as np
    >>> from types import SimpleNamespace
    >>> vm = SimpleNamespace(uid="u1", U=2, num_frames=9, trigger=np.array([2, 7]))
    >>> need_values([0, 4], vm)
    (array([0., 4.]), array([2, 7]))
    """
    trigger = getattr(need, "trigger", None)
    if trigger is not None:
        if need.utt != vm.uid:
            raise ParameterError(
                f"utt {vm.uid!r}: found the look-ahead need of utterance {need.utt!r}, "
                "expected the need of the viewed utterance; pass lookahead_need(bundle[uid], ...)"
            )
        values = np.asarray(need.need, dtype=np.float64)
        trigger = np.asarray(trigger, dtype=np.int64)
    else:
        values = np.asarray(need, dtype=np.float64).reshape(-1)
        trigger = np.asarray(vm.trigger, dtype=np.int64)
    if values.shape != (vm.U,):
        raise ParameterError(
            f"utt {vm.uid!r}: found a need of {values.size} tokens, expected one per "
            f"reference token ({vm.U}); compute it on this utterance's reference"
        )
    if np.isnan(values).any() or (values < 0).any():
        raise ParameterError(
            f"utt {vm.uid!r}: found a negative or NaN need, expected frames >= 0 (inf: "
            "beyond the largest look-ahead tried); pass LookaheadNeed.need"
        )
    return values, np.clip(trigger, 0, max(vm.num_frames - 1, 0))


def need_exceeds(need: np.ndarray, lookahead: int) -> np.ndarray:
    """True for tokens whose need exceeds the decoder look-ahead (frames).

    Examples
    --------
    >>> need_exceeds(np.array([0, 3, np.inf, 5]), 3).tolist()
    [False, False, True, True]
    """
    return np.asarray(need, dtype=np.float64) > lookahead


def _need_source(vm: ViewModel, values: np.ndarray, trigger: np.ndarray, lookahead: int) -> dict:
    """Columns of the bars: position, height (inf at the top), colour and hover text."""
    finite = values[np.isfinite(values)]
    top = float(max(finite.max() if finite.size else 0.0, lookahead, 1.0)) + 1.0
    over = need_exceeds(values, lookahead)
    half = 0.3 * vm.frame_shift_s
    x = np.asarray(vm.frame_time(trigger), np.float64)
    return {
        "x": x,
        "left": x - half,
        "right": x + half,
        "bottom": np.zeros(values.size),
        "top": np.where(np.isfinite(values), values, top),
        "need": np.where(np.isfinite(values), values, 1e9),
        "text": [f"{v:.0f}" if np.isfinite(v) else "beyond the largest tried" for v in values],
        "token": list(vm.token_labels),
        "hatch": [" " if np.isfinite(v) else "/" for v in values],
        "over": over.astype(np.int8),
        "c": [EXCEEDS if o else WITHIN for o in over],
        "c_over": [EXCEEDS] * values.size,
        "c_within": [WITHIN] * values.size,
    }


def need_panel(
    vm: ViewModel,
    need,
    x_range,
    *,
    lookahead: int,
    width: int = 900,
    height: int = 130,
    output_backend: str = "canvas",
) -> Panel:
    """The need lane of one utterance (see the module docstring)."""
    values, trigger = need_values(need, vm)
    data = _need_source(vm, values, trigger, lookahead)
    src = ColumnDataSource(name="need_bars", data=data)
    top = float(np.max(data["top"])) if values.size else 2.0
    # the bottom leaves room for the window strip under the dots of need 0
    y_range = Range1d(-0.25 * top - 1.0, top + 0.8)
    p = _figure(
        "need",
        vm,
        x_range,
        height=height,
        width=width,
        title="look-ahead need per reference token (frames)",
        y_range=y_range,
        output_backend=output_backend,
    )
    p.yaxis.axis_label = "need"
    p.ygrid.visible = False
    p.yaxis.ticker.desired_num_ticks = 3
    r_stem = _add(
        p,
        Quad(
            left="left",
            right="right",
            top="top",
            bottom="bottom",
            fill_color={"field": "c"},
            line_color={"field": "c"},
            hatch_pattern={"field": "hatch"},
            hatch_color=COLORS["paper"],
        ),
        src,
    )
    r = _add(
        p,
        Scatter(
            x="x",
            y="top",
            marker="circle",
            size=6,
            fill_color={"field": "c"},
            line_color={"field": "c"},
        ),
        src,
    )
    line = Span(
        location=lookahead,
        dimension="width",
        line_color=COLORS["ink"],
        line_dash="dashed",
        line_width=1,
        name="need_lookahead",
    )
    p.add_layout(line)
    p.add_tools(
        HoverTool(
            renderers=[r, r_stem],
            tooltips=[("token", "@token"), ("need", "@text frames")],
        )
    )
    _need_legend(p, values)
    band = _band(p, "need")
    return Panel("need", p, band, sources={"bars": src}, models={"line": line, "y_range": y_range})


def _need_legend(p, values: np.ndarray) -> None:
    """Legend of fixed swatches (the bars' colours change with the look-ahead; a
    legend entry pointing at a bar would change with them)."""
    items = [
        ("need ≤ look-ahead", _add(p, _scatter("circle", 6, WITHIN), x=_NAN, y=_NAN)),
        ("need > look-ahead", _add(p, _scatter("circle", 6, EXCEEDS), x=_NAN, y=_NAN)),
    ]
    if not np.isfinite(values).all():
        items.append(("beyond the largest tried", _swatch(p, EXCEEDS, hatch="/")))
    key = _add(
        p, Line(x="x", y="x", line_color=COLORS["ink"], line_dash="dashed", line_width=1), x=_NAN
    )
    items.append(("decoder look-ahead", key))
    _legend(p, items, location="right")


def recolour_need(panel: Panel, lookahead: int) -> None:
    """Python side of :data:`NEED_JS`: mark the tokens past ``lookahead``, move the line."""
    src = panel.sources["bars"]
    d = dict(src.data)
    over = need_exceeds(d["need"], lookahead)
    d["over"] = over.astype(np.int8)
    d["c"] = [EXCEEDS if o else WITHIN for o in over]
    src.data = d
    panel.models["line"].location = lookahead
