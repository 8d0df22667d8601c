"""``peekalign scan BUNDLE --out DIR``: scan a whole test set and write its report."""

from __future__ import annotations

import argparse

from ._common import (
    add_branch_option,
    add_triggers_option,
    branch_line,
    print_notes,
    print_problems,
    print_recommendations,
    print_table,
    wer_headline,
)


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "scan",
        help="scan every utterance; write an HTML report and CSV tables",
        description="Analyse every utterance of BUNDLE (in parallel) and write DIR: "
        "index.html (totals, WER, deletion causes, margin and delay distributions, the "
        "look-ahead sweep, the worst utterances), utts/<id>.html (each utterance's "
        "views), utterances.csv, words.csv, sweep.csv, problems.csv (and slices.csv "
        "with --by). Bad utterances "
        "are listed with the reason; every good one is in the tables. Exit 1 when any "
        "was bad.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    p.add_argument("--out", metavar="DIR", required=True, help="report folder to write")
    p.add_argument(
        "--lookahead",
        metavar="N",
        type=int,
        help="decoder look-ahead in frames (default: the bundle's own)",
    )
    p.add_argument(
        "--workers",
        metavar="N",
        type=int,
        help="worker processes (default: one per core; 0 runs in this process)",
    )
    p.add_argument(
        "--max-lookahead", metavar="N", type=int, default=30, help="sweep look-aheads 0..N"
    )
    p.add_argument(
        "--target",
        metavar="P",
        type=float,
        default=0.95,
        help="reach the recommended look-ahead must reach (default 0.95)",
    )
    p.add_argument(
        "--pages",
        metavar="N",
        type=int,
        help="draw the views of the N worst utterances only (default: every utterance; "
        "drawing is the slow part)",
    )
    p.add_argument(
        "--no-pages", action="store_true", help="skip the per-utterance pages (fastest)"
    )
    p.add_argument(
        "--by",
        metavar="FIELD",
        action="append",
        default=[],
        help="slice by this manifest meta field (repeatable): WER, deletion rate and "
        "reach per slice with bootstrap 95 %% intervals, printed and written to "
        "slices.csv; numbers with many values are binned at their quartiles",
    )
    p.add_argument(
        "--glm",
        metavar="FILE",
        help="alternates in the NIST GLM filter format, applied to both sides after "
        "case, punctuation and number normalisation; the clean WER and the errors it "
        "removed are printed",
    )
    p.add_argument(
        "--word-counts",
        metavar="FILE",
        help="word counts of the training text ('word count' a line): errors by "
        "frequency bin and OOV, printed and written to frequency_bins.csv",
    )
    p.add_argument(
        "--entities",
        metavar="FILE",
        help="entity list (one entry a line): recall and B-WER / U-WER are printed",
    )
    p.add_argument(
        "--figures",
        metavar="FIGDIR",
        help="also write every chart of the overview as a 16:9 slide figure into FIGDIR "
        "(SVG, and PNG through headless Chromium when playwright is installed)",
    )
    p.add_argument(
        "--redecoded",
        metavar="CSV",
        help="the table 'peekalign redecode --csv' wrote for this bundle: its measured WER "
        "joins the look-ahead sweep on one plot and decides the recommended look-ahead",
    )
    p.add_argument(
        "--tolerance",
        type=float,
        default=0.5,
        metavar="P",
        help="with --redecoded: WER points the recommended look-ahead may lose against full "
        "context at the upper 95 %% bound (default: 0.5)",
    )
    add_branch_option(p)
    add_triggers_option(p)
    p.add_argument("--overwrite", action="store_true", help="replace a non-empty DIR")
    return p


def print_review(s, args) -> None:
    """Clean scoring, frequency bins and entity scores, as the options ask."""
    from pathlib import Path

    if s.alignments():
        print("clean scoring: " + s.scoring(glm=args.glm).summary())
    if args.word_counts:
        t = s.frequency_bins(args.word_counts)
        print_table(t.columns, t.rows)
        print(f"frequency bins written to {Path(args.out) / 'frequency_bins.csv'}")
    if args.entities:
        e = s.entity_scores(args.entities)
        print(
            f"entities: {e.recalled} of {e.entities} recalled ({_pct(e.recall)} %); "
            f"B-WER {_pct(e.b_wer)} % over {e.b_words} words, "
            f"U-WER {_pct(e.u_wer)} % over {e.u_words} words"
        )


