"""The intervention page: ``probe.html`` and its CSV tables.

Four sections, one per intervention (DEVELOPERS.md, "Proof by intervention"): the
encoder's look-ahead measured against the declared one, two dumps compared frame by
frame, each token's look-ahead need, and each deletion cause tried by its fix. The
page is ``templates/probe.html`` with one template per section in
``templates/sections/probe_*.html`` (autoescape: every id, word and token is escaped).
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from .. import __version__
from . import _svg
from ._html import Column, card, problems_table, render, sortable_table, trusted

__all__ = ["render_probe", "write_probe"]

CSV_FILES = {
    "need.csv": "token_table",
    "need_classes.csv": "need_table",
    "causes.csv": "cause_table",
    "deleted_words.csv": "word_table",
    "encoder.csv": "encoder_table",
}


def _pct(x: float) -> str:
    return "-" if x != x else f"{100 * x:.1f} %"


def _frames(x: float, most: int) -> str:
    """A need in frames; ``inf`` (no look-ahead tried was enough) as "> most"."""
    return "-" if x != x else (f"> {most}" if math.isinf(x) else f"{int(x)}")


def _encoder_section(p) -> list[dict]:
    """Per utterance measured: its cards and the plain-words lines."""
    out = []
    for uid, m in p.encoder:
        ex = m.excess if m.declared is not None else np.zeros(m.measured.size, np.int64)
        ok = ~m.censored
        leaking = int(np.sum((ex > 0) & ok))
        cards = [
            card("frames measured", f"{int(ok.sum())}", f"of {m.measured.size} ({uid})"),
            card(
                "measured look-ahead",
                f"{int(m.measured[ok].max()) if ok.any() else 0}",
                "frames, largest",
            ),  # fmt: skip
            card("declared", "-" if m.declared is None else f"{int(m.declared.max())}", "frames"),
            card("frames above declared", f"{leaking}", bad=leaking > 0),
        ]
        out.append({"cards": cards, "lines": m.leaks()})
    return out


def _dump_section(p) -> dict | None:
    """Cards and the per-utterance table of the dump comparison."""
    if p.dumps is None:
        return None
    t = p.dumps.totals()
    cards = [
        card("utterances", f"{t['utterances']}", f"{t['frames']} frames"),
        card("mean KL", f"{t['kl_mean']:.2g}", "nats per frame"),
        card("greedy labels agree", _pct(t["agreement"]), "of frames"),
        card("utterances that part", f"{t['parted']}", bad=t["parted"] > 0),
    ]
    cols = [
        Column("utterance", lambda r: r["id"]),
        Column("frames", lambda r: r["frames"], num=True),
        Column("mean KL", lambda r: r["kl_mean"], num=True, cell=lambda r: f"{r['kl_mean']:.2g}"),
        Column("largest KL", lambda r: r["kl_max"], num=True, cell=lambda r: f"{r['kl_max']:.2g}"),
        Column(
            "labels agree", lambda r: r["agreement"], num=True, cell=lambda r: _pct(r["agreement"])
        ),
        Column(
            "part frame",
            lambda r: r["part_frame"],
            num=True,
            cell=lambda r: "never" if r["part_frame"] < 0 else str(r["part_frame"]),
        ),  # fmt: skip
        Column("same greedy text", lambda r: "yes" if r["same_text"] else "no"),
    ]
    rows = sorted(p.dumps.table, key=lambda r: (r["part_frame"] < 0, r["part_frame"]))
    return {"cards": cards, "table": sortable_table(cols, rows, table_id="dumps")}


def _need_cards(p, total: dict) -> list[dict]:
    """The need section's totals: tokens, p50 / p90, largest, share within look-ahead."""
    e = p.setup.lookahead
    most = p.max_lookahead
    p50, p90 = _frames(total["need_p50_frames"], most), _frames(total["need_p90_frames"], most)
    within = total["within_lookahead"]
    return [
        card("tokens", f"{total['tokens']}", f"{len(p.needs)} utterances"),
        card("need p50 / p90", f"{p50} / {p90}", "frames"),
        card(
            "largest need",
            _frames(total["need_max_frames"], most),
            f"{total['beyond_max']} beyond {p.max_lookahead}",
        ),  # fmt: skip
        card(
            f"within look-ahead {'full' if e is None else e}",
            _pct(within),
            "of tokens",
            bad=within < 0.95,
        ),  # fmt: skip
    ]


def _frames_cell(key: str, most: int):
    return lambda r: _frames(r[key], most)


def _need_tables(p, rows: list):
    """Per word class, and the 25 tokens that need the most."""
    cls_cols = [
        Column("class", lambda r: r["class"]),
        Column("tokens", lambda r: r["tokens"], num=True),
        *(
            Column(title, lambda r, k=key: r[k], num=True, cell=_frames_cell(key, p.max_lookahead))
            for title, key in (
                ("p50", "need_p50_frames"),
                ("p90", "need_p90_frames"),
                ("largest", "need_max_frames"),
            )  # fmt: skip
        ),
        Column(
            "within look-ahead",
            lambda r: r["within_lookahead"],
            num=True,
            cell=lambda r: _pct(r["within_lookahead"]),
        ),  # fmt: skip
    ]
    worst = sorted(p.token_table(), key=lambda r: -r["need_frames"])[:25]
    tok_cols = [
        *(Column(t, lambda r, k=k: r[k]) for t, k in (("utterance", "id"), ("word", "word"),
                                                       ("token", "token"), ("class", "class"))),
        Column("trigger", lambda r: r["trigger_frame"], num=True),
        Column("need", lambda r: r["need_frames"], num=True, cell=_frames_cell("need_frames", p.max_lookahead)),
    ]  # fmt: skip
    return (
        sortable_table(cls_cols, rows, table_id="need-classes"),
        sortable_table(tok_cols, worst, table_id="need-tokens"),
    )


