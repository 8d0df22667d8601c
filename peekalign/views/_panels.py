"""Figure builders: one bokeh figure per panel, all on one time axis (seconds).

Each builder takes a :class:`~peekalign.views._model.ViewModel` (plus a shared
``x_range``) and returns a :class:`Panel`: the figure and the models that selection and
look-ahead changes update (window marker, sources). They add no widgets, so the Jupyter
peek widget can reuse them and drive the same models from Python.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from bokeh.core.properties import field as col

from ._data import (
    LogMel,
    attention_means,
    concat_images,
    encode_images,
    mel_frequencies,
    quantize,
    reference_curves,
    top_tokens,
)
from ._model import ViewModel
from ._palette import COLORS, ERROR_OP_COLORS, ERROR_OP_HATCH, sequential_ramp
from ._static import models as _kit

# bokeh models, or static records inside views._static.static()
BoxAnnotation = _kit.BoxAnnotation
ColorBar = _kit.ColorBar
ColumnDataSource = _kit.ColumnDataSource
CustomJS = _kit.CustomJS
CustomJSTickFormatter = _kit.CustomJSTickFormatter
FixedTicker = _kit.FixedTicker
HoverTool = _kit.HoverTool
Image = _kit.Image
Label = _kit.Label
LabelSet = _kit.LabelSet
Legend = _kit.Legend
LegendItem = _kit.LegendItem
Line = _kit.Line
LinearColorMapper = _kit.LinearColorMapper
Node = _kit.Node
Quad = _kit.Quad
Range1d = _kit.Range1d
Scatter = _kit.Scatter
Span = _kit.Span
TapTool = _kit.TapTool
figure = _kit.figure

__all__ = [
    "Panel",
    "Band",
    "spectrogram_panel",
    "posterior_panel",
    "lanes_panel",
    "occupancy_panel",
    "attention_panel",
    "LEFT_BORDER",
]

#: Left border (px) of every panel, wide enough for the lane names, so that all time
#: axes line up.
LEFT_BORDER = 118
_FONT = "10px"
_RAMP = sequential_ramp(256)
_TOOLS = "xpan,xwheel_zoom,reset"


@dataclass
class Band:
    """The selected token's decoder window on one panel: a strip along the bottom of
    the panel from the window's first to its last frame, the right context past the
    window end as a hatched continuation of the strip, the window end as a dashed line
    and the trigger as a thin line (DEVELOPERS.md, "Adding a view")."""

    window: BoxAnnotation
    context: BoxAnnotation
    end: Span
    trigger: Span


@dataclass
class Panel:
    """A figure and the models that selection and look-ahead changes touch."""

    name: str
    figure: object
    band: Band
    sources: dict = field(default_factory=dict)
    models: dict = field(default_factory=dict)


def _figure(name: str, vm: ViewModel, x_range, *, height: int, width: int, title: str, **kw):
    p = figure(
        name=name,
        x_range=x_range,
        frame_width=width,
        height=height,
        tools=_TOOLS,
        active_drag="xpan",
        title=title,
        toolbar_location="right",
        min_border_left=LEFT_BORDER,
        min_border_right=56,  # colour-bar labels and legends run past the reserved room
        output_backend=kw.pop("output_backend", "canvas"),
        **kw,
    )
    p.toolbar.autohide = True
    p.toolbar.logo = None
    p.title.text_font_size = "11px"
    p.title.text_color = COLORS["ink"]
    p.xaxis.axis_label = "time (s)"
    p.xaxis.axis_label_text_font_size = _FONT
    p.xaxis.axis_label_standoff = 2
    p.axis.major_label_text_font_size = _FONT
    p.yaxis.axis_label_text_font_size = _FONT
    p.grid.grid_line_color = COLORS["grid"]
    p.outline_line_color = COLORS["span_line"]
    return p


def _add(p, glyph, source=None, **kw):
    """Add one glyph renderer without the plotting API's selection/hover copies
    (each bokeh model costs time to build; a view holds a few hundred).

    Array keywords become the columns of a new source; the rest go to the renderer.
    """
    if source is None:
        cols = {k: v for k, v in kw.items() if isinstance(v, (list, np.ndarray))}
        kw = {k: v for k, v in kw.items() if k not in cols}
        source = ColumnDataSource(cols)
    return p.add_glyph(source, glyph, **kw)


def _quad(**props) -> Quad:
    return Quad(left="left", right="right", top="top", bottom="bottom", **props)


def _scatter(marker: str, size: float, color: str, *, alpha: float = 1.0) -> Scatter:
    return Scatter(
        x="x",
        y="y",
        marker=marker,
        size=size,
        fill_color=color,
        line_color=color,
        fill_alpha=alpha,
        line_alpha=alpha,
    )


def _image(mapper) -> Image:
    return Image(image="image", x="x", y="y", dw="dw", dh="dh", color_mapper=mapper)


#: Height (px) of the window strip along the bottom of each panel.
STRIP_PX = 7


def _strip(name: str, **props) -> BoxAnnotation:
    """A box along the bottom of the frame, ``STRIP_PX`` high (screen offsets from the
    frame's bottom edge), spanning ``left`` to ``right`` in seconds."""
    return BoxAnnotation(
        name=name,
        left=0,
        right=0,
        bottom=Node(target="frame", symbol="bottom"),
        top=Node(target="frame", symbol="bottom", offset=-STRIP_PX),
        visible=False,
        **props,
    )


def _band(p, name: str) -> Band:
    w = _strip(
        f"window_strip_{name}",
        fill_color=COLORS["window"],
        fill_alpha=0.75,
        line_color=COLORS["window"],
        line_alpha=1.0,
        line_width=1,
    )
    c = _strip(
        f"context_strip_{name}",
        fill_color=COLORS["paper"],
        fill_alpha=0.6,
        line_color=COLORS["ink"],
        line_alpha=0.5,
        line_width=1,
        hatch_pattern="/",
        hatch_color=COLORS["ink"],
        hatch_alpha=0.6,
        hatch_scale=6,
    )
    e = Span(
        name=f"window_end_{name}",
        location=0,
        dimension="height",
        line_color=COLORS["window"],
        line_dash=[5, 3],
        line_width=1.5,
        visible=False,
    )
    t = Span(
        name=f"trigger_line_{name}",
        location=0,
        dimension="height",
        line_color=COLORS["ink"],
        line_alpha=0.55,
        line_width=1,
        visible=False,
    )
    # the marker lives in the overlay layer: moving it repaints no image underneath
    for m in (w, c, e, t):
        m.level = "overlay"
        p.add_layout(m)
    return Band(w, c, e, t)


def _legend(p, items, *, location="right", title=None, ncols=1):
    """Legend outside the frame; items are (label, renderer) or (label, renderer, index)."""
    leg = Legend(
        ncols=ncols,
        label_width=100 if ncols > 1 else 20,
        items=[
            LegendItem(
                label=it[0],
                renderers=list(it[1]) if isinstance(it[1], (list, tuple)) else [it[1]],
                index=it[2] if len(it) > 2 else None,
            )
            for it in items
        ],
        location="top_left",
        label_text_font_size=_FONT,
        glyph_height=12,
        glyph_width=18,
        spacing=1,
        padding=4,
        margin=4,
        border_line_alpha=0,
        background_fill_alpha=0,
    )
    if title:
        leg.title = title
        leg.title_text_font_size = _FONT
        leg.title_text_font_style = "bold"
    p.add_layout(leg, location)
    return leg


_NAN = [float("nan")]


def _swatch(p, color, *, alpha=1.0, hatch=None, line=None):
    """A quad renderer with one NaN box: invisible in the plot, a swatch in a legend
    (legends draw the visuals of the first data point, so the source cannot be empty)."""
    return _add(
        p,
        Quad(
            left=_NAN[0],
            right=_NAN[0],
            top=_NAN[0],
            bottom=_NAN[0],
            fill_color=color,
            fill_alpha=alpha,
            line_color=line or color,
            hatch_pattern=hatch,
            hatch_color=COLORS["paper"] if hatch else COLORS["ink"],
            hatch_alpha=0.8 if hatch else 0.0,
        ),
        x=_NAN,
    )


def band_legend_items(p) -> list:
    """Legend entries for the window marker drawn on every panel."""
    win = _swatch(p, COLORS["window"], alpha=0.75, line=COLORS["window"])
    ctx = _add(
        p,
        Quad(
            left=_NAN[0],
            right=_NAN[0],
            top=_NAN[0],
            bottom=_NAN[0],
            fill_color=COLORS["paper"],
            fill_alpha=0.6,
            line_color=COLORS["ink"],
            line_alpha=0.5,
            hatch_pattern="/",
            hatch_color=COLORS["ink"],
            hatch_alpha=0.6,
        ),
        x=_NAN,
    )
    end = _add(
        p,
        Line(x="x", y="x", line_color=COLORS["window"], line_dash=[5, 3], line_width=1.5),
        x=_NAN,
    )
    trig = _add(p, Line(x="x", y="x", line_color=COLORS["ink"], line_alpha=0.55), x=_NAN)
    return [
        ("decoder window", win),
        ("window end", end),
        ("right context", ctx),
        ("selected trigger", trig),
    ]


def _image_placeholder(rows: int, cols: int, dense: np.ndarray | None):
    if dense is not None:
        return dense
    return np.zeros((1, 1), np.float32)


# -- spectrogram -------------------------------------------------------------------


def spectrogram_panel(
    vm: ViewModel,
    mel: LogMel | None,
    x_range,
    *,
    width: int = 900,
    height: int = 150,
    output_backend: str = "canvas",
) -> Panel:
    """Log-mel spectrogram (uint8-quantised dB image) with a dB colour bar.

    Without audio the panel says so instead of staying blank.
    """
    if mel is None:
        p = _figure(
            "spectrogram",
            vm,
            x_range,
            height=60,
            width=width,
            title="log-mel spectrogram",
            output_backend=output_backend,
        )
        p.yaxis.visible = False
        p.y_range = Range1d(0, 1)
        p.add_layout(
            Label(
                x=vm.x_start,
                y=0.3,
                text="no audio in the bundle: add the wav file to draw the spectrogram",
                text_font_size="11px",
                text_color=COLORS["ink"],
                x_offset=8,
            )
        )
        return Panel("spectrogram", p, _band(p, "spectrogram"))
    n_mels = mel.db.shape[0]
    title = (
        f"log-mel spectrogram ({n_mels} bands, {mel.win_s * 1000:.0f} ms window, "
        f"{mel.hop_s * 1000:.0f} ms hop)"
    )
    p = _figure(
        "spectrogram",
        vm,
        x_range,
        height=height,
        width=width,
        title=title,
        y_range=Range1d(-0.5, n_mels - 0.5),
        output_backend=output_backend,
    )
    q = quantize(mel.db, -mel.top_db, 0.0)
    mapper = LinearColorMapper(palette=_RAMP, low=0, high=255)
    src = ColumnDataSource(
        {"image": [q], "x": [mel.x0], "y": [-0.5], "dw": [mel.width_s], "dh": [n_mels]}
    )
    _add(p, _image(mapper), src, level="image")
    # y axis: mel bands, labelled with the centre frequency of a few of them
    centres = mel_frequencies(n_mels + 2, mel.fmax)[1:-1]
    ticks, labels = [], {}
    min_gap = max(2, n_mels // 8)  # keep tick labels apart on a short panel
    for hz in (250, 500, 1000, 2000, 4000, 8000, 16000):
        if hz < mel.fmax:
            b = int(np.argmin(np.abs(centres - hz)))
            if ticks and b - ticks[-1] < min_gap:
                continue
            ticks.append(b)
            labels[b] = f"{hz / 1000:g}k" if hz >= 1000 else f"{hz}"
    p.yaxis.ticker = FixedTicker(ticks=ticks)
    p.yaxis.major_label_overrides = labels
    p.yaxis.axis_label = "Hz"
    p.grid.visible = False
    db_ticks = np.arange(-mel.top_db, 0.1, 20.0)
    qt = quantize(db_ticks, -mel.top_db, 0.0).astype(float)
    bar = ColorBar(
        color_mapper=mapper,
        ticker=FixedTicker(ticks=qt.tolist()),
        major_label_overrides={float(t): f"{d:.0f} dB" for t, d in zip(qt, db_ticks, strict=True)},
        major_label_text_font_size=_FONT,
        title="power",
        title_text_font_size=_FONT,
        width=10,
        padding=4,
        margin=4,
    )
    p.add_layout(bar, "right")
    return Panel("spectrogram", p, _band(p, "spectrogram"), sources={"image": src})


# -- CTC posteriors ------------------------------------------------------------------

_LOG_FLOOR = 1e-4


def posterior_panel(
    vm: ViewModel,
    x_range,
    *,
    k: int = 5,
    scale: str = "linear",
    width: int = 900,
    height: int = 190,
    output_backend: str = "canvas",
) -> Panel:
    """CTC posteriors: blank, per-frame most likely tokens, the reference tokens' curves near
    their spans, greedy spikes and the selected token's curve.

    ``scale="log"`` plots ``log10 p`` (floored at 1e-4) on an axis labelled in powers
    of ten; the browser can switch scales by swapping each source's ``y`` column.
    Hover anywhere shows the frame, its time and the top tokens with probabilities.
    """
    src, k_shown = _posterior_sources(vm, k, scale)
    blank_src, tk_src, curve_src = src["blank"], src["top_tokens"], src["curves"]
    sel_src, sp_src = src["selected"], src["spikes"]
    if scale == "log":
        y_range = Range1d(np.log10(_LOG_FLOOR), 0.15)
    else:
        y_range = Range1d(-0.03, 1.08)
    p = _figure(
        "posteriors",
        vm,
        x_range,
        height=height,
        width=width,
        title="CTC posteriors",
        y_range=y_range,
        output_backend=output_backend,
    )
    c = COLORS
    r_tk = _add(p, _scatter("circle", 3, c["top_tokens"], alpha=0.9), tk_src)
    r_blank = _add(p, Line(x="x", y="y", line_color=c["blank"], line_width=1.3), blank_src)
    r_curve = _add(p, Line(x="x", y="y", line_color=c["reference"], line_width=1.3), curve_src)
    r_sel = _add(p, Line(x="x", y="y", line_color=c["selected"], line_width=2.6), sel_src)
    r_spike = _add(p, _scatter("inverted_triangle", 7, c["spike"]), sp_src)
    p.add_tools(
        HoverTool(
            renderers=[r_blank],
            mode="vline",
            tooltips=[("frame", "@frame"), ("time", "@x{0.000} s"), ("top", "@top")],
        ),
        HoverTool(renderers=[r_spike], tooltips=[("spike", "@token"), ("p", "@p{0.000}")]),
    )
    lin_ticker, log_ticker, lin_fmt, log_fmt = _posterior_axis(p, scale)
    band = _band(p, "posteriors")
    _legend(
        p,
        [
            ("blank", r_blank),
            ("reference tokens", r_curve),
            (f"{k_shown} likeliest per frame", r_tk),
            ("CTC spike (greedy)", r_spike),
            ("selected token", r_sel),
        ],
    )
    return Panel(
        "posteriors",
        p,
        band,
        sources=src,
        models={
            "y_range": y_range,
            "tickers": {"linear": lin_ticker, "log": log_ticker},
            "formatters": {"linear": lin_fmt, "log": log_fmt},
            "scale": scale,
        },
    )


def _posterior_sources(vm: ViewModel, k: int, scale: str) -> tuple[dict, int]:
    """Data of the posterior panel by name: blank (with the hover's top tokens per
    frame), top tokens, reference curves, the selected curve (empty) and spikes; and the
    number of top tokens per frame shown (``k`` at most)."""
    T = vm.num_frames
    frames = np.arange(T)
    t = vm.frame_time(frames)
    ids, probs, blank_p = top_tokens(vm.log_probs, k, blank=vm.blank)

    def ycol(p):
        p = np.asarray(p, np.float32)
        return np.log10(np.maximum(p, _LOG_FLOOR)) if scale == "log" else p

    from ._data import frame_hover_text

    hover_text = frame_hover_text(ids, probs, blank_p, vm.token_text)
    blank_src = ColumnDataSource(
        {
            "x": t,
            "p": blank_p,
            "y": ycol(blank_p),
            "frame": frames.astype(np.int32),
            "top": hover_text,
        }
    )
    keep = probs >= 0.01
    tk_src = ColumnDataSource(
        {
            "x": np.repeat(t, ids.shape[1])[keep.ravel()].astype(np.float32),
            "p": probs[keep],
            "y": ycol(probs[keep]),
        }
    )
    cf, cp, cu = reference_curves(vm.log_probs, vm.tokens, vm.first, vm.last, pad=8)
    cx = vm.frame_time(cf)  # NaN stays NaN and breaks the line
    curve_src = ColumnDataSource({"x": cx, "p": cp, "y": ycol(cp), "u": cu.astype(np.int32)})
    sel_src = ColumnDataSource({"x": [], "p": [], "y": []})
    spike_names = [vm.token_text(int(i)) for i in vm.spike_tokens.tolist()]
    sp_src = ColumnDataSource(
        {
            "x": vm.frame_time(vm.spike_frames),
            "p": vm.spike_probs,
            "y": ycol(vm.spike_probs),
            "frame": vm.spike_frames.astype(np.int32),
            "token": spike_names,
        }
    )
    return {
        "blank": blank_src,
        "top_tokens": tk_src,
        "curves": curve_src,
        "selected": sel_src,
        "spikes": sp_src,
    }, ids.shape[1]


def _posterior_axis(p, scale: str) -> tuple:
    """Set the y axis for ``scale``; both scales' tickers and formatters, for the
    browser's switch: ``(linear ticker, log ticker, linear format, log format)``."""
    lin_ticker = FixedTicker(ticks=[0.0, 0.25, 0.5, 0.75, 1.0])
    log_ticker = FixedTicker(ticks=[-4, -3, -2, -1, 0])
    log_fmt = CustomJSTickFormatter(code="return tick >= 0 ? '1' : '1e' + tick.toFixed(0)")
    lin_fmt = CustomJSTickFormatter(code="return tick.toFixed(2)")
    p.yaxis.ticker = log_ticker if scale == "log" else lin_ticker
    p.yaxis.formatter = log_fmt if scale == "log" else lin_fmt
    p.yaxis.axis_label = "p (log scale)" if scale == "log" else "p"
    return lin_ticker, log_ticker, lin_fmt, log_fmt


def selected_curve(vm: ViewModel, u: int, *, scale: str = "linear", pad: int = 8):
    """Data of the selected token's posterior curve (x, p, y)."""
    T = vm.num_frames
    if not 0 <= u < vm.U:
        return {"x": [], "p": [], "y": []}
    a = max(0, int(vm.first[u]) - 3 * pad)
    b = min(T - 1, int(vm.last[u]) + 3 * pad)
    f = np.arange(a, b + 1)
    p = np.exp(vm.log_probs[f, int(vm.tokens[u])]).astype(np.float32)
    p = np.maximum(p, _LOG_FLOOR)
    y = np.log10(p) if scale == "log" else p
    return {"x": vm.frame_time(f), "p": p, "y": y}


# -- lanes ---------------------------------------------------------------------------


def _label_ink(op: str) -> str:
    """Label colour readable on an error operation's fill."""
    return COLORS["paper"] if op in ("deletion", "insertion") else COLORS["ink"]


def _label_threshold(centres: np.ndarray, labels: list[str], *, stagger: int = 1) -> float:
    """Pixels per second above which the labels of a lane mostly do not overlap.

    Adjacent labels (or every ``stagger``-th, for labels alternating between lines)
    need their centres apart by half their widths summed; the 80th percentile of the
    needed scale is used, so a few tight pairs do not hide a whole lane.
    """
    n = len(labels)
    if n <= stagger:
        return 0.0
    w = np.array([6.0 * len(s) + 6.0 for s in labels])
    gap = np.maximum(np.diff(centres[::1])[: n - 1], 1e-3)
    if stagger > 1:
        gap = np.maximum(centres[stagger:] - centres[:-stagger], 1e-3)
        need = (w[stagger:] + w[:-stagger]) / 2 / gap
    else:
        need = (w[1:] + w[:-1]) / 2 / gap
    return float(np.percentile(need, 80))


def ref_diagnosis_columns(vm: ViewModel) -> dict:
    """The reference-word lane's columns that follow the diagnosis.

    ``label`` is the word with its code (hover, tables), ``diag`` the code alone,
    drawn on a line under the word (``dy``); the words move up (``wy``) when any word
    of the utterance carries a code, so the two lines never overlap.
    """
    W = vm.W
    diag = [f"[{d}]" if d else "" for d in vm.word_diagnosis]
    up = 0.14 if any(diag) else 0.0
    return {
        "label": [f"{w} {d}" if d else w for w, d in zip(vm.words, diag, strict=True)],
        "diag": diag,
        "wy": np.full(W, _LANE_ROWS["ref"] + up),
        "dy": np.full(W, _LANE_ROWS["ref"] - 0.19),
        "diagnosis": [d or "–" for d in vm.word_diagnosis],
        "evidence": [e or "–" for e in vm.word_evidence],
    }


def label_thresholds(vm: ViewModel, fw_src, tok_src, hyp_src, ref_src) -> list[float]:
    """Pixels per second each lane's labels need (order of the lane's label sets)."""
    cx_ref = np.asarray(ref_src.data["cx"], float)
    diag = list(ref_src.data["diag"])
    has = np.flatnonzero([bool(d) for d in diag])
    out = [
        _label_threshold(cx_ref, list(vm.words)),
        _label_threshold(cx_ref[has], [diag[i] for i in has]),
    ]
    for src, stagger in ((fw_src, 1), (tok_src, 2), (hyp_src, 1)):
        cx = np.asarray(src.data["cx"], float)
        out.append(_label_threshold(cx, list(src.data["label"]), stagger=stagger))
    return out


def show_labels(labelsets, need, px_per_s: float, title, titles) -> None:
    """Show the lanes whose labels fit at ``px_per_s`` (the browser does the same)."""
    for ls, th in zip(labelsets, need, strict=True):
        ls.visible = bool(px_per_s >= th)
    title.text = titles[0] if all(ls.visible for ls in labelsets) else titles[1]


_LANES_TITLE = "lanes (click a token to select it)"
#: Lane rows, top to bottom: what the recognizer said, then the reference in three
#: lanes (words with their diagnosis, words and tokens where the forced alignment puts
#: them), so the forced tokens sit right above the window strip at the panel's bottom.
_LANE_ROWS = {"hyp": 3, "ref": 2, "forced_words": 1, "tokens": 0}


def lanes_panel(
    vm: ViewModel,
    x_range,
    *,
    width: int = 900,
    height: int = 168,
    output_backend: str = "canvas",
) -> Panel:
    """Lanes: the hypothesis coloured by error operation on top, set apart from the
    reference below it: reference words (with their time source and diagnosis), forced
    words and forced tokens (selectable; trigger frames ticked).
    """
    p = _lanes_figure(vm, x_range, width, height, output_backend)
    ref_src, r_ref, fw_src, r_fw = _reference_lanes(p, vm)
    tok_src, r_tok, r_trig = _token_lane(p, vm)
    hyp_src, r_hyp = _hypothesis_lane(p, vm)
    labelsets, need, titles = _lane_labels(
        p, vm, x_range, width, ref_src, fw_src, tok_src, hyp_src
    )
    p.add_tools(
        HoverTool(
            renderers=[r_ref],
            tooltips=[
                ("word", "@word"),
                ("time", "@left{0.000}–@right{0.000} s (@source)"),
                ("operation", "@op"),
                ("diagnosis", "@diagnosis"),
                ("evidence", "@evidence"),
            ],
        ),
        HoverTool(
            renderers=[r_tok],
            tooltips=[
                ("token", "#@u @label"),
                ("frames", "@first–@last, spike @spike, trigger @trigger"),
            ],
        ),
        HoverTool(
            renderers=[r_hyp],
            tooltips=[("word", "@label"), ("operation", "@op"), ("placed by", "@times")],
        ),
        TapTool(renderers=[r_tok], mode="replace"),
    )
    band = _band(p, "lanes")
    _lanes_legend(p, vm, r_ref, r_fw, r_trig, r_hyp)
    return Panel(
        "lanes",
        p,
        band,
        sources={"ref": ref_src, "forced_words": fw_src, "tokens": tok_src, "hyp": hyp_src},
        models={
            "labels": labelsets,
            "label_need": need,
            "label_titles": titles,
            "token_renderer": r_tok,
        },
    )


#: Half the height of a lane's boxes.
_LANE_H = 0.38


def _lanes_figure(vm: ViewModel, x_range, width: int, height: int, output_backend: str):
    """The lanes' figure: lane names on the y axis, a rule between the hypothesis and
    the reference lanes."""
    rows = _LANE_ROWS
    p = _figure(
        "lanes",
        vm,
        x_range,
        height=height,
        width=width,
        title=_LANES_TITLE,
        y_range=Range1d(-0.9, 3.6),  # room under the tokens for triggers and the strip
        output_backend=output_backend,
    )
    p.ygrid.visible = False
    src_name = vm.words_source
    p.yaxis.ticker = FixedTicker(ticks=list(rows.values()))
    p.yaxis.major_label_overrides = {
        rows["hyp"]: f"hypothesis\n({vm.hyp_branch})" if vm.hyp_branch else "hypothesis",
        rows["ref"]: f"reference words\n({src_name} times)"
        if len(src_name) < 22
        else "reference words\n(times: see hover)",
        rows["forced_words"]: "forced words",
        rows["tokens"]: "forced tokens",
    }
    # the hypothesis stands apart from the three reference lanes
    p.add_layout(
        Span(
            location=(rows["hyp"] + rows["ref"]) / 2,
            dimension="width",
            line_color=COLORS["ink"],
            line_alpha=0.45,
            line_width=1,
        )
    )
    return p


def _reference_lanes(p, vm: ViewModel) -> tuple:
    """Reference words (coloured by operation, with their diagnosis) and forced words:
    ``(ref_src, ref_renderer, forced_src, forced_renderer)``."""
    rows, h = _LANE_ROWS, _LANE_H
    op_fill = {
        "correct": COLORS["span"],
        "substitution": ERROR_OP_COLORS["substitution"],
        "deletion": ERROR_OP_COLORS["deletion"],
        "insertion": ERROR_OP_COLORS["insertion"],
    }

    # reference words
    W = vm.W
    ref_src = ColumnDataSource(
        {
            "left": vm.word_start_s,
            "right": vm.word_end_s,
            "top": np.full(W, rows["ref"] + h),
            "bottom": np.full(W, rows["ref"] - h),
            "cx": (vm.word_start_s + vm.word_end_s) / 2,
            "cy": np.full(W, rows["ref"]),
            "word": list(vm.words),
            "op": list(vm.word_op),
            "fill": [op_fill[o] for o in vm.word_op],
            "ink": [_label_ink(o) for o in vm.word_op],
            "hatch": [ERROR_OP_HATCH.get(o) or " " for o in vm.word_op],
            "source": [vm.words_source] * W,
            **ref_diagnosis_columns(vm),
        }
    )
    r_ref = _add(
        p,
        _quad(
            fill_color=col("fill"),
            line_color=COLORS["span_line"],
            hatch_pattern=col("hatch"),
            hatch_color=COLORS["paper"],
            hatch_alpha=0.35,
        ),
        ref_src,
    )

    # forced words
    fw_src = ColumnDataSource(
        {
            "left": vm.forced_word_start_s,
            "right": vm.forced_word_end_s,
            "top": np.full(W, rows["forced_words"] + h),
            "bottom": np.full(W, rows["forced_words"] - h),
            "cx": (vm.forced_word_start_s + vm.forced_word_end_s) / 2,
            "cy": np.full(W, rows["forced_words"]),
            "label": list(vm.words),
        }
    )
    r_fw = _add(p, _quad(fill_color=COLORS["span"], line_color=COLORS["span_line"]), fw_src)

    return ref_src, r_ref, fw_src, r_fw


def _token_lane(p, vm: ViewModel) -> tuple:
    """Forced tokens (selectable) and their trigger ticks: ``(source, renderer,
    trigger_renderer)``."""
    rows, h = _LANE_ROWS, _LANE_H
    U = vm.U
    t0 = vm.frame_start(vm.first)
    t1 = vm.frame_end(vm.last)
    stagger = np.where(np.arange(U) % 2 == 0, 0.17, -0.17)
    tok_src = ColumnDataSource(
        {
            "left": t0,
            "right": t1,
            "top": np.full(U, rows["tokens"] + h),
            "bottom": np.full(U, rows["tokens"] - h),
            "cx": (t0 + t1) / 2,
            "cy": rows["tokens"] + stagger,
            "label": list(vm.token_labels),
            "u": np.arange(U, dtype=np.int32),
            "first": vm.first.astype(np.int32),
            "last": vm.last.astype(np.int32),
            "spike": vm.spike.astype(np.int32),
            "trigger": vm.trigger.astype(np.int32),
            "trigger_src": list(vm.trigger_src or ["given"] * U),
        }
    )
    tok_glyph = _quad(fill_color=COLORS["span"], line_color=COLORS["span_line"])
    r_tok = _add(
        p,
        tok_glyph,
        tok_src,
        selection_glyph=_quad(fill_color=COLORS["selected"], line_color=COLORS["selected"]),
        nonselection_glyph=tok_glyph,
    )
    r_trig = _add(
        p,
        _scatter("triangle", 6, COLORS["ink"]),
        x=vm.frame_time(vm.trigger),
        y=np.full(U, rows["tokens"] - h - 0.04),
    )

    return tok_src, r_tok, r_trig


def _hypothesis_lane(p, vm: ViewModel) -> tuple:
    """Hypothesis words coloured by error operation: ``(source, renderer)``."""
    rows, h = _LANE_ROWS, _LANE_H
    Hn = len(vm.hyp_words)
    hyp_src = ColumnDataSource(
        {
            "left": vm.hyp_start_s,
            "right": vm.hyp_end_s,
            "top": np.full(Hn, rows["hyp"] + h),
            "bottom": np.full(Hn, rows["hyp"] - h),
            "cx": (vm.hyp_start_s + vm.hyp_end_s) / 2,
            "cy": np.full(Hn, rows["hyp"]),
            "label": list(vm.hyp_words),
            "op": list(vm.hyp_op),
            "fill": [ERROR_OP_COLORS[o] for o in vm.hyp_op],
            "ink": [_label_ink(o) for o in vm.hyp_op],
            "hatch": [ERROR_OP_HATCH.get(o) or " " for o in vm.hyp_op],
            "times": [vm.hyp_times_source] * Hn,
        }
    )
    r_hyp = _add(
        p,
        _quad(
            fill_color=col("fill"),
            fill_alpha=0.85,
            line_color=COLORS["span_line"],
            hatch_pattern=col("hatch"),
            hatch_color=COLORS["paper"],
            hatch_alpha=0.35,
        ),
        hyp_src,
    )

    return hyp_src, r_hyp


def _lane_labels(p, vm: ViewModel, x_range, width, ref_src, fw_src, tok_src, hyp_src):
    """Label sets of every lane, shown when the zoom leaves room for them (here and in
    the browser): ``(labelsets, need, titles)``."""
    # (the reference words' diagnoses are a second, smaller line of their own: appended
    # to the words they would hide the whole lane at widths where the words fit)
    labelsets = []
    for src, text, y, size in (
        (ref_src, "word", "wy", _FONT),
        (ref_src, "diag", "dy", "9px"),
        (fw_src, "label", "cy", _FONT),
        (tok_src, "label", "cy", "9px"),
        (hyp_src, "label", "cy", _FONT),
    ):
        ls = LabelSet(
            x="cx",
            y=y,
            text=text,
            source=src,
            text_align="center",
            text_baseline="middle",
            text_font_size=size,
            text_color=col("ink") if "ink" in src.data else COLORS["ink"],
            background_fill_color=None,
        )
        p.add_layout(ls)
        labelsets.append(ls)
    need = ColumnDataSource({"need": label_thresholds(vm, fw_src, tok_src, hyp_src, ref_src)})
    titles = [_LANES_TITLE, _LANES_TITLE + "; zoom in to read the hidden labels"]
    span0 = float(x_range.end - x_range.start) if x_range.end is not None else vm.duration_s
    show_labels(labelsets, need.data["need"], width / max(span0, 1e-6), p.title, titles)
    x_range.js_on_change(
        "end",
        CustomJS(
            args={
                "labels": labelsets,
                "need": need,
                "width": width,
                "xr": x_range,
                "title": p.title,
                "titles": titles,
            },
            code="""
const pxs = width / Math.max(xr.end - xr.start, 1e-6);
const th = need.data.need;
let all = true;
for (let i = 0; i < labels.length; i++) { labels[i].visible = pxs >= th[i]; all = all && labels[i].visible; }
const t = all ? titles[0] : titles[1];
if (title.text != t) title.text = t;
""",
        ),
    )

    return labelsets, need, titles


def _lanes_legend(p, vm: ViewModel, r_ref, r_fw, r_trig, r_hyp) -> None:
    """One legend entry per colour drawn, then the aligned span, trigger and selection."""
    # one legend entry per colour drawn: point at the first item with that operation
    op_items = []
    for op, renderer, ops in (
        ("correct", r_hyp, vm.hyp_op),
        ("substitution", r_hyp, vm.hyp_op),
        ("substitution", r_ref, vm.word_op),
        ("insertion", r_hyp, vm.hyp_op),
        ("deletion", r_ref, vm.word_op),
    ):
        if op in ops and op not in [lab for lab, *_ in op_items]:
            op_items.append((op, renderer, ops.index(op)))
    op_items += [
        # r_tok draws with the same colours; listing it too makes bokeh 3.9 drop the
        # legend's swatches after a redraw, so the entry points at the words only
        ("aligned span", r_fw, None),
        ("trigger frame", r_trig, None),
        ("selected token", _swatch(p, COLORS["selected"]), None),
    ]
    _legend(p, op_items)


# -- images: occupancy and attention -------------------------------------------------


def _row_axis(p, labels: list[str], rows: int) -> None:
    p.yaxis.major_label_overrides = {i: f"{i} {s}" for i, s in enumerate(labels)}
    p.ygrid.visible = False
    p.xgrid.visible = False


def _row_band(p, name: str) -> BoxAnnotation:
    b = BoxAnnotation(
        name=f"row_band_{name}",
        bottom=0,
        top=0,
        fill_color=COLORS["selected"],
        fill_alpha=0.22,
        line_color=COLORS["selected"],
        line_alpha=0.9,
        visible=False,
        level="overlay",
    )
    p.add_layout(b)
    return b


def _image_bar(mapper, title: str) -> ColorBar:
    return ColorBar(
        color_mapper=mapper,
        major_label_text_font_size=_FONT,
        title=title,
        title_text_font_size=_FONT,
        width=10,
        padding=4,
        margin=4,
    )


def occupancy_panel(
    vm: ViewModel,
    x_range,
    *,
    compact: bool = True,
    width: int = 900,
    height: int = 170,
    output_backend: str = "canvas",
) -> Panel | None:
    """CTC state occupancy: CTC forward-backward occupancy of each reference token per frame
    (rows = tokens), with the Viterbi spans outlined.

    With ``compact=True`` the image travels as cropped uint8 rows
    (``sources['store']``) and the browser fills the image in at load.
    """
    if vm.occupancy is None or vm.U == 0:
        return None
    U = vm.U
    img = np.ascontiguousarray(vm.occupancy.T)  # (U, T)
    mapper = LinearColorMapper(palette=_RAMP, low=0, high=1)
    x0 = float(vm.frame_start(0))
    dw = vm.num_frames * vm.frame_shift_s
    store = None
    if compact:
        store = encode_images(img[None])
        dense = None
    else:
        dense = img.astype(np.float32)
    src = ColumnDataSource(
        name="occupancy_image",
        data={
            "image": [_image_placeholder(U, vm.num_frames, dense)],
            "x": [x0],
            "y": [-0.5],
            "dw": [dw],
            "dh": [U],
        },
    )
    y_range = Range1d(U - 0.5, -0.5)
    p = _figure(
        "occupancy",
        vm,
        x_range,
        height=height,
        width=width,
        title="CTC state occupancy (CTC occupancy per reference token)",
        y_range=y_range,
        output_backend=output_backend,
    )
    r_img = _add(p, _image(mapper), src, level="image")
    p.yaxis.axis_label = "token"
    _row_axis(p, vm.token_labels, U)
    vit = _add(
        p,
        _quad(
            fill_color=COLORS["paper"],
            fill_alpha=0,
            line_color=COLORS["reference"],
            line_width=1.2,
        ),
        left=vm.frame_start(vm.first),
        right=vm.frame_end(vm.last),
        top=np.arange(U) - 0.5,
        bottom=np.arange(U) + 0.5,
    )
    p.add_tools(
        HoverTool(
            renderers=[r_img],
            tooltips=[
                ("time", "$x{0.000} s"),
                ("token #", "$y{0}"),
                ("occupancy", "@image{0.00}"),
            ],
        )
    )
    # legend before the colour bar: bokeh reserves more room right of a colour bar
    # than it draws in, which would push a legend after it far out
    _legend(p, [("Viterbi span", vit)], location="right")
    p.add_layout(_image_bar(mapper, "occupancy"), "right")
    band = _band(p, "occupancy")
    rb = _row_band(p, "occupancy")
    sources = {"image": src}
    meta = {}
    if store is not None:
        sources["store"] = _store_source(store)
        meta = {"shape": list(store.shape)}
    return Panel(
        "occupancy",
        p,
        band,
        sources=sources,
        models={"row_band": rb, "y_range": y_range, "mapper": mapper, "meta": meta},
    )


def _store_source(store) -> dict:
    """Sparse image rows in two column sources (columns of equal length each)."""
    rows = ColumnDataSource(
        {"lo": store.lo, "len": store.length, "off": store.offset},
        name="image_rows",
    )
    vals = ColumnDataSource({"v": store.values}, name="image_values")
    scale = ColumnDataSource({"scale": store.scale}, name="image_scale")
    return {"rows": rows, "values": vals, "scale": scale}


def attention_modes(L: int, H: int, *, heads: bool = True) -> list[tuple[str, str]]:
    """(value, label) of the attention views: overall mean, per layer, per head."""
    out = [("mean", f"mean of {L} layers × {H} heads")]
    for layer in range(L):
        out.append((f"L{layer}", f"layer {layer + 1}, mean of {H} heads"))
    if heads:
        for layer in range(L):
            for h in range(H):
                out.append((f"L{layer}H{h}", f"layer {layer + 1}, head {h + 1}"))
    return out


def _mean_over(a: np.ndarray, axis: int, out: np.ndarray) -> None:
    """``a.mean(axis)`` into ``out``, slice by slice: the same sums in the same order as
    numpy's reduction over an outer axis, in about half its time."""
    if a.dtype not in (np.float32, np.float64):  # numpy sums float16 in float32
        out[...] = a.mean(axis=axis)
        return
    n = a.shape[axis]
    parts = np.moveaxis(a, axis, 0)
    np.copyto(out, parts[0])
    for k in range(1, n):
        np.add(out, parts[k], out=out)
    np.divide(out, n, out=out)


def attention_stack(att: np.ndarray, *, heads: bool = True) -> np.ndarray:
    """Images in :func:`attention_modes` order: mean, layer means, then every head."""
    L, H, Up, T = att.shape
    dtype = np.result_type(att.dtype, np.float16)  # what att.mean() gives
    out = np.empty((1 + L + (L * H if heads else 0), Up, T), dtype)
    # the means are written in place: no concatenated copy
    _mean_over(att, 1, out[1 : 1 + L])  # layer means (L, U', T)
    _mean_over(out[1 : 1 + L], 0, out[0])
    if heads:
        out[1 + L :] = att.reshape(L * H, Up, T)
    return out


def attention_panel(
    vm: ViewModel,
    x_range,
    *,
    mode: str = "mean",
    compact: bool = True,
    budget_bytes: int = 900_000,
    width: int = 900,
    height: int = 200,
    output_backend: str = "canvas",
) -> Panel | None:
    """Decoder cross-attention (rows = attention tokens) for the overall mean, a layer
    mean or one head, with each row's decoder-window end drawn as a step line and the
    end of what the row's step hears (its right context) dashed.

    With ``compact=True`` the images travel as cropped uint8 rows; heads are left out
    when they would push the data past ``budget_bytes`` (the mode list says so).
    """
    att = vm.attention
    if att is None:
        return None
    L, H, Up, T = att.shape
    modes, mode, mode_index, store, dense = _attention_images(att, mode, compact, budget_bytes)
    mapper = LinearColorMapper(
        palette=_RAMP, low=0, high=float(dense.max()) if dense is not None and dense.size else 1
    )
    x0 = float(vm.frame_start(0))
    dw = T * vm.frame_shift_s
    src = ColumnDataSource(
        name="attention_image",
        data={
            "image": [_image_placeholder(Up, T, dense)],
            "x": [x0],
            "y": [-0.5],
            "dw": [dw],
            "dh": [Up],
        },
    )
    y_range = Range1d(Up - 0.5, -0.5)
    label = dict(modes)[mode]
    p = _figure(
        "attention",
        vm,
        x_range,
        height=height,
        width=width,
        title=f"decoder cross-attention: {label}",
        y_range=y_range,
        output_backend=output_backend,
    )
    r_img = _add(p, _image(mapper), src, level="image")
    row_labels = (
        [vm.token_text(int(t)) for t in vm.attention_tokens.tolist()]
        if vm.attention_tokens is not None
        else [str(i) for i in range(Up)]
    )
    p.yaxis.axis_label = "decoder step"
    _row_axis(p, row_labels, Up)
    edge_src, hedge_src, r_edge, r_hedge = _window_edge_lines(p)
    p.add_tools(
        HoverTool(
            renderers=[r_img],
            tooltips=[("time", "$x{0.000} s"), ("step", "$y{0}"), ("weight", "@image{0.000}")],
        )
    )
    _legend(
        p,
        [("decoder window end", r_edge), ("end of right context", r_hedge)],
        location="right",
    )
    p.add_layout(_image_bar(mapper, "weight"), "right")
    band = _band(p, "attention")
    rb = _row_band(p, "attention")
    sources = {"image": src, "edge": edge_src, "heard_edge": hedge_src}
    if store is not None:
        sources["store"] = _store_source(store)
    return Panel(
        "attention",
        p,
        band,
        sources=sources,
        models={
            "row_band": rb,
            "y_range": y_range,
            "mapper": mapper,
            "modes": modes,
            "mode": mode,
            "mode_index": mode_index,
            "row_labels": row_labels,
        },
    )


def _attention_images(att: np.ndarray, mode: str, compact: bool, budget_bytes: int) -> tuple:
    """The attention modes offered and the images behind them: ``(modes, mode,
    mode_index, store, dense)``. Compact: every mode's image encoded as cropped uint8
    rows in ``store`` (heads left out past ``budget_bytes``, then all but the mean);
    otherwise the one ``dense`` image of ``mode`` (unknown modes fall back to the mean).
    """
    L, H, Up, T = att.shape
    modes = attention_modes(L, H, heads=True)
    store = None
    if compact:
        # means and heads are encoded apart: no (1 + L + L*H, U', T) copy is made
        if att.dtype == np.float32 and att.size:
            # one pass: the means, each head's maximum and where its rows can be cut
            means, peaks, spans = attention_means(att)
        else:
            means, peaks, spans = attention_stack(att, heads=False), None, None
        store = encode_images(means)
        heads = encode_images(att.reshape(L * H, Up, T), peaks=peaks, spans=spans)
        if store.nbytes + heads.nbytes <= budget_bytes:
            store = concat_images(store, heads)
        else:
            modes = attention_modes(L, H, heads=False)
        if store.nbytes > budget_bytes:
            modes = modes[:1]
            store = encode_images(means[:1])
        mode_index = {m: i for i, (m, _) in enumerate(modes)}
        if mode not in mode_index:
            mode = "mean"
        dense = None
    else:
        mode_index = {m: i for i, (m, _) in enumerate(modes)}
        if mode not in mode_index:
            mode = "mean"
        dense = attention_image(att, mode)
    return modes, mode, mode_index, store, dense


def _window_edge_lines(p) -> tuple:
    """Empty lines of each row's window end and right-context end (the browser fills
    them): ``(edge_src, heard_src, edge_renderer, heard_renderer)``."""
    edge_src = ColumnDataSource({"x": [], "y": []}, name="attention_window_end")
    hedge_src = ColumnDataSource({"x": [], "y": []}, name="attention_heard_until")
    r_edge = _add(p, Line(x="x", y="y", line_color=COLORS["window"], line_width=2), edge_src)
    r_hedge = _add(
        p,
        Line(x="x", y="y", line_color=COLORS["ink"], line_width=1.2, line_dash="dashed"),
        hedge_src,
    )
    return edge_src, hedge_src, r_edge, r_hedge


def attention_image(att: np.ndarray, mode: str) -> np.ndarray:
    """One (U', T) image of ``att`` (L, H, U', T) for a mode of :func:`attention_modes`."""
    if mode == "mean":
        return att.mean(axis=(0, 1)).astype(np.float32)
    if mode.startswith("L") and "H" in mode:
        layer, head = mode[1:].split("H")
        return np.asarray(att[int(layer), int(head)], np.float32)
    if mode.startswith("L"):
        return att[int(mode[1:])].mean(axis=0).astype(np.float32)
    raise ValueError(mode)


def edge_lines(vm: ViewModel, lookahead: int) -> tuple[dict, dict]:
    """Step lines of the decoder-window end and the end of the right context per
    attention row."""
    from ._model import row_windows

    trig = vm.attention_trigger
    if trig is None:
        return {"x": [], "y": []}, {"x": [], "y": []}
    ok = np.flatnonzero(trig >= 0)
    if ok.size == 0:
        return {"x": [], "y": []}, {"x": [], "y": []}
    w = row_windows(vm, trig[ok], lookahead)
    xe = vm.frame_end(w["end"])
    xh = w["heard_until_s"]
    ys = np.stack([ok - 0.5, ok + 0.5], axis=1).ravel().astype(float)
    return {"x": np.repeat(xe, 2), "y": ys}, {"x": np.repeat(xh, 2), "y": ys}
