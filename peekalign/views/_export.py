"""Standalone HTML, PNG and SVG of one utterance's views.

HTML carries BokehJS inline (no network, no kernel). PNG and SVG are drawn by the
machine's own headless Chromium (Debian package ``chromium``) driven by the
``playwright`` Python package; no browser is ever downloaded.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

from bokeh.embed import file_html
from bokeh.resources import INLINE

from ..exceptions import PeekalignError
from ..io.atomic import atomic_write, check_target
from ._document import UtteranceView, to_document, utterance_view

__all__ = [
    "BrowserError",
    "standalone_html",
    "save_html",
    "export_png",
    "export_svg",
    "find_chromium",
    "CHROMIUM_ARGS",
]

#: Flags for a headless Chromium run as root in a container, with no network chatter.
CHROMIUM_ARGS = (
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
)

_INSTALL_HINT = (
    "install Debian's browser with 'apt-get install chromium' (or set PEEKALIGN_CHROMIUM "
    "to a Chromium binary) and the Python package with 'pip install playwright'; never "
    "run 'playwright install'"
)


class BrowserError(PeekalignError):
    """Headless Chromium (or the playwright package) is missing or failed."""


def find_chromium() -> str:
    """Path of the machine's Chromium: env ``PEEKALIGN_CHROMIUM``, else on ``PATH``.

    Raises
    ------
    BrowserError
        Naming the Debian package to install.
    """
    env = os.environ.get("PEEKALIGN_CHROMIUM")
    if env:
        if os.path.isfile(env) and os.access(env, os.X_OK):
            return env
        raise BrowserError(
            f"found PEEKALIGN_CHROMIUM={env!r}, which is not an executable file, expected "
            f"the path of a Chromium binary; {_INSTALL_HINT}"
        )
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        found = shutil.which(name)
        if found:
            return found
    for path in ("/usr/bin/chromium", "/usr/lib/chromium/chromium"):
        if os.path.isfile(path):
            return path
    raise BrowserError(
        f"found no Chromium on this machine, expected one for PNG/SVG; {_INSTALL_HINT}"
    )


def _view(analysis, kw) -> UtteranceView:
    if isinstance(analysis, UtteranceView):
        if kw:
            raise TypeError(f"options {sorted(kw)} do not apply to an already built view")
        return analysis
    # a file or a picture needs no live models: static records write the same page
    return utterance_view(analysis, **{"static": True, **kw})


def standalone_html(view: UtteranceView, *, title: str | None = None) -> str:
    """The whole page as one string: BokehJS inline, data and callbacks embedded."""
    doc = to_document(view, title=title)
    if view.static:
        from ._static import file_html as static_file_html

        return static_file_html(doc, INLINE, title=doc.title)
    return file_html(doc, resources=INLINE, title=doc.title)


def save_html(analysis, path, *, overwrite: bool = False, **options) -> Path:
    """Write one utterance's linked views as a self-contained HTML file.

    The file needs no network and no kernel: token selection, the window marker, the
    look-ahead slider, the attention view and the posterior scale work in the browser.

    Parameters
    ----------
    analysis : UtteranceAnalysis, Utterance or UtteranceView
    path : str or Path
    overwrite : bool
        Replace an existing file.
    **options
        Passed to :func:`~peekalign.views.utterance_view` (``lookahead``, ``token``, ...).

    Returns
    -------
    Path

    Examples
    --------
    >>> import os, tempfile, numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((6, 3), 0.02); p[:, 0] = 0.96; p[2] = [0.02, 0.02, 0.96]
    >>> u = Utterance.from_arrays(np.log(p), ref="a", vocab=v)
    >>> out = save_html(u, os.path.join(tempfile.mkdtemp(), "u.html"))
    >>> out.stat().st_size > 1_000_000  # BokehJS inline: no network needed
    True
    """
    check_target(path, overwrite=overwrite)
    view = _view(analysis, options)
    text = standalone_html(view)
    with atomic_write(path, overwrite=overwrite) as f:
        f.write(text)
    return Path(path)


#: Chromium puts a Unix socket at $TMPDIR/.org.chromium.Chromium.<6 random characters>/
#: SingletonSocket, and a socket's path stops at 107 bytes: a longer temp folder makes
#: the launch fail.
_SOCKET_ROOM = 107 - len("/.org.chromium.Chromium.abcdef/SingletonSocket")


@contextlib.contextmanager
def _browser_env() -> Iterator[dict | None]:
    """The browser's environment: this one, with a short TMPDIR when ours is too long
    for Chromium's socket (None: no change needed)."""
    tmp = tempfile.gettempdir()
    if len(os.fsencode(tmp)) <= _SOCKET_ROOM or not os.access("/tmp", os.W_OK):
        yield None
        return
    with tempfile.TemporaryDirectory(prefix="pk-", dir="/tmp") as short:
        yield {**os.environ, "TMPDIR": short}


