"""The peek widget's word table: one row per reference word, the word itself a button."""

from __future__ import annotations

import html
import math
from collections.abc import Callable

import ipywidgets as W

from ..views import COLORS, ERROR_OP_COLORS

__all__ = ["WordTable", "OP_NAMES"]

#: Error operation codes of the analysis -> the words the views use.
OP_NAMES = {"C": "correct", "S": "substitution", "D": "deletion", "I": "insertion", "": ""}

#: Times in ms (word edges, reach margin), as every table of peekalign gives them.
_HEAD = ("#", "word", "start ms", "end ms", "error", "hypothesis", "diagnosis", "reach margin ms")


def _style(*, align: str = "left", color: str | None = None, bold: bool = False) -> str:
    style = f"text-align:{align};white-space:nowrap;font-size:12px;"
    if color:
        style += f"color:{color};"
    if bold:
        style += "font-weight:600;"
    return style


def _html(text: str, **style) -> str:
    return f'<div style="{_style(**style)}">{text}</div>'


def _chip(op: str) -> str:
    """An error operation on its own colour (the views' palette), readable ink on top."""
    fg = COLORS["paper"] if op in ("deletion", "insertion") else COLORS["ink"]
    return (
        f'<div style="{_style()}"><span style="background:{ERROR_OP_COLORS[op]};color:{fg};'
        f'padding:0 4px;border-radius:2px">{html.escape(op)}</span></div>'
    )


def _cell(text: str, **style) -> W.HTML:
    return W.HTML(_html(text, **style), layout=W.Layout(margin="0 4px"))


def _num(x: float, fmt: str = "{:.3f}") -> str:
    return "&ndash;" if x is None or (isinstance(x, float) and math.isnan(x)) else fmt.format(x)


def _ms(x: float | None, fmt: str = "{:.0f}") -> str:
    """Seconds shown in ms (``&ndash;`` for none)."""
    return _num(None if x is None else x * 1000.0, fmt)


class WordTable(W.VBox):
    """Reference words with their error operation, diagnosis and reach margin.

    Clicking a word calls ``on_pick(index)``; :meth:`highlight` marks the selected row.
    """

    def __init__(self, on_pick: Callable[[int], None]) -> None:
        self._on_pick = on_pick
        self._buttons: list[W.Button] = []
        self._cells: list[list[W.HTML]] = []
        self._words: list[str] | None = None
        self._grid = W.GridBox(
            layout=W.Layout(
                grid_template_columns="32px minmax(90px, max-content) repeat(6, max-content)",
                grid_gap="1px 2px",
                align_items="center",
            )
        )
        self._title = W.HTML("<b>reference words</b>")
        super().__init__(
            [self._title, self._grid],
            layout=W.Layout(max_height="420px", overflow="auto", padding="0 4px"),
        )
        self.selected = -1

    @property
    def buttons(self) -> list[W.Button]:
        """The word buttons, in reference order (clicking one selects the word)."""
        return self._buttons

    def show(self, rows: list[dict], *, lookahead: int, shift_s: float) -> None:
        """Fill the table from ``UtteranceAnalysis.word_table()`` rows.

        The same words as before update their cells in place (a look-ahead or floor
        change sends a few strings to the page, not a new table).
        """
        words = [str(r["word"]) for r in rows]
        if words != self._words:
            self._build(rows)
        for r, cells in zip(rows, self._cells, strict=True):
            for cell, text in zip(cells, self._texts(r), strict=True):
                if cell.value != text:
                    cell.value = text
        self._title.value = (
            f"<b>reference words</b> <span style='color:#5b6470;font-size:12px'>"
            f"(margin at look-ahead {lookahead} = {lookahead * shift_s * 1000:.0f} ms; "
            f"click a word to select it)</span>"
        )
        self.highlight(self.selected)

    def _build(self, rows: list[dict]) -> None:
        self._words = [str(r["word"]) for r in rows]
        head = [_cell(f"<b>{html.escape(h)}</b>") for h in _HEAD]
        self._buttons, self._cells = [], []
        grid = list(head)
        for r in rows:
            i = int(r["index"])
            b = W.Button(
                description=str(r["word"]),
                tooltip=f"select '{r['word']}' (its last token)",
                layout=W.Layout(width="auto", height="24px", padding="0 6px"),
            )
            b.on_click(lambda _b, i=i: self._on_pick(i))
            cells = [_cell("") for _ in range(len(_HEAD) - 1)]
            self._buttons.append(b)
            self._cells.append(cells)
            grid += [cells[0], b, *cells[1:]]
        self._grid.children = grid

    @staticmethod
    def _texts(r: dict) -> list[str]:
        """HTML of the row's cells except the word button."""
        esc = html.escape
        op = OP_NAMES.get(r.get("op", ""), r.get("op", ""))
        op_color = ERROR_OP_COLORS.get(op) if op not in ("", "correct") else None
        m = r.get("margin_s")
        m_bad = isinstance(m, float) and not math.isnan(m) and not r.get("reached", True)
        code = r.get("code", "")
        bad = COLORS["deletion"]
        return [
            _html(str(r["index"]), align="right", color="#5b6470"),
            _html(_ms(r.get("start_s")), align="right"),
            _html(_ms(r.get("end_s")), align="right"),
            _chip(op) if op_color else _html(esc(op) if op else "&ndash;"),
            _html(esc(str(r.get("hyp_word") or "")) or "&ndash;"),
            _html(esc(code) if code else "", color=bad if code else None),
            _html(_ms(m, "{:+.0f}"), align="right", color=bad if m_bad else None, bold=m_bad),
        ]

    def highlight(self, index: int) -> None:
        """Mark word ``index`` (-1: none) as selected."""
        self.selected = index
        for i, b in enumerate(self._buttons):
            b.button_style = "info" if i == index else ""
