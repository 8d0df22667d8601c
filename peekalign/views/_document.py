"""One utterance's linked views as one bokeh layout, with browser-side controls.

:func:`utterance_view` builds the panels, the window marker, the controls (token,
look-ahead, attention view, posterior scale) and the callbacks that make them work in
a file with no kernel. :class:`UtteranceView` applies the same changes from Python
(the peek widget drives it that way).
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
from bokeh.document import Document

from ..exceptions import ParameterError
from . import _js, _static
from ._data import decode_images, log_mel
from ._model import ViewModel, view_model, window_state
from ._palette import COLORS, ERROR_OP_COLORS
from ._panels import (
    Panel,
    attention_image,
    attention_panel,
    edge_lines,
    label_thresholds,
    lanes_panel,
    occupancy_panel,
    posterior_panel,
    ref_diagnosis_columns,
    show_labels,
    spectrogram_panel,
)

__all__ = ["UtteranceView", "utterance_view", "default_token"]

# bokeh models, or static records inside views._static.static()
_kit = _static.models
CustomJS = _kit.CustomJS
Div = _kit.Div
RadioButtonGroup = _kit.RadioButtonGroup
Range1d = _kit.Range1d
Select = _kit.Select
Slider = _kit.Slider
LegendItem = _kit.LegendItem
column = _kit.column
row = _kit.row

#: Image panels with more rows than this follow the selected token.
FOLLOW_ROWS = 40
#: Initial visible span (s) of long utterances; the rest is a drag away.
MAX_INITIAL_SPAN_S = 20.0
MIN_INITIAL_SPAN_S = 6.0


def _check_choice(name: str, value, choices, func: str = "utterance_view") -> None:
    if value not in choices:
        raise ParameterError(
            f"The {name!r} parameter of {func} must be one of {tuple(choices)}. "
            f"Got {value!r} instead."
        )


def _check_int(name: str, value, lo: int, hi: float | None = None) -> int:
    ok = not isinstance(value, bool) and isinstance(value, (int, np.integer))
    ok = ok and value >= lo and (hi is None or value <= hi)
    if not ok:
        rng = f"[{lo}, {'inf' if hi is None else int(hi)}]"
        rng = rng[:-1] + ")" if hi is None else rng
        raise ParameterError(
            f"The {name!r} parameter of utterance_view must be an int in the range {rng}. "
            f"Got {value!r} instead."
        )
    return int(value)


def default_token(vm: ViewModel, lookahead: int) -> int:
    """The token to show first: the last token of the first deleted word, else of the
    word with the smallest reach margin, else token 0."""
    if vm.U == 0:
        return -1
    for w, op in enumerate(vm.word_op):
        if op == "deletion":
            return int(vm.word_last_token[w])
    if vm.W:
        m = window_state(vm, lookahead)["word_margin_s"]
        return int(vm.word_last_token[int(np.argmin(m))])
    return 0


def _encoder_text(vm: ViewModel) -> str:
    """The header's encoder look-ahead: uniform frames, or the per-frame range."""
    rc = vm.encoder_right_context
    if rc is None or not rc.size:
        return f"encoder look-ahead {vm.encoder_frames} frames"
    lo, hi = int(rc.min()), int(rc.max())
    span = f"{lo}" if lo == hi else f"{lo}&ndash;{hi}"
    return f"encoder right context per frame {span} frames"


