"""The scan report in a real browser: headless Debian Chromium through playwright.

No console errors, column sorting, links that resolve, nothing fetched from the
network, and ids/words that are HTML shown as text with no script run.
"""

from __future__ import annotations

from pathlib import Path
from urllib.parse import unquote, urlsplit

import pytest
from browser import chromium
from test_corpus import make_bundle
from test_report import XSS_IDS, make_xss_bundle

from peekalign.report import write_comparison, write_report

pytestmark = pytest.mark.browser


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    # profile, HOME and TMPDIR under pytest's tmp dir: Chromium's files stay out of the
    # user's home
    tmp = tmp_path_factory.mktemp("chromium-profile")
    with chromium(tmp, viewport={"width": 1400, "height": 1000}) as ctx:
        yield ctx


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    d = tmp_path_factory.mktemp("browser-report")
    b = make_bundle(d / "bundle", n=8, seed=31, broken={5: "unalignable"})
    out = d / "out"
    write_report(b, out, workers=2, progress=False)
    return out


class Watched:
    """A page with its console errors, script errors and requests recorded."""

    def __init__(self, ctx):
        self.page = ctx.new_page()
        self.errors: list[str] = []
        self.requests: list[str] = []
        self.page.on(
            "console", lambda m: self.errors.append(m.text) if m.type == "error" else None
        )
        self.page.on("pageerror", lambda e: self.errors.append(str(e)))
        self.page.on("requestfailed", lambda r: self.errors.append(f"failed {r.url}"))
        self.page.on("request", lambda r: self.requests.append(r.url))

    def open(self, path: Path):
        self.page.goto(path.as_uri())
        self.page.wait_for_load_state("load")
        return self.page

    def wait_for_bokeh(self):
        self.page.wait_for_function(
            "typeof Bokeh !== 'undefined' && Bokeh.documents.length > 0 && "
            "Bokeh.documents[0].is_idle",
            timeout=30_000,
        )


def _column(page, table: str, col: int) -> list[str]:
    return page.eval_on_selector_all(
        f"#{table} tbody tr",
        f"rows => rows.map(r => r.cells[{col}].getAttribute('data-v'))",
    )


def _num(v: str) -> float | None:
    return float(v) if v not in ("", None) else None


def test_index_opens_without_errors_and_sorts(browser, report, tmp_path):
    w = Watched(browser)
    page = w.open(report / "index.html")
    page.screenshot(path=str(tmp_path / "index.png"), full_page=True)
    assert w.errors == []
    assert all(u.startswith("file://") for u in w.requests)
    heads = page.eval_on_selector_all("#worst thead th", "ths => ths.map(t => t.textContent)")
    wer_col = heads.index("WER")
    # reference: Python's sort of the same cell values
    page.click(f"#worst thead th:nth-child({wer_col + 1}) button")
    vals = [_num(v) for v in _column(page, "worst", wer_col)]
    nums = [v for v in vals if v is not None]
    assert nums == sorted(nums) and len(set(nums)) > 1
    assert vals[: len(nums)] == nums  # empty cells last
    assert page.get_attribute(f"#worst thead th:nth-child({wer_col + 1})", "aria-sort") == (
        "ascending"
    )
    page.click(f"#worst thead th:nth-child({wer_col + 1}) button")
    nums = [v for v in map(_num, _column(page, "worst", wer_col)) if v is not None]
    assert nums == sorted(nums, reverse=True)
    # text column: ids in ascending order
    page.click("#worst thead th:nth-child(1) button")
    ids = _column(page, "worst", 0)
    assert ids == sorted(ids)
    # the broken utterance is listed with its reason
    problems = page.inner_text("#problems")
    assert "dispatch-0005" in problems and "frames" in problems
    assert w.errors == []


