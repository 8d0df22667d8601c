"""Per-utterance pages of the report, drawn inside the scan's workers.

Each page is the utterance's linked views (:func:`peekalign.views.utterance_view`) plus
its word table. Pages do not carry BokehJS themselves: they load it from the report's
``static/js/`` folder by a relative path, so the ~2 MB library is stored once per
report and the pages still open from disk with no network.
"""

from __future__ import annotations

import functools
import re
import shutil
from dataclasses import dataclass
from pathlib import Path

from ._html import environment, render

__all__ = ["PageWriter", "copy_bokeh_js", "fallback_page", "word_table_html"]

#: Relative folder (inside the report) holding BokehJS.
STATIC = "static"

_JS_REF = re.compile(r'src="(?:\.\./)+static/js/([A-Za-z0-9._-]+\.js)"')


def word_table_html(rows: list[dict]) -> str:
    """The words of one utterance as a plain table (the scan's word-table fields)."""
    return render("word_table.html", words=rows)


def fallback_page(uid: str, message: str, words: list[dict], *, back: str) -> str:
    """A page without views (when they could not be drawn): the reason and the words."""
    return render("fallback.html", uid=uid, message=message, words=words, back=back)


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
    from ..views import utterance_view
    from ..views._document import to_document

    # a page needs no live models: static records write the same document, faster
    view = utterance_view(analysis, lookahead=lookahead, width=width, static=True)
    doc = to_document(view, title=f"peekalign: {uid}")
    res = _resources(root)
    variables = {"pk_nav": nav, "pk_back": back, "pk_uid": uid, "pk_words": words}
    return _doc_html(doc, res, title=f"peekalign: {uid}", variables=variables)


@functools.lru_cache(maxsize=8)
def _resources(root: str):
    """BokehJS resources loaded from ``root + static/js/``: one object per root, so the
    page's script list is made once (``views._static.resources_bundle``)."""
    from bokeh.resources import Resources

    # "server" mode with a relative root gives plain relative <script src> paths
    return Resources(mode="server", root_url=root, minified=True)


def _template():
    """``templates/utterance.html``: bokeh's page with our navigation and words."""
    return environment().get_template("utterance.html")


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
    from ..views._static import StaticDocument, file_html

    if isinstance(doc, StaticDocument):
        return file_html(doc, resources, title=title, template=_template(), variables=variables)
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
