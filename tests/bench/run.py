"""Run the performance benchmarks and print the table.

    python tests/bench/run.py                 # every figure (15-25 minutes, most of
                                              # it the 1,000-page scan report)
    python tests/bench/run.py align fb        # some figures
    python tests/bench/run.py --quick         # fewer repeats, 100-utterance scan (~5 min)
    python tests/bench/run.py --markdown      # the table as Markdown (for the README)

Figures are measured against a reference in the same process (ratios), on seeded
synthetic inputs, one thread each (``torch.set_num_threads(1)``,
``NUMBA_NUM_THREADS=1``) unless the figure says otherwise. Every fast result is
checked against a reference value (the "check" column). Synthetic bundles are
written once under ``--cache`` (default: the temp folder) and reused.

Not part of the test command: timings are not tests.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import os
import platform
import sys
import traceback
from pathlib import Path

os.environ.setdefault("NUMBA_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import figures  # noqa: E402


def _machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        load = f"load {os.getloadavg()[0]:.1f}"
    except OSError:
        load = ""
    return f"{cpu}, {os.cpu_count()} cores, Python {platform.python_version()}, {load}"


def _mark(ok) -> str:
    return {True: "yes", False: "NO", None: "-"}[ok]


def render(rows: list[figures.Row], markdown: bool) -> str:
    head = ("figure", "ours", "reference", "ratio", "target", "pass", "wall", "check")
    cells = [head] + [
        (r.figure, r.ours, r.ref, r.ratio, r.target, _mark(r.ok), r.wall, r.check) for r in rows
    ]
    if markdown:
        lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        for c in cells[1:]:
            lines.append("| " + " | ".join(x.replace("|", "\\|") for x in c) + " |")
        return "\n".join(lines)
    widths = [max(len(c[i]) for c in cells) for i in range(len(head) - 1)]
    out = []
    for k, c in enumerate(cells):
        out.append(
            "  ".join(x.ljust(w) for x, w in zip(c[:-1], widths, strict=True)) + "  " + c[-1]
        )
        if k == 0:
            out.append("-" * (sum(widths) + 2 * len(widths) + 5))
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("figures", nargs="*", help="any of: " + ", ".join(figures.FIGURES))
    ap.add_argument("--quick", action="store_true", help="fewer repeats; 100-utterance scan")
    ap.add_argument("--repeat", type=int, default=None, help="timed repeats per figure")
    ap.add_argument(
        "--cache",
        type=Path,
        default=figures.Config.cache,
        help="folder for the synthetic bundles (default: %(default)s)",
    )
    ap.add_argument("--markdown", action="store_true", help="print a Markdown table")
    args = ap.parse_args(argv)
    names = args.figures or list(figures.FIGURES)
    unknown = [n for n in names if n not in figures.FIGURES]
    if unknown:
        ap.error(f"unknown figure(s) {unknown}; choose from {list(figures.FIGURES)}")
    cfg = figures.Config(
        repeat=args.repeat or (5 if args.quick else 15), cache=args.cache, quick=args.quick
    )
    cfg.cache.mkdir(parents=True, exist_ok=True)
    print(f"# {_dt.date.today().isoformat()}  {_machine()}", flush=True)
    rows: list[figures.Row] = []
    for name in names:
        print(f"# running {name} ...", file=sys.stderr, flush=True)
        try:
            got = figures.FIGURES[name](cfg)
        except Exception as exc:  # keep going: one broken figure must not hide the rest
            traceback.print_exc()
            got = [
                figures.Row(name, f"error: {type(exc).__name__}: {exc}"[:120], "", "", "", False)
            ]
        rows.extend(got)
        for r in got:
            print(f"#   {r.figure}: {r.ours} ({_mark(r.ok)})", file=sys.stderr, flush=True)
    print(render(rows, args.markdown))
    failed = [r for r in rows if r.ok is False]
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