def info_html(vm: ViewModel, u: int, eps: int, att_img: np.ndarray | None, att_label: str):
    """The line under the controls describing the selected token (same as the JS)."""
    if not 0 <= u < vm.U:
        return "<i>no token selected</i>"
    st = window_state(vm, eps)
    n = int(vm.trigger[u])
    start, end = int(st["start"][u]), int(st["end"][u])
    x0 = float(vm.frame_start(start))
    x1 = float(vm.frame_end(end))
    hs = float(st["heard_until_s"][u])
    trig = float(vm.frame_time(n))
    w = int(vm.token_word[u])
    esc = html.escape
    s = f"<b>token #{u}</b> &lsquo;{esc(vm.token_labels[u])}&rsquo;"
    if w >= 0:
        s += f" in &lsquo;{esc(vm.words[w])}&rsquo;"
    src = vm.trigger_src[u] if vm.trigger_src else "given"
    s += f" &middot; trigger frame {n} ({trig:.3f} s, {esc(src)})"
    s += f" &middot; decoder window frames {start}&ndash;{end}"
    s += f" ({x0:.3f}&ndash;{x1:.3f} s, look-ahead {eps} = {eps * vm.frame_shift_s * 1000:.0f} ms)"
    s += f" &middot; right context {(hs - trig) * 1000:.0f} ms (hears until {hs:.3f} s)"
    if w >= 0 and u == int(vm.word_last_token[w]):
        m = hs - float(vm.word_end_s[w])
        s += (
            f" &middot; word ends {float(vm.word_end_s[w]):.3f} s: reach margin "
            f"{'+' if m >= 0 else '&minus;'}{abs(m) * 1000:.0f} ms "
            f"({'reached' if m >= 0 else 'cut off'})"
        )
    elif w >= 0:
        s += " &middot; (margin is measured at the word's last token)"
    if att_img is not None and vm.attention_row_token is not None:
        rows = np.flatnonzero(vm.attention_row_token == u)
        if rows.size:
            sub = att_img[rows].astype(np.float64)
            tot = sub.sum()
            if tot > 0:
                inside = sub[:, start : end + 1].sum()
                s += (
                    f" &middot; attention mass outside the window ({esc(att_label)}) "
                    f"{(tot - inside) / tot:.3f}"
                )
    return s


def _header_html(vm: ViewModel, eps: int) -> str:
    esc = html.escape
    ink = COLORS["ink"]

    def chip(word: str, op: str) -> str:
        if op == "correct":
            return esc(word)
        color = ERROR_OP_COLORS[op]
        fg = "#ffffff" if op in ("deletion", "insertion") else ink
        return (
            f'<span style="background:{color};color:{fg};padding:0 3px;border-radius:2px" '
            f'title="{esc(op)}">{esc(word)}</span>'
        )

    ref = " ".join(chip(w, op) for w, op in zip(vm.words, vm.word_op, strict=True))
    # long transcripts scroll inside a box instead of pushing the panels down
    box = 'style="max-height:4.6em;overflow-y:auto"'
    hyp = " ".join(chip(w, op) for w, op in zip(vm.hyp_words, vm.hyp_op, strict=True))
    lines = [
        f'<div style="font:13px sans-serif;color:{ink};line-height:1.5">',
        f"<b>{esc(vm.uid)}</b> &middot; {vm.num_frames} encoder frames of "
        f"{vm.frame_shift_s * 1000:g} ms &middot; reference word times: "
        f"{esc(vm.words_source)} &middot; {_encoder_text(vm)}"
        f" &middot; triggers: {esc(vm.trigger_label)}",
        f"<div {box}><b>REF</b> {ref}</div>",
    ]
    branch = f" <i>({esc(vm.hyp_branch)})</i>" if vm.hyp_branch else ""
    if vm.hyp is not None:
        lines.append(
            f"<div {box}><b>HYP</b>{branch} {hyp or '<i>(empty)</i>'} "
            f'<span style="color:#5b6470">(times: {esc(vm.hyp_times_source)})</span></div>'
        )
    dels = [
        f"{esc(vm.words[w])}: <b>{esc(vm.word_diagnosis[w] or 'not diagnosed')}</b>"
        + (f" ({esc(vm.word_evidence[w])})" if vm.word_evidence[w] else "")
        for w in range(vm.W)
        if vm.word_op[w] == "deletion"
    ]
    if dels:
        lines.append(f"<div {box}><b>deleted</b> " + "; ".join(dels) + "</div>")
    lines.append("</div>")
    return "".join(lines)


