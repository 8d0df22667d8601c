"""The Jupyter peek widget: ipywidgets controls around the views' bokeh figures.

A thin layer. :class:`PeekState` holds what is shown; :func:`peekalign.analysis.
analyze` computes everything (re-run when the look-ahead or the floor moves: it is a
few milliseconds per utterance); :func:`peekalign.views.utterance_view` builds the
figures, shown through ``jupyter_bokeh`` and updated from Python (the widget syncs the
bokeh models to the page, no ``push_notebook``).
"""

from __future__ import annotations

import functools
import html
import math
import os
from collections.abc import Sequence
from pathlib import Path

import ipywidgets as W
import numpy as np

from ..exceptions import ParameterError, PeekalignError, describe
from ..model import Bundle, Utterance, open_bundle
from ..views import COLORS
from ._audio import clip, wav_bytes
from ._picker import SORT_KEYS, order_ids, picker_label
from ._state import PeekState
from ._table import WordTable

__all__ = ["Peek", "peek", "load_bokehjs"]

#: Bundles with at most this many utterances are scanned when the peek widget opens.
AUTO_SCAN_MAX = 64
#: The diagnosis' default posterior floor (``analyze(floor=...)``).
DEFAULT_FLOOR = 0.05
#: Posterior floor slider range (the diagnosis needs floor <= spike threshold, 0.5).
FLOOR_MAX = 0.5

_MUTED = "#5b6470"


def load_bokehjs() -> None:
    """Put BokehJS on the notebook page (jupyter_bokeh draws nothing without it).

    :func:`peek` calls it when the peek widget is displayed; call it yourself before
    displaying a ``jupyter_bokeh.BokehModel`` of your own.
    """
    from bokeh.io import output_notebook
    from bokeh.resources import INLINE

    output_notebook(INLINE, hide_banner=True)


def _note(text: str) -> str:
    return f'<div style="color:{_MUTED};font-size:12px;margin:2px 0">{text}</div>'


def _word_of_token(words, u: int) -> int:
    """Index of the reference word holding token ``u`` (-1: a separator or none)."""
    if u < 0:
        return -1
    hit = np.flatnonzero((words.first_token <= u) & (words.last_token >= u))
    return int(hit[0]) if hit.size else -1


def _mode_cut(cm, mode: str) -> np.ndarray:
    """Cut mass per attention row for an attention view mode."""
    if mode == "mean":
        return np.asarray(cm.mean)
    layer, _, head = mode[1:].partition("H")
    if head:
        return np.asarray(cm.per_head[int(layer), int(head)])
    return np.asarray(cm.per_layer[int(layer)])


@functools.cache
def _bokeh_model_class():
    from jupyter_bokeh import BokehModel

    class _BokehModel(BokehModel):
        """``jupyter_bokeh.BokehModel`` whose ``close`` may run twice (the original
        fails the second time, e.g. when garbage collection closes it again)."""

        def close(self) -> None:
            try:
                super().close()
            except KeyError:
                pass

    return _BokehModel


def _bokeh_widget(layout):
    """The bokeh ``layout`` as an ipywidget (jupyter_bokeh)."""
    return _bokeh_model_class()(layout)


def _make_controls(sort: str) -> dict[str, W.Widget]:
    """The peek widget's controls by name (not yet connected)."""
    c: dict[str, W.Widget] = {}
    c["utt"] = W.Dropdown(description="utterance", options=[], layout=W.Layout(width="460px"))
    c["sort"] = W.Dropdown(
        description="order",
        options=[(v, k) for k, v in SORT_KEYS.items()],
        value=sort,
        layout=W.Layout(width="300px"),
    )
    c["scan"] = W.Button(
        description="analyse all",
        tooltip="analyse every utterance so the picker can sort them",
        layout=W.Layout(width="120px"),
    )
    c["prev"] = W.Button(description="◀", tooltip="previous token", layout=W.Layout(width="36px"))
    c["token"] = W.Dropdown(description="token", options=[], layout=W.Layout(width="300px"))
    c["next"] = W.Button(description="▶", tooltip="next token", layout=W.Layout(width="36px"))
    c["lookahead"] = W.IntSlider(
        description="look-ahead",
        min=0,
        max=30,
        value=0,
        continuous_update=True,
        style={"description_width": "initial"},
        layout=W.Layout(width="360px"),
    )
    c["lookahead_ms"] = W.HTML("", layout=W.Layout(width="150px"))
    c["attention"] = W.Dropdown(
        description="attention", options=[("mean", "mean")], layout=W.Layout(width="320px")
    )
    c["floor"] = W.FloatSlider(
        description="posterior floor",
        min=0.0,
        max=FLOOR_MAX,
        step=0.01,
        value=DEFAULT_FLOOR,
        readout_format=".2f",
        continuous_update=False,
        style={"description_width": "initial"},
        layout=W.Layout(width="300px"),
    )
    c["scale"] = W.ToggleButtons(
        options=[("linear", "linear"), ("log", "log")],
        value="linear",
        tooltips=["posterior axis linear", "posterior axis log10"],
        style={"button_width": "64px"},
    )
    c["export_format"] = W.Dropdown(
        options=[("HTML", "html"), ("PNG", "png"), ("SVG", "svg")],
        value="html",
        layout=W.Layout(width="90px"),
    )
    c["export_path"] = W.Text(
        placeholder="file to write", layout=W.Layout(width="320px"), description="export to"
    )
    c["export_overwrite"] = W.Checkbox(value=False, description="overwrite", indent=False)
    c["export"] = W.Button(description="export", icon="download", layout=W.Layout(width="100px"))
    # stable hooks for page scripts and browser tests
    for name in ("utt", "token", "lookahead", "attention", "floor"):
        c[name].add_class(f"peekalign-{name}")
    return c