def test_every_link_resolves_and_pages_draw(browser, report, tmp_path):
    w = Watched(browser)
    page = w.open(report / "index.html")
    hrefs = page.eval_on_selector_all("a[href]", "as => as.map(a => a.href)")
    assert len(hrefs) >= 7 + 4  # seven utterance pages and the CSV tables
    for h in hrefs:
        assert h.startswith("file://")
        assert Path(unquote(urlsplit(h).path)).exists(), h
    # follow one link as a user would
    page.click("#worst tbody tr:first-child a")
    page.wait_for_load_state("load")
    w.wait_for_bokeh()
    page.screenshot(path=str(tmp_path / "utterance.png"), full_page=True)
    assert "/utts/" in page.url
    # the views are drawn from the report's own BokehJS copy
    assert any(u.endswith("/static/js/bokeh.min.js") for u in w.requests)
    assert all(u.startswith("file://") for u in w.requests)
    page.click("nav.pk a")
    page.wait_for_load_state("load")
    assert page.url.endswith("/index.html")
    assert w.errors == []


def test_markup_in_ids_and_words_stays_text(browser, tmp_path):
    b = make_xss_bundle(tmp_path / "b")
    out = tmp_path / "out"
    write_report(b, out, workers=0, progress=False)
    w = Watched(browser)
    page = w.open(out / "index.html")
    assert page.evaluate("window.__pwned") is None
    cells = page.eval_on_selector_all(
        "#worst tbody td:first-child", "t => t.map(c => c.innerText)"
    )
    assert sorted(cells) == sorted(XSS_IDS)  # shown literally, as text
    for k in range(len(XSS_IDS)):
        page = w.open(out / "index.html")
        page.click(f"#worst tbody tr:nth-child({k + 1}) a")
        page.wait_for_load_state("load")
        w.wait_for_bokeh()
        assert page.evaluate("window.__pwned") is None
        assert "<script>window.__pwned=3</script>" in page.inner_text("section.pk")
    page.screenshot(path=str(tmp_path / "xss.png"), full_page=True)
    assert w.errors == []


def test_compare_report_opens(browser, tmp_path):
    a = make_bundle(tmp_path / "a", n=3, seed=8)
    b = make_bundle(tmp_path / "b", n=3, seed=8, hyp_seed=4)
    out = tmp_path / "cmp"
    write_comparison(a, b, out, workers=0, progress=False, labels=("stream", "full"))
    w = Watched(browser)
    page = w.open(out / "index.html")
    page.click("#deltas tbody tr:first-child a")
    page.wait_for_load_state("load")
    frames = [f for f in page.frames if f != page.main_frame]
    assert len(frames) == 2
    for f in frames:
        f.wait_for_function("typeof Bokeh !== 'undefined' && Bokeh.documents.length > 0")
    page.screenshot(path=str(tmp_path / "compare.png"), full_page=True)
    assert all(u.startswith("file://") for u in w.requests)
    assert w.errors == []


def test_markup_stays_text_in_comparison_and_standalone_view(browser, tmp_path):
    # issue: no injected script may run in the view, the report or the comparison page
    from peekalign import open_bundle
    from peekalign.views import save_html

    a = make_xss_bundle(tmp_path / "a")
    out = tmp_path / "cmp"
    write_comparison(a, a, out, workers=0, progress=False, labels=("x", "y"))
    w = Watched(browser)
    page = w.open(out / "index.html")
    assert page.evaluate("window.__pwned") is None
    page.click("#deltas tbody tr:first-child a")
    page.wait_for_load_state("load")
    frames = [f for f in page.frames if f != page.main_frame]
    assert len(frames) == 2
    for f in frames:
        f.wait_for_function("typeof Bokeh !== 'undefined' && Bokeh.documents.length > 0")
        assert f.evaluate("window.__pwned") is None
    assert page.evaluate("window.__pwned") is None
    view = tmp_path / "view.html"
    save_html(open_bundle(a)[XSS_IDS[0]], view)
    page = w.open(view)
    w.wait_for_bokeh()
    assert page.evaluate("window.__pwned") is None
    # bokeh draws inside shadow DOM; get_by_text reaches into it
    assert page.get_by_text("<script>window.__pwned=3</script>").count() >= 1
    assert w.errors == []
