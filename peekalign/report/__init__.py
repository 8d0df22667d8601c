"""Static HTML reports of a corpus scan and of a two-model comparison.

A report is a folder that opens from disk with no network and no kernel:
``index.html`` (totals, charts, sortable tables), one page per utterance with its
linked views, BokehJS stored once under ``static/js`` and the CSV tables.

>>> from peekalign.report import write_report
>>> s = write_report("bundle", "report", pages=2, workers=1, progress=False)
>>> import os; os.path.isfile("report/index.html")
True
"""

from __future__ import annotations

from ._compare import write_comparison
from ._scan import render_index, write_report

__all__ = ["render_index", "write_comparison", "write_report"]
