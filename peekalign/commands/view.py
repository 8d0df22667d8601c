"""``peekalign view BUNDLE UTT``: one utterance's linked views as a self-contained HTML
file, a PNG or an SVG."""

from __future__ import annotations

import argparse

from ..exceptions import ParameterError
from ..model import open_bundle
from ._common import add_branch_option, add_triggers_option


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "view",
        help="one utterance's linked views (HTML, PNG, SVG)",
        description="Spectrogram, CTC posteriors, lanes, CTC state occupancy and attention on "
        "one time axis. The HTML file works offline with no kernel: token selection, "
        "the window band and the look-ahead slider run in the browser. PNG and SVG are "
        "drawn by the machine's headless Chromium (Debian package 'chromium').",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    p.add_argument("utt", metavar="UTT", help="utterance id")
    p.add_argument("--html", metavar="F", help="write a self-contained HTML file")
    p.add_argument("--png", metavar="F", help="write a PNG picture")
    p.add_argument("--svg", metavar="F", help="write an SVG picture of the panels")
    p.add_argument(
        "--lookahead",
        metavar="N",
        type=int,
        help="decoder look-ahead in frames (default: the bundle's)",
    )
    p.add_argument("--token", metavar="U", type=int, help="reference token selected at first")
    p.add_argument(
        "--beam",
        metavar="N",
        type=int,
        help="run the traced prefix search with beam N and add the beam lane and the "
        "decoding replay",
    )
    add_branch_option(p)
    add_triggers_option(p)
    p.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    return p


def run(args: argparse.Namespace) -> int:
    if not (args.html or args.png or args.svg):
        raise ParameterError(
            "found no output option, expected at least one of --html F, --png F, --svg F; "
            "say where to write the view"
        )
    if args.lookahead is not None and args.lookahead < 0:
        raise ParameterError(
            "The 'lookahead' parameter of view must be an int in the range [0, inf). "
            f"Got {args.lookahead} instead."
        )
    from ..io.atomic import check_target

    for target in (args.html, args.png, args.svg):
        if target:
            check_target(target, overwrite=args.overwrite)
    bundle = open_bundle(args.bundle)
    utt = bundle[args.utt] if args.utt in bundle else None
    if utt is None:
        near = ", ".join(bundle.ids[:5])
        raise ParameterError(
            f"found no utterance {args.utt!r} in {args.bundle!r}, expected one of its ids "
            f"({near}{', ...' if len(bundle) > 5 else ''}); run 'peekalign check' to list them"
        )
    from ..analysis import analyze
    from ..views import export_png, export_svg, save_html

    if args.beam is not None and args.beam < 1:
        raise ParameterError(f"found --beam {args.beam}, expected an int >= 1; e.g. --beam 8")
    search = {"beam": args.beam} if args.beam else False
    analysis = analyze(
        utt, lookahead=args.lookahead, search=search, branch=args.branch, triggers=args.triggers
    )
    opts = {} if args.token is None else {"token": args.token}
    written = []
    if args.html:
        written.append(save_html(analysis, args.html, overwrite=args.overwrite, **opts))
    if args.png:
        written.append(export_png(analysis, args.png, overwrite=args.overwrite, **opts))
    if args.svg:
        written.append(export_svg(analysis, args.svg, overwrite=args.overwrite, **opts))
    for path in written:
        print(f"wrote {path}")
    return 0
