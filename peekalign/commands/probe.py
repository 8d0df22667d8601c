"""``peekalign probe BUNDLE``: prove the streaming figures by intervention (each
token's look-ahead need, each deletion cause tried by its fix, a second dump compared
frame by frame, the encoder's measured look-ahead)."""

from __future__ import annotations

import argparse
import math

from ..exceptions import ParameterError
from ._common import add_decoder_options, decoder_factory, demo_factory, print_problems

DEMO_ENCODER = "peekalign.encoder_probe:demo_target"


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "probe",
        help="prove it by intervention: look-ahead need, causes tried by their fix, "
        "dump against engine, measured encoder look-ahead",
        description="Run the model with one thing changed at a time. With your decoder: "
        "each reference token's look-ahead need (teacher-forced, the smallest look-ahead "
        "within --delta nats of full context) and each deleted word re-decoded with the "
        "fix its diagnosed cause predicts (cut-off: full context, pruned: 4x beam, weak: "
        "blank penalty, decoder-drop: decoder weight 0). With --engine: a second dump of "
        "the same audio compared frame by frame. With an encoder: its look-ahead measured "
        "by changing only the future input. Exit 1 when some utterance was skipped.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    add_decoder_options(
        p,
        required=True,
        decoder_help="function FACTORY(bundle) in MODULE returning the decoder",
        demo_help="the demo model's decoder (needs the [torch] extra)",
    )
    p.add_argument(
        "--lookahead", type=int, default=None, metavar="E",
        help="decoder look-ahead of the decode whose deletions are tried (default: the "
        "bundle's, else 0)",
    )  # fmt: skip
    p.add_argument("--mode", choices=("triggered", "joint", "ctc"), default="triggered")
    p.add_argument("--beam", type=int, default=8, metavar="N", help="search beam (default 8)")
    p.add_argument(
        "--decoder-weight", type=float, default=1.0, metavar="L",
        help="joint mode: weight of the decoder (default 1.0)",
    )  # fmt: skip
    p.add_argument(
        "--max-lookahead", type=int, default=30, metavar="N",
        help="look-aheads 0..N are tried for each token's need (default 30)",
    )  # fmt: skip
    p.add_argument(
        "--delta", type=float, default=0.1, metavar="NATS",
        help="a token's need: within NATS of its full-context log-prob (default 0.1)",
    )  # fmt: skip
    p.add_argument(
        "--engine", metavar="BUNDLE2",
        help="a second dump of the same audio; 'streamed': the encoder (--encoder or "
        "--demo-encoder) replayed on the input as it arrives, each frame from the input "
        "its declared look-ahead allows",
    )  # fmt: skip
    enc = p.add_mutually_exclusive_group()
    enc.add_argument(
        "--encoder", metavar="MODULE:FACTORY",
        help="function FACTORY(bundle) returning a dict with the torch 'encoder', "
        "'features' (utt -> input array) and optionally 'layers', 'declared', "
        "'subsampling', 'front_end_frames'",
    )  # fmt: skip
    enc.add_argument(
        "--demo-encoder", action="store_true", help="the demo model's encoder (torch extra)"
    )
    p.add_argument(
        "--encoder-utts", type=int, default=1, metavar="N",
        help="utterances whose encoder look-ahead is measured (default 1)",
    )  # fmt: skip
    p.add_argument(
        "--encoder-frames", type=int, default=None, metavar="N",
        help="measure on the first N input frames only (one encoder run per cut)",
    )  # fmt: skip
    p.add_argument(
        "--workers", type=int, default=None, metavar="N",
        help="worker processes for the need and the fixes (default: one per core; 0 runs "
        "in this process)",
    )  # fmt: skip
    p.add_argument("--out", metavar="DIR", help="write probe.html and the CSV tables here")
    p.add_argument("--overwrite", action="store_true", help="replace existing files in --out")
    return p


