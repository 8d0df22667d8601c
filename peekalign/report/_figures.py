"""Slide-ready figures: every chart of a report page as a 16:9 SVG and PNG.

The report's charts are SVG drawn in a small view box (about 460-620 units wide) with
11-unit text. A slide figure puts the chart, scaled to fit, on a 1600 x 900 canvas
under its caption: chart text lands at about 30-38 px, which reads as 14-18 pt on a
13.3 inch 16:9 slide, from the back of a meeting room. PNG files are the same
pictures rasterised by headless Chromium (the optional ``export`` extra: playwright);
without it only the SVG files are written.

The page itself gets a small "SVG / PNG" control under each chart that saves the
same 16:9 picture from the browser.
"""

from __future__ import annotations

import re
from html.entities import name2codepoint
from pathlib import Path

from ..exceptions import ParameterError, describe
from ._html import esc

__all__ = ["SLIDE_W", "SLIDE_H", "slide_svg", "page_figures", "write_figures", "DOWNLOAD_SCRIPT"]

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


#: Adds an "SVG / PNG" control under every chart of the page (16:9 pictures).
DOWNLOAD_SCRIPT = (
    """
<script>
document.addEventListener("DOMContentLoaded", function () {
  var W = @W@, H = @H@, T = @T@;
  function slide(svg, title) {
    var vb = svg.viewBox.baseVal, ns = "http://www.w3.org/2000/svg";
    var out = document.createElementNS(ns, "svg");
    out.setAttribute("xmlns", ns); out.setAttribute("width", W); out.setAttribute("height", H);
    out.setAttribute("viewBox", "0 0 " + W + " " + H);
    var st = document.createElementNS(ns, "style");
    st.textContent = "text{font-family:system-ui,'DejaVu Sans',sans-serif;font-size:11px;" +
      "fill:#1b2430}.t{font-size:" + T + "px;font-weight:600}";
    out.appendChild(st);
    var bg = document.createElementNS(ns, "rect");
    bg.setAttribute("width", W); bg.setAttribute("height", H); bg.setAttribute("fill", "#fff");
    out.appendChild(bg);
    var tt = document.createElementNS(ns, "text");
    tt.setAttribute("class", "t"); tt.setAttribute("x", 60); tt.setAttribute("y", T + 20);
    tt.textContent = title; out.appendChild(tt);
    var inner = svg.cloneNode(true);
    inner.removeAttribute("style"); inner.removeAttribute("width");
    inner.setAttribute("x", 40); inner.setAttribute("y", 2 * T);
    inner.setAttribute("width", W - 80); inner.setAttribute("height", H - 2 * T - 30);
    inner.setAttribute("viewBox", "0 0 " + vb.width + " " + vb.height);
    out.appendChild(inner);
    return new XMLSerializer().serializeToString(out);
  }
  function save(href, name) {
    var a = document.createElement("a"); a.href = href; a.download = name;
    document.body.appendChild(a); a.click(); a.remove();
  }
  document.querySelectorAll("figure").forEach(function (fig, k) {
    var svg = fig.querySelector("svg"), cap = fig.querySelector("figcaption");
    if (!svg || !svg.viewBox || !svg.viewBox.baseVal) return;
    var title = cap ? cap.textContent.trim() : "chart";
    var name = (k + 1 < 10 ? "0" : "") + (k + 1) + "-" +
      (title.toLowerCase().replace(/[^a-z0-9]+/g, "-").replace(/^-|-$/g, "") || "chart");
    var bar = document.createElement("div");
    bar.className = "figsave";
    bar.innerHTML = 'save for a slide: <button type="button">SVG</button> ' +
      '<button type="button">PNG</button>';
    var b = bar.querySelectorAll("button");
    b[0].addEventListener("click", function () {
      var url = URL.createObjectURL(new Blob([slide(svg, title)], {type: "image/svg+xml"}));
      save(url, name + ".svg"); setTimeout(function () { URL.revokeObjectURL(url); }, 1000);
    });
    b[1].addEventListener("click", function () {
      var img = new Image();
      img.onload = function () {
        var c = document.createElement("canvas"); c.width = W; c.height = H;
        c.getContext("2d").drawImage(img, 0, 0); save(c.toDataURL("image/png"), name + ".png");
      };
      img.src = "data:image/svg+xml;charset=utf-8," + encodeURIComponent(slide(svg, title));
    });
    fig.appendChild(bar);
  });
});
</script>
<style>.figsave{font-size:12px;color:#5b6470;margin-top:4px}.figsave button{font-size:12px}</style>
""".replace("@W@", str(SLIDE_W))
    .replace("@H@", str(SLIDE_H))
    .replace("@T@", str(TITLE_PX))
)
