"""``peekalign demo``: run the main job on the shipped demo bundle.

The demo bundle holds 24 utterances of synthetic tram-depot dispatch radio decoded by a
tiny streaming CTC/attention model (see ``fixtures/make/README.md``). For now the demo
forced-aligns every reference and writes CTM, JSON lines and TextGrid files.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from ..data import demo_path
from ..exceptions import ParameterError
from ..model import open_bundle
from ._common import print_problems

DEFAULT_OUT = "peekalign-demo"


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "demo",
        help="run the whole job on the embedded demo bundle",
        description="Forced-align the shipped demo bundle (synthetic tram-depot dispatch "
        "radio, tiny streaming CTC/attention model) and write the results into a folder.",
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
    print(f"demo bundle: {bundle_dir} ({len(bundle)} utterances)")
    print(f"aligned {len(result.aligned)} utterances; results in {out.resolve()}:")
    print(f"  {paths['ctm'].name:<16} word times, NIST CTM")
    print(f"  {paths['json'].name:<16} tokens and words with frames, one utterance a line")
    print(f"  {paths['textgrid'].name + '/':<16} one TextGrid per utterance")
    if result.problems:
        print_problems(result.problems)
        return 1
    return 0
