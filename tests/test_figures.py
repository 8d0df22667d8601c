"""Slide figures: files written by scan --figures and the page's save control.

References: Pillow decodes the PNG files, the standard library's XML parser parses
the SVG files; the browser checks run in headless Debian Chromium.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest
from browser import chromium, require_chromium
from test_slices import make_meta_bundle

from peekalign import ParameterError
from peekalign.cli import main
from peekalign.report import write_report
from peekalign.report._figures import SLIDE_H, SLIDE_W, page_figures

pytestmark = pytest.mark.browser


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    d = tmp_path_factory.mktemp("figures")
    path, _ = make_meta_bundle(d / "b", n=24)
    write_report(path, d / "rep", pages=False, workers=0, by=["speaker"], figures=d / "fig")
    return d


def test_every_chart_written_as_svg_and_png(report):
    require_chromium()
    from PIL import Image

    html = (report / "rep" / "index.html").read_text()
    figs = page_figures(html)
    # the overview's charts: causes, sweep, margins, delays, shown delay, rewrite rate,
    # WER by speaker
    assert len(figs) == 7
    svgs = sorted((report / "fig").glob("*.svg"))
    pngs = sorted((report / "fig").glob("*.png"))
    assert len(svgs) == len(pngs) == 7
    assert any("wer-by-speaker" in p.name for p in svgs)
    for p in svgs:
        # reference: the standard library's XML parser
        root = ET.parse(p).getroot()
        assert root.tag.endswith("svg")
        assert (root.get("width"), root.get("height")) == (str(SLIDE_W), str(SLIDE_H))
    for p in pngs:
        # reference: Pillow decodes the file
        with Image.open(p) as im:
            im.load()
            assert im.size == (SLIDE_W, SLIDE_H)
            # not blank: the chart drew something besides the white background
            assert len(im.convert("L").getcolors(1 << 16)) > 2


def test_figures_not_overwritten_unless_asked(report, capsys):
    path = report / "b"
    args = ["scan", str(path), "--out", str(report / "rep2"), "--no-pages", "--workers", "0"]
    with pytest.raises(ParameterError, match="already in"):
        write_report(path, report / "rep3", pages=False, workers=0, figures=report / "fig")
    assert main(args + ["--figures", str(report / "fig"), "--overwrite"]) == 0
    assert "figures written to" in capsys.readouterr().out


def test_page_save_control_downloads_svg_and_png(report, tmp_path_factory):
    from PIL import Image

    tmp_path = tmp_path_factory.mktemp("fc")  # short: Chromium's socket path has a limit
    with chromium(tmp_path, viewport={"width": 1300, "height": 900}, accept_downloads=True) as ctx:
        page = ctx.new_page()
        errors = []
        page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        page.on("pageerror", lambda e: errors.append(str(e)))
        page.goto((report / "rep" / "index.html").as_uri())
        page.wait_for_load_state("load")
        bars = page.locator(".figsave")
        assert bars.count() == 7  # one save control under each chart
        bar = page.locator("figure", has_text="WER by speaker").locator(".figsave")
        with page.expect_download() as dl:
            bar.locator("button", has_text="SVG").click()
        svg = tmp_path / "x.svg"
        dl.value.save_as(svg)
        root = ET.parse(svg).getroot()  # reference: the standard library's XML parser
        assert root.get("width") == str(SLIDE_W)
        with page.expect_download() as dl:
            bar.locator("button", has_text="PNG").click()
        png = tmp_path / "x.png"
        dl.value.save_as(png)
        with Image.open(png) as im:  # reference: Pillow decodes the file
            im.load()
            assert im.size == (SLIDE_W, SLIDE_H)
        assert dl.value.suggested_filename.endswith("wer-by-speaker.png")
        assert errors == []
