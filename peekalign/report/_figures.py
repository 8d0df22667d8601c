"""Slide-ready figures: every chart of a report page as a 16:9 SVG and PNG.

The report's charts are SVG drawn in a small view box (about 460-620 units wide) with
11-unit text. A slide figure puts the chart, scaled to fit, on a 1600 x 900 canvas
under its caption: chart text lands at about 30-38 px, which reads as 14-18 pt on a
13.3 inch 16:9 slide, from the back of a meeting room. PNG files are the same
pictures rasterised by headless Chromium (the optional ``export`` extra: playwright);
without it only the SVG files are written.

The page itself gets a small "SVG / PNG" control under each chart that saves the
same 16:9 picture from the browser (``templates/figsave.html``).
"""

from __future__ import annotations

import re
from html.entities import name2codepoint
from pathlib import Path

from ..exceptions import ParameterError, describe
from ._html import esc

__all__ = ["SLIDE_W", "SLIDE_H", "slide_svg", "page_figures", "write_figures"]

SLIDE_W, SLIDE_H = 1600, 900
TITLE_PX = 44
_FIGURE = re.compile(r"<figure>\s*<figcaption>(.*?)</figcaption>(.*?)</figure>", re.S)
_SVG = re.compile(r"<svg\b[^>]*viewBox=\"0 0 ([\d.]+) ([\d.]+)\"[^>]*>(.*?)</svg>", re.S)
_STYLE = (
    "text{font-family:system-ui,'DejaVu Sans',sans-serif;font-size:11px;fill:#1b2430}"
    ".t{font-size:%dpx;font-weight:600}"
)


_XML_NAMED = {"amp", "lt", "gt", "quot", "apos"}


def _xml_entities(text: str) -> str:
    """HTML named entities (``&ndash;``) as numeric references, which XML knows."""

    def sub(m):
        name = m.group(1)
        if name in _XML_NAMED or name not in name2codepoint:
            return m.group(0)
        return f"&#{name2codepoint[name]};"

    return re.sub(r"&([A-Za-z][A-Za-z0-9]*);", sub, text)


def slide_svg(svg: str, title: str) -> str:
    """The chart ``svg`` (a report chart) on a 1600 x 900 canvas under ``title``.

    Examples
    --------
    >>> s = slide_svg('<svg viewBox="0 0 200 100"><text>x</text></svg>', "WER")
    >>> s.startswith('<svg xmlns="http://www.w3.org/2000/svg" width="1600" height="900"')
    True
    """
    m = _SVG.search(svg)
    if m is None:
        raise ValueError("not a report chart: no <svg viewBox='0 0 W H'>")
    w, h, inner = float(m.group(1)), float(m.group(2)), _xml_entities(m.group(3))
    top = TITLE_PX * 2
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{SLIDE_W}" height="{SLIDE_H}" '
        f'viewBox="0 0 {SLIDE_W} {SLIDE_H}">'
        f"<style>{_STYLE % TITLE_PX}</style>"
        f'<rect width="{SLIDE_W}" height="{SLIDE_H}" fill="#ffffff"/>'
        f'<text class="t" x="60" y="{TITLE_PX + 20}">{esc(title)}</text>'
        f'<svg x="40" y="{top}" width="{SLIDE_W - 80}" height="{SLIDE_H - top - 30}" '
        f'viewBox="0 0 {w:g} {h:g}" preserveAspectRatio="xMidYMid meet">{inner}</svg>'
        "</svg>"
    )


def _plain(caption: str) -> str:
    """Caption HTML as plain text (tags dropped, the few entities the report uses)."""
    text = re.sub(r"<[^>]+>", "", caption)
    for a, b in (("&amp;", "&"), ("&lt;", "<"), ("&gt;", ">"), ("&quot;", '"'), ("&#x27;", "'")):
        text = text.replace(a, b)
    return re.sub(r"&[a-z]+;", "", text).strip()


def page_figures(html: str) -> list[tuple[str, str]]:
    """``(caption, slide svg)`` of every chart of a report page."""
    out = []
    for cap, body in _FIGURE.findall(html):
        if _SVG.search(body):
            title = _plain(cap)
            out.append((title, slide_svg(body, title)))
    return out


def _file_names(titles: list[str]) -> list[str]:
    names, seen = [], set()
    for k, t in enumerate(titles, 1):
        base = re.sub(r"[^a-z0-9]+", "-", t.lower()).strip("-")[:50] or "chart"
        name = f"{k:02d}-{base}"
        while name in seen:
            name += "-x"
        seen.add(name)
        names.append(name)
    return names


def _rasterise(svgs: list[Path]) -> list[Path]:
    """PNG of each SVG file through headless Chromium; [] without playwright."""
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        return []
    out = []
    with sync_playwright() as p:
        browser = p.chromium.launch(
            executable_path="/usr/bin/chromium",
            headless=True,
            args=["--no-sandbox", "--disable-gpu", "--disable-background-networking"],
        )
        try:
            page = browser.new_page(viewport={"width": SLIDE_W, "height": SLIDE_H})
            for f in svgs:
                page.goto(f.resolve().as_uri())
                png = f.with_suffix(".png")
                page.screenshot(
                    path=str(png), clip={"x": 0, "y": 0, "width": SLIDE_W, "height": SLIDE_H}
                )
                out.append(png)
        finally:
            browser.close()
    return out


def write_figures(
    html: str, folder: str | Path, *, png: bool = True, overwrite: bool = False
) -> list[Path]:
    """Write every chart of a report page as ``NN-caption.svg`` (and ``.png``).

    Returns the files written. ``folder`` is created when missing; an existing file
    of the same name is replaced only with ``overwrite``.
    """
    d = Path(folder)
    figs = page_figures(html)
    names = _file_names([t for t, _ in figs])
    clash = [d / f"{n}.{x}" for n in names for x in ("svg", "png") if (d / f"{n}.{x}").exists()]
    if clash and not overwrite:
        raise ParameterError(
            describe(
                f"{len(clash)} figure file(s) already in {str(d)!r} (e.g. {clash[0].name})",
                "a folder without them",
                "pick another folder or pass overwrite (--overwrite)",
            )
        )
    d.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, (_, svg) in zip(names, figs, strict=True):
        p = d / f"{name}.svg"
        p.write_text(svg, encoding="utf-8")
        paths.append(p)
    return paths + (_rasterise(paths) if png and paths else [])
