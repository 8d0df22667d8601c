"""Helpers shared by the commands: table printing and problem lists."""

from __future__ import annotations

import sys
from collections.abc import Iterable, Sequence

from ..exceptions import ParameterError


def print_table(headers: Sequence[str], rows: Iterable[Sequence[object]], *, file=None) -> None:
    """Print rows as plain aligned columns (numbers right-aligned)."""
    file = file or sys.stdout
    rows = [[_fmt(c) for c in r] for r in rows]
    widths = [len(h) for h in headers]
    for r in rows:
        widths = [max(w, len(c)) for w, c in zip(widths, r, strict=True)]
    numeric = [all(_is_num(r[i]) for r in rows) and bool(rows) for i in range(len(headers))]

    def line(cells):
        return "  ".join(
            c.rjust(w) if num else c.ljust(w)
            for c, w, num in zip(cells, widths, numeric, strict=True)
        ).rstrip()

    print(line(list(headers)), file=file)
    for r in rows:
        print(line(r), file=file)


def _fmt(c: object) -> str:
    if isinstance(c, float):
        return f"{c:.3f}"
    return str(c)


def _is_num(s: str) -> bool:
    try:
        float(s)
    except ValueError:
        return False
    return True


def print_problems(problems, *, file=None) -> None:
    """One line per problem: ``<utt>: <message>``."""
    file = file or sys.stderr
    for p in problems:
        msg = p.message
        prefix = f"utt {p.utt!r}: "
        if msg.startswith(prefix):
            msg = msg[len(prefix) :]
        print(f"{p.utt}: {msg}", file=file)


def print_notes(bundle_path, *, file=None) -> None:
    """Print the bundle's notes (streaming facts it leaves out), one ``note:`` line each.

    A bundle that does not open prints nothing here: that is the problem listed.
    """
    from ..exceptions import PeekalignError
    from ..model import open_bundle

    try:
        notes = open_bundle(bundle_path).notes()
    except PeekalignError:
        return
    for note in notes:
        print(f"note: {note}", file=file or sys.stdout)


BRANCH_HELP = (
    "hypothesis branch the WER, worst-first ranking and diagnoses use: ctc, decoder, "
    "joint, or hyp (a legacy hypothesis of unstated branch); default the system's "
    "output (joint, else decoder, else ctc)"
)


DEMO_FACTORY = "peekalign.demo_model:demo_decoder"


def add_decoder_options(p, *, required: bool, decoder_help: str, demo_help: str) -> None:
    """``--decoder MODULE:FACTORY`` or ``--demo-decoder`` (one of them when
    ``required``); :func:`decoder_factory` reads them back."""
    which = p.add_mutually_exclusive_group(required=required)
    which.add_argument("--decoder", metavar="MODULE:FACTORY", help=decoder_help)
    which.add_argument("--demo-decoder", action="store_true", help=demo_help)


def demo_factory() -> str:
    """The demo decoder's factory name, after checking it can be imported."""
    try:
        import torch  # noqa: F401

        from ..demo_model import demo_decoder  # noqa: F401
    except ImportError as exc:
        raise ParameterError(
            f"found no demo decoder ({exc}), expected torch and the demo model; "
            'install the extra: pip install "peekalign[torch]"'
        ) from None
    return DEMO_FACTORY


def decoder_factory(args) -> str | None:
    """The factory name the options of :func:`add_decoder_options` chose, or None."""
    return demo_factory() if args.demo_decoder else args.decoder


def add_branch_option(p) -> None:
    """The ``--branch`` option shared by scan, view and check."""
    from ..analysis import SCORED_BRANCHES

    p.add_argument("--branch", metavar="B", choices=SCORED_BRANCHES, help=BRANCH_HELP)


def wer_headline(totals: dict, digits: int = 1) -> str:
    """``"WER 6.4 % (decoder)"``: the scan's WER naming the branch it scores."""
    wer = totals["wer"]
    text = "WER n/a" if wer != wer else f"WER {wer * 100:.{digits}f} %"
    return f"{text} ({totals['branch']})" if totals.get("branch") else text


def branch_line(totals: dict, digits: int = 1) -> str | None:
    """``"WER by branch: ctc 17.5 %, decoder 6.4 %"``; None with fewer than two branches."""
    by = totals.get("branches") or {}
    if len(by) < 2:
        return None
    parts = [f"{b} {v['wer'] * 100:.{digits}f} %" for b, v in by.items()]
    return "WER by branch: " + ", ".join(parts)


def add_triggers_option(p) -> None:
    """The ``--triggers`` option of sweep, scan and view."""
    p.add_argument(
        "--triggers",
        choices=("greedy", "oracle"),
        default="greedy",
        help="source of the trigger frames: greedy (the CTC best path, what a streaming "
        "system has; default) or oracle (Viterbi forced alignment of the whole "
        "reference, labelled oracle in every output)",
    )


def print_recommendations(sweep, measured=None, *, tolerance: float = 0.005, file=None):
    """Print the look-ahead by each criterion (reach, attention, measured WER when a
    re-decoding or its table is given) and the ``criterion:`` line of the one that
    decides; returns that recommendation (DEVELOPERS.md, "Look-ahead recommendation")."""
    from ..recommend import choose

    file = file or sys.stdout
    decided, every = choose(sweep, measured, tolerance=tolerance)
    for name, rec in every.items():
        where = "none" if rec.lookahead is None else f"{rec.lookahead} frames"
        lat = "" if rec.lookahead is None else f" ({rec.latency_ms:.0f} ms latency)"
        print(f"look-ahead by {name}: {where}{lat} - {rec.rule}", file=file)
    return decided