@dataclass(eq=False)
class UtteranceView:
    """The built views of one utterance and the models a selection change touches.

    Attributes
    ----------
    layout : bokeh LayoutDOM
        Everything, ready for ``bokeh.io.show`` / ``file_html``.
    panels : dict of str -> Panel
    vm : ViewModel
    token, lookahead : int
        The current selection and decoder look-ahead.
    """

    vm: ViewModel
    layout: object
    panels: dict[str, Panel]
    x_range: Range1d
    token: int
    lookahead: int
    attention_mode: str = "mean"
    scale: str = "linear"
    controls: dict = field(default_factory=dict)
    info: Div | None = None
    js_ready: CustomJS | None = None
    replay: object | None = None
    static: bool = False
    _att_dense: np.ndarray | None = None

    # -- Python-side updates (the browser does the same in _js.py) ----------------
    def state(self) -> dict:
        """Window marker currently drawn (seconds): the window's edges, the end of the
        right context (``heard_until``), the window-end line and the trigger."""
        band = self.panels["lanes"].band
        return {
            "token": self.token,
            "lookahead": self.lookahead,
            "window": (band.window.left, band.window.right),
            "heard_until": band.context.right,
            "window_end": band.end.location,
            "trigger": band.trigger.location,
            "visible": bool(band.window.visible),
        }

    def select(self, token: int) -> None:
        """Select reference token ``token`` (index into the reference tokens)."""
        self.token = _check_int("token", token, -1, self.vm.U - 1)
        self._apply()

    def set_lookahead(self, lookahead: int) -> None:
        """Move the decoder look-ahead (frames)."""
        self.lookahead = _check_int("lookahead", lookahead, 0)
        self._apply()

    def set_attention(self, mode: str) -> None:
        """Show attention ``mode``: ``"mean"``, ``"L<l>"`` or ``"L<l>H<h>"`` (0-based)."""
        att = self.panels.get("attention")
        if att is None:
            raise ParameterError(
                f"utt {self.vm.uid!r}: found no attention in this utterance, expected an "
                "'attention' array; dump the decoder cross-attention to pick layers and heads"
            )
        modes = dict(att.models["modes"])
        _check_choice("mode", mode, tuple(modes), func="set_attention")
        store = att.sources.get("store")
        if store is not None:
            sp = _sparse_of(store, att, self.vm)
            img = decode_images(sp, only=att.models["mode_index"][mode])[0]
        else:
            img = attention_image(self.vm.attention, mode)
        src = att.sources["image"]
        data = dict(src.data)
        data["image"] = [img]
        src.data = data
        att.models["mapper"].high = float(img.max()) if img.size and img.max() > 0 else 1.0
        att.figure.title.text = f"decoder cross-attention: {modes[mode]}"
        self.attention_mode = mode
        self._att_dense = img
        if "attention" in self.controls:
            self.controls["attention"].value = mode
        self._apply()

    def set_scale(self, scale: str) -> None:
        """Posterior axis: ``"linear"`` or ``"log"`` (``log10 p``, floored at 1e-4)."""
        _check_choice("scale", scale, ("linear", "log"), func="set_scale")
        post = self.panels["posteriors"]
        log = scale == "log"
        for key in ("blank", "top_tokens", "curves", "selected", "spikes"):
            src = post.sources[key]
            data = dict(src.data)
            p = np.asarray(data["p"], dtype=np.float64)
            data["y"] = np.log10(np.maximum(p, 1e-4)) if log else p
            src.data = data
        m = post.models
        m["y_range"].update(start=-4 if log else -0.03, end=0.15 if log else 1.08)
        axis = post.figure.yaxis[0]
        axis.ticker = m["tickers"][scale]
        axis.formatter = m["formatters"][scale]
        axis.axis_label = "p (log scale)" if log else "p"
        self.scale = scale
        if "scale" in self.controls:
            self.controls["scale"].active = 1 if log else 0

    def update_analysis(self, analysis) -> None:
        """Redraw what depends on the diagnosis (header, reference-word labels and
        hover) after the same utterance was analysed again (e.g. another floor)."""
        vm2 = view_model(analysis, audio=False)
        vm = self.vm
        vm.word_op, vm.word_diagnosis, vm.word_evidence = (
            vm2.word_op,
            vm2.word_diagnosis,
            vm2.word_evidence,
        )
        # the header is the layout's first child; select_one would walk every model
        kids = getattr(self.layout, "children", None) or [None]
        header = kids[0] if getattr(kids[0], "name", None) == "header" else None
        if header is not None:
            header.text = _header_html(vm, self.lookahead)
        lanes = self.panels["lanes"]
        src = lanes.sources["ref"]
        src.data = {**src.data, **ref_diagnosis_columns(vm)}
        need = lanes.models["label_need"]
        s = lanes.sources
        need.data = {"need": label_thresholds(vm, s["forced_words"], s["tokens"], s["hyp"], src)}
        xr = self.x_range
        show_labels(
            lanes.models["labels"],
            need.data["need"],
            lanes.figure.frame_width / max(float(xr.end - xr.start), 1e-6),
            lanes.figure.title,
            lanes.models["label_titles"],
        )

    def _att_image(self):
        if self.vm.attention is None:
            return None
        if self._att_dense is None:
            self._att_dense = attention_image(self.vm.attention, self.attention_mode)
        return self._att_dense

    def _apply(self) -> None:
        vm, u, eps = self.vm, self.token, self.lookahead
        ok = 0 <= u < vm.U
        st = window_state(vm, eps) if vm.U else None
        for panel in self.panels.values():
            b = panel.band
            if not ok:
                b.window.visible = b.context.visible = b.end.visible = False
                b.trigger.visible = False
                continue
            x0 = float(vm.frame_start(st["start"][u]))
            x1 = float(vm.frame_end(st["end"][u]))
            hs = float(st["heard_until_s"][u])
            b.window.update(left=x0, right=x1, visible=True)
            b.context.update(left=x1, right=max(hs, x1), visible=hs > x1)
            b.end.update(location=x1, visible=True)
            b.trigger.update(location=float(vm.frame_time(vm.trigger[u])), visible=True)
        lanes = self.panels["lanes"]
        lanes.sources["tokens"].selected.indices = [u] if ok else []
        post = self.panels["posteriors"]
        post.sources["selected"].data = selected_curve_slice(post, u)
        for name in ("occupancy", "attention"):
            panel = self.panels.get(name)
            if panel is None:
                continue
            rb = panel.models["row_band"]
            if name == "attention":
                rows = np.flatnonzero(vm.attention_row_token == u) if ok else np.zeros(0, int)
                R = vm.attention.shape[2]
            else:
                rows = np.array([u]) if ok else np.zeros(0, int)
                R = vm.U
            if rows.size == 0:
                rb.visible = False
                continue
            rb.update(bottom=rows.min() - 0.5, top=rows.max() + 0.5, visible=True)
            if R > FOLLOW_ROWS:
                mid = (rows.min() + rows.max()) / 2
                lo = max(-0.5, min(R - 0.5 - FOLLOW_ROWS, mid - FOLLOW_ROWS / 2))
                panel.models["y_range"].update(start=lo + FOLLOW_ROWS, end=lo)
        att = self.panels.get("attention")
        if att is not None:
            e, h = edge_lines(vm, eps)
            att.sources["edge"].data = e
            att.sources["heard_edge"].data = h
        if "need" in self.panels:
            from ._need import recolour_need

            recolour_need(self.panels["need"], eps)
        if self.info is not None:
            label = dict(att.models["modes"])[self.attention_mode] if att is not None else ""
            self.info.text = info_html(vm, u, eps, self._att_image(), label)
        sel = self.controls.get("token")
        if sel is not None and ok:
            sel.value = str(u)
        sl = self.controls.get("lookahead")
        if sl is not None:
            sl.value = eps
            sl.title = f"decoder look-ahead (frames; {eps * vm.frame_shift_s * 1000:.0f} ms)"