def _need_section(p) -> dict | None:
    """Cards, the histogram of needs and the two tables."""
    if not p.needs:
        return None
    rows = p.need_table().records()
    needs = np.concatenate([n.need for n in p.needs])
    chart = _svg.histogram(
        np.where(np.isinf(needs), p.max_lookahead + 1, needs), xlabel="need (frames)",
        label="look-ahead need per token", split_at=None, unit="tokens", clip=(0.0, 100.0),
        bins=min(31, p.max_lookahead + 2),
    )  # fmt: skip
    classes, tokens = _need_tables(p, rows)
    return {
        "cards": _need_cards(p, rows[0]), "chart": trusted(chart), "classes": classes,
        "tokens": tokens, "delta": f"{p.delta:g}", "max_lookahead": p.max_lookahead,
    }  # fmt: skip


def _how(s) -> str:
    return f"{s.mode} decoding, look-ahead {'full' if s.lookahead is None else s.lookahead}" + (
        f", beam {s.beam}" if s.mode != "triggered" or s.triggers == "search" else ""
    )


def _cause_section(p) -> dict | None:
    """Cards, the table per cause and the table of every deleted word."""
    if not p.checks:
        return None
    table = p.cause_table()
    cols = [
        Column("cause", lambda r: r["code"]),
        Column("fix tried", lambda r: r["fix"] or "none"),
        *(Column(t, lambda r, k=t: r[k], num=True) for t in ("deleted", "tested", "confirmed")),
        Column("share", lambda r: r["share"], num=True, cell=lambda r: _pct(r["share"])),
        Column("not confirmed (fixes that did)", lambda r: r["not_confirmed"], css="wrap"),
    ]
    wcols = [
        Column("utterance", lambda r: r["id"]),
        Column("word", lambda r: r["word"]),
        Column("cause", lambda r: r["code"]),
        Column("fix", lambda r: r["fix"] or "none"),
        Column("comes back", lambda r: r["confirmed"] or "not tested"),
        Column("brought back by", lambda r: r["fixed_by"].replace(",", ", ") or "nothing"),
    ]
    tested = int(sum(table["tested"])) if len(table) else 0
    conf = int(sum(table["confirmed"])) if len(table) else 0
    cards = [
        card("deleted words", f"{len(p.checks)}", _how(p.setup)),
        card("tested", f"{tested}", "causes with a decoding fix"),
        card(
            "confirmed",
            _pct(conf / tested if tested else float("nan")),
            f"{conf} of {tested}",
            bad=tested > 0 and conf < tested,
        ),  # fmt: skip
    ]
    return {
        "cards": cards,
        "table": sortable_table(cols, table, table_id="causes"),
        "words": sortable_table(wcols, p.word_table(), table_id="deleted-words"),
    }


def render_probe(p, *, title: str = "Proof by intervention", subtitle: str = "") -> str:
    """The whole ``probe.html`` page of a :class:`peekalign.probing.Probe`.

    Examples
    --------
    See :func:`write_probe`.
    """
    problems = problems_table(p.problems)
    files = (*CSV_FILES, *(("dumps.csv",) if p.dumps is not None else ()))
    summary = {
        "utterances": len(p.needs), "deleted_words": len(p.checks),
        "problems": len(p.problems), "dumps": p.dumps is not None, "encoder": len(p.encoder),
    }  # fmt: skip
    return str(
        render(
            "probe.html",
            title=title,
            subtitle=subtitle,
            summary=summary,
            encoder=_encoder_section(p),
            dumps=_dump_section(p),
            need=_need_section(p),
            causes=_cause_section(p),
            how=_how(p.setup),
            problems=problems,
            files=files,
            version=__version__,
        )  # fmt: skip
    )


def write_probe(p, out: str | os.PathLike, *, overwrite: bool = False, subtitle: str = "") -> Path:
    """Write ``probe.html`` and its CSV tables into folder ``out`` (created).

    Examples
    --------
    >>> from peekalign.probing import Probe
    >>> from peekalign.confirm import DecodeSetup
    >>> empty = Probe([], [], None, [], [], DecodeSetup(), 30, 0.1)
    >>> write_probe(empty, "probe-out").name
    'probe.html'
    """
    from ..io.atomic import atomic_write, check_target

    folder = Path(out)
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / "probe.html"
    for name in (target.name, *CSV_FILES, "dumps.csv"):  # refuse before writing anything
        check_target(folder / name, overwrite=overwrite)
    for name, method in CSV_FILES.items():
        getattr(p, method)().write_csv(folder / name, overwrite=overwrite)
    if p.dumps is not None:
        p.dumps.table.write_csv(folder / "dumps.csv", overwrite=overwrite)
    with atomic_write(target, overwrite=overwrite, encoding="utf-8") as f:
        f.write(render_probe(p, subtitle=subtitle))
    return target
