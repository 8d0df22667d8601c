"""``peekalign latency [BUNDLE]``: the algorithmic look-ahead of a streaming set-up (a
range over a chunk's frames for a chunked encoder)."""

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
    p.add_argument(
        "--chunk",
        type=int,
        default=None,
        metavar="C",
        help="chunked encoder of C frames: frame n sees C - 1 - (n mod C) frames ahead, so "
        "the encoder part ranges over 0..C-1 frames (read from BUNDLE's encoder.chunk_size)",
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    return p


def _setup(args: argparse.Namespace):
    """``(clock, lookahead, (layers, per_layer), chunk)``: options first, then the
    bundle."""
    clock, dec, enc, chunk = FrameClock(), 0, (0, 0), None
    if args.bundle is not None:
        from ..model import open_bundle

        b = open_bundle(args.bundle)
        clock, dec, enc = b.clock, b.decoder_lookahead or 0, b.encoder_lookahead or (0, 0)
        chunk = b.encoder_chunk
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
    chunk = chunk if args.chunk is None else args.chunk
    if chunk is not None and not chunk >= 1:
        raise ParameterError(
            f"The 'chunk' parameter of latency must be an int >= 1. Got {chunk!r} instead."
        )
    return FrameClock(shift_s, right_context_s=rc_s), dec, (layers, per_layer), chunk


def run(args: argparse.Namespace) -> int:
    clock, dec, enc, chunk = _setup(args)
    if chunk is not None:
        return _run_chunked(args, clock, dec, enc, chunk)
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


def _run_chunked(args, clock: FrameClock, dec: int, enc, chunk: int) -> int:
    """A chunked encoder: frame ``n`` sees ``C - 1 - (n mod C)`` frames ahead (plus any
    time-restricted layers), so the look-ahead is a range over a chunk's frames, from
    the chunk's last frame (0 more) to its first (``C - 1`` more); the mean over a
    chunk's frames is ``(C - 1) / 2`` more."""
    layers, per_layer = enc
    parts = {
        name: algorithmic_lookahead(
            clock, lookahead=dec, encoder_lookahead=layers * per_layer + extra
        )
        for name, extra in (("least", 0), ("most", chunk - 1))
    }
    mean_ms = (parts["least"].total_ms + parts["most"].total_ms) / 2
    if args.json:
        print(json.dumps({**{k: b.as_dict() for k, b in parts.items()}, "chunk": chunk,
                          "mean_total_ms": mean_ms}))  # fmt: skip
        return 0
    lo, hi = parts["least"], parts["most"]
    rows = [
        (f"encoder (chunks of {chunk})", f"{lo.encoder_frames}-{hi.encoder_frames}",
         f"{lo.encoder_ms:g}-{hi.encoder_ms:g}"),
        ("decoder", lo.decoder_frames, f"{lo.decoder_ms:g}"),
        ("front end", "", f"{lo.front_end_ms:g}"),
        ("algorithmic look-ahead", "", f"{lo.total_ms:g}-{hi.total_ms:g}"),
        ("... mean over a chunk's frames", "", f"{mean_ms:g}"),
    ]  # fmt: skip
    print_table(("part", "frames", "ms"), rows)
    print(
        "a token waits for the end of its chunk: the sweep's latency column (mean token "
        "wait) gives the figure over a test set's tokens"
    )
    return 0