def _sparse_of(store: dict, att: Panel, vm: ViewModel):
    """The :class:`SparseImages` held by an attention panel's store sources."""
    from ._data import SparseImages

    return SparseImages(
        (len(att.models["modes"]), int(vm.attention.shape[2]), vm.num_frames),
        np.asarray(store["scale"].data["scale"]),
        np.asarray(store["rows"].data["lo"]),
        np.asarray(store["rows"].data["len"]),
        np.asarray(store["rows"].data["off"]),
        np.asarray(store["values"].data["v"]),
    )


def selected_curve_slice(post: Panel, u: int) -> dict:
    """The selected token's slice of the reference curves (what the browser shows)."""
    d = post.sources["curves"].data
    owner = np.asarray(d["u"])
    m = owner == u
    return {"x": np.asarray(d["x"])[m], "p": np.asarray(d["p"])[m], "y": np.asarray(d["y"])[m]}


def _as_analysis(obj, lookahead):
    if hasattr(obj, "alignment") and hasattr(obj, "utt"):
        return obj
    if hasattr(obj, "log_probs") and hasattr(obj, "ref_tokens"):
        from ..analysis import analyze

        return analyze(obj, lookahead=lookahead)
    raise ParameterError(
        f"found {type(obj).__name__}, expected an UtteranceAnalysis (peekalign.analysis."
        "analyze) or an Utterance; pass bundle[utt_id] or analyze(...)"
    )


