"""HTML of the report: the Jinja2 templates, sortable tables, number formats, escaping.

Pages are Jinja2 templates (``peekalign/report/templates/``, one file per page, one
per overview section) rendered with autoescape on: every id, word and transcript a
template shows is escaped unless it is :class:`markupsafe.Markup`. Markup comes from
one place, :func:`trusted`, for HTML we generate ourselves (the SVG charts, JSON inside
``<script>``, rendered templates). JSON inside ``<script>`` goes through
:func:`script_json`, which turns ``</`` into ``<\\/`` so no text can close the script
element. :func:`esc` escapes text inside the SVG charts, which are drawn in Python.
"""

from __future__ import annotations

import functools
import hashlib
import html
import json
import math
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from urllib.parse import quote

from markupsafe import Markup

__all__ = [
    "esc",
    "trusted",
    "render",
    "script_json",
    "Cell",
    "Column",
    "Section",
    "sortable_table",
    "fmt_num",
    "page_name",
    "page_names",
]


def esc(x: object) -> str:
    """Text as HTML (``&``, ``<``, ``>``, quotes escaped)."""
    return html.escape("" if x is None else str(x), quote=True)


def script_json(obj) -> str:
    """JSON safe inside a ``<script>`` element (``</`` -> ``<\\/``, ``<!--`` escaped)."""
    text = json.dumps(obj, ensure_ascii=False, sort_keys=True, allow_nan=False, default=str)
    return text.replace("</", "<\\/").replace("<!--", "\\u003c!--")


def fmt_num(v, digits: int = 3, *, signed: bool = False, percent: bool = False) -> str:
    """A number for a cell: fixed digits, '' for missing, '∞' for inf."""
    if v is None:
        return ""
    if isinstance(v, float):
        if math.isnan(v):
            return ""
        if math.isinf(v):
            return "∞" if v > 0 else "−∞"
    if isinstance(v, int) and not isinstance(v, bool):
        return (f"{v:+d}" if signed and v else str(v)).replace("-", "−")
    if percent:
        return f"{v * 100:.{max(digits - 2, 0)}f} %"
    s = f"{v:+.{digits}f}" if signed else f"{v:.{digits}f}"
    return s.replace("-", "−")


# -- page names ------------------------------------------------------------------------

_SAFE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,119}")


def page_name(uid: str, *, suffixed: bool = False) -> str:
    """File name of an utterance's page: the id itself when it is a plain name, else a
    cleaned name plus a short hash of the id (always unique, never a path)."""
    if _SAFE.fullmatch(uid) and not suffixed and not uid.endswith("."):
        return f"{uid}.html"
    clean = re.sub(r"[^A-Za-z0-9._-]+", "_", uid).strip("._-")[:100] or "utt"
    digest = hashlib.sha1(uid.encode("utf-8")).hexdigest()[:8]
    return f"{clean}-{digest}.html"


def page_names(ids: Iterable[str]) -> dict[str, str]:
    """Page file names of ``ids``, unique even on case-insensitive file systems."""
    ids = list(ids)
    plain = {u: page_name(u) for u in ids}
    seen: dict[str, list[str]] = {}
    for u, n in plain.items():
        seen.setdefault(n.lower(), []).append(u)
    clash = {u for group in seen.values() if len(group) > 1 for u in group}
    return {u: page_name(u, suffixed=u in clash) for u in ids}


def href(*parts: str) -> str:
    """A relative link from path parts (each percent-encoded)."""
    return "/".join(quote(p, safe="") for p in parts)


# -- templates ---------------------------------------------------------------------------


def trusted(html_text: str) -> Markup:
    """HTML we generate ourselves, to be inserted into a template as it is.

    The only place in the report where text becomes :class:`~markupsafe.Markup`: the
    SVG charts of :mod:`._svg` (their text escaped with :func:`esc` as they are
    drawn), JSON inside ``<script>`` (:func:`script_json`) and rendered templates.
    Anything else a template shows is escaped.
    """
    return Markup(html_text)