def _in_browser(html_text: str, action, *, width: int = 1400, device_scale_factor: float = 1.0):
    """Show ``html_text`` in headless Chromium (from a file:// URL) and return
    ``action(page)``.

    Playwright's sync API refuses to run inside an asyncio loop (Jupyter has one), so
    the browser is driven from a worker thread.
    """
    try:
        from playwright.sync_api import Error as PlaywrightError
        from playwright.sync_api import sync_playwright
    except ImportError as exc:
        raise BrowserError(
            f"found no 'playwright' Python package ({exc}), expected it for PNG/SVG; "
            f"{_INSTALL_HINT}"
        ) from None
    exe = find_chromium()

    def run():
        with (
            tempfile.TemporaryDirectory(prefix="peekalign-export-") as tmp,
            _browser_env() as env,
        ):
            page_path = Path(tmp) / "view.html"
            page_path.write_text(html_text, encoding="utf-8")
            try:
                with sync_playwright() as pw:
                    ctx = pw.chromium.launch_persistent_context(
                        str(Path(tmp) / "profile"),
                        executable_path=exe,
                        headless=True,
                        args=list(CHROMIUM_ARGS),
                        viewport={"width": width, "height": 900},
                        device_scale_factor=device_scale_factor,
                        env=env,
                    )
                    try:
                        page = ctx.new_page()
                        errors: list[str] = []
                        page.on("pageerror", lambda e: errors.append(str(e)))
                        page.goto(page_path.as_uri())
                        wait_until_rendered(page)
                        if errors:
                            raise BrowserError(
                                f"found script errors in the page ({errors[0]}), expected "
                                "none; report this with the utterance"
                            )
                        return action(page)
                    finally:
                        ctx.close()
            except PlaywrightError as exc:
                raise BrowserError(
                    f"Chromium at {exe!r} failed ({str(exc).splitlines()[0]}), expected a "
                    f"headless run; {_INSTALL_HINT}"
                ) from None

    with concurrent.futures.ThreadPoolExecutor(max_workers=1) as pool:
        return pool.submit(run).result()


def wait_until_rendered(page, *, timeout_ms: int = 30_000) -> None:
    """Wait until BokehJS has built the document and drawn two more frames."""
    page.wait_for_function(
        "typeof Bokeh !== 'undefined' && Bokeh.documents.length > 0 && Bokeh.documents[0].is_idle",
        timeout=timeout_ms,
    )
    page.evaluate(
        "() => new Promise((r) => requestAnimationFrame(() => requestAnimationFrame(() => "
        "setTimeout(r, 50))))"
    )


def export_png(
    analysis, path, *, overwrite: bool = False, device_scale_factor: float = 1.0, **options
) -> Path:
    """Draw one utterance's views to a PNG with headless Chromium.

    Parameters
    ----------
    analysis : UtteranceAnalysis, Utterance or UtteranceView
    path : str or Path
    overwrite : bool
    device_scale_factor : float
        2 gives a sharper picture of twice the size.
    **options
        Passed to :func:`~peekalign.views.utterance_view` (controls are left out unless
        ``controls=True``).

    Raises
    ------
    BrowserError
        No Chromium or no playwright package (the message names what to install).
    """
    check_target(path, overwrite=overwrite)
    if not isinstance(analysis, UtteranceView):
        options.setdefault("controls", False)
        options.setdefault("toolbar", False)
    view = _view(analysis, options)

    def shoot(page):
        box = page.evaluate(_ROOT_BOX)
        page.set_viewport_size(
            {"width": int(box[0] + box[2]) + 16, "height": int(box[1] + box[3]) + 16}
        )
        wait_until_rendered(page)
        box = page.evaluate(_ROOT_BOX)
        clip = {"x": box[0], "y": box[1], "width": box[2], "height": box[3]}
        return page.screenshot(clip=clip, type="png")

    png = _in_browser(standalone_html(view), shoot, device_scale_factor=device_scale_factor)
    with atomic_write(path, overwrite=overwrite, mode="wb") as f:
        f.write(png)
    return Path(path)


_ROOT_BOX = (
    "() => { const r = Bokeh.index.roots[0].el.getBoundingClientRect(); "
    "return [r.x, r.y, r.width, r.height]; }"
)

_SVG_SCRIPT = """
() => {
  const root = Bokeh.index.roots[0];
  function* walk(v) {
    yield v;
    if (v.child_views != null) for (const c of v.child_views) yield* walk(c);
  }
  for (const v of walk(root)) {
    if (v.model.name == "panels") {
      // bokeh's SVG layout reserves more room right of some legends than it draws
      // in: crop the picture to what is drawn (axes, colour bars, legends)
      let right = 0;
      for (const f of walk(v)) {
        if (f.renderer_views == null) continue;
        const x0 = f.bbox.left - v.bbox.left;
        for (const rv of f.renderer_views.values())
          if (rv.bbox != null && rv.model.type != "GlyphRenderer")
            right = Math.max(right, x0 + rv.bbox.right);
      }
      const {ctx} = v.export("svg");
      let svg = ctx.get_serialized_svg(true);
      if (right > 0) svg = svg.replace(/^(<svg[^>]*?) width="[0-9.]+"/, `$1 width="${Math.ceil(right + 12)}"`);
      return svg;
    }
  }
  return null;
}
"""


def export_svg(analysis, path, *, overwrite: bool = False, **options) -> Path:
    """Draw one utterance's panels to one SVG file with headless Chromium.

    The panels are drawn with bokeh's SVG backend; the header lines (HTML) are not part
    of the picture.

    Raises
    ------
    BrowserError
        No Chromium or no playwright package (the message names what to install).
    """
    check_target(path, overwrite=overwrite)
    if isinstance(analysis, UtteranceView):
        view = analysis
    else:
        options.setdefault("controls", False)
        options.setdefault("toolbar", False)
        options["output_backend"] = "svg"
        view = _view(analysis, options)
    svg = _in_browser(standalone_html(view), lambda page: page.evaluate(_SVG_SCRIPT))
    if not svg:
        raise BrowserError(
            "found no SVG drawing in the page, expected the panels drawn with the SVG "
            "backend; build the view with output_backend='svg'"
        )
    with atomic_write(path, overwrite=overwrite) as f:
        f.write(svg)
    return Path(path)
