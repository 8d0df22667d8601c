"""Helpers shared by the commands: table printing and problem lists."""

from __future__ import annotations

import sys
from collections.abc import Iterable, Sequence


def print_table(headers: Sequence[str], rows: Iterable[Sequence[object]], *, file=None) -> None:
    """Print rows as plain aligned columns (numbers right-aligned)."""
    file = file or sys.stdout
    rows = [[_fmt(c) for c in r] for r in rows]
    widths = [len(h) for h in headers]
    for r in rows:
        widths = [max(w, len(c)) for w, c in zip(widths, r, strict=True)]
    numeric = [all(_is_num(r[i]) for r in rows) and bool(rows) for i in range(len(headers))]

    def line(cells):
        return "  ".join(
            c.rjust(w) if num else c.ljust(w)
            for c, w, num in zip(cells, widths, numeric, strict=True)
        ).rstrip()

    print(line(list(headers)), file=file)
    for r in rows:
        print(line(r), file=file)


def _fmt(c: object) -> str:
    if isinstance(c, float):
        return f"{c:.3f}"
    return str(c)


def _is_num(s: str) -> bool:
    try:
        float(s)
    except ValueError:
        return False
    return True


def print_problems(problems, *, file=None) -> None:
    """One line per problem: ``<utt>: <message>``."""
    file = file or sys.stderr
    for p in problems:
        msg = p.message
        prefix = f"utt {p.utt!r}: "
        if msg.startswith(prefix):
            msg = msg[len(prefix) :]
        print(f"{p.utt}: {msg}", file=file)


def print_notes(bundle_path, *, file=None) -> None:
    """Print the bundle's notes (streaming facts it leaves out), one ``note:`` line each.

    A bundle that does not open prints nothing here: that is the problem listed.
    """
    from ..exceptions import PeekalignError
    from ..model import open_bundle

    try:
        notes = open_bundle(bundle_path).notes()
    except PeekalignError:
        return
    for note in notes:
        print(f"note: {note}", file=file or sys.stdout)