@functools.cache
def environment():
    """The report's Jinja2 environment: package templates, autoescape on, undefined
    names an error (compiled templates are cached by the environment)."""
    import jinja2

    env = jinja2.Environment(
        loader=jinja2.PackageLoader("peekalign.report", "templates"),
        autoescape=True,
        trim_blocks=True,
        lstrip_blocks=True,
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
    )
    env.filters["num"] = fmt_num
    env.filters["text"] = lambda x: "" if x is None else x
    env.filters["href"] = lambda parts: href(*([parts] if isinstance(parts, str) else parts))
    env.filters["script_json"] = lambda obj: trusted(script_json(obj))
    from ._figures import SLIDE_H, SLIDE_W, TITLE_PX

    env.globals.update(slide_w=SLIDE_W, slide_h=SLIDE_H, title_px=TITLE_PX)
    return env


def render(template: str, **context) -> Markup:
    """``template`` (a file of ``templates/``) rendered with ``context``."""
    return trusted(environment().get_template(template).render(**context))


@dataclass(frozen=True)
class Section:
    """A rendered section of a report page (None: nothing to show) and the files it
    links to (listed under "Tables")."""

    html: Markup | None
    files: tuple[str, ...] = ()


# -- sortable tables -----------------------------------------------------------------------


@dataclass(frozen=True)
class Cell:
    """What a table cell shows when it is more than its text: a link, a CSS class, a
    tooltip or a row of chips (``(text, tooltip)`` pairs). Text is escaped."""

    text: object = ""
    href: str | None = None
    css: str = ""
    tip: str = ""
    chips: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class Column:
    """One column of a sortable table.

    ``get(row)`` gives the value, ``cell(row)`` what the cell shows: text (escaped) or a
    :class:`Cell` (default: the formatted value), ``num`` whether it sorts as a number.
    """

    title: str
    get: Callable
    num: bool = False
    cell: Callable | None = None
    css: str = ""
    tip: str = ""


def _sort_value(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "1" if v else "0"
    if isinstance(v, float):
        return "" if math.isnan(v) else repr(v)
    return str(v)


@dataclass(frozen=True)
class Table:
    """A sortable table ready for the ``table`` macro of ``macros.html``."""

    id: str
    columns: Sequence[Column]
    rows: list = field(default_factory=list)
    caption: str = ""


def _cells(columns: Sequence[Column], rows: Iterable) -> list[list[dict]]:
    out = []
    for r in rows:
        cells = []
        for c in columns:
            v = c.get(r)
            shown = c.cell(r) if c.cell is not None else (fmt_num(v) if c.num else v)
            if not isinstance(shown, Cell):
                shown = Cell("" if shown is None else shown)
            classes = " ".join(x for x in ("num" if c.num else "", c.css, shown.css) if x)
            cells.append({"v": _sort_value(v), "cls": classes, "c": shown})
        out.append(cells)
    return out


def sortable_table(
    columns: Sequence[Column], rows: Iterable, *, table_id: str, caption: str = ""
) -> Table:
    """A table whose column headers sort it (click again to reverse); a template shows
    it with ``{{ m.table(t) }}`` (``macros.html``)."""
    return Table(table_id, list(columns), _cells(columns, rows), caption)


def problems_table(problems) -> Table | None:
    """The utterances that could not be analysed (None when there are none)."""
    if not problems:
        return None
    cols = [
        Column("utterance", lambda p: p.utt),
        Column("problem", lambda p: p.message, css="wrap"),
    ]
    return sortable_table(cols, problems, table_id="problems")


def card(key: str, value: str, detail: str = "", *, bad: bool = False) -> dict:
    """A small totals box (plain text, escaped by the template)."""
    return {"k": key, "v": value, "d": detail, "bad": bad}