def utterance_view(
    analysis,
    *,
    lookahead: int | None = None,
    token: int | None = None,
    scale: str = "linear",
    attention: str = "mean",
    top_tokens: int = 5,
    width: int = 900,
    compact: bool = True,
    controls: bool = True,
    audio: bool = True,
    view_s: tuple[float, float] | None = None,
    output_backend: str = "canvas",
    attention_budget_bytes: int = 900_000,
    toolbar: bool = True,
    beam: bool | None = None,
    need=None,
    static: bool = False,
) -> UtteranceView:
    """Build the linked views of one utterance.

    Parameters
    ----------
    analysis : UtteranceAnalysis or Utterance
        An analysis (:func:`peekalign.analysis.analyze`); an utterance is analysed first.
    lookahead : int, optional
        Decoder look-ahead in frames; defaults to the analysis' own.
    token : int, optional
        Reference token selected at first; defaults to the last token of the first
        deleted word, else of the word with the smallest reach margin.
    scale : {"linear", "log"}
        Posterior axis.
    attention : str
        ``"mean"``, ``"L<l>"`` (one layer's mean of heads) or ``"L<l>H<h>"`` (0-based).
    top_tokens : int
        Tokens per frame kept for the posterior panel and the hover.
    width : int
        Width in pixels of every panel's plotting area.
    compact : bool
        Send images as cropped uint8 rows unpacked in the browser (standalone files).
        ``False`` sends dense float32 images (for a live kernel).
    controls : bool
        Add the widgets (token, look-ahead, attention view, scale).
    audio : bool
        Draw the spectrogram when the utterance has audio.
    view_s : (float, float), optional
        Initial time range; long utterances open on a span around the selected token
        short enough (6 to 20 s) for the reference words' labels to fit.
    output_backend : {"canvas", "svg", "webgl"}
    attention_budget_bytes : int
        Compact attention images above this size leave the heads out (then the layer
        means); the attention list offers what was kept.
    toolbar : bool
        Pan / zoom / reset tools on each panel (static pictures leave them out).
    beam : bool, optional
        Add the beam lane and the replay cursor (:mod:`peekalign.views._beam`): None
        draws it when the analysis ran a traced search, True runs one if needed.
    need : LookaheadNeed or array of float, optional
        Each reference token's look-ahead need (:func:`peekalign.need.lookahead_need`
        of this utterance, or one value per token): adds the need lane
        (:mod:`peekalign.views._need`), tokens needing more than the look-ahead marked.
    static : bool
        Build records of the models instead of bokeh models (:mod:`views._static`):
        the same page in a fraction of the time, for files and pictures; a live
        kernel (the peek widget) needs bokeh's models.

    Returns
    -------
    UtteranceView

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((10, 4), 0.01); p[:, 0] = 0.97
    >>> p[2] = [0.04, 0.01, 0.94, 0.01]; p[7] = [0.04, 0.01, 0.01, 0.94]
    >>> u = Utterance.from_arrays(np.log(p), ref="a b", vocab=v, hyp="a")
    >>> view = utterance_view(u, lookahead=1)
    >>> view.select(2)  # token "b": trigger frame 7, window frames 0..8
    >>> [round(x, 2) for x in view.state()["window"]]
    [-0.02, 0.34]
    """
    with _static.static(static):
        view = _build_view(
            analysis,
            lookahead=lookahead,
            token=token,
            scale=scale,
            attention=attention,
            top_tokens=top_tokens,
            width=width,
            compact=compact,
            controls=controls,
            audio=audio,
            view_s=view_s,
            output_backend=output_backend,
            attention_budget_bytes=attention_budget_bytes,
            toolbar=toolbar,
            beam=beam,
            need=need,
        )
    view.static = static
    return view


