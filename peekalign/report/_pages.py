"""Per-utterance pages of the report, drawn inside the scan's workers.

Each page is the utterance's linked views (:func:`peekalign.views.utterance_view`) plus
its word table. Pages do not carry BokehJS themselves: they load it from the report's
``static/js/`` folder by a relative path, so the ~2 MB library is stored once per
report and the pages still open from disk with no network.
"""

from __future__ import annotations

import functools
import math
import re
import shutil
from dataclasses import dataclass
from pathlib import Path

from ._html import esc, fmt_num

__all__ = ["PageWriter", "copy_bokeh_js", "fallback_page", "word_table_html"]

#: Relative folder (inside the report) holding BokehJS.
STATIC = "static"

_JS_REF = re.compile(r'src="(?:\.\./)+static/js/([A-Za-z0-9._-]+\.js)"')

_TEMPLATE = """
{% block preamble %}<style>
body { margin: 0; font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif;
       color: #1b2430; }
nav.pk { background: #1b2430; color: #fff; padding: 8px 18px; font-size: 13px; }
nav.pk a { color: #fff; margin-right: 16px; }
nav.pk .id { font-weight: 600; margin-right: 16px; }
section.pk { padding: 8px 18px 30px; }
section.pk h2 { font-size: 15px; margin: 18px 0 8px; }
.pkview { padding: 6px 12px; }
table.data { border-collapse: collapse; font-size: 13px; }
table.data th, table.data td { padding: 3px 8px; border-bottom: 1px solid #eceef1; text-align: left;
                                white-space: nowrap; }
table.data td.num { text-align: right; font-variant-numeric: tabular-nums; }
table.data thead th { background: #f4f6f8; }
td.bad { color: #b31b34; font-weight: 600; }
.muted { color: #5b6470; }
</style>{% endblock %}
{% block contents %}{{ pk_before }}<div class="pkview">{{ super() }}</div>{{ pk_after }}{% endblock %}
"""


def _op_cell(op: str) -> str:
    return f'<td class="bad">{esc(op)}</td>' if op and op != "correct" else f"<td>{esc(op)}</td>"


def word_table_html(rows: list[dict]) -> str:
    """The words of one utterance as a plain table (the scan's word-table fields)."""
    head = (
        "word",
        "start s",
        "end s",
        "times from",
        "error",
        "hypothesis",
        "diagnosis",
        "reach margin ms",
        "emission delay ms",
        "trigger frame",
        "window end frame",
    )
    out = [
        '<table class="data"><thead><tr>'
        + "".join(f"<th>{esc(h)}</th>" for h in head)
        + "</tr></thead><tbody>"
    ]
    for r in rows:
        m = r.get("reach_margin_ms")
        bad_m = isinstance(m, float) and not math.isnan(m) and m < -1e-6
        out.append(
            "<tr>"
            f"<td>{esc(r.get('word'))}</td>"
            f'<td class="num">{fmt_num(r.get("start_s"))}</td>'
            f'<td class="num">{fmt_num(r.get("end_s"))}</td>'
            f"<td>{esc(r.get('time_source'))}</td>"
            + _op_cell(str(r.get("op") or ""))
            + f"<td>{esc(r.get('hyp_word'))}</td>"
            f"<td>{esc(r.get('diagnosis'))}</td>"
            f'<td class="num{" bad" if bad_m else ""}">{fmt_num(m, 0, signed=True)}</td>'
            f'<td class="num">{fmt_num(r.get("emission_delay_ms"), 0, signed=True)}</td>'
            f'<td class="num">{esc(r.get("trigger_frame"))}</td>'
            f'<td class="num">{esc(r.get("window_end_frame"))}</td>'
            "</tr>"
        )
    out.append("</tbody></table>")
    return "".join(out)


def _nav(uid: str, back: str, extra: str = "") -> str:
    return (
        f'<nav class="pk"><a href="{esc(back)}">&larr; overview</a>'
        f'<span class="id">{esc(uid)}</span>{extra}</nav>'
    )


def fallback_page(uid: str, message: str, words: list[dict], *, back: str) -> str:
    """A page without views (when they could not be drawn): the reason and the words."""
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>peekalign: {esc(uid)}</title>"
        "<style>body{font:14px system-ui,sans-serif;margin:0;color:#1b2430}"
        "nav{background:#1b2430;color:#fff;padding:8px 18px}nav a{color:#fff;margin-right:16px}"
        "section{padding:8px 18px}table{border-collapse:collapse;font-size:13px}"
        "td,th{padding:3px 8px;border-bottom:1px solid #eceef1;text-align:left}"
        ".bad{color:#b31b34}</style></head><body>"
        f'<nav><a href="{esc(back)}">&larr; overview</a><b>{esc(uid)}</b></nav><section>'
        f'<p class="bad">The views of this utterance could not be drawn: {esc(message)}</p>'
        f"<h2>Words</h2>{word_table_html(words)}</section></body></html>\n"
    )


