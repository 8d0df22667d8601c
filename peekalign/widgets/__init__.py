"""Jupyter explorer: ipywidgets controls around the views' bokeh figures.

>>> import peekalign
>>> app = peekalign.explore(peekalign.open_bundle("bundle"))   # doctest: +SKIP
>>> app                                                        # doctest: +SKIP
"""

from __future__ import annotations

from ._explorer import Explorer, explore, load_bokehjs
from ._state import ExplorerState

__all__ = ["Explorer", "ExplorerState", "explore", "load_bokehjs"]