def _build_view(
    analysis,
    *,
    lookahead,
    token,
    scale,
    attention,
    top_tokens,
    width,
    compact,
    controls,
    audio,
    view_s,
    output_backend,
    attention_budget_bytes,
    toolbar,
    beam,
    need,
) -> UtteranceView:
    """:func:`utterance_view`'s work, with the models of the current kit."""
    _check_choice("scale", scale, ("linear", "log"))
    _check_choice("output_backend", output_backend, ("canvas", "svg", "webgl"))
    _check_int("top_tokens", top_tokens, 1, 50)
    _check_int("width", width, 200, 10000)
    if lookahead is not None:
        _check_int("lookahead", lookahead, 0)
    analysis = _as_analysis(analysis, lookahead)
    vm = view_model(analysis, audio=audio)
    eps = int(lookahead if lookahead is not None else vm.lookahead)
    u = default_token(vm, eps) if token is None else _check_int("token", token, -1, vm.U - 1)

    mel = log_mel(*vm.audio) if vm.audio is not None else None
    lo, hi = vm.x_start, vm.x_end
    if mel is not None:
        hi = max(hi, mel.x0 + mel.width_s)
    if view_s is None:
        view_s = _initial_span(vm, u, lo, hi, width)
    x_range = Range1d(float(view_s[0]), float(view_s[1]), bounds=(lo, hi), name="time")
    kw = {"width": width, "output_backend": output_backend}
    panels, att, replay = _make_panels(
        analysis,
        vm,
        mel,
        x_range,
        top_tokens=top_tokens,
        scale=scale,
        attention=attention,
        compact=compact,
        attention_budget_bytes=attention_budget_bytes,
        beam=beam,
        kw=kw,
    )
    if need is not None:
        from ._need import need_panel

        # the need lane sits under the lanes, on the same time axis
        lanes_at = list(panels).index("lanes") + 1
        items = list(panels.items())
        items.insert(lanes_at, ("need", need_panel(vm, need, x_range, lookahead=eps, **kw)))
        panels = dict(items)
    if att is not None:
        attention = att.models["mode"]
    _dress_panels(panels, toolbar)

    widgets: dict = {}
    if controls and vm.U:
        widgets = _make_widgets(vm, u, eps, scale, att, attention)
    layout, info = _page_layout(vm, eps, width, panels, widgets, replay, controls)

    view = UtteranceView(
        vm=vm,
        layout=layout,
        panels=panels,
        x_range=x_range,
        token=u,
        lookahead=eps,
        attention_mode=attention,
        scale=scale,
        controls=widgets,
        info=info,
        replay=replay,
    )
    if compact and att is not None:
        # Python's info line reads the same uint8 image the browser unpacks
        sp = _sparse_of(att.sources["store"], att, vm)
        view._att_dense = decode_images(sp, only=att.models["mode_index"][attention])[0]
    view._apply()
    _add_callbacks(view)
    return view


def _page_layout(
    vm: ViewModel, eps: int, width: int, panels: dict, widgets: dict, replay, controls: bool
):
    """Lay out the header, widgets, info line, panels and replay; returns (layout, info)."""
    header = Div(text=_header_html(vm, eps), name="header", width=width + 300)
    # a fixed height: a line that wraps differently after a selection would re-lay out
    # every panel (and bokeh 3.9 then leaves legend swatches unpainted until the next draw)
    info = Div(
        text="",
        name="info",
        width=width + 300,
        height=50,
        styles={"font-size": "12px", "overflow": "hidden", "line-height": "16px"},
    )
    grid = column(*[panels[n].figure for n in panels], name="panels", spacing=4)
    parts = [header]
    if widgets:
        parts.append(row(*widgets.values()))
    parts += [info, grid]
    if replay is not None:
        from ._beam import replay_controls

        # the replay's models exist either way (Python moves them); the page shows them
        # with the other controls
        replay_parts = replay_controls(vm, replay, panels["beam"], lookahead=eps, width=width)
        if controls:
            parts += replay_parts
    return column(*parts, name="root"), info


def _initial_span(vm: ViewModel, u: int, lo: float, hi: float, width: int) -> tuple:
    """The time range a view opens on when the caller gives none."""
    # long utterances open on the span at which the reference words' labels fit
    # (between MIN_ and MAX_INITIAL_SPAN_S), centred on the selected token
    from ._panels import _label_threshold

    span = MAX_INITIAL_SPAN_S
    if vm.W > 1:
        need = _label_threshold((vm.word_start_s + vm.word_end_s) / 2, list(vm.words))
        if need > 0:
            span = float(np.clip(width / need, MIN_INITIAL_SPAN_S, MAX_INITIAL_SPAN_S))
    if hi - lo <= span:
        return (lo, hi)
    c = float(vm.frame_time(vm.trigger[u])) if 0 <= u < vm.U else lo
    a = min(max(lo, c - span / 2), hi - span)
    return (a, a + span)


