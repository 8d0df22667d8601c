"""``peekalign sweep BUNDLE``: word reach, kept attention and latency per decoder
look-ahead, and the smallest look-ahead that reaches a target reach."""

from __future__ import annotations

import argparse
import sys

from ..model import open_bundle
from ..streaming import sweep
from ._common import print_problems, print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "sweep",
        help="reach, kept attention and latency for look-aheads 0..N",
        description="For decoder look-aheads 0..N frames: the share of reference words "
        "fully heard when the decoder emits their last token, the mean attention mass "
        "inside the decoder windows (when the bundle holds attention) and the algorithmic "
        "latency. Prints the smallest look-ahead that reaches --target. Exit 1 when some "
        "utterance was skipped.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    p.add_argument(
        "--max-lookahead",
        type=int,
        default=30,
        metavar="N",
        help="largest decoder look-ahead in frames (default: 30)",
    )
    p.add_argument(
        "--target",
        type=float,
        default=0.95,
        metavar="P",
        help="reach to reach, as a fraction (default: 0.95)",
    )
    p.add_argument(
        "--csv",
        metavar="F",
        help="write lookahead_frames, latency_ms, reach, kept_attention as CSV",
    )
    p.add_argument(
        "--front-end-ms",
        type=float,
        default=0.0,
        metavar="X",
        help="front end's own look-ahead added to the latency (default: 0)",
    )
    p.add_argument(
        "--trigger",
        choices=("first", "spike"),
        default="first",
        help="trigger frame of a token: first frame of its CTC segment or its spike",
    )
    p.add_argument("--overwrite", action="store_true", help="replace an existing --csv file")
    return p


def run(args: argparse.Namespace) -> int:
    bundle = open_bundle(args.bundle)
    if args.csv:
        from ..io.atomic import check_target

        check_target(args.csv, overwrite=args.overwrite)  # fail before the work
    s = sweep(
        bundle,
        max_lookahead=args.max_lookahead,
        target=args.target,
        front_end_ms=args.front_end_ms,
        trigger_rule=args.trigger,
    )
    if args.csv:
        s.write_csv(args.csv, overwrite=args.overwrite)
    print_table(
        ("lookahead_frames", "latency_ms", "reach", "kept_attention"),
        [
            (
                r.lookahead_frames,
                f"{r.latency_ms:g}",
                f"{r.reach:.4f}",
                "-" if r.kept_attention != r.kept_attention else f"{r.kept_attention:.4f}",
            )
            for r in s.rows
        ],
    )
    src = ", ".join(f"{n} {k}" for k, n in s.word_sources.items() if n)
    print(
        f"{s.n_words} words in {s.n_utterances} utterances (word times: {src or 'none'}); "
        f"encoder look-ahead {s.encoder_frames} frames, frame shift {s.frame_shift_ms:g} ms"
    )
    if s.recommended is not None:
        r = s.recommended_row
        print(
            f"recommended look-ahead: {r.lookahead_frames} frames "
            f"({r.lookahead_frames * s.frame_shift_ms:g} ms; total latency {r.latency_ms:g} ms) "
            f"reaches {100 * r.reach:.1f} % reach (target {100 * s.target:g} %)"
        )
    else:
        best = s.rows[-1].reach if s.rows else float("nan")
        print(
            f"recommended look-ahead: none - no look-ahead up to {args.max_lookahead} frames "
            f"reaches {100 * s.target:g} % reach (best {100 * best:.1f} %); "
            "raise --max-lookahead"
        )
    if s.problems:
        sys.stdout.flush()
        print_problems(s.problems)
        print(f"{len(s.problems)} problem(s) (listed above)")
        return 1
    return 0