def _checked(args) -> None:
    for name, v, lo in (
        ("--lookahead", args.lookahead, 0), ("--beam", args.beam, 1),
        ("--max-lookahead", args.max_lookahead, 0), ("--encoder-utts", args.encoder_utts, 0),
        ("--encoder-frames", args.encoder_frames, 1), ("--workers", args.workers, 0),
    ):  # fmt: skip
        if v is not None and v < lo:
            raise ParameterError(f"found {name} {v}, expected an integer >= {lo}")
    if not (math.isfinite(args.delta) and args.delta >= 0):
        raise ParameterError(f"found --delta {args.delta}, expected nats >= 0, e.g. 0.1")
    if not math.isfinite(args.decoder_weight):
        raise ParameterError(f"found --decoder-weight {args.decoder_weight}, expected a number")


def _print(r) -> None:
    if r.encoder:
        for uid, m in r.encoder:
            print(f"encoder look-ahead, measured on {uid}:")
            for line in m.leaks():
                print(f"  {line}")
    if r.dumps is not None:
        t = r.dumps.totals()
        print(
            f"dumps: {t['utterances']} utterances, mean KL {t['kl_mean']:.3g} nats, labels "
            f"agree on {100 * t['agreement']:.2f} % of frames, {t['parted']} part"
        )
    e = r.setup.lookahead

    def _frames(x: float) -> str:  # no look-ahead tried was enough: "> max"
        return f"> {r.max_lookahead}" if math.isinf(x) else f"{x:g}"

    for row in r.need_table():
        within = row["within_lookahead"]
        print(
            f"need, {row['class']}: {row['tokens']} tokens, p50 {_frames(row['need_p50_frames'])}"
            f" / p90 {_frames(row['need_p90_frames'])} / max {_frames(row['need_max_frames'])}"
            " frames"
            + ("" if within != within else f", {100 * within:.1f} % within look-ahead {e}")
        )
    for row in r.cause_table():
        share = row["share"]
        print(
            f"cause {row['code']}: {row['deleted']} deleted, fix {row['fix'] or 'none'}: "
            + ("not tested" if share != share else f"{row['confirmed']}/{row['tested']} confirmed")
            + (f"; not confirmed: {row['not_confirmed']}" if row["not_confirmed"] else "")
        )
    if not r.checks:
        print("causes: no deleted word")


def run(args: argparse.Namespace) -> int:
    from ..confirm import DecodeSetup
    from ..model import open_bundle
    from ..probing import probe
    from ..redecoding import load_factory

    _checked(args)
    bundle = open_bundle(args.bundle)
    # a factory name: every worker builds its own decoder
    decoder = decoder_factory(args)
    lookahead = args.lookahead if args.lookahead is not None else bundle.decoder_lookahead or 0
    setup = DecodeSetup(
        mode=args.mode, lookahead=lookahead, beam=args.beam, decoder_weight=args.decoder_weight
    )
    target = None
    if args.encoder or args.demo_encoder:
        if args.demo_encoder:
            demo_factory()  # the same check: torch and the demo model present
        spec = DEMO_ENCODER if args.demo_encoder else args.encoder
        target = load_factory(spec, "encoder target")(bundle)
    if args.out:
        from ..io.atomic import check_target

        check_target(f"{args.out}/probe.html", overwrite=args.overwrite)  # fail before work
    r = probe(
        bundle, decoder, setup=setup, max_lookahead=args.max_lookahead, delta=args.delta,
        engine=args.engine, encoder=target, encoder_utts=args.encoder_utts,
        max_input_frames=args.encoder_frames, workers=args.workers,
    )  # fmt: skip
    _print(r)
    if args.out:
        from ..report._probe import write_probe

        path = write_probe(r, args.out, overwrite=args.overwrite, subtitle=str(bundle.path))
        print(f"wrote {path}")
    print_problems(r.problems)
    return 1 if r.problems else 0