def _make_panels(
    analysis,
    vm: ViewModel,
    mel,
    x_range,
    *,
    top_tokens,
    scale,
    attention,
    compact,
    attention_budget_bytes,
    beam,
    kw,
):
    """Build the panels on the shared time axis; returns (panels, attention panel, replay)."""
    panels: dict[str, Panel] = {}
    panels["spectrogram"] = spectrogram_panel(vm, mel, x_range, **kw)
    panels["posteriors"] = posterior_panel(vm, x_range, k=top_tokens, scale=scale, **kw)
    panels["lanes"] = lanes_panel(vm, x_range, **kw)
    occ = occupancy_panel(vm, x_range, compact=compact, **kw)
    if occ is not None:
        panels["occupancy"] = occ
    att = attention_panel(
        vm, x_range, mode=attention, compact=compact, budget_bytes=attention_budget_bytes, **kw
    )
    if att is not None:
        panels["attention"] = att
    from ._beam import analysis_replay, beam_panel

    replay = analysis_replay(analysis, beam)
    if replay is not None:
        panels["beam"] = beam_panel(vm, replay, x_range, **kw)
    return panels, att, replay


def _dress_panels(panels: dict, toolbar: bool) -> None:
    """Drop the toolbars if asked and add the window marker's key to the lanes' legend."""
    if not toolbar:
        for panel in panels.values():
            panel.figure.toolbar_location = None
    # the window marker's key lives in the lanes panel's legend
    from ._panels import band_legend_items

    lanes_fig = panels["lanes"].figure
    legend = lanes_fig.right[0]
    for lab, r in band_legend_items(lanes_fig):
        legend.items.append(LegendItem(label=lab, renderers=[r]))


def _make_widgets(vm: ViewModel, u: int, eps: int, scale: str, att, attention: str) -> dict:
    """The token, look-ahead, scale and attention-view widgets, by name."""
    options = [
        (str(i), f"{i}: {lab}" + (f" ({vm.words[w]})" if w >= 0 else ""))
        for i, (lab, w) in enumerate(zip(vm.token_labels, vm.token_word.tolist(), strict=True))
    ]
    widgets: dict = {}
    widgets["token"] = Select(
        title="selected token",
        options=options,
        value=str(max(u, 0)),
        name="token_select",
        width=220,
    )
    top = max(2 * eps, 30, eps + 10)
    widgets["lookahead"] = Slider(
        start=0,
        end=top,
        step=1,
        value=eps,
        title="decoder look-ahead",
        name="lookahead",
        width=320,
    )
    widgets["scale"] = RadioButtonGroup(
        labels=["linear", "log"], active=1 if scale == "log" else 0, name="scale"
    )
    if att is not None and len(att.models["modes"]) > 1:
        widgets["attention"] = Select(
            title="attention",
            options=[(m, lab) for m, lab in att.models["modes"]],
            value=attention,
            name="attention_mode",
            width=260,
        )
    return widgets


def _add_callbacks(view: UtteranceView) -> None:
    """Attach the browser-side callbacks of the view's widgets and lanes."""
    panels, w = view.panels, view.controls
    lanes = panels["lanes"]
    post = panels["posteriors"]
    args = _callback_args(view)

    def cb(code: str, **extra) -> CustomJS:
        return CustomJS(args={**args, **extra}, code=_js.LIB + code)

    view.js_ready = cb(_js.ON_READY)
    if "token" in w:
        w["token"].js_on_change("value", cb(_js.ON_SELECT))
    if "lookahead" in w:
        w["lookahead"].js_on_change("value", cb(_js.ON_SELECT))
        if "need" in panels:
            _link_need(w["lookahead"], panels["need"])
    lanes.sources["tokens"].selected.js_on_change("indices", cb(_js.ON_TAP))
    if "attention" in w:
        w["attention"].js_on_change("value", cb(_js.ON_ATT_MODE))
    if "scale" in w:
        _link_scale(w["scale"], post)


def _js_constants(view: UtteranceView) -> dict:
    """The view's fixed numbers the browser-side code reads."""
    vm = view.vm
    att = view.panels.get("attention")
    return {
        "T": vm.num_frames,
        "U": vm.U,
        "shift": vm.frame_shift_s,
        "offset": vm.frame_offset_s,
        "rc": vm.right_context_s,
        "enc": vm.encoder_frames,
        "look_back": -1 if vm.look_back is None else vm.look_back,
        "lookahead": view.lookahead,
        "follow_rows": FOLLOW_ROWS,
        "att_R": 0 if vm.attention is None else int(vm.attention.shape[2]),
        "att_row_token": []
        if vm.attention_row_token is None
        else vm.attention_row_token.astype(int).tolist(),
        "att_trigger": []
        if vm.attention_trigger is None
        else vm.attention_trigger.astype(int).tolist(),
        "att_modes": [] if att is None else [m for m, _ in att.models["modes"]],
        "att_mode_labels": [] if att is None else [lab for _, lab in att.models["modes"]],
        "att_mode_index": 0 if att is None else att.models["mode_index"][view.attention_mode],
        **_heard_constant(vm),
    }


