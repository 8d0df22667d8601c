"""``peekalign latency``: algorithmic delay of encoder and decoder look-ahead."""

from __future__ import annotations

import argparse
import json

from ..streaming import latency_budget
from ._common import print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "latency",
        help="latency budget of encoder + decoder look-ahead",
        description="Algorithmic delay: encoder layers x per-layer look-ahead frames, plus "
        "the decoder look-ahead past the trigger frame, plus the front end.",
    )
    p.add_argument(
        "--frame-shift-ms",
        type=float,
        required=True,
        metavar="F",
        help="encoder frame shift in ms (feature hop x subsampling)",
    )
    p.add_argument("--layers", type=int, default=0, metavar="L", help="encoder layers")
    p.add_argument(
        "--per-layer",
        type=int,
        default=0,
        metavar="R",
        help="future frames each encoder layer sees",
    )
    p.add_argument(
        "--lookahead",
        type=int,
        default=0,
        metavar="E",
        help="decoder look-ahead in encoder frames",
    )
    p.add_argument(
        "--front-end-ms",
        type=float,
        default=0.0,
        metavar="X",
        help="front end's own look-ahead in ms (e.g. conv right context)",
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    return p


def run(args: argparse.Namespace) -> int:
    b = latency_budget(
        frame_shift_ms=args.frame_shift_ms,
        layers=args.layers,
        per_layer=args.per_layer,
        lookahead=args.lookahead,
        front_end_ms=args.front_end_ms,
    )
    if args.json:
        print(json.dumps(b.as_dict()))
        return 0
    rows = [
        ("encoder", b.encoder_frames, b.encoder_ms),
        ("decoder", b.decoder_frames, b.decoder_ms),
        ("front end", "", b.front_end_ms),
        ("total", "", b.total_ms),
    ]
    print_table(("part", "frames", "ms"), [(p, f, f"{ms:g}") for p, f, ms in rows])
    return 0
