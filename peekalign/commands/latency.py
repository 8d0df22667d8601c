"""``peekalign latency [BUNDLE]``: the algorithmic look-ahead of a streaming set-up."""

from __future__ import annotations

import argparse
import json

from ..clock import FrameClock
from ..exceptions import ParameterError
from ..streaming import algorithmic_lookahead
from ._common import print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "latency",
        help="algorithmic look-ahead of encoder + decoder + front end",
        description="Algorithmic look-ahead: how far past the centre of a token's trigger "
        "frame the input reaches when the decoder emits it. Encoder layers x per-layer "
        "look-ahead frames, plus the decoder look-ahead past the trigger frame, times the "
        "frame shift, plus the front end's own look-ahead. It leaves out the emission "
        "delay and compute time. With BUNDLE, every part not given as an option is read "
        "from its bundle.json (the same figure as the view's right context and the sweep).",
    )
    p.add_argument("bundle", metavar="BUNDLE", nargs="?", help="bundle folder (optional)")
    p.add_argument(
        "--frame-shift-ms",
        type=float,
        default=None,
        metavar="F",
        help="encoder frame shift in ms (feature hop x subsampling); needed without BUNDLE",
    )
    p.add_argument("--layers", type=int, default=None, metavar="L", help="encoder layers")
    p.add_argument(
        "--per-layer",
        type=int,
        default=None,
        metavar="R",
        help="future frames each encoder layer sees",
    )
    p.add_argument(
        "--lookahead",
        type=int,
        default=None,
        metavar="E",
        help="decoder look-ahead in encoder frames",
    )
    p.add_argument(
        "--front-end-ms",
        type=float,
        default=None,
        metavar="X",
        help="front end's own look-ahead in ms (e.g. conv right context)",
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    return p


def _setup(args: argparse.Namespace):
    """``(clock, lookahead, (layers, per_layer))``: options first, then the bundle."""
    clock, dec, enc = FrameClock(), 0, (0, 0)
    if args.bundle is not None:
        from ..model import open_bundle

        b = open_bundle(args.bundle)
        clock, dec, enc = b.clock, b.decoder_lookahead or 0, b.encoder_lookahead or (0, 0)
    elif args.frame_shift_ms is None:
        raise ParameterError(
            "give a BUNDLE or --frame-shift-ms (the encoder frame shift in ms, feature hop "
            "x subsampling)"
        )
    if args.frame_shift_ms is not None and not args.frame_shift_ms > 0:
        raise ParameterError(
            "The 'frame_shift_ms' parameter of latency must be a float in the range "
            f"(0, inf). Got {args.frame_shift_ms!r} instead."
        )
    if args.front_end_ms is not None and not args.front_end_ms >= 0:
        raise ParameterError(
            "The 'front_end_ms' parameter of latency must be a float in the range "
            f"[0, inf). Got {args.front_end_ms!r} instead."
        )
    shift_s = clock.frame_shift_s if args.frame_shift_ms is None else args.frame_shift_ms / 1000
    rc_s = clock.right_context_s if args.front_end_ms is None else args.front_end_ms / 1000
    layers = enc[0] if args.layers is None else args.layers
    per_layer = enc[1] if args.per_layer is None else args.per_layer
    dec = dec if args.lookahead is None else args.lookahead
    return FrameClock(shift_s, right_context_s=rc_s), dec, (layers, per_layer)


def run(args: argparse.Namespace) -> int:
    clock, dec, enc = _setup(args)
    b = algorithmic_lookahead(clock, lookahead=dec, encoder_lookahead=enc)
    if args.json:
        print(json.dumps(b.as_dict()))
        return 0
    rows = [
        ("encoder", b.encoder_frames, b.encoder_ms),
        ("decoder", b.decoder_frames, b.decoder_ms),
        ("front end", "", b.front_end_ms),
        ("algorithmic look-ahead", "", b.total_ms),
    ]
    print_table(("part", "frames", "ms"), [(p, f, f"{ms:g}") for p, f, ms in rows])
    return 0
