"""``peekalign compare BUNDLE_A BUNDLE_B --out DIR``: two models over the same ids."""

from __future__ import annotations

import argparse

from ._common import print_problems, print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "compare",
        help="compare two models over the same utterances (HTML report and CSV)",
        description="Scan BUNDLE_A and BUNDLE_B (e.g. a streaming and a full-context "
        "model over the same test set) and write DIR: index.html (per-utterance deltas "
        "of WER, deletions and emission delay; words whose status changed), "
        "utts/<id>.html (both models' views side by side), utterances.csv, "
        "changed_words.csv, significance.csv (is B better than A: matched-pairs segment "
        "test, sign test, paired bootstrap) and problems.csv. Exit 1 when any utterance was bad or in one "
        "bundle only.",
    )
    p.add_argument("bundle_a", metavar="BUNDLE_A", help="first model's bundle")
    p.add_argument("bundle_b", metavar="BUNDLE_B", help="second model's bundle")
    p.add_argument("--out", metavar="DIR", required=True, help="report folder to write")
    p.add_argument(
        "--labels",
        nargs=2,
        metavar=("A", "B"),
        default=("A", "B"),
        help="names of the two models in the report",
    )
    p.add_argument(
        "--lookahead", metavar="N", type=int, help="decoder look-ahead of A (default: its own)"
    )
    p.add_argument(
        "--lookahead-b", metavar="N", type=int, help="decoder look-ahead of B (default: its own)"
    )
    p.add_argument("--workers", metavar="N", type=int, help="worker processes")
    p.add_argument("--no-pages", action="store_true", help="skip the side-by-side pages")
    p.add_argument(
        "--by",
        metavar="FIELD",
        help="also test each slice of this manifest meta field (of BUNDLE_A): printed, "
        "in the report and in significance.csv",
    )
    p.add_argument(
        "--glm",
        metavar="FILE",
        help="NIST GLM alternates: print both models' clean scoring (after case, "
        "punctuation and number normalisation and the alternates)",
    )
    p.add_argument("--overwrite", action="store_true", help="replace a non-empty DIR")
    return p


def run(args: argparse.Namespace) -> int:
    from ..normalize import read_glm
    from ..report import write_comparison

    if args.glm:
        read_glm(args.glm)  # a bad file fails before the scans

    c = write_comparison(
        args.bundle_a,
        args.bundle_b,
        args.out,
        labels=tuple(args.labels),
        lookahead=args.lookahead,
        lookahead_b=args.lookahead_b,
        workers=args.workers,
        overwrite=args.overwrite,
        pages=not args.no_pages,
        by=args.by,
    )
    a, b = c.label_a, c.label_b
    rows = sorted(
        c.utterances,
        key=lambda r: (-(r["wer_delta"] if r["wer_delta"] == r["wer_delta"] else -9), r["id"]),
    )[:10]
    if rows:
        print_table(
            ("utt", f"wer_{a}", f"wer_{b}", "wer_delta", "D_delta", "delay_delta_ms", "changed"),
            [
                (
                    r["id"],
                    r["wer_a"],
                    r["wer_b"],
                    r["wer_delta"],
                    "" if r["D_delta"] is None else r["D_delta"],
                    r["emission_delay_delta_ms"],
                    r["changed_words"],
                )
                for r in rows
            ],
        )
    t = c.totals()
    print(
        f"{t['n_common']} common utterances; WER {a} {t['a']['wer'] * 100:.2f} % -> {b} "
        f"{t['b']['wer'] * 100:.2f} %; deletions {t['a']['D']} -> {t['b']['D']}; "
        f"{t['n_changed_words']} word(s) changed status"
    )
    table = c.significance(by=args.by)
    for r in table:
        where = "" if r["field"] == "all" else f"{r['field']} = {r['value']}: "
        print(
            f"{where}{r['verdict']} (matched-pairs p = {r['mp_p']:.3g} over "
            f"{r['segments']} segments; sign test p = {r['sign_p']:.3g}; bootstrap p = "
            f"{r['boot_p']:.3g})"
        )
    if args.glm:
        for label, s in ((a, c.a), (b, c.b)):
            print(f"clean scoring {label}: " + s.scoring(glm=args.glm).summary())
    print(f"report written to {args.out}/index.html")
    if c.problems:
        print_problems(c.problems)
        print(f"{len(c.problems)} problem(s) (listed above and in problems.csv)")
        return 1
    return 0
