"""``peekalign demo``: run the main job on the shipped demo bundle.

The demo bundle holds 24 utterances of synthetic tram-depot dispatch radio decoded by a
tiny streaming CTC/attention model (see ``fixtures/make/README.md``). The demo runs
what a user runs on their own dumps: forced alignment (CTM, JSON lines, TextGrid), the
scan report of the whole set (deletion diagnosis, reach, look-ahead sweep, one page
of linked views per utterance), the look-ahead by reach, by attention and, with torch
installed, by the WER measured by re-decoding with the shipped demo decoder (drawn
with the sweep in the report), and the window-consistency check on the bundle whose
attention came from the truncated (streaming) decoder.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..data import demo_path
from ..exceptions import ParameterError
from ..model import open_bundle
from ._common import branch_line, print_problems, print_recommendations, wer_headline

DEFAULT_OUT = "peekalign-demo"


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "demo",
        help="run the whole job on the embedded demo bundle",
        description="Run the whole job on the shipped demo bundle (synthetic tram-depot "
        "dispatch radio, tiny streaming CTC/attention model): forced alignment, the scan "
        "report with its per-utterance views, the look-ahead by reach, attention and (with "
        "torch) WER measured with the shipped demo decoder, and the window-consistency "
        "check of the streaming run. Results go into one folder.",
    )
    p.add_argument(
        "--out",
        metavar="DIR",
        default=DEFAULT_OUT,
        help=f"output folder (default: ./{DEFAULT_OUT}); must be new or empty",
    )
    p.add_argument("--overwrite", action="store_true", help="write into a non-empty --out")
    return p


def run(args: argparse.Namespace) -> int:
    from .align import align_bundle, write_outputs

    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise ParameterError(
            f"found a file at --out {str(out)!r}, expected a folder; choose another --out"
        )
    if out.is_dir() and any(out.iterdir()) and not args.overwrite:
        raise ParameterError(
            f"found a non-empty folder {str(out)!r}, expected a new or empty one; "
            "choose another --out or pass --overwrite"
        )
    bundle_dir = demo_path("full")
    bundle = open_bundle(bundle_dir)
    result = align_bundle(bundle)
    out.mkdir(parents=True, exist_ok=True)
    paths = {
        "ctm": out / "alignment.ctm",
        "json": out / "alignment.jsonl",
        "textgrid": out / "textgrid",
    }
    write_outputs(
        result,
        ctm=paths["ctm"],
        textgrid=paths["textgrid"],
        json_path=paths["json"],
        overwrite=args.overwrite,
    )
    from ..analysis import analyze
    from ..report import write_report

    measured, why_not = _measure(bundle)
    report = write_report(
        bundle, out / "report", overwrite=args.overwrite, progress=False, measured=measured
    )
    stream = open_bundle(demo_path("streaming"))
    worst_outside = max(
        (a.consistency.max_outside for a in map(analyze, stream) if a.consistency is not None),
        default=float("nan"),
    )
    t = report.totals()
    print(f"demo bundle: {bundle_dir} ({len(bundle)} utterances)")
    print(f"{wer_headline(t)}: S {t['S']}, D {t['D']}, I {t['I']}")
    if branch_line(t):
        print(branch_line(t))
    _recommendations(report.sweep, measured, t, why_not)
    print(
        "streaming run: largest attention share outside the computed windows "
        f"{worst_outside:.2e} (~0 means the truncation matches trigger + look-ahead)"
    )
    print(f"results in {out.resolve()}:")
    print(
        f"  {'report/index.html':<18} the whole set: causes, margins, look-ahead sweep"
        + (" and measured WER" if measured is not None else "")
        + ", worst first"
    )
    print(f"  {'report/utts/':<18} one page of linked views per utterance")
    print(f"  {paths['ctm'].name:<18} word times, NIST CTM")
    print(f"  {paths['json'].name:<18} tokens and words with frames, one utterance a line")
    print(f"  {paths['textgrid'].name + '/':<18} one TextGrid per utterance")
    problems = result.problems + list(report.problems)
    problems += list(measured.problems) if measured is not None else []
    if problems:
        print_problems(problems)
        return 1
    return 0


#: Look-aheads the demo re-decodes: those of the report's sweep (its streaming bundle
#: uses 6).
DEMO_LOOKAHEADS = tuple(range(0, 31))


def _measure(bundle):
    """Re-decode the demo set with the shipped demo decoder at every look-ahead; returns
    the run (None without torch or the shipped weights) and why not."""
    from ..exceptions import PeekalignError
    from ..redecoding import redecode
    from ._common import demo_factory

    try:
        factory = demo_factory()
    except ParameterError:
        return None, (
            'needs torch to run the shipped demo decoder: pip install "peekalign[torch]", '
            "then run peekalign demo again (or peekalign redecode BUNDLE --demo-decoder)"
        )
    try:
        return redecode(bundle, factory, lookaheads=DEMO_LOOKAHEADS, progress=False), ""
    except PeekalignError as exc:  # e.g. an installation without the shipped weights
        return None, str(exc)


def _recommendations(sweep, measured, totals, why_not: str) -> None:
    """Print the three look-ahead recommendations (reach, attention, measured WER) and
    the ``criterion:`` line of the one that decides."""
    decided = print_recommendations(sweep, measured)
    if measured is None:
        print(f"look-ahead by measured WER: not measured - {why_not}")
    else:
        full = measured.table.rows[-1][2]
        print(
            f"  (measured WER: the demo decoder re-run at look-aheads 0-{DEMO_LOOKAHEADS[-1]}, "
            f"{measured.mode} decoding, one token per CTC trigger; full context "
            f"{100 * full:.1f} %, against {_branch_wer(totals)} for the bundle's own "
            "decoder hypotheses, a free beam search)"
        )
    print(decided.line())


def _branch_wer(totals) -> str:
    dec = (totals.get("branches") or {}).get("decoder")
    return "-" if dec is None else f"{100 * dec['wer']:.1f} %"