def _pct(x) -> str:
    return "" if x != x else f"{100 * x:.1f}"


def print_slices(s, fields) -> None:
    """Print the slices of each field (the report folder has them in slices.csv)."""
    for f in fields:
        print_table(
            ("field", "value", "utts", "words", "wer %", "95 % interval", "del %", "reach %"),
            [
                (
                    r["field"],
                    r["value"],
                    r["utterances"],
                    r["words"],
                    _pct(r["wer"]),
                    f"{_pct(r['wer_lo'])}-{_pct(r['wer_hi'])}",
                    _pct(r["del_rate"]),
                    _pct(r["reach"]),
                )
                for r in s.by(f)
            ],
        )


def summarize(s, *, worst: int = 10, measured=None, tolerance: float = 0.005) -> None:
    """Print the worst utterances, the totals of a scan and its look-ahead choice."""
    rows = []
    for r in s.worst(worst):
        errs = "" if r["S"] is None else r["S"] + r["D"] + r["I"]
        rows.append(
            (
                r["id"],
                r["n_words"],
                errs,
                "" if r["wer"] != r["wer"] else f"{r['wer']:.3f}",
                "" if r["D"] is None else r["D"],
                r["worst_reach_margin_ms"],
                r["median_emission_delay_ms"],
            )
        )
    if rows:
        print_table(
            ("utt", "words", "errors", "wer", "D", "worst_reach_margin_ms", "median_delay_ms"),
            rows,
        )
    t = s.totals()
    print(
        f"{t['n_utterances']} utterances, {t['n_words']} words, {wer_headline(t, 2)}: "
        f"S {t['S']}, D {t['D']}, I {t['I']}"
    )
    by_branch = branch_line(t, 2)
    if by_branch:
        print(by_branch)
    print(f"triggers: {s.sweep.triggers_label}")
    rec = print_recommendations(s.sweep, measured, tolerance=tolerance)
    if rec.lookahead is not None:
        print(
            f"recommended look-ahead: {rec.lookahead} frames ({rec.latency_ms:.0f} ms "
            f"{s.sweep.latency_name})"
        )
    else:
        print("recommended look-ahead: none")
    print(rec.line())


def _check_inputs(args) -> None:
    """Read the optional input files before the long scan: a bad one fails at once."""
    from pathlib import Path

    from ..confusions import read_word_counts
    from ..exceptions import ParameterError, describe
    from ..normalize import read_glm

    if args.glm:
        read_glm(Path(args.glm))
    if args.word_counts:
        read_word_counts(args.word_counts)
    if not (args.tolerance == args.tolerance and 0 <= args.tolerance < 100):
        raise ParameterError(
            f"found --tolerance {args.tolerance!r}, expected WER points in [0, 100), e.g. 0.5"
        )
    if args.entities and not Path(args.entities).is_file():
        raise ParameterError(
            describe(f"no file at {args.entities!r}", "an entity list", "check the path")
        )


def run(args: argparse.Namespace) -> int:
    from ..report import write_report

    _check_inputs(args)
    measured = None
    if args.redecoded:
        from ..redecoding import read_redecode_csv

        measured = read_redecode_csv(args.redecoded)  # a bad file fails before the scan
    s = write_report(
        args.bundle,
        args.out,
        lookahead=args.lookahead,
        workers=args.workers,
        overwrite=args.overwrite,
        pages=False if args.no_pages else (True if args.pages is None else args.pages),
        max_lookahead=args.max_lookahead,
        target=args.target,
        by=args.by,
        figures=args.figures,
        word_counts=args.word_counts,
        entities=args.entities,
        glm=args.glm,
        branch=args.branch,
        triggers=args.triggers,
        measured=measured,
        tolerance=args.tolerance / 100,
    )
    summarize(s, measured=measured, tolerance=args.tolerance / 100)
    print(f"report written to {args.out}/index.html")
    if args.figures:
        print(f"figures written to {args.figures}")
    print_review(s, args)
    if args.by:
        print_slices(s, args.by)
        print(f"slices written to {args.out}/slices.csv")
    print_notes(args.bundle)
    if s.problems:
        print_problems(s.problems)
        print(f"{len(s.problems)} utterance(s) not analysed (listed above and in problems.csv)")
        return 1
    return 0
