"""``peekalign align BUNDLE``: forced alignment of every utterance to CTM, TextGrid
and JSON lines."""

from __future__ import annotations

import argparse
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

from ..align import Alignment, align_tokens, word_runs
from ..exceptions import ParameterError, PeekalignError
from ..io.atomic import atomic_write, check_target
from ..model import Bundle, Problem, Utterance, open_bundle
from ._common import print_problems, print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "align",
        help="forced-align every utterance (CTM, TextGrid, JSON lines)",
        description="CTC Viterbi forced alignment of each reference. Bad utterances are "
        "listed with the reason; every good one is written. Exit 1 when any was bad.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    p.add_argument("--ctm", metavar="F", help="write a NIST CTM file")
    p.add_argument("--textgrid", metavar="DIR", help="write one TextGrid per utterance")
    p.add_argument("--json", metavar="F", help="write JSON lines, one utterance a line")
    p.add_argument(
        "--level",
        choices=("word", "token"),
        default="word",
        help="units of the CTM file (default: word)",
    )
    p.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    return p


def _start(clock, frame: int) -> float:
    """Start time of a frame, clipped at 0: frame 0 of a clock with no offset starts
    half a shift before the audio does, which CTM and TextGrid cannot hold."""
    return max(0.0, float(clock.start(frame)))


@dataclass
class AlignedUtterance:
    """An utterance with its forced alignment."""

    utt: Utterance
    alignment: Alignment

    def token_rows(self) -> list[dict]:
        a, v = self.alignment, self.utt.vocab
        return [
            {
                "id": int(s.token),
                "token": v.token(s.token),
                "first": s.first,
                "last": s.last,
                "spike": s.spike,
            }
            for s in a.runs
        ]

    def word_rows(self) -> list[dict]:
        c = self.utt.clock
        return [
            {
                "word": w.word,
                "first": w.first,
                "last": w.last,
                "start_s": round(_start(c, w.first), 4),
                "end_s": round(float(c.end(w.last)), 4),
            }
            for w in word_runs(self.alignment, self.utt.vocab)
        ]

    def json_line(self) -> dict:
        return {
            "id": self.utt.id,
            "score": round(self.alignment.score, 4),
            "tokens": self.token_rows(),
            "words": self.word_rows(),
        }


@dataclass
class AlignRun:
    """All good alignments of a bundle and the problems met on the way."""

    aligned: list[AlignedUtterance] = field(default_factory=list)
    problems: list[Problem] = field(default_factory=list)


def align_bundle(bundle: Bundle) -> AlignRun:
    """Align every utterance; a bad one becomes a :class:`Problem`, the rest go on."""
    run = AlignRun(problems=[Problem(u, m) for u, m in bundle.manifest_problems])
    for uid in bundle.ids:
        try:
            utt = bundle[uid]
            a = align_tokens(utt.log_probs, utt.ref_tokens, utt.blank, utt=uid)
        except PeekalignError as exc:
            run.problems.append(Problem(uid, str(exc)))
            continue
        run.aligned.append(AlignedUtterance(utt, a))
    return run


def _safe_file_name(uid: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", uid).strip("._")[:120] or "utt"


def write_outputs(
    run: AlignRun,
    *,
    ctm: str | os.PathLike | None = None,
    textgrid: str | os.PathLike | None = None,
    json_path: str | os.PathLike | None = None,
    level: str = "word",
    overwrite: bool = False,
) -> list[Path]:
    """Write the chosen outputs of an :class:`AlignRun`; returns the paths written."""
    # refuse every existing target before writing any, so a refusal leaves no partial set
    for target in (json_path, ctm):
        if target:
            check_target(target, overwrite=overwrite)
    if textgrid:
        tg = Path(textgrid)
        if tg.exists() and not tg.is_dir() or any(p.is_file() for p in tg.parents):
            raise ParameterError(
                f"found a file in the way of the TextGrid folder {str(tg)!r}, expected a "
                "folder path; choose another --textgrid"
            )
        for au in run.aligned:
            check_target(tg / f"{_safe_file_name(au.utt.id)}.TextGrid", overwrite=overwrite)
    written: list[Path] = []
    if json_path:
        with atomic_write(json_path, overwrite=overwrite) as f:
            for au in run.aligned:
                f.write(json.dumps(au.json_line(), ensure_ascii=False) + "\n")
        written.append(Path(json_path))
    if ctm:
        from ..io.ctm import write_ctm

        rows = []
        for au in run.aligned:
            if level == "word":
                rows += [
                    (au.utt.id, w["word"], w["start_s"], w["end_s"], None) for w in au.word_rows()
                ]
            else:
                c = au.utt.clock
                rows += [
                    (
                        au.utt.id,
                        t["token"],
                        _start(c, t["first"]),
                        float(c.end(t["last"])),
                        None,
                    )
                    for t in au.token_rows()
                ]
        write_ctm(ctm, rows, overwrite=overwrite)
        written.append(Path(ctm))
    if textgrid:
        from ..io.textgrid import write_textgrid

        out = Path(textgrid)
        out.mkdir(parents=True, exist_ok=True)
        for au in run.aligned:
            c = au.utt.clock
            tiers = {
                "words": [(w["start_s"], w["end_s"], w["word"]) for w in au.word_rows()],
                "tokens": [
                    (_start(c, t["first"]), float(c.end(t["last"])), t["token"])
                    for t in au.token_rows()
                ],
            }
            if au.utt.words:
                tiers["reference words"] = list((s, e, w) for w, s, e in au.utt.words)
            xmax = max([au.utt.duration_s] + [e for _, e, _ in sum(tiers.values(), [])])
            path = out / f"{_safe_file_name(au.utt.id)}.TextGrid"
            write_textgrid(path, tiers, xmax=xmax, overwrite=overwrite)
            written.append(path)
    return written


def run(args: argparse.Namespace) -> int:
    bundle = open_bundle(args.bundle)
    result = align_bundle(bundle)
    write_outputs(
        result,
        ctm=args.ctm,
        textgrid=args.textgrid,
        json_path=args.json,
        level=args.level,
        overwrite=args.overwrite,
    )
    rows = []
    for au in result.aligned:
        a = au.alignment
        rows.append(
            (
                au.utt.id,
                au.utt.num_frames,
                len(a.tokens),
                len(au.word_rows()),
                f"{a.score:.2f}",
                f"{a.score / max(au.utt.num_frames, 1):.3f}",
            )
        )
    print_table(("utt", "frames", "tokens", "words", "score", "score/frame"), rows)
    print(
        f"aligned {len(result.aligned)} of {len(bundle) + len(bundle.manifest_problems)} "
        f"utterances"
    )
    if result.problems:
        print_problems(result.problems)
        print(f"{len(result.problems)} utterance(s) not aligned (listed above)")
        return 1
    return 0
