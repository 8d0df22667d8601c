"""``peekalign redecode BUNDLE``: decode with the model's own decoder at every look-ahead
and measure what each look-ahead costs in words."""

from __future__ import annotations

import argparse
import math
import sys

from ..exceptions import ParameterError
from ._common import add_decoder_options, decoder_factory, print_problems, print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "redecode",
        help="decode with your decoder at every look-ahead: WER, lost words, latency",
        description="Run the model's attention decoder over every utterance at decoder "
        "look-aheads A..B frames and at full context: triggered decoding (one decoder "
        "token per CTC trigger) or joint decoding (prefix search with the decoder's "
        "score). Prints WER, S, D, I, deleted words by cause, words lost and gained "
        "against full context and the latency per look-ahead, and the smallest "
        "look-ahead whose WER stays within --tolerance of full context at the upper "
        "95 %% bound of a paired bootstrap. Exit 1 when some utterance was skipped.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    add_decoder_options(
        p,
        required=True,
        decoder_help="function FACTORY(bundle) in MODULE returning the decoder "
        "(see peekalign.decoder.Decoder)",
        demo_help="the demo model's decoder (needs the [torch] extra)",
    )
    p.add_argument(
        "--lookaheads",
        default="0:30",
        metavar="A:B",
        help="decoder look-aheads A..B frames, inclusive; A:B:S for a step (default: 0:30)",
    )
    p.add_argument("--mode", choices=("triggered", "joint"), default="triggered")
    p.add_argument(
        "--triggers",
        choices=("greedy", "search"),
        default="greedy",
        help="triggered mode: trigger frames from CTC greedy or the prefix search",
    )
    p.add_argument(
        "--decoder-weight",
        type=float,
        default=1.0,
        metavar="L",
        help="joint mode: weight of the decoder score (default: 1.0)",
    )
    p.add_argument("--beam", type=int, default=8, metavar="N", help="joint mode: beam (default 8)")
    p.add_argument(
        "--tolerance",
        type=float,
        default=0.5,
        metavar="P",
        help="WER points the recommended look-ahead may lose against full context, at the "
        "upper 95 %% bound (default: 0.5)",
    )
    p.add_argument("--csv", metavar="F", help="write the per-look-ahead table as CSV")
    p.add_argument(
        "--hyps", metavar="F", help='write JSON lines {"id", "lookahead_frames", "hyp"}'
    )
    p.add_argument("--workers", type=int, default=None, metavar="N", help="processes")
    p.add_argument("--overwrite", action="store_true", help="replace existing --csv/--hyps")
    return p


def parse_lookaheads(text: str) -> list[int]:
    """``"A:B"`` or ``"A:B:S"`` (inclusive) or ``"B"`` (0..B) as a list of frames.

    Examples
    --------
    >>> parse_lookaheads("0:4"), parse_lookaheads("2:10:4"), parse_lookaheads("2")
    ([0, 1, 2, 3, 4], [2, 6, 10], [0, 1, 2])
    """
    parts = str(text).split(":")
    try:
        nums = [int(x) for x in parts]
    except ValueError:
        nums = []
    if len(parts) == 1 and nums:
        nums = [0, nums[0]]
    ok = len(nums) in (2, 3) and nums[0] >= 0 and nums[1] >= nums[0]
    ok = ok and (len(nums) == 2 or nums[2] >= 1)
    if not ok:
        raise ParameterError(
            f"found --lookaheads {text!r}, expected A:B or A:B:S with 0 <= A <= B and S >= 1 "
            "(frames, inclusive); e.g. 0:30"
        )
    step = nums[2] if len(nums) == 3 else 1
    return list(range(nums[0], nums[1] + 1, step))


def _num(x: float, fmt: str) -> str:
    return "-" if x != x else ("full" if x == math.inf else format(x, fmt))


def run(args: argparse.Namespace) -> int:
    from ..model import open_bundle
    from ..redecoding import redecode

    eps = parse_lookaheads(args.lookaheads)
    _check_args(args)
    factory = decoder_factory(args)
    bundle = open_bundle(args.bundle)
    r = redecode(
        bundle,
        factory,
        lookaheads=eps,
        mode=args.mode,
        workers=args.workers,
        triggers=args.triggers,
        decoder_weight=args.decoder_weight,
        search_options={"beam": args.beam} if args.mode == "joint" else None,
    )
    if args.csv:
        r.write_csv(args.csv, overwrite=args.overwrite)
    if args.hyps:
        r.write_hyps(args.hyps, overwrite=args.overwrite)
    _print_rows(r)
    _print_causes(r)
    _print_recommendation(r, args.tolerance)
    if r.problems:
        sys.stdout.flush()
        print_problems(r.problems)
        print(f"{len(r.problems)} problem(s) (listed above)")
        return 1
    return 0


def _check_args(args: argparse.Namespace) -> None:
    """Refuse a bad --tolerance, or an output file that exists, before the work."""
    if not (args.tolerance == args.tolerance and 0 <= args.tolerance < 100):
        raise ParameterError(
            f"found --tolerance {args.tolerance!r}, expected WER points in [0, 100), e.g. 0.5"
        )
    for target in (args.csv, args.hyps):
        if target:
            from ..io.atomic import check_target

            check_target(target, overwrite=args.overwrite)  # fail before the work


def _print_rows(r) -> None:
    """One row per look-ahead: WER, S, D, I, words lost and gained, the WER change's
    interval."""
    print_table(
        ("lookahead_frames", "latency_ms", "wer_%", "S", "D", "I", "lost", "gained", "delta_95%"),
        [
            (
                _num(row["lookahead_frames"], "d"),
                _num(row["latency_ms"], "g"),
                _num(100 * row["wer"], ".2f"),
                row["S"],
                row["D"],
                row["I"],
                row["words_lost"],
                row["words_gained"],
                "-"
                if row["lookahead_frames"] == math.inf
                else f"{100 * row['wer_delta_low']:+.2f}..{100 * row['wer_delta_high']:+.2f}",
            )
            for row in r.table
        ],
    )


def _print_causes(r) -> None:
    """Deleted words by cause at the first look-ahead and at full context."""
    full = r.table.rows[-1] if len(r.table) else None
    if full is not None:
        causes = ", ".join(
            f"{c[4:]} {n}" for c, n in zip(r.table.columns, full, strict=True)
            if c.startswith("del_") and n
        )  # fmt: skip
        at = r.table.records()
        worst = at[0]
        causes0 = ", ".join(
            f"{c[4:]} {worst[c]}" for c in r.table.columns if c.startswith("del_") and worst[c]
        )
        print(
            f"{len(r.ids)} utterances, {full[6]} words, mode {r.mode}; deleted words by cause at "
            f"{worst['lookahead_frames']} frames: {causes0 or 'none'}; at full context: "
            f"{causes or 'none'}"
        )


def _print_recommendation(r, tolerance: float) -> None:
    """The smallest look-ahead within ``tolerance`` WER points of full context."""
    rec = r.recommend(tolerance=tolerance / 100)
    if rec.lookahead is not None:
        print(
            f"recommended look-ahead: {rec.lookahead} frames ({rec.latency_ms:g} ms latency); "
            f"WER {100 * rec.interval.delta:+.2f} points vs full context "
            f"(95 % interval {100 * rec.interval.lo:+.2f}..{100 * rec.interval.hi:+.2f})"
        )
    else:
        print("recommended look-ahead: none within the tolerance; widen --lookaheads")
    print(rec.line())
