"""Jupyter peek widget: ipywidgets controls around the views' bokeh figures.

>>> import peekalign
>>> app = peekalign.peek(peekalign.open_bundle("bundle"))
>>> type(app).__name__
'Peek'
"""

from __future__ import annotations

from ._peek import Peek, load_bokehjs, peek
from ._state import PeekState

__all__ = ["Peek", "PeekState", "peek", "load_bokehjs"]
