"""The beam lane and the decoding replay (one panel on the shared time axis).

Per frame the prefixes the traced search kept, by rank (row 0 on top), shaded by their
score gap to the frame's best; the reference's best-held prefix marked on-track or
off-track (spans where the beam had lost the reference are tinted); prune events of
prefixes that had been kept on the row under the beam, their score gap on hover; where
the reference was lost marked with a star. A replay cursor (a frame slider) shows the
partial result, the beam list with its score parts and the decoder window at that
frame, in the browser with no kernel: the prefix table travels once and prefix ids
decode to text in JavaScript.
"""

from __future__ import annotations

import html

import bokeh.models as bokeh_models
import numpy as np
from bokeh.core.properties import field as col

from ..exceptions import ParameterError
from ..replay import BeamReplay
from ._model import ViewModel
from ._palette import COLORS, sequential_ramp
from ._panels import Panel, _add, _band, _figure, _image, _legend
from ._static import is_a as _is_a
from ._static import models as _kit

# bokeh models, or static records inside views._static.static()
BoxAnnotation = _kit.BoxAnnotation
ColumnDataSource = _kit.ColumnDataSource
CustomJS = _kit.CustomJS
CustomJSHover = _kit.CustomJSHover
Div = _kit.Div
FixedTicker = _kit.FixedTicker
HoverTool = _kit.HoverTool
Label = _kit.Label
LinearColorMapper = _kit.LinearColorMapper
Quad = _kit.Quad
Range1d = _kit.Range1d
Scatter = _kit.Scatter
Slider = _kit.Slider
Span = _kit.Span

__all__ = [
    "REPLAY_JS",
    "analysis_replay",
    "beam_panel",
    "replay_controls",
    "replay_html",
    "replay_to",
]

#: Gap to the frame's best (score units) at which the shading is lightest.
GAP_SPAN = 10.0
ON_TRACK = "#1a9e5a"
OFF_TRACK = "#c8283c"


