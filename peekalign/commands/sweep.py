"""``peekalign sweep BUNDLE``: word reach, kept attention and latency per decoder
look-ahead, and the smallest look-ahead that reaches a target reach."""

from __future__ import annotations

import argparse
import sys

from ..model import open_bundle
from ..recommend import from_sweep
from ..streaming import sweep
from ._common import (
    add_decoder_options,
    add_triggers_option,
    decoder_factory,
    print_problems,
    print_table,
)


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "sweep",
        help="reach, kept attention and latency for look-aheads 0..N",
        description="For decoder look-aheads 0..N frames: the share of reference words "
        "fully heard when the decoder emits their last token, the mean attention mass "
        "inside the decoder windows (when the bundle holds attention) and the algorithmic "
        "latency. Recommends a look-ahead and prints which criterion decided (a line "
        "'criterion: ...'): the measured WER with --decoder (smallest look-ahead within "
        "--tolerance of full context), else reach (smallest reaching --target), else, when "
        "reach is at its target already at look-ahead 0, the attention mass kept "
        "(--attention-share). Exit 1 when some utterance was skipped.",
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
        default=None,
        metavar="X",
        help="front end's own look-ahead in ms (default: the one bundle.json declares, as "
        "the view uses it)",
    )
    p.add_argument(
        "--trigger",
        choices=("first", "spike"),
        default="first",
        help="trigger frame of a token: first frame of its CTC segment or its spike",
    )
    p.add_argument(
        "--attention-share",
        type=float,
        default=0.9,
        metavar="P",
        help="attention criterion, used when reach is at its target already at look-ahead 0: "
        "share of the full-context attention mass to keep (default: 0.9)",
    )
    add_decoder_options(
        p,
        required=False,
        decoder_help="also re-decode with this decoder (see peekalign redecode) and "
        "recommend from the measured WER",
        demo_help="the demo model's decoder (needs [torch])",
    )
    p.add_argument("--mode", choices=("triggered", "joint"), default="triggered")
    p.add_argument(
        "--tolerance",
        type=float,
        default=0.5,
        metavar="P",
        help="with a decoder: WER points the look-ahead may lose against full context at "
        "the upper 95 %% bound (default: 0.5)",
    )
    p.add_argument("--workers", type=int, default=None, metavar="N", help="processes")
    add_triggers_option(p)
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
        triggers=args.triggers,
    )
    measured = _measured(args, bundle)
    if args.csv:
        s.write_csv(args.csv, overwrite=args.overwrite)
    _print_rows(s, measured)
    _print_setting(s, measured)
    decided, both = from_sweep(s, attention_share=args.attention_share)
    _print_proxies(s, both, args)
    _print_decision(s, measured, decided, both, args)
    problems = list(s.problems) + (list(measured.problems) if measured is not None else [])
    if problems:
        sys.stdout.flush()
        print_problems(problems)
        print(f"{len(problems)} problem(s) (listed above)")
        return 1
    return 0


def _print_rows(s, measured) -> None:
    """The sweep's table: one row per look-ahead (with the measured WER when re-decoded)."""
    wer = {} if measured is None else {r["lookahead_frames"]: r["wer"] for r in measured.table}
    print_table(
        ("lookahead_frames", "latency_ms", "reach", "kept_attention")
        + (("wer",) if measured is not None else ()),
        [
            (
                r.lookahead_frames,
                f"{r.latency_ms:g}",
                f"{r.reach:.4f}",
                "-" if r.kept_attention != r.kept_attention else f"{r.kept_attention:.4f}",
            )
            + ((f"{wer[r.lookahead_frames]:.4f}",) if measured is not None else ())
            for r in s.rows
        ],
    )


def _print_setting(s, measured) -> None:
    """What the sweep ran on: full-context WER, words, clock and trigger source."""
    if measured is not None:
        print(f"full context: wer {measured.table.rows[-1][2]:.4f} ({measured.mode} decoding)")
    src = ", ".join(f"{n} {k}" for k, n in s.word_sources.items() if n)
    print(
        f"{s.n_words} words in {s.n_utterances} utterances (word times: {src or 'none'}); "
        f"encoder look-ahead {s.encoder_frames} frames, frame shift {s.frame_shift_ms:g} ms, "
        f"front end {s.front_end_ms:g} ms"
        + (
            f"; per-frame encoder right contexts: latency is the mean wait of {s.n_tokens} tokens"
            if s.per_frame_right_context
            else ""
        )
    )
    print(f"triggers: {s.triggers_label}")


def _print_proxies(s, both, args) -> None:
    """The look-ahead each proxy (reach, kept attention) would pick, or why none."""
    if s.recommended is not None:
        r = s.recommended_row
        print(
            f"reach: {r.lookahead_frames} frames ({r.latency_ms:g} ms {s.latency_name}) reach "
            f"{100 * r.reach:.1f} % of words (target {100 * s.target:g} %)"
            + (
                " - already at look-ahead 0, so reach cannot choose"
                if r.lookahead_frames == 0
                else ""
            )
        )
    else:
        best = s.rows[-1].reach if s.rows else float("nan")
        print(
            f"reach: none - no look-ahead up to {args.max_lookahead} frames reaches "
            f"{100 * s.target:g} % (best {100 * best:.1f} %); raise --max-lookahead"
        )
    a = both["attention"]
    if a.lookahead is not None:
        r = s.rows[a.lookahead]
        print(
            f"attention: {a.lookahead} frames ({r.latency_ms:g} ms total latency) keep "
            f"{100 * r.kept_attention:.1f} % of the full-context attention mass "
            f"(share {100 * args.attention_share:g} %)"
        )
    elif not a.rule.endswith("no attention"):
        print(f"attention: none - {a.rule.split('; ', 1)[-1]}; raise --max-lookahead")


def _print_decision(s, measured, decided, both, args) -> None:
    """The measured WER's pick when re-decoded, and the recommended look-ahead."""
    if measured is not None:
        decided = measured.recommend(tolerance=args.tolerance / 100)
        if decided.lookahead is not None:
            iv = decided.interval
            print(
                f"measured WER: {decided.lookahead} frames ({decided.latency_ms:g} ms total "
                f"latency), {100 * iv.delta:+.2f} points vs full context (95 % interval "
                f"{100 * iv.lo:+.2f}..{100 * iv.hi:+.2f})"
            )
        else:
            print(f"measured WER: none - {decided.rule.split('; ', 1)[-1]}")
    elif both["reach"].lookahead == 0 and decided.criterion == "reach":
        print(
            "note: reach is at its target at look-ahead 0 and the bundle holds no attention; "
            "re-decode (--decoder) to measure what the look-ahead costs"
        )
    if decided.lookahead is None:
        print("recommended look-ahead: none")
    else:
        print(
            f"recommended look-ahead: {decided.lookahead} frames "
            f"({decided.lookahead * s.frame_shift_ms:g} ms; total latency "
            f"{decided.latency_ms:g} ms)"
        )
    print(decided.line())


def _measured(args, bundle):
    """The redecode run when a decoder was named (None otherwise)."""
    if not (args.decoder or args.demo_decoder):
        return None
    from ..redecoding import redecode

    factory = decoder_factory(args)
    return redecode(
        bundle,
        factory,
        lookaheads=list(range(args.max_lookahead + 1)),
        mode=args.mode,
        workers=args.workers,
        front_end_ms=args.front_end_ms,  # the same latency as the sweep's rows
    )