class Peek(W.VBox):
    """One utterance at a time: picker, token stepper, look-ahead, attention view,
    posterior floor, word table, audio and export, around the linked bokeh views.

    Build it with :func:`peek`. Every control has a method doing the same from
    Python (:meth:`select_utterance`, :meth:`select_token`, :meth:`step`,
    :meth:`select_word`, :meth:`set_lookahead`, :meth:`set_attention`,
    :meth:`set_floor`, :meth:`export`).

    Attributes
    ----------
    state : PeekState
        What is shown now.
    analysis : UtteranceAnalysis
        Analysis of the shown utterance at the current look-ahead and floor.
    view : UtteranceView
        The bokeh figures (``view.state()`` reads the window marker).
    controls : dict of str -> ipywidgets.Widget
    replay : ReplayControls
        Play button and frame slider of the decoding replay (shown when the analysis
        ran a traced search, e.g. ``options={"search": {"beam": 8}}``).
    """

    # intended: the signature repeats peek()'s so help() and tab completion show it
    def __init__(
        self,
        source,
        *,
        utt: str | None = None,
        lookahead: int | None = None,
        token: int | None = None,
        attention: str = "mean",
        floor: float = DEFAULT_FLOOR,
        sort: str = "worst",
        scan=None,
        width: int = 760,
        scale: str = "linear",
        options: dict | None = None,
        branch: str | None = None,
    ) -> None:
        super().__init__(layout=W.Layout(width="100%"))
        self.add_class("peekalign-peek")
        if sort not in SORT_KEYS:
            raise ParameterError(
                f"The 'sort' parameter of peek must be one of {tuple(SORT_KEYS)}. "
                f"Got {sort!r} instead."
            )
        self._bundle: Bundle | None = None
        self._utts: dict[str, Utterance] = {}
        self._given = None  # an analysis handed in
        self._ids = self._open(source)
        self._metrics: dict[str, dict] = {}
        self._width = int(width)
        if scale not in ("linear", "log"):
            raise ParameterError(
                "The 'scale' parameter of peek must be one of ('linear', 'log'). "
                f"Got {scale!r} instead."
            )
        self._scale = scale
        self._options = dict(options or {})
        if branch is not None:
            self._options["branch"] = branch
        for bad in ("lookahead", "floor"):
            if bad in self._options:
                raise ParameterError(
                    f"The 'options' parameter of peek must not set {bad!r}; pass "
                    f"{bad}= to peek instead. Got {bad}={self._options[bad]!r}."
                )
        self._syncing = False
        self._bokeh = None
        self.view = None
        self.analysis = None
        self._audio: tuple[np.ndarray, int] | None = None
        self._build_controls(sort)

        state = PeekState(utt=self._ids[0] if self._ids else "")
        state = state.set(floor=floor, attention=attention)
        if lookahead is not None:
            state = state.set(lookahead=lookahead)
        self.state = state
        self._lookahead_given = lookahead is not None

        if hasattr(scan, "utterances"):  # a finished corpus scan: order from its tables
            self.use_scan(scan)
        else:
            if scan is None:
                scan = self._bundle is not None and 1 < len(self._ids) <= AUTO_SCAN_MAX
            if scan:
                self.scan()
        first = utt
        if first is None:
            ordered = order_ids(self._ids, self._metrics, self.controls["sort"].value)
            first = ordered[0] if ordered else None
        if first is None:
            raise ParameterError(
                describe("no utterances", "at least one", "check the bundle (peekalign check)")
            )
        self.select_utterance(first, token=token)

    # -- sources -----------------------------------------------------------------
    def _open(self, source) -> list[str]:
        if isinstance(source, (str, os.PathLike)):
            source = open_bundle(source)
        if isinstance(source, Bundle):
            self._bundle = source
            return list(source.ids)
        if isinstance(source, Utterance):
            self._utts[source.id] = source
            return [source.id]
        if hasattr(source, "alignment") and isinstance(getattr(source, "utt", None), Utterance):
            self._given = source
            self._utts[source.utt.id] = source.utt
            return [source.utt.id]
        if (
            isinstance(source, Sequence)
            and source
            and all(isinstance(u, Utterance) for u in source)
        ):
            for u in source:
                self._utts[u.id] = u
            return [u.id for u in source]
        raise ParameterError(
            f"The 'source' parameter of peek must be a Bundle, a bundle folder, an "
            f"Utterance, a list of Utterances or an UtteranceAnalysis. Got "
            f"{type(source).__name__} instead."
        )

    def _utterance(self, uid: str) -> Utterance:
        if uid in self._utts:
            return self._utts[uid]
        if self._bundle is not None and uid in self._bundle:
            return self._bundle[uid]
        raise ParameterError(
            describe(
                f"utterance id {uid!r}",
                f"one of the {len(self._ids)} ids shown in the picker",
                "pick an id from the list",
            )
        )

    # -- controls ----------------------------------------------------------------
    def _build_controls(self, sort: str) -> None:
        """Make the controls and panes, connect them and lay them out."""
        self.controls = _make_controls(sort)
        self._build_panes()
        self._connect_controls()
        self._lay_out()

    def _build_panes(self) -> None:
        """The header, notes, plot box, replay, word table and audio players."""
        self._header = W.HTML("")
        self._status = W.HTML("")
        self._notes = W.HTML("")
        self._export_status = W.HTML("")
        self._plot_box = W.Box(layout=W.Layout(width="100%", overflow="auto"))
        from ._replay import ReplayControls

        self.replay = ReplayControls()
        self.table = WordTable(self._on_table_pick)
        self._word_label = W.HTML("")
        self._hear_label = W.HTML("")
        self._word_audio = W.Audio(format="wav", autoplay=False, controls=True)
        self._hear_audio = W.Audio(format="wav", autoplay=False, controls=True)
        self._audio_box = W.VBox(
            [
                W.HTML("<b>listen</b>"),
                self._word_label,
                self._word_audio,
                self._hear_label,
                self._hear_audio,
            ],
            layout=W.Layout(min_width="320px", padding="0 8px"),
        )

    def _connect_controls(self) -> None:
        """Run the widget's handlers when a control changes."""
        c = self.controls
        c["utt"].observe(self._on_utt, names="value")
        c["sort"].observe(self._on_sort, names="value")
        c["scan"].on_click(lambda _b: self._run_scan_clicked())
        c["prev"].on_click(lambda _b: self.step(-1))
        c["next"].on_click(lambda _b: self.step(+1))
        c["token"].observe(self._on_token, names="value")
        c["lookahead"].observe(self._on_lookahead, names="value")
        c["attention"].observe(self._on_attention, names="value")
        c["floor"].observe(self._on_floor, names="value")
        c["scale"].observe(self._on_scale, names="value")
        c["export"].on_click(lambda _b: self._export_clicked())

    def _lay_out(self) -> None:
        """Rows of controls, the plot, the replay, the word table and audio, export."""
        c = self.controls
        row1 = W.HBox([c["utt"], c["sort"], c["scan"]])
        row2 = W.HBox([c["prev"], c["token"], c["next"], c["lookahead"], c["lookahead_ms"]])
        row3 = W.HBox([c["attention"], c["floor"], W.HTML("&nbsp;posteriors"), c["scale"]])
        export = W.HBox([c["export_path"], c["export_format"], c["export_overwrite"], c["export"]])
        below = W.HBox([self.table, self._audio_box], layout=W.Layout(align_items="flex-start"))
        self.children = [
            self._header,
            row1,
            row2,
            row3,
            self._notes,
            self._status,
            self._plot_box,
            self.replay,
            below,
            export,
            self._export_status,
        ]

    def _set_quiet(self, widget, **values) -> None:
        """Set control values without running their observers."""
        old = self._syncing
        self._syncing = True
        try:
            for k, v in values.items():
                setattr(widget, k, v)
        finally:
            self._syncing = old

    # -- observers (controls -> methods) ---------------------------------------------
    def _on_utt(self, change) -> None:
        if not self._syncing and change["new"] and change["new"] != self.state.utt:
            self.select_utterance(change["new"])

    def _on_sort(self, change) -> None:
        if not self._syncing:
            self._refresh_picker()

    def _on_token(self, change) -> None:
        if not self._syncing and change["new"] is not None:
            self.select_token(int(change["new"]))

    def _on_lookahead(self, change) -> None:
        if not self._syncing:
            self.set_lookahead(int(change["new"]))

    def _on_attention(self, change) -> None:
        if not self._syncing and change["new"]:
            self.set_attention(change["new"])

    def _on_floor(self, change) -> None:
        if not self._syncing:
            self.set_floor(float(change["new"]))

    def _on_scale(self, change) -> None:
        if not self._syncing:
            self.set_scale(change["new"])

    def _on_table_pick(self, index: int) -> None:
        self.select_word(index)

    def _on_bokeh_tap(self, attr, old, new) -> None:
        # a tap on a token in the lanes panel (synced back from the page)
        if self._syncing or len(new) != 1 or int(new[0]) == self.state.token:
            return
        self.select_token(int(new[0]))

    def _run_scan_clicked(self) -> None:
        self.controls["scan"].disabled = True
        self.controls["scan"].description = "analysing…"
        try:
            self.scan()
        finally:
            self.controls["scan"].description = "analyse all"
            self.controls["scan"].disabled = self._bundle is None and len(self._ids) < 2

    def _export_clicked(self) -> None:
        path = self.controls["export_path"].value.strip()
        fmt = self.controls["export_format"].value
        if not path:
            path = f"{self.state.utt}.{fmt}"
        try:
            out = self.export(path, fmt=fmt, overwrite=self.controls["export_overwrite"].value)
        except (PeekalignError, OSError) as exc:
            self._export_status.value = (
                f'<div style="color:{COLORS["deletion"]};font-size:12px">'
                f"{html.escape(str(exc))}</div>"
            )
        else:
            self._export_status.value = _note(f"wrote {html.escape(str(out))}")

    # -- utterances ----------------------------------------------------------------
    def scan(self) -> None:
        """Analyse every utterance (at the current look-ahead) so the picker can sort
        them by WER, deletions and worst margin."""
        eps = self.state.lookahead if self._lookahead_given or self.analysis else None
        if self._bundle is not None:
            from ..corpus import scan

            branch = self._options.get("branch")
            self.use_scan(
                scan(self._bundle, lookahead=eps, workers=0, progress=False, branch=branch)
            )
            return
        else:
            from ..analysis import analyze

            for uid, u in self._utts.items():
                try:
                    self._metrics[uid] = analyze(
                        u, lookahead=eps, branch=self._options.get("branch")
                    ).summary()
                except PeekalignError:
                    continue
        self._refresh_picker()

    def use_scan(self, result) -> None:
        """Order the picker from a finished corpus scan (:func:`peekalign.scan`, e.g.
        the one behind a report) without analysing anything again."""
        for row in result.utterances:
            if row["id"] in self._ids:
                # the scan's table has the margin in ms; the picker reads summaries (s)
                m = dict(row)
                m["worst_margin_s"] = row["worst_reach_margin_ms"] / 1000.0
                self._metrics[row["id"]] = m
        bad = [p.utt for p in result.problems]
        if bad:
            self._notes.value = _note(
                f"{len(bad)} utterance(s) could not be analysed (e.g. "
                f"{html.escape(bad[0])}); run <code>peekalign check</code> on the bundle"
            )
        self._refresh_picker()

    def _refresh_picker(self) -> None:
        ids = order_ids(self._ids, self._metrics, self.controls["sort"].value)
        opts = [(picker_label(u, self._metrics.get(u)), u) for u in ids]
        self._set_quiet(self.controls["utt"], options=opts)
        if self.state.utt in ids:
            self._set_quiet(self.controls["utt"], value=self.state.utt)
        single = len(self._ids) < 2
        self.controls["utt"].disabled = single
        self.controls["sort"].disabled = single
        self.controls["scan"].disabled = single

    def _analyze(self, utt: Utterance, lookahead: int | None, floor: float):
        from ..analysis import analyze

        return analyze(utt, lookahead=lookahead, floor=floor, **self._options)

    def select_utterance(self, uid: str, *, token: int | None = None) -> None:
        """Show utterance ``uid`` (its first deleted word's last token is selected
        unless ``token`` is given)."""
        if uid not in self._ids:
            self._utterance(uid)  # raises, naming the ids there are
        st = self.state
        eps = st.lookahead if (self._lookahead_given or self.analysis is not None) else None
        try:
            utt = self._utterance(uid)
            given = self._given
            if (
                given is not None
                and given.utt is utt
                and eps in (None, given.lookahead)
                and st.floor == DEFAULT_FLOOR  # the floor analyze used by default
            ):
                live = given
            else:
                live = self._analyze(utt, eps, st.floor)
            from ..views import utterance_view

            mode = st.attention
            view = utterance_view(
                live,
                lookahead=live.lookahead,
                token=token,
                attention=mode,
                compact=False,
                controls=False,
                width=self._width,
                scale=self._scale,
            )
        except PeekalignError as exc:
            self._notes.value = (
                f'<div style="color:{COLORS["deletion"]};font-size:12px">cannot show '
                f"{html.escape(uid)}: {html.escape(str(exc))}</div>"
            )
            self._set_quiet(self.controls["utt"], value=self.state.utt or None)
            if self.view is None:
                raise
            return
        self.analysis = live
        self._metrics[uid] = live.summary()
        self.view = view
        self._audio = view.vm.audio
        self._hook_view(view)
        self.state = st.set(utt=uid, lookahead=int(live.lookahead), token=-1, word=-1)
        self._lookahead_given = True
        self._fill_controls()
        self._refresh_picker()
        self._show_bokeh(view)
        self.replay.attach(view)
        self.select_token(int(view.token))

    def _hook_view(self, view) -> None:
        """Wire the figures to Python: a tap on a token selects it here."""
        from bokeh.models import Span

        sel = view.panels["lanes"].sources["tokens"].selected
        # the standalone file's tap callback would redraw the marker in the browser with
        # the build-time look-ahead; here Python redraws it with the current one
        sel.js_property_callbacks = {
            k: v for k, v in sel.js_property_callbacks.items() if k != "change:indices"
        }
        sel.on_change("indices", self._on_bokeh_tap)
        post = view.panels["posteriors"]
        self._floor_line = Span(
            location=self._floor_y(self.state.floor),
            dimension="width",
            line_color=COLORS["deletion"],
            line_dash="dotted",
            line_width=1.5,
            name="posterior_floor",
        )
        post.figure.add_layout(self._floor_line)

    def _floor_y(self, floor: float) -> float:
        if self._scale == "log":
            return float(np.log10(max(floor, 1e-4)))
        return float(floor)

    def _show_bokeh(self, view) -> None:
        old = self._bokeh
        self._bokeh = _bokeh_widget(view.layout)
        self._plot_box.children = [self._bokeh]
        if old is not None:
            old.close()

    def _fill_controls(self) -> None:
        c, view, a = self.controls, self.view, self.analysis
        vm = view.vm
        opts = [
            (f"{i}: {lab}" + (f"  ({vm.words[w]})" if w >= 0 else ""), i)
            for i, (lab, w) in enumerate(zip(vm.token_labels, vm.token_word.tolist(), strict=True))
        ]
        self._set_quiet(c["token"], options=opts, value=None)
        eps = self.state.lookahead
        top = max(30, 2 * eps, eps + 10)
        self._set_quiet(c["lookahead"], max=top, value=eps)
        self._set_quiet(c["floor"], value=min(self.state.floor, FLOOR_MAX))
        self._set_quiet(c["scale"], value=self._scale)
        notes = []
        att = view.panels.get("attention")
        if att is not None:
            modes = [(label, m) for m, label in att.models["modes"]]
            mode = (
                self.state.attention
                if self.state.attention in dict(att.models["modes"])
                else "mean"
            )
            self._set_quiet(c["attention"], options=modes, value=mode, disabled=False)
            self.state = self.state.set(attention=mode)
        else:
            self._set_quiet(c["attention"], options=[("no attention", "mean")], disabled=True)
            notes.append(
                "No decoder attention in this utterance's dump: the attention panel, the "
                "layer/head picker and the cut mass are off."
            )
        if self._audio is None:
            self._audio_box.layout.display = "none"
            why = "no audio file" if a.utt.audio_path is None else "audio not loaded"
            notes.append(f"No audio ({why}): the spectrogram and the players are hidden.")
        else:
            self._audio_box.layout.display = None
        if a.errors is None:
            notes.append("No hypothesis: error operations and deletion diagnoses are off.")
        for n in a.notes:
            notes.append(html.escape(str(n)))
        self._notes.value = "".join(_note(n) for n in notes)
        self._header.value = self._header_html()

    def _header_html(self) -> str:
        a = self.analysis
        s = a.summary()
        parts = [f"<b>{html.escape(a.utt.id)}</b>", f"{a.utt.duration_s:.2f} s"]
        if a.errors is not None:
            parts.append(
                f"WER {s['wer']:.3f} ({html.escape(str(a.branch))}; "
                f"S {s['S']}, D {s['D']}, I {s['I']})"
            )
            others = [
                f"{html.escape(b)} {e.wer:.3f}"
                for b, e in a.branch_errors.items()
                if b != a.branch
            ]
            if others:
                parts.append("other branches: " + ", ".join(others))
        parts.append(f"word times: {html.escape(str(s['words_source']))}")
        parts.append(f"triggers: {html.escape(a.windows.trigger_label)}")
        return f'<div style="font-size:13px">{" · ".join(parts)}</div>'

    # -- selection ---------------------------------------------------------------
    def select_token(self, token: int) -> None:
        """Select reference token ``token`` (0-based; -1 clears the selection)."""
        a = self.analysis
        U = int(a.alignment.tokens.size)
        st = self.state.set(token=token, num_tokens=U)
        w = _word_of_token(a.words, st.token)
        self.state = st.set(word=w)
        self._syncing = True
        try:
            self.view.select(st.token)
        finally:
            self._syncing = False
        if st.token >= 0:
            self._set_quiet(self.controls["token"], value=st.token)
        self.controls["prev"].disabled = st.token <= 0
        self.controls["next"].disabled = st.token >= U - 1
        self.table.highlight(w)
        self._update_audio()
        self._update_status()

    def step(self, delta: int = 1) -> None:
        """Move the token selection by ``delta`` tokens (clipped to the utterance)."""
        U = int(self.analysis.alignment.tokens.size)
        if U == 0:
            return
        u = self.state.token if self.state.token >= 0 else 0
        self.select_token(int(min(max(u + int(delta), 0), U - 1)))

    def select_word(self, index: int) -> None:
        """Select reference word ``index``: its last token (where the margin is
        measured) and its audio."""
        words = self.analysis.words
        st = self.state.set(word=index, num_words=len(words))
        if st.word < 0:
            self.select_token(-1)
            return
        self.select_token(int(words.last_token[st.word]))

    # -- look-ahead, attention, floor -------------------------------------------
    def set_lookahead(self, lookahead: int) -> None:
        """Move the decoder look-ahead (frames): windows, margins, cut mass and
        diagnoses are recomputed."""
        st = self.state.set(lookahead=lookahead)
        self._reanalyse(st)
        self.view.set_lookahead(st.lookahead)
        slider = self.controls["lookahead"]
        if st.lookahead > slider.max:
            self._set_quiet(slider, max=st.lookahead)
        self._set_quiet(slider, value=st.lookahead)
        self._update_audio()
        self._update_status()

    def set_floor(self, floor: float) -> None:
        """Move the posterior floor of the deletion diagnosis (``no-spike`` below it)."""
        st = self.state.set(floor=floor)
        if st.floor > FLOOR_MAX:
            raise ParameterError(
                f"The 'floor' parameter of set_floor must be a float in the range "
                f"[0, {FLOOR_MAX}] (at most the spike threshold). Got {floor!r} instead."
            )
        self._reanalyse(st)
        self._floor_line.location = self._floor_y(st.floor)
        self._set_quiet(self.controls["floor"], value=st.floor)
        self._update_status()

    def set_attention(self, mode: str) -> None:
        """Show the attention of ``mode``: ``"mean"``, ``"L<l>"`` or ``"L<l>H<h>"``."""
        att = self.view.panels.get("attention")
        if att is None:
            raise ParameterError(
                describe(
                    "no attention in this utterance",
                    "an 'attention' array in the dump",
                    "dump the decoder cross-attention to use the layer/head picker",
                    utt=self.state.utt,
                ),
                utt=self.state.utt,
            )
        modes = dict(att.models["modes"])
        if mode not in modes:
            raise ParameterError(
                f"The 'mode' parameter of set_attention must be one of {tuple(modes)}. "
                f"Got {mode!r} instead."
            )
        self.state = self.state.set(attention=mode)
        self.view.set_attention(mode)
        self._set_quiet(self.controls["attention"], value=mode)
        self._update_status()

    def set_scale(self, scale: str) -> None:
        """Posterior axis: ``"linear"`` or ``"log"``."""
        if scale not in ("linear", "log"):
            raise ParameterError(
                "The 'scale' parameter of set_scale must be one of ('linear', 'log'). "
                f"Got {scale!r} instead."
            )
        self._scale = scale
        self.view.set_scale(scale)
        self._floor_line.location = self._floor_y(self.state.floor)
        self._set_quiet(self.controls["scale"], value=scale)

    def _reanalyse(self, st: PeekState) -> None:
        old = [(d.ref_index, d.code, d.evidence) for d in self.analysis.diagnoses]
        self.analysis = self._analyze(self.analysis.utt, st.lookahead, st.floor)
        self.state = st
        self._metrics[st.utt] = self.analysis.summary()
        new = [(d.ref_index, d.code, d.evidence) for d in self.analysis.diagnoses]
        if new != old:
            self._sync_view_diagnoses()

    def _sync_view_diagnoses(self) -> None:
        """Diagnoses changed (floor, or cut-off at another look-ahead): redraw the
        views' header line and the reference-word lane that show them."""
        self.view.update_analysis(self.analysis)

    # -- read-outs ---------------------------------------------------------------
    def _attention_row(self) -> int | None:
        """Attention row of the selected token: the same token when the rows are the
        reference's, else the last token of the hypothesis word aligned to the
        selected reference word."""
        a, st = self.analysis, self.state
        utt = a.utt
        if a.cut_mass is None or st.token < 0:
            return None
        rows = utt.attention_tokens
        if rows is not None and np.array_equal(rows, a.alignment.tokens):
            return st.token
        if a.errors is None or st.word < 0 or rows is None:
            return None
        h = int(a.errors.hyp_index_of_ref()[st.word])
        if h < 0:
            return None
        groups = utt.vocab.words(rows)
        if len(groups) != len(a.errors.hyp) or h >= len(groups):
            return None
        return int(groups[h][2])

    def _update_status(self) -> None:
        a, st = self.analysis, self.state
        shift = a.utt.clock.frame_shift_s
        eps = st.lookahead
        self.controls["lookahead_ms"].value = _note(f"= {eps * shift * 1000:.0f} ms")
        parts = [
            f"look-ahead {eps} frames ({eps * shift * 1000:.0f} ms)",
            f"reach {100 * a.words.reach:.1f} % of {len(a.words)} words",
        ]
        if a.cut_mass is not None:
            per_row = _mode_cut(a.cut_mass, st.attention)
            if np.isfinite(per_row).any():
                parts.append(f"mean cut attention mass {float(np.nanmean(per_row)):.3f}")
        line2 = []
        if st.token >= 0:
            # the token's window and right context are in the figures' own info line
            if st.word >= 0:
                m = float(a.words.margin_s[st.word])
                ok = bool(a.words.reached[st.word])
                color = COLORS["correct"] if ok else COLORS["deletion"]
                line2.append(
                    f"selected word &lsquo;{html.escape(a.words.words[st.word])}&rsquo;: "
                    f'reach margin <b style="color:{color}">{m * 1000:+.0f} ms</b> '
                    f"({'reached' if ok else 'cut off'})"
                )
                d = a.diagnosis_of(st.word)
                if d is not None:
                    line2.append(f"deleted: <b>{html.escape(d.code)}</b>")
            r = self._attention_row()
            if r is not None:
                v = float(_mode_cut(a.cut_mass, st.attention)[r])
                if math.isfinite(v):
                    line2.append(
                        f"cut mass of its attention row {r} "
                        f"({html.escape(self.controls['attention'].label or st.attention)}): {v:.3f}"
                    )
        self._status.value = (
            '<div style="font-size:12px;line-height:1.5">'
            + " · ".join(parts)
            + ("<br>" + " · ".join(line2) if line2 else "")
            + "</div>"
        )
        self.table.show(a.word_table(), lookahead=eps, shift_s=shift)

    def _update_audio(self) -> None:
        if self._audio is None:
            return
        y, sr = self._audio
        a, st = self.analysis, self.state
        if st.word >= 0:
            t0, t1 = float(a.words.start_s[st.word]), float(a.words.end_s[st.word])
            self._word_label.value = _note(
                f"word &lsquo;{html.escape(a.words.words[st.word])}&rsquo; "
                f"{t0:.3f}&ndash;{t1:.3f} s ({html.escape(a.words.source)} times)"
            )
            self._word_audio.value = wav_bytes(clip(y, sr, t0, t1), sr)
        else:
            self._word_label.value = _note("no word selected")
            self._word_audio.value = b""
        if st.token >= 0:
            h = float(a.windows.heard_until_s[st.token])
            end = min(h, y.shape[0] / sr)
            self._hear_label.value = _note(
                f"what the decoder could hear for token #{st.token}: 0&ndash;{end:.3f} s "
                f"(right context {a.windows.right_context_ms[st.token]:.0f} ms past "
                "the trigger)"
            )
            data = wav_bytes(clip(y, sr, 0.0, h), sr)
            if data != self._hear_audio.value:
                self._hear_audio.value = data
        else:
            self._hear_label.value = _note("no token selected")
            self._hear_audio.value = b""

    def audio_clips(self) -> dict[str, np.ndarray]:
        """Samples of the two players: ``"word"`` and ``"heard"`` (0 to the end of the token's right context)."""
        if self._audio is None:
            return {}
        y, sr = self._audio
        a, st = self.analysis, self.state
        out = {}
        if st.word >= 0:
            out["word"] = clip(
                y, sr, float(a.words.start_s[st.word]), float(a.words.end_s[st.word])
            )
        if st.token >= 0:
            out["heard"] = clip(y, sr, 0.0, float(a.windows.heard_until_s[st.token]))
        return out

    # -- export ------------------------------------------------------------------
    def export(self, path, *, fmt: str | None = None, overwrite: bool = False) -> Path:
        """Write what is shown as a standalone file, like ``peekalign view``.

        Parameters
        ----------
        path : str or Path
        fmt : {"html", "png", "svg"}, optional
            Default: from the file's suffix.
        overwrite : bool
        """
        from .. import views

        path = Path(path)
        if fmt is None:
            fmt = path.suffix.lower().lstrip(".")
        writers = {"html": views.save_html, "png": views.export_png, "svg": views.export_svg}
        if fmt not in writers:
            raise ParameterError(
                f"The 'fmt' parameter of export must be one of {tuple(writers)}. "
                f"Got {fmt!r} instead; or give the file a .html, .png or .svg suffix."
            )
        st = self.state
        opts = {
            "lookahead": st.lookahead,
            "token": st.token,
            "scale": self._scale,
            "width": self._width,
        }
        if self.view.panels.get("attention") is not None:
            opts["attention"] = st.attention
        return writers[fmt](self.analysis, path, overwrite=overwrite, **opts)

    # -- display -----------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs):
        load_bokehjs()
        return super()._repr_mimebundle_(**kwargs)


