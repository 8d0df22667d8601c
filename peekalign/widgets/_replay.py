"""The peek widget's decoding replay: a play button and a frame slider stepping the
beam lane's cursor, with the partial result and the beam table updating live."""

from __future__ import annotations

import ipywidgets as W

__all__ = ["ReplayControls"]


class ReplayControls(W.VBox):
    """Play button, frame slider and the replay box of the shown view.

    Hidden when the view has no beam lane (the analysis ran no traced search: pass
    ``options={"search": {...}}`` to :func:`peekalign.peek`).
    """

    def __init__(self, *, interval_ms: int = 120) -> None:
        super().__init__(layout=W.Layout(display="none"))
        self.view = None
        self.play = W.Play(value=0, min=0, max=1, step=1, interval=interval_ms)
        self.play.description = "play"
        self.slider = W.IntSlider(
            value=0, min=0, max=1, step=1, description="replay frame", continuous_update=True
        )
        W.jslink((self.play, "value"), (self.slider, "value"))
        self.box = W.HTML()
        self.slider.observe(self._on_frame, names="value")
        self.children = [W.HBox([self.play, self.slider]), self.box]

    def attach(self, view) -> None:
        """Follow ``view`` (a new utterance): range, last frame, visibility."""
        self.view = view
        rp = getattr(view, "replay", None)
        if rp is None:
            self.layout.display = "none"
            return
        last = rp.num_frames - 1
        for w in (self.play, self.slider):
            w.max = max(last, 1)
        self.layout.display = ""
        if self.slider.value == last:
            self._show(last)
        else:
            self.slider.value = last  # observers show it

    def _on_frame(self, change) -> None:
        view = self.view
        if view is None or getattr(view, "replay", None) is None:
            return
        self._show(min(int(change["new"]), view.replay.num_frames - 1))

    def _show(self, frame: int) -> None:
        from ..views._beam import replay_to

        replay_to(self.view, frame)
        self.box.value = self.view.panels["beam"].models["box"].text