def _word_dicts(analysis) -> list[dict]:
    from ..corpus import WORD_COLUMNS, _word_row

    rows = []
    for k, w in enumerate(analysis.word_table()):
        row = _word_row("", k, w)  # the analysis' own columns (no partial results)
        rows.append(dict(zip(WORD_COLUMNS[: len(row)], row, strict=True)))
    return rows


@dataclass(frozen=True)
class PageWriter:
    """Draws one utterance's page in a worker (``scan(on_utterance=...)``).

    Attributes
    ----------
    folder : str
        Where the pages go (the report's temporary ``utts`` folder).
    depth : int
        Folders between the report's root and ``folder`` (``../`` to reach static).
    clash : frozenset
        Ids whose plain page names collide on a case-insensitive file system.
    lookahead : int or None
    back : str
        Link to the overview page.
    width : int
        Plot width of the views.
    """

    folder: str
    depth: int = 1
    clash: frozenset = frozenset()
    lookahead: int | None = None
    back: str = "../index.html"
    width: int = 900
    nav: bool = True

    def __call__(self, utt, analysis) -> dict:
        from ._html import page_name

        name = page_name(utt.id, suffixed=utt.id in self.clash)
        path = Path(self.folder) / name
        words = _word_dicts(analysis)
        try:
            text = render_page(
                utt.id,
                analysis,
                words,
                lookahead=self.lookahead,
                root="../" * self.depth,
                back=self.back,
                width=self.width,
                nav=self.nav,
            )
            error = None
        except Exception as exc:  # one utterance's drawing must not stop the report
            error = f"{type(exc).__name__}: {exc}"
            text = fallback_page(utt.id, error, words, back=self.back)
        path.write_text(text, encoding="utf-8")
        return {
            "page": name,
            "bytes": len(text.encode("utf-8")),
            "js": sorted(set(_JS_REF.findall(text))),
            "error": error,
        }


def render_page(
    uid: str,
    analysis,
    words: list[dict],
    *,
    lookahead: int | None,
    root: str,
    back: str,
    width: int = 900,
    nav: bool = True,
) -> str:
    """One utterance's page: views (BokehJS loaded from ``root + static/js/``), words."""
    from bokeh.resources import Resources

    from ..views import utterance_view
    from ..views._document import to_document

    view = utterance_view(analysis, lookahead=lookahead, width=width)
    doc = to_document(view, title=f"peekalign: {uid}")
    # "server" mode with a relative root gives plain relative <script src> paths
    res = Resources(mode="server", root_url=root, minified=True)
    after = f'<section class="pk"><h2>Words</h2>{word_table_html(words)}</section>'
    return _doc_html(
        doc,
        res,
        title=f"peekalign: {uid}",
        variables={"pk_before": _nav(uid, back) if nav else "", "pk_after": after},
    )


@functools.cache
def _template():
    """The page template, compiled once per process (bokeh compiles a string each time)."""
    from bokeh.core.templates import get_env

    return get_env().from_string("{% extends base %}\n" + _TEMPLATE)


class _Models:
    """Stands for a document's roots where bokeh asks for their ``references()``."""

    def __init__(self, doc) -> None:
        self._models = set(doc.models)

    def references(self) -> set:
        return self._models


def _doc_html(doc, resources, *, title: str, variables: dict) -> str:
    """``bokeh.embed.file_html`` of a whole document, minus its per-call extra walks.

    file_html walks the model graph four times besides serialising it: integrity checks
    (warnings meant for hand-built layouts; the views' tests cover ours), a search for
    Python callbacks (a page has none) and a fresh template compile; its serialiser
    builds every default value it then leaves out (``views._serialize``). The page is
    the same: the document's JSON, one render item for its roots, the BokehJS bundle its
    models need.
    """
    from bokeh.embed.bundle import bundle_for_objs_and_resources
    from bokeh.embed.elements import html_page_for_render_items
    from bokeh.embed.util import RenderItem
    from bokeh.util.serialization import make_globally_unique_css_safe_id, make_globally_unique_id

    from ..views._serialize import document_json

    docid = make_globally_unique_id()
    roots = {r: make_globally_unique_css_safe_id() for r in doc.roots}
    docs_json = {docid: document_json(doc)}
    # the document already holds the set of its models: spare bokeh a second walk
    bundle = bundle_for_objs_and_resources([_Models(doc)], resources)
    return html_page_for_render_items(
        bundle,
        docs_json,
        [RenderItem(docid, roots=roots)],
        title=title,
        template=_template(),
        template_variables=variables,
    )


def copy_bokeh_js(report_dir: Path, names) -> list[Path]:
    """Copy the BokehJS files the pages reference into ``report_dir/static/js``."""
    from bokeh.settings import settings

    src = Path(settings.bokehjs_path()) / "js"
    dst = Path(report_dir) / STATIC / "js"
    dst.mkdir(parents=True, exist_ok=True)
    out = []
    for n in sorted(set(names)):
        shutil.copyfile(src / n, dst / n)
        out.append(dst / n)
    return out
