"""HTML pieces of the report: escaping, page frame, sortable tables, number formats.

Every id, word and transcript goes through :func:`esc` (``html.escape`` with quotes);
JSON inside ``<script>`` goes through :func:`script_json`, which turns ``</`` into
``<\\/`` so no text can close the script element.
"""

from __future__ import annotations

import hashlib
import html
import json
import math
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from urllib.parse import quote

__all__ = [
    "esc",
    "script_json",
    "page",
    "Column",
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


# -- page frame --------------------------------------------------------------------------

CSS = """
:root { --ink:#1b2430; --muted:#5b6470; --line:#d9dde2; --soft:#f4f6f8; --accent:#1f5fa8;
        --bad:#b31b34; --good:#2f9a7f; --warn:#f08a24; }
* { box-sizing: border-box; }
body { margin: 0; font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif;
       color: var(--ink); background: #fff; }
header.top { background: var(--ink); color: #fff; padding: 14px 28px; }
header.top h1 { margin: 0; font-size: 19px; font-weight: 600; }
header.top .sub { color: #c9d1db; font-size: 13px; margin-top: 2px; word-break: break-all; }
header.top a { color: #fff; }
main { padding: 18px 28px 40px; max-width: 1320px; }
h2 { font-size: 16px; margin: 28px 0 10px; padding-bottom: 4px; border-bottom: 1px solid var(--line); }
.cards { display: grid; grid-template-columns: repeat(auto-fill, minmax(185px, 1fr)); gap: 10px; }
.cards.wide { grid-template-columns: repeat(auto-fill, minmax(250px, 1fr)); }
.card { border: 1px solid var(--line); border-radius: 6px; padding: 9px 12px; background: var(--soft); }
.card .k { font-size: 12px; color: var(--muted); }
.card .v { font-size: 21px; font-weight: 600; font-variant-numeric: tabular-nums; }
.card .d { font-size: 12px; color: var(--muted); }
.card.bad .v { color: var(--bad); }
.charts { display: grid; grid-template-columns: repeat(auto-fill, minmax(460px, 1fr)); gap: 14px; }
figure { margin: 0; border: 1px solid var(--line); border-radius: 6px; padding: 8px 10px 4px; }
figcaption { font-weight: 600; font-size: 13px; }
figure .note { font-size: 12px; color: var(--muted); margin: 2px 0 4px; }
svg text { font: 11px system-ui, sans-serif; fill: var(--ink); }
.tablewrap { overflow-x: auto; border: 1px solid var(--line); border-radius: 6px; }
table.data { border-collapse: collapse; width: 100%; font-size: 13px; }
table.data th, table.data td { padding: 4px 8px; border-bottom: 1px solid #eceef1; text-align: left;
                                white-space: nowrap; }
table.data td.num, table.data th.num { text-align: right; font-variant-numeric: tabular-nums; }
table.data td.wrap { white-space: normal; min-width: 260px; }
table.data thead th { background: var(--soft); position: sticky; top: 0; }
table.data th button { all: unset; cursor: pointer; font-weight: 600; }
table.data th button:focus-visible { outline: 2px solid var(--accent); }
table.data th[aria-sort=ascending] button::after { content: " \\25B2"; font-size: 10px; }
table.data th[aria-sort=descending] button::after { content: " \\25BC"; font-size: 10px; }
table.data tbody tr:hover { background: #f7f9fb; }
td.bad, span.bad { color: var(--bad); font-weight: 600; }
.chip { display: inline-block; padding: 0 5px; border-radius: 3px; font-size: 12px; margin-right: 3px;
        background: #eef1f4; }
.muted { color: var(--muted); }
.files a { margin-right: 14px; }
.problems td.wrap { color: var(--bad); }
footer { color: var(--muted); font-size: 12px; margin-top: 30px; }
"""

SORT_JS = """
(function () {
  function key(td, num) {
    var v = td.getAttribute('data-v');
    if (v === null) v = td.textContent;
    if (!num) return v.toLowerCase();
    var x = parseFloat(v);
    return isNaN(x) ? null : x;
  }
  document.querySelectorAll('table.sortable').forEach(function (table) {
    var heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function (th, col) {
      var b = th.querySelector('button');
      if (!b) return;
      b.addEventListener('click', function () {
        var num = th.getAttribute('data-type') === 'num';
        var dir = th.getAttribute('aria-sort') === 'ascending' ? -1 : 1;
        Array.prototype.forEach.call(heads, function (h) { h.setAttribute('aria-sort', 'none'); });
        th.setAttribute('aria-sort', dir === 1 ? 'ascending' : 'descending');
        var body = table.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        rows.sort(function (ra, rb) {
          var a = key(ra.cells[col], num), c = key(rb.cells[col], num);
          if (a === null && c === null) return 0;
          if (a === null) return 1;   // empty cells last either way
          if (c === null) return -1;
          if (num) return dir * (a - c);
          return dir * a.localeCompare(c);
        });
        rows.forEach(function (r) { body.appendChild(r); });
      });
    });
  });
})();
"""


def page(title: str, body: str, *, subtitle: str = "", head_extra: str = "") -> str:
    """A whole HTML page (no network: styles and scripts inline)."""
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n{head_extra}</head>\n<body>\n"
        f'<header class="top"><h1>{esc(title)}</h1>'
        + (f'<div class="sub">{subtitle}</div>' if subtitle else "")
        + f"</header>\n<main>\n{body}\n</main>\n<script>{SORT_JS}</script>\n</body>\n</html>\n"
    )


@dataclass(frozen=True)
class Column:
    """One column of a sortable table.

    ``get(row)`` gives the value, ``cell(row)`` the cell's inner HTML (default: the
    escaped/formatted value), ``num`` whether it sorts as a number.
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


def sortable_table(
    columns: Sequence[Column], rows: Iterable, *, table_id: str, caption: str = ""
) -> str:
    """A table whose column headers sort it (click again to reverse)."""
    head = []
    for c in columns:
        cls = ' class="num"' if c.num else ""
        tip = f' title="{esc(c.tip)}"' if c.tip else ""
        head.append(
            f'<th{cls} data-type="{"num" if c.num else "text"}" aria-sort="none"{tip}>'
            f'<button type="button">{esc(c.title)}</button></th>'
        )
    body = []
    for r in rows:
        cells = []
        for c in columns:
            v = c.get(r)
            inner = c.cell(r) if c.cell is not None else (fmt_num(v) if c.num else esc(v))
            classes = " ".join(x for x in ("num" if c.num else "", c.css) if x)
            cls = f' class="{classes}"' if classes else ""
            cells.append(f'<td{cls} data-v="{esc(_sort_value(v))}">{inner}</td>')
        body.append("<tr>" + "".join(cells) + "</tr>")
    cap = f"<caption class='muted'>{esc(caption)}</caption>" if caption else ""
    return (
        f'<div class="tablewrap"><table class="data sortable" id="{esc(table_id)}">{cap}'
        f"<thead><tr>{''.join(head)}</tr></thead>\n<tbody>\n"
        + "\n".join(body)
        + "\n</tbody></table></div>"
    )


def card(key: str, value: str, detail: str = "", *, bad: bool = False) -> str:
    """A small totals box (arguments are already HTML)."""
    cls = "card bad" if bad else "card"
    d = f'<div class="d">{detail}</div>' if detail else ""
    return f'<div class="{cls}"><div class="k">{key}</div><div class="v">{value}</div>{d}</div>'