def _gap_image(rp: BeamReplay) -> np.ndarray:
    """(beam, T) float32: the best score of the frame minus each kept prefix's score."""
    T, B = rp.num_frames, rp.beam
    img = np.full((B, T), np.nan, np.float32)
    counts = np.diff(rp.offsets)
    frame = np.repeat(np.arange(T), counts)
    rank = np.arange(rp.prefix.size) - np.repeat(rp.offsets[:-1], counts)
    best = rp.score[rp.offsets[:-1][frame]]
    img[rank, frame] = best - rp.score
    return img


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and last index of each run of True."""
    d = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    return np.flatnonzero(d == 1), np.flatnonzero(d == -1) - 1


def beam_panel(
    vm: ViewModel,
    rp: BeamReplay,
    x_range,
    *,
    width: int = 900,
    height: int = 170,
    output_backend: str = "canvas",
) -> Panel:
    """The beam lane of one utterance (see the module docstring)."""
    B, T = rp.beam, rp.num_frames
    p, y_range = _beam_figure(vm, x_range, B, width, height, output_backend)
    mapper, img_src, r_img = _gap_shading(p, vm, rp)
    off0, r_off = _off_track_spans(p, vm, rp)
    ref_src, r_ref, pr_src, r_pr, lost_src, r_lost = _beam_markers(p, vm, rp)
    cursor, window = _replay_marks(p, vm, T)
    decode = CustomJSHover(args=_table_args(rp), code=_JS_DECODE + "return text_of(value);")
    p.add_tools(
        HoverTool(
            renderers=[r_pr],
            tooltips=[
                ("pruned at", "@x{0.000} s"),
                ("rank", "@rank"),
                ("gap to cut-off", "@gap{0.000}"),
                ("prefix", "@prefix{custom}"),
            ],
            formatters={"@prefix": decode},
        ),
        HoverTool(
            renderers=[r_img],
            tooltips=[("time", "$x{0.000} s"), ("rank", "$y{0}"), ("gap to best", "@image{0.00}")],
        ),
    )
    _beam_legend(p, rp, ref_src, r_ref, r_off, off0, r_pr, lost_src, r_lost)
    band = _band(p, "beam")
    return Panel(
        "beam",
        p,
        band,
        sources={"image": img_src, "reference": ref_src, "pruned": pr_src, "lost": lost_src},
        models={"cursor": cursor, "window": window, "y_range": y_range, "mapper": mapper},
    )


def _beam_figure(vm: ViewModel, x_range, B: int, width: int, height: int, output_backend: str):
    """The beam lane's figure (ranks 0..B down the y axis, B for pruned) and its y
    range."""
    y_range = Range1d(B + 0.6, -0.6)
    p = _figure(
        "beam",
        vm,
        x_range,
        height=height,
        width=width,
        title=f"beam of the traced search (beam {B}; rank 0 on top, shade: score gap to the "
        "frame's best)",
        y_range=y_range,
        output_backend=output_backend,
    )
    p.yaxis.axis_label = "rank"
    p.yaxis.ticker = FixedTicker(ticks=[*range(0, B, max(1, B // 4)), B])
    p.yaxis.major_label_overrides = {B: "pruned"}
    p.ygrid.visible = False
    return p, y_range


def _gap_shading(p, vm: ViewModel, rp: BeamReplay) -> tuple:
    """Each kept prefix's cell shaded by its score gap to the frame's best:
    ``(mapper, source, renderer)``."""
    B, T = rp.beam, rp.num_frames
    # best (gap 0) a mid blue, fading to near white at GAP_SPAN: markers stay readable
    mapper = LinearColorMapper(
        palette=sequential_ramp(256)[150:12:-1], low=0.0, high=GAP_SPAN, nan_color=(0, 0, 0, 0)
    )
    img_src = ColumnDataSource(
        name="beam_image",
        data={
            "image": [_gap_image(rp)],
            "x": [float(vm.frame_start(0))],
            "y": [-0.5],
            "dw": [T * vm.frame_shift_s],
            "dh": [B],
        },
    )
    r_img = _add(p, _image(mapper), img_src, level="image")
    return mapper, img_src, r_img


def _off_track_spans(p, vm: ViewModel, rp: BeamReplay) -> tuple:
    """Spans where the beam did not hold the reference as far as the alignment had
    got: ``(first frames, renderer)``."""
    B = rp.beam
    off0, off1 = _runs(~rp.on_track) if rp.lost is not None else (np.zeros(0), np.zeros(0))
    r_off = _add(
        p,
        Quad(
            left="left",
            right="right",
            top="top",
            bottom="bottom",
            fill_color=OFF_TRACK,
            fill_alpha=0.10,
            line_alpha=0,
        ),  # fmt: skip
        left=np.asarray(vm.frame_start(off0), np.float32),
        right=np.asarray(vm.frame_end(off1), np.float32),
        top=np.full(off0.size, -0.5, np.float32),
        bottom=np.full(off0.size, B + 0.5, np.float32),
    )
    return off0, r_off


def _beam_markers(p, vm: ViewModel, rp: BeamReplay) -> tuple:
    """The reference's rank per frame, prune events and the star where the reference
    was lost: ``(ref_src, ref_renderer, pruned_src, pruned_renderer, lost_src,
    lost_renderer)``."""
    B = rp.beam
    held = np.flatnonzero(rp.ref_rank >= 0)
    ref_src = ColumnDataSource(
        name="beam_reference",
        data={
            "x": np.asarray(vm.frame_time(held), np.float32),
            "y": rp.ref_rank[held].astype(np.float32),
            "c": np.where(rp.on_track[held], ON_TRACK, OFF_TRACK),
        },
    )
    r_ref = _add(
        p,
        Scatter(x="x", y="y", marker="square", size=4, fill_color=col("c"), line_color=col("c")),
        ref_src,
    )
    pr_src = ColumnDataSource(
        name="beam_pruned",
        data={
            "x": np.asarray(vm.frame_time(rp.prune_frame), np.float32),
            "y": np.full(rp.prune_frame.size, B, np.float32),
            "gap": rp.prune_gap,
            "prefix": rp.prune_prefix,
            "rank": rp.prune_rank,
        },
    )
    r_pr = _add(
        p,
        Scatter(
            x="x",
            y="y",
            marker="x",
            size=6,
            line_color=COLORS["ink"],
            line_alpha=0.55,
        ),  # fmt: skip
        pr_src,
    )
    lost_src = ColumnDataSource(name="beam_lost", data={"x": [], "y": []})
    lost = rp.lost
    if lost is not None and not lost["complete"] and lost["last_frame_held"] >= 0:
        f = lost["last_frame_held"]
        a, b = int(rp.offsets[f]), int(rp.offsets[f + 1])
        r = np.flatnonzero(rp.prefix[a:b] == lost["prefix"])
        if r.size:
            lost_src.data = {"x": [float(vm.frame_time(f))], "y": [float(r[0])]}
    r_lost = _add(
        p,
        Scatter(
            x="x",
            y="y",
            marker="star",
            size=13,
            fill_color=OFF_TRACK,
            line_color=COLORS["ink"],
        ),  # fmt: skip
        lost_src,
    )
    return ref_src, r_ref, pr_src, r_pr, lost_src, r_lost


def _replay_marks(p, vm: ViewModel, T: int) -> tuple:
    """The replay cursor and the decoder window it shows: ``(cursor, window)``."""
    cursor = Span(
        name="replay_cursor",
        location=float(vm.frame_time(T - 1)),
        dimension="height",
        line_color=COLORS["ink"],
        line_width=2,
    )
    cursor.level = "overlay"
    window = BoxAnnotation(
        name="replay_window",
        left=0,
        right=0,
        fill_color=COLORS["window"],
        fill_alpha=0.10,
        line_color=COLORS["window"],
        line_alpha=0.6,
    )
    window.level = "overlay"
    p.add_layout(window)
    p.add_layout(cursor)
    return cursor, window


def _beam_legend(p, rp, ref_src, r_ref, r_off, off0, r_pr, lost_src, r_lost) -> None:
    """Legend entries for what is drawn, and the label of the star where the reference
    was lost."""
    lost = rp.lost
    items = []
    c = ref_src.data["c"]
    for label, colour in (("reference on track", ON_TRACK), ("reference off track", OFF_TRACK)):
        hit = np.flatnonzero(c == colour)
        if hit.size:
            items.append((label, r_ref, int(hit[0])))
    items.append(("reference lost", r_lost))
    if off0.size:
        items.insert(1, ("beam off track", r_off))
    items.append(("pruned (had been kept)", r_pr))
    _legend(p, items, location="right")
    if lost_src.data["x"]:
        p.add_layout(
            Label(
                x=lost_src.data["x"][0],
                y=lost_src.data["y"][0],
                text=f"reference lost (gap {lost['prune_gap']:.2f})",
                text_font_size="10px",
                text_color=OFF_TRACK,
                x_offset=8,
                y_offset=-4,
            )
        )


# ---------------------------------------------------------------------------
# replay cursor
# ---------------------------------------------------------------------------


def _table_args(rp: BeamReplay) -> dict:
    """The prefix table and token strings as column sources (binary arrays in the page)."""
    data = {"parent": rp.parent, "token": rp.token, "length": rp.length, "ext": rp.ext}
    if rp.lm is not None and rp.dec is not None:
        data["lm"] = rp.lm  # with one part only, ext less the token bonus is that part
    table = ColumnDataSource(name="beam_table", data=data)
    tokens = ColumnDataSource(name="beam_tokens", data={"text": list(rp.tokens)})
    return {
        "table": table,
        "tokens": tokens,
        "B": {"sep": rp.separator, "boundary": rp.boundary, "token_bonus": rp.token_bonus},
    }


def _part_columns(rp: BeamReplay) -> tuple[bool, bool]:
    """Whether the beam list has an LM column and a decoder column: the parts the
    search scored with, when the trace holds them."""
    if not rp.parts_known:
        return False, False
    return rp.lm is not None, rp.dec is not None


def _parts(rp: BeamReplay, p: int) -> tuple[float, float, float]:
    """Token bonus, LM and decoder parts of prefix ``p`` (as the browser computes them
    from the page's tables)."""
    has_lm, has_dec = _part_columns(rp)
    token_bonus = rp.token_bonus * int(rp.length[p])
    rest = float(rp.ext[p]) - token_bonus
    lm = (float(rp.lm[p]) if has_dec else rest) if has_lm else 0.0
    return token_bonus, lm, rest - lm if has_dec else 0.0


def replay_html(vm: ViewModel, rp: BeamReplay, frame: int, *, lookahead: int) -> str:
    """The replay box at ``frame`` (the same text the browser writes): the partial
    result, the decoder window and the beam list with its score parts."""
    esc = html.escape
    t = int(frame)
    lb = vm.look_back
    start = 0 if lb is None else max(0, t - lb)
    end = min(vm.num_frames - 1, t + lookahead)
    ref_rank = int(rp.ref_rank[t])
    rows = []
    has_lm, has_dec = _part_columns(rp)
    for r in rp.beam_at(t):
        mark = " &#9664; reference" if r["rank"] == ref_rank else ""
        token_bonus, lm, dec = _parts(rp, r["prefix"])
        # a word separator at the end shows (otherwise "a b|" and "a b" look alike)
        if rp.separator >= 0 and int(rp.token[r["prefix"]]) == rp.separator:
            mark = " \u2423" + mark
        rows.append(
            f"<tr><td>{r['rank']}</td><td>{esc(r['text']) or '<i>(empty)</i>'}{mark}</td>"
            f"<td>{r['score']:.3f}</td><td>{r['ctc']:.3f}</td>"
            + (f"<td>{lm:.3f}</td>" if has_lm else "")
            + (f"<td>{dec:.3f}</td>" if has_dec else "")
            + f"<td>{token_bonus:.3f}</td></tr>"
        )
    track = ""
    if rp.lost is not None:
        ok = bool(rp.on_track[t])
        track = (
            f' &middot; <span style="color:{ON_TRACK if ok else OFF_TRACK}">reference '
            f"{'on track' if ok else 'off track'}</span> (holds {int(rp.ref_held[t])} of "
            f"{int(rp.ref_due[t])} tokens due)"
        )
    part = rp.text(int(rp.partial[t]))
    return (
        f'<div class="replay"><b>frame {t}</b> ({float(vm.frame_time(t)):.3f} s) &middot; '
        f"decoder window frames {start}&ndash;{end}{track}<br>"
        f'partial: <span class="replay-partial">{esc(part) or "<i>(nothing yet)</i>"}</span>'
        '<table class="replay-beam"><thead><tr><th>rank</th><th>prefix</th><th>score</th>'
        f"<th>{_CTC_HEAD[rp.parts_known]}</th>"
        + ("<th>lm</th>" if has_lm else "")
        + ("<th>decoder</th>" if has_dec else "")
        + "<th>token bonus</th></tr></thead><tbody>"
        + "".join(rows)
        + "</tbody></table></div>"
    )


# without the LM / decoder parts in the trace, the CTC column holds them too
_CTC_HEAD = {True: "ctc", False: "ctc + lm + decoder"}

_JS_DECODE = r"""
function text_of(p) {
  const par = table.data.parent, tk = table.data.token, strs = tokens.data.text;
  const ids = [];
  for (let j = p; j > 0; j = par[j]) ids.push(tk[j]);
  ids.reverse();
  const words = [];
  let cur = "";
  for (const k of ids) {
    const s = strs[k];
    if (B.sep >= 0) {
      if (k == B.sep) { if (cur) words.push(cur); cur = ""; } else cur += s;
    } else if (s.startsWith(B.boundary)) {
      if (cur) words.push(cur);
      cur = s.slice(B.boundary.length);
    } else cur += s;
  }
  if (cur) words.push(cur);
  return words.join(" ");
}
"""

#: Moves the replay cursor to ``slider.value``: cursor line, decoder-window box and the
#: replay box (mirrors :func:`replay_html`).
REPLAY_JS = (
    _JS_DECODE
    + r"""
const esc = (s) => String(s).replace(/[&<>"']/g, (c) => ({"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"}[c]));
const t = slider.value;
const ftime = (f) => R.offset + f * R.shift;
const start = R.look_back < 0 ? 0 : Math.max(0, t - R.look_back);
const end = Math.min(R.T - 1, t + R.lookahead);
cursor.location = ftime(t);
win.left = ftime(start) - R.shift / 2;
win.right = ftime(end) + R.shift / 2;
const fr = frames.data, kp = kept.data, ext = table.data.ext, len = table.data.length;
const a = fr.offsets[t], b = fr.offsets[t + 1], refr = fr.ref_rank[t];
let rows = "";
for (let i = a; i < b; i++) {
  const p = kp.prefix[i], s = kp.score[i], token_bonus = B.token_bonus * len[p];
  let mark = (i - a) == refr ? " &#9664; reference" : "";
  if (B.sep >= 0 && table.data.token[p] == B.sep) mark = " \u2423" + mark;
  const ctc = s - ext[p], rest = ext[p] - token_bonus;
  const lm = R.has_lm ? (R.has_dec ? table.data.lm[p] : rest) : 0;
  const txt = esc(text_of(p)) || "<i>(empty)</i>";
  rows += `<tr><td>${i - a}</td><td>${txt}${mark}</td><td>${s.toFixed(3)}</td>` +
          `<td>${ctc.toFixed(3)}</td>` +
          (R.has_lm ? `<td>${lm.toFixed(3)}</td>` : "") +
          (R.has_dec ? `<td>${(rest - lm).toFixed(3)}</td>` : "") +
          `<td>${token_bonus.toFixed(3)}</td></tr>`;
}
let track = "";
if (R.has_ref) {
  const ok = fr.on_track[t] > 0;
  track = ` &middot; <span style="color:${ok ? R.on : R.off}">reference ` +
          `${ok ? "on track" : "off track"}</span> (holds ${fr.ref_held[t]} of ` +
          `${fr.ref_due[t]} tokens due)`;
}
const part = esc(text_of(fr.partial[t])) || "<i>(nothing yet)</i>";
box.text = _style + `<div class="replay"><b>frame ${t}</b> (${ftime(t).toFixed(3)} s) &middot; ` +
  `decoder window frames ${start}&ndash;${end}${track}<br>` +
  `partial: <span class="replay-partial">${part}</span>` +
  `<table class="replay-beam"><thead><tr><th>rank</th><th>prefix</th><th>score</th>` +
  `<th>${R.ctc_head}</th>` + (R.has_lm ? "<th>lm</th>" : "") +
  (R.has_dec ? "<th>decoder</th>" : "") + `<th>token bonus</th>` +
  `</tr></thead><tbody>` +
  rows + `</tbody></table></div>`;
"""
)

_REPLAY_STYLE = (
    "<style>.replay{font:12px sans-serif;color:#1b2430}.replay-partial{font-weight:600}"
    ".replay-beam{border-collapse:collapse;margin-top:3px}.replay-beam td,.replay-beam th"
    "{padding:1px 8px;border-bottom:1px solid #eceef1;text-align:left}</style>"
)


def replay_controls(vm: ViewModel, rp: BeamReplay, panel: Panel, *, lookahead: int, width: int):
    """The replay slider and box, wired to the beam lane's cursor in the browser.

    Returns ``(slider, box)``; the slider starts on the last frame (the final result).
    """
    T = rp.num_frames
    t0 = T - 1
    slider = Slider(
        start=0,
        end=max(T - 1, 1),
        step=1,
        value=t0,
        title="replay: frame",
        name="replay_frame",
        width=width,
        disabled=T < 2,
    )
    box = Div(
        text=_REPLAY_STYLE + replay_html(vm, rp, t0, lookahead=lookahead),
        name="replay_box",
        width=width + 300,
        height=48 + 17 * (rp.beam + 1),
        styles={"overflow-y": "auto"},
    )
    pad = np.full(1, -1, np.int32)
    frames = ColumnDataSource(
        name="beam_frames",
        data={
            "offsets": rp.offsets,
            "partial": np.concatenate([rp.partial, pad]),
            "ref_rank": np.concatenate([rp.ref_rank, pad]),
            "ref_held": np.concatenate([rp.ref_held, pad]),
            "ref_due": np.concatenate([rp.ref_due, pad]),
            "on_track": np.concatenate([rp.on_track.astype(np.int8), pad.astype(np.int8)]),
        },
    )
    kept = ColumnDataSource(name="beam_kept", data={"prefix": rp.prefix, "score": rp.score})
    const = {
        "T": T,
        "shift": vm.frame_shift_s,
        "offset": vm.frame_offset_s,
        "look_back": -1 if vm.look_back is None else int(vm.look_back),
        "lookahead": int(lookahead),
        "has_ref": rp.lost is not None,
        "has_lm": _part_columns(rp)[0],
        "has_dec": _part_columns(rp)[1],
        "ctc_head": _CTC_HEAD[rp.parts_known],
        "on": ON_TRACK,
        "off": OFF_TRACK,
    }
    args = {
        **_table_args(rp),
        "R": const,
        "frames": frames,
        "kept": kept,
        "slider": slider,
        "cursor": panel.models["cursor"],
        "win": panel.models["window"],
        "box": box,
    }
    # the first replay box comes from Python; the prefix table is shared with the hover
    hover = next(t for t in panel.figure.tools if _is_a(t, bokeh_models.HoverTool))
    fmt = hover.formatters["@prefix"]
    args["table"], args["tokens"] = fmt.args["table"], fmt.args["tokens"]
    cb = CustomJS(args=args, code=_REPLAY_STYLE_JS + REPLAY_JS)
    slider.js_on_change("value", cb)
    panel.models.update(slider=slider, box=box, frames=frames, kept=kept, replay_js=cb)
    _set_window(vm, panel, t0, lookahead)
    return slider, box


# the box keeps its style block in front of the table the callback writes
_REPLAY_STYLE_JS = "const _style = " + repr(_REPLAY_STYLE) + ";\n"


def _set_window(vm: ViewModel, panel: Panel, frame: int, lookahead: int) -> None:
    """Cursor and decoder-window box at ``frame`` (what the browser does, from Python)."""
    lb = vm.look_back
    start = 0 if lb is None else max(0, frame - lb)
    end = min(vm.num_frames - 1, frame + lookahead)
    panel.models["cursor"].location = float(vm.frame_time(frame))
    panel.models["window"].update(
        left=float(vm.frame_start(start)), right=float(vm.frame_end(end))
    )


def analysis_replay(analysis, beam: bool | None) -> BeamReplay | None:
    """The replay data of an analysis: from its traced search, or (``beam=True``) from a
    traced prefix search with the default settings; None when there is no lane to draw
    (``beam=False``, or ``None`` and the analysis ran no search)."""
    if beam is False:
        return None
    res = getattr(analysis, "search", None)
    utt = analysis.utt
    if res is None or res.trace is None:
        if not beam:
            return None
        from ..search import prefix_search

        res = prefix_search(utt.log_probs, blank=utt.blank, trace=True, utt=utt.id)
    from ..replay import beam_replay

    return beam_replay(
        res, utt.vocab, ref_tokens=utt.ref_tokens, ref_first_frames=analysis.alignment.first
    )


def replay_to(view, frame: int) -> None:
    """Move a view's replay cursor to ``frame`` from Python (the peek widget's slider):
    cursor, decoder-window box, replay box and the page's slider."""
    rp = view.replay
    panel = view.panels.get("beam")
    if rp is None or panel is None:
        raise ParameterError(
            f"utt {view.vm.uid!r}: found a view without a beam lane, expected one; build "
            "it with beam=True (or from an analysis that ran a traced search)"
        )
    T = rp.num_frames
    if isinstance(frame, bool) or not isinstance(frame, (int, np.integer)) or not 0 <= frame < T:
        raise ParameterError(
            f"The 'frame' parameter of replay_to must be an int in the range [0, {T}). "
            f"Got {frame!r} instead."
        )
    frame = int(frame)
    _set_window(view.vm, panel, frame, view.lookahead)
    panel.models["box"].text = _REPLAY_STYLE + replay_html(
        view.vm, rp, frame, lookahead=view.lookahead
    )
    panel.models["slider"].value = frame
