"""``peekalign demo``: run the main job on the shipped demo bundle.

The demo bundle holds 24 utterances of synthetic tram-depot dispatch radio decoded by a
tiny streaming CTC/attention model (see ``fixtures/make/README.md``). The demo runs
what a user runs on their own dumps: forced alignment (CTM, JSON lines, TextGrid), the
scan report of the whole set (deletion diagnosis, reach, look-ahead sweep, one page
of linked views per utterance), and the window-consistency check on the bundle whose
attention came from the truncated (streaming) decoder.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..data import demo_path
from ..exceptions import ParameterError
from ..model import open_bundle
from ._common import branch_line, print_problems, wer_headline

DEFAULT_OUT = "peekalign-demo"


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "demo",
        help="run the whole job on the embedded demo bundle",
        description="Run the whole job on the shipped demo bundle (synthetic tram-depot "
        "dispatch radio, tiny streaming CTC/attention model): forced alignment, the scan "
        "report with its per-utterance views, and the window-consistency check of the "
        "streaming run. Results go into one folder.",
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

    report = write_report(bundle, out / "report", overwrite=args.overwrite, progress=False)
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
    measured_problems = _recommendations(report.sweep, bundle)
    print(
        "streaming run: largest attention share outside the computed windows "
        f"{worst_outside:.2e} (~0 means the truncation matches trigger + look-ahead)"
    )
    print(f"results in {out.resolve()}:")
    print(f"  {'report/index.html':<18} the whole set: causes, margins, sweep, worst first")
    print(f"  {'report/utts/':<18} one page of linked views per utterance")
    print(f"  {paths['ctm'].name:<18} word times, NIST CTM")
    print(f"  {paths['json'].name:<18} tokens and words with frames, one utterance a line")
    print(f"  {paths['textgrid'].name + '/':<18} one TextGrid per utterance")
    problems = result.problems + list(report.problems) + measured_problems
    if problems:
        print_problems(problems)
        return 1
    return 0


#: Look-aheads the demo re-decodes (its streaming bundle uses 6).
DEMO_LOOKAHEADS = tuple(range(0, 13))


def _recommendations(sweep, bundle) -> list:
    """Print the three look-ahead recommendations (reach, attention, measured WER) and
    which one decides; returns the re-decoding's problems."""
    from ..recommend import from_sweep

    decided, both = from_sweep(sweep)
    for name, rec in both.items():
        where = "none" if rec.lookahead is None else f"{rec.lookahead} frames"
        lat = "" if rec.lookahead is None else f" ({rec.latency_ms:.0f} ms latency)"
        print(f"look-ahead by {name}: {where}{lat} - {rec.rule}")
    problems: list = []
    try:
        from .redecode import demo_factory

        factory = demo_factory()
    except ParameterError as exc:
        print(f"look-ahead by measured WER: not measured - {exc}")
    else:
        from ..exceptions import PeekalignError
        from ..redecoding import redecode

        try:
            r = redecode(bundle, factory, lookaheads=DEMO_LOOKAHEADS, progress=False)
        except PeekalignError as exc:  # e.g. an installation without the checkpoint
            print(f"look-ahead by measured WER: not measured - {exc}")
            print(decided.line())
            return problems
        problems = list(r.problems)
        decided = r.recommend()
        where = "none" if decided.lookahead is None else f"{decided.lookahead} frames"
        lat = "" if decided.lookahead is None else f" ({decided.latency_ms:.0f} ms latency)"
        full = r.table.rows[-1][2]
        print(
            f"look-ahead by measured WER: {where}{lat} - {decided.rule}; full-context WER "
            f"{100 * full:.1f} % ({r.mode} decoding)"
        )
    print(decided.line())
    return problems
