"""Views: bokeh figures of one utterance on one time axis (no widgets).

Spectrogram, CTC posteriors (blank, top tokens, reference tokens, spikes), lanes (reference
words with their time source, forced words and tokens, the hypothesis with its error
operations), the CTC state occupancy and the decoder's cross-attention; the selected
token's decoder window is marked on every panel by a strip along its bottom edge (the
hatched continuation is the right context) and a dashed line at the window end.

>>> from peekalign import open_bundle
>>> from peekalign.views import save_html
>>> bundle = open_bundle("bundle")
>>> save_html(bundle[bundle.ids[0]], "utt.html").name
'utt.html'
"""

from __future__ import annotations

from ._data import LogMel, log_mel
from ._document import UtteranceView, utterance_view
from ._export import BrowserError, export_png, export_svg, save_html, standalone_html
from ._model import ViewModel, view_model, window_state
from ._palette import COLORS, ERROR_OP_COLORS, sequential_ramp
from ._panels import (
    Panel,
    attention_panel,
    lanes_panel,
    occupancy_panel,
    posterior_panel,
    spectrogram_panel,
)

__all__ = [
    "BrowserError",
    "COLORS",
    "ERROR_OP_COLORS",
    "LogMel",
    "Panel",
    "UtteranceView",
    "ViewModel",
    "attention_panel",
    "export_png",
    "export_svg",
    "log_mel",
    "occupancy_panel",
    "posterior_panel",
    "save_html",
    "sequential_ramp",
    "spectrogram_panel",
    "standalone_html",
    "lanes_panel",
    "utterance_view",
    "view_model",
    "window_state",
]
