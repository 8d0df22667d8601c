"""``peekalign check BUNDLE``: list every problem of a bundle, one line each."""

from __future__ import annotations

import argparse

from ..model import check_bundle
from ._common import print_notes, print_problems


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "check",
        help="list every problem of a bundle",
        description="Read every utterance of BUNDLE and list each problem on one line: "
        "the utterance, what was found, what was expected and the fix.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder (holds bundle.json)")
    return p


def run(args: argparse.Namespace) -> int:
    problems = check_bundle(args.bundle)
    if problems:
        print_problems(problems)
        print(f"{len(problems)} problem(s) in {args.bundle}")
    else:
        from ..model import open_bundle

        n = len(open_bundle(args.bundle))
        print(f"{args.bundle}: {n} utterances, no problem")
    print_notes(args.bundle)
    return 1 if problems else 0
