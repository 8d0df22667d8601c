"""``peekalign check BUNDLE``: list every problem of a bundle, one line each."""

from __future__ import annotations

import argparse

from ..model import check_bundle
from ._common import add_branch_option, print_notes, print_problems


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "check",
        help="list every problem of a bundle",
        description="Read every utterance of BUNDLE and list each problem on one line: "
        "the utterance, what was found, what was expected and the fix.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder (holds bundle.json)")
    add_branch_option(p)
    p.epilog = "With --branch B, an utterance without a hypothesis of branch B is a problem."
    return p


def _branch_problems(path, branch: str) -> list:
    """Utterances that open but carry no hypothesis of ``branch``."""
    from ..exceptions import PeekalignError
    from ..model import Problem, open_bundle

    try:
        bundle = open_bundle(path)
    except PeekalignError:
        return []  # the bundle's own problem is listed already
    out = []
    for uid in bundle.ids:
        try:
            bundle[uid].hypothesis(branch)
        except PeekalignError as exc:
            out.append(Problem(uid, str(exc)))
    return out


def _branch_counts(path) -> str | None:
    """``"hypotheses: ctc 24, decoder 24 (system output: decoder)"`` over the bundle."""
    from collections import Counter

    from ..exceptions import PeekalignError
    from ..model import open_bundle

    try:
        bundle = open_bundle(path)
    except PeekalignError:
        return None
    have: Counter = Counter()
    system: Counter = Counter()
    for uid in bundle.ids:
        try:
            u = bundle[uid]
        except PeekalignError:
            continue
        have.update(u.hyps.keys())
        system[u.system_branch or "none"] += 1
    if not have:
        return "hypotheses: none (WER and deletion diagnoses need one)"
    counts = ", ".join(f"{b} {n}" for b, n in have.items())
    sys_ = ", ".join(f"{b} {n}" if len(system) > 1 else b for b, n in system.items())
    return f"hypotheses: {counts} (system output: {sys_})"


def run(args: argparse.Namespace) -> int:
    problems = check_bundle(args.bundle)
    if getattr(args, "branch", None):
        bad = {p.utt for p in problems}
        problems += [p for p in _branch_problems(args.bundle, args.branch) if p.utt not in bad]
    if problems:
        print_problems(problems)
        print(f"{len(problems)} problem(s) in {args.bundle}")
    else:
        from ..model import open_bundle

        n = len(open_bundle(args.bundle))
        print(f"{args.bundle}: {n} utterances, no problem")
    counts = _branch_counts(args.bundle)
    if counts:
        print(counts)
    print_notes(args.bundle)
    return 1 if problems else 0