def peek(
    source,
    *,
    utt: str | None = None,
    lookahead: int | None = None,
    token: int | None = None,
    attention: str = "mean",
    floor: float = DEFAULT_FLOOR,
    sort: str = "worst",
    scan=None,
    width: int = 760,
    scale: str = "linear",
    options: dict | None = None,
    branch: str | None = None,
) -> Peek:
    """Peek at utterances in Jupyter: the linked views with live controls.

    Parameters
    ----------
    source : Bundle, path, Utterance, list of Utterance or UtteranceAnalysis
    utt : str, optional
        Utterance to open first; default the worst one (after the scan) or the first.
    lookahead : int, optional
        Decoder look-ahead in frames; default the bundle's own.
    token : int, optional
        Token selected first; default the last token of the first deleted word.
    attention : str
        Attention view: ``"mean"``, ``"L<l>"`` or ``"L<l>H<h>"`` (0-based).
    floor : float
        Posterior floor of the deletion diagnosis.
    sort : {"worst", "manifest", "wer", "deletions", "margin"}
        Order of the utterance picker.
    scan : bool or Scan, optional
        Analyse every utterance first so the picker can sort them; default for
        bundles of up to 64 utterances (else the "analyse all" button does it). A
        finished :func:`peekalign.scan` result orders the picker from its tables
        (worst first by default) with no new analysis.
    width : int
        Width in pixels of the figures' plotting area.
    scale : {"linear", "log"}
        Posterior axis.
    options : dict, optional
        More :func:`peekalign.analysis.analyze` options (``look_back``,
        ``trigger_rule``, ``encoder_lookahead``, ``search``, ...).
    branch : str, optional
        Hypothesis branch the errors, diagnoses and the worst-first order use
        (``"ctc"``, ``"decoder"``, ``"joint"``, ``"hyp"``); default the system's output.
        The header names it and lists the other branches' WER.

    Returns
    -------
    Peek
        An ipywidgets box; display it (last line of a cell).

    Examples
    --------
    >>> import peekalign
    >>> app = peekalign.peek("full")
    >>> app.set_lookahead(4); app.view.state()["window"][1] >= app.view.state()["window"][0]
    True
    """
    return Peek(
        source,
        utt=utt,
        lookahead=lookahead,
        token=token,
        attention=attention,
        floor=floor,
        sort=sort,
        scan=scan,
        width=width,
        scale=scale,
        options=options,
        branch=branch,
    )
