"""Markup in ids, transcripts, meta values, labels, paths and messages comes out as text
in every section of every report page (the templates escape by default)."""

from __future__ import annotations

import html
import re

import pytest
from test_report import XSS_IDS, make_xss_bundle

from peekalign.report import write_comparison, write_report

#: Raw markup that must never reach a page outside a JSON block.
RAW = ("<script>window.__pwned", '<img src=x onerror="window', "<b>bad</b>", '<i class="x">')
SPEAKER = '<i class="x">ana</i> & "bo"'
BAD_ID = '<b>bad</b> & "q"'
ENTITY = "<script>window.__pwned=3</script> depot"
FAIL = '<b>bad</b> drawing & "quotes"'
A = 'model <i class="x">a</i> & co'
GLM = 'alt<i class="x">.glm'
LABELS = ("<b>bad</b>", "B & 'co'")
_JSON = re.compile(r'<script type="application/json"[^>]*>.*?</script>', re.S)


def shows(text: str, source: str) -> bool:
    """``text`` (markup) is on the page as text: the source holds it escaped, never raw."""
    # reference: the standard library's html.unescape reads the character references
    return text in html.unescape(source) and text not in source


def sections(page: str) -> dict[str, str]:
    """A page's parts by their <h2> title (text before the first one under '')."""
    parts = re.split(r"<h2>(.*?)</h2>", page, flags=re.S)
    out = {"": parts[0]}
    for title, body in zip(parts[1::2], parts[2::2], strict=True):
        out[title] = body
    return out


def assert_text_only(page: str) -> None:
    body = _JSON.sub("", page)
    for raw in RAW:
        assert raw not in body, raw


@pytest.fixture(scope="module")
def pages(tmp_path_factory, monkeypatch_module):
    d = tmp_path_factory.mktemp("escaping")
    make_xss_bundle(d / A, meta={"speaker": SPEAKER}, broken_id=BAD_ID)
    make_xss_bundle(d / "b", hyp="tram depot", meta={"speaker": SPEAKER})
    glm = d / GLM
    glm.write_text(";; t\nTWO => { TWO / TOO } / [ ] __ [ ]\n")
    import peekalign.report._pages as pg

    real = pg.render_page

    def render_page(uid, *a, **k):
        if uid == XSS_IDS[1]:  # one page whose views fail: the fallback page and its note
            raise RuntimeError(FAIL)
        return real(uid, *a, **k)

    monkeypatch_module.setattr(pg, "render_page", render_page)
    write_report(
        d / A,
        d / "rep",
        workers=0,
        progress=False,
        by=["speaker"],
        word_counts={"tram": 3, "<script>window.__pwned=3</script>": 1},
        entities=[ENTITY],
        glm=glm,
    )
    write_comparison(d / A, d / "b", d / "cmp", labels=LABELS, workers=0, by="speaker")
    return d


@pytest.fixture(scope="module")
def monkeypatch_module():
    mp = pytest.MonkeyPatch()
    yield mp
    mp.undo()


def test_every_index_section_escapes(pages):
    index = (pages / "rep" / "index.html").read_text()
    assert_text_only(index)
    part = sections(index)
    # reference: hand-worked - where each kind of user text shows on the overview
    expect = {
        "": [str(pages / A)],
        "Scoring": [str(pages / GLM)],
        "WER by speaker": [SPEAKER],
        "Confusions": ["<script>window.__pwned=3</script>"],
        "Errors by word frequency": [],
        "Entity list": [ENTITY],
        "What a listener sees": [],
        "Worst utterances": XSS_IDS[:2],
        "Problems": [BAD_ID],
        "Pages without views": [XSS_IDS[1], FAIL],
    }
    for title, needles in expect.items():
        assert title in part, title
        assert_text_only(part[title])
        for n in needles:
            assert shows(n, part[title]), (title, n)
    # the slice values inside the chart (SVG text) too
    assert shows(SPEAKER, part["WER by speaker"].split("<svg", 1)[1])


def test_utterance_and_fallback_pages_escape(pages):
    texts = {p.name: p.read_text() for p in (pages / "rep" / "utts").iterdir()}
    assert len(texts) == 3
    for text in texts.values():
        assert_text_only(text)
        assert shows("<script>window.__pwned=3</script>", text)  # the word table
    fallback = [t for t in texts.values() if "could not be drawn" in t]
    assert len(fallback) == 1
    assert shows(FAIL, fallback[0]) and shows(XSS_IDS[1], fallback[0])
    for t in texts.values():
        if t is not fallback[0]:
            nav = re.search(r'<span class="id">(.*?)</span>', t).group(1)
            assert html.unescape(nav) in XSS_IDS and (
                nav == "plain-0001" or shows(html.unescape(nav), nav)
            )


def test_comparison_pages_escape(pages):
    index = (pages / "cmp" / "index.html").read_text()
    assert_text_only(index)
    part = sections(index)
    assert shows(f"{LABELS[0]}: {pages / A}", part[""])
    title = next(t for t in part if t.startswith("Is "))
    assert html.unescape(title) == f"Is {LABELS[1]} better than {LABELS[0]}?"
    assert shows(f"WER {LABELS[0]}", part[title])
    assert 'id="significance-speaker"' in part[title] and shows(SPEAKER, part[title])
    assert shows(f"{LABELS[0]} (solid) and {LABELS[1]} (light)", part["Deleted words by cause"])
    assert shows(XSS_IDS[0], part["Utterances"])
    assert shows("<script>window.__pwned=3</script>", part["Words whose status changed"])
    assert shows(BAD_ID, part["Problems"])
    sides = [p.read_text() for p in (pages / "cmp" / "utts").glob("*.html")]
    assert len(sides) == 3
    for text in sides:
        assert_text_only(text)
        assert shows(LABELS[0], text) and shows(LABELS[1], text)
    # the side-by-side page of each markup id shows it as text
    for uid in XSS_IDS[:2]:
        assert sum(shows(uid, t) for t in sides) == 1