def _heard_constant(vm: ViewModel) -> dict:
    """With a per-frame encoder right context ``rc``, the front-end frame a decoder step
    reading encoder frames ``[0, m]`` hears up to, ``max_{j <= m} (j + rc[j])``, for
    every ``m < T`` (key ``heard``, what the browser takes instead of ``m + enc``);
    nothing without one."""
    rc = vm.encoder_right_context
    if rc is None:
        return {}
    from ..streaming import _heard_frames as heard_until

    m = np.arange(vm.num_frames, dtype=np.int64)
    return {"heard": heard_until(m, rc, 0, vm.num_frames, "view").astype(int).tolist()}


def _callback_args(view: UtteranceView) -> dict:
    """The models and constants shared by the selection callbacks' arguments."""
    vm, panels, w = view.vm, view.panels, view.controls
    occ = panels.get("occupancy")
    att = panels.get("attention")
    lanes = panels["lanes"]
    post = panels["posteriors"]
    # word columns the JS needs
    ref_src = lanes.sources["ref"]
    ref_src.data["last_token"] = vm.word_last_token.astype(np.int32)
    lanes.sources["tokens"].data["word"] = vm.token_word.astype(np.int32)
    row_bands = []
    if occ is not None:
        row_bands.append([occ.models["row_band"], False, occ.models["y_range"], vm.U])
    if att is not None:
        row_bands.append(
            [att.models["row_band"], True, att.models["y_range"], int(vm.attention.shape[2])]
        )
    return {
        "C": _js_constants(view),
        "tok": lanes.sources["tokens"],
        "ref": ref_src,
        "bands": [
            [p.band.window, p.band.context, p.band.end, p.band.trigger] for p in panels.values()
        ],
        "curves": post.sources["curves"],
        "sel": post.sources["selected"],
        "row_bands": row_bands,
        "edge": None if att is None else att.sources["edge"],
        "hedge": None if att is None else att.sources["heard_edge"],
        "att_src": None if att is None else att.sources["image"],
        "att_store": None if att is None else att.sources.get("store"),
        "att_mapper": None if att is None else att.models["mapper"],
        "att_fig": None if att is None else att.figure,
        "occ_src": None if occ is None else occ.sources["image"],
        "occ_store": None if occ is None else occ.sources.get("store"),
        "info": view.info,
        "select": w.get("token"),
        "slider": w.get("lookahead"),
        "mode_select": w.get("attention"),
    }


def _link_need(slider, need: Panel) -> None:
    """Mark the need lane's tokens past the slider's look-ahead in the browser."""
    from ._need import NEED_JS

    args = {"src": need.sources["bars"], "line": need.models["line"], "slider": slider}
    slider.js_on_change("value", CustomJS(args=args, code=NEED_JS))


def _link_scale(toggle, post: Panel) -> None:
    """Switch the posterior axis between linear and log in the browser."""
    pm = post.models
    toggle.js_on_change(
        "active",
        CustomJS(
            args={
                "scale_toggle": toggle,
                "post_sources": [
                    post.sources[k]
                    for k in ("blank", "top_tokens", "curves", "selected", "spikes")
                ],
                "post_yr": pm["y_range"],
                "post_axis": post.figure.yaxis[0],
                "tickers": [pm["tickers"]["linear"], pm["tickers"]["log"]],
                "formatters": [pm["formatters"]["linear"], pm["formatters"]["log"]],
            },
            code=_js.ON_SCALE,
        ),
    )


def to_document(view: UtteranceView, *, title: str | None = None):
    """A bokeh Document holding the view, with the on-load callback attached (a
    :class:`~peekalign.views._static.StaticDocument` for a static view)."""
    doc = _static.StaticDocument() if view.static else Document()
    doc.add_root(view.layout)
    doc.title = title or f"peekalign: {view.vm.uid}"
    if view.js_ready is not None:
        doc.js_on_event("document_ready", view.js_ready)
    return doc
