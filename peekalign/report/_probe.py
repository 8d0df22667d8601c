"""The intervention page: ``probe.html`` and its CSV tables.

Four sections, one per intervention (DEVELOPERS.md, "Proof by intervention"): the
encoder's look-ahead measured against the declared one, two dumps compared frame by
frame, each token's look-ahead need, and each deletion cause tried by its fix. Every
id, word and token goes through :func:`esc`.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from . import _svg
from ._html import Column, card, esc, page, sortable_table

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


def _frames(x: float) -> str:
    return "-" if x != x else ("more than max" if math.isinf(x) else f"{int(x)}")


def _encoder_section(p) -> str:
    head = "<h2>Encoder look-ahead, measured</h2>"
    if not p.encoder:
        return head + (
            "<p class='muted'>Not measured: it needs the encoder as a torch module "
            "(<code>--encoder MODULE:FACTORY</code> or <code>--demo-encoder</code>).</p>"
        )
    parts = [
        head,
        "<p class='muted'>The input was changed only after each cut and the encoder run "
        "again; an encoder frame whose output moved depends on input past the cut.</p>",
    ]
    for uid, m in p.encoder:
        ex = m.excess if m.declared is not None else np.zeros(m.measured.size, np.int64)
        ok = ~m.censored
        leaking = int(np.sum((ex > 0) & ok))
        cards = (
            card("frames measured", f"{int(ok.sum())}", f"of {m.measured.size} ({esc(uid)})")
            + card(
                "measured look-ahead",
                f"{int(m.measured[ok].max()) if ok.any() else 0}",
                "frames, largest",
            )  # fmt: skip
            + card("declared", "-" if m.declared is None else f"{int(m.declared.max())}", "frames")
            + card("frames above declared", f"{leaking}", bad=leaking > 0)
        )
        lines = "".join(f"<li>{esc(x)}</li>" for x in m.leaks())
        parts.append(f"<div class='cards'>{cards}</div><ul class='leaks'>{lines}</ul>")
    return "".join(parts)


def _dump_section(p) -> str:
    head = "<h2>Dump against engine</h2>"
    if p.dumps is None:
        return head + (
            "<p class='muted'>No second dump given (<code>--engine BUNDLE</code>: the same "
            "audio through your streaming engine).</p>"
        )
    t = p.dumps.totals()
    cards = (
        card("utterances", f"{t['utterances']}", f"{t['frames']} frames")
        + card("mean KL", f"{t['kl_mean']:.2g}", "nats per frame")
        + card("greedy labels agree", _pct(t["agreement"]), "of frames")
        + card("utterances that part", f"{t['parted']}", bad=t["parted"] > 0)
    )
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
    return (
        head + f"<div class='cards'>{cards}</div>" + sortable_table(cols, rows, table_id="dumps")
    )


def _need_cards(p, total: dict) -> str:
    """The need section's totals: tokens, p50 / p90, largest, share within look-ahead."""
    e = p.setup.lookahead
    return (
        card("tokens", f"{total['tokens']}", f"{len(p.needs)} utterances")
        + card(
            "need p50 / p90",
            f"{_frames(total['need_p50_frames'])} / {_frames(total['need_p90_frames'])}",
            "frames",
        )  # fmt: skip
        + card(
            "largest need",
            _frames(total["need_max_frames"]),
            f"{total['beyond_max']} beyond {p.max_lookahead}",
        )  # fmt: skip
        + card(
            f"within look-ahead {'full' if e is None else e}",
            _pct(total["within_lookahead"]),
            "of tokens",
            bad=total["within_lookahead"] < 0.95,
        )  # fmt: skip
    )


def _frames_cell(key: str):
    return lambda r: _frames(r[key])


def _need_tables(p, rows: list) -> str:
    """Per word class, and the 25 tokens that need the most."""
    cls_cols = [
        Column("class", lambda r: r["class"]),
        Column("tokens", lambda r: r["tokens"], num=True),
        *(
            Column(title, lambda r, k=key: r[k], num=True, cell=_frames_cell(key))
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
        Column("need", lambda r: r["need_frames"], num=True, cell=_frames_cell("need_frames")),
    ]  # fmt: skip
    return (
        "<figure><figcaption>Per word class</figcaption>"
        + sortable_table(cls_cols, rows, table_id="need-classes") + "</figure></div>"
        + "<h3>Tokens that need the most</h3>"
        + sortable_table(tok_cols, worst, table_id="need-tokens")
    )  # fmt: skip


def _need_section(p) -> str:
    head = "<h2>Look-ahead need per token</h2>"
    if not p.needs:
        return head + "<p class='muted'>No utterance measured.</p>"
    rows = p.need_table().records()
    needs = np.concatenate([n.need for n in p.needs])
    chart = _svg.histogram(
        np.where(np.isinf(needs), p.max_lookahead + 1, needs), xlabel="need (frames)",
        label="look-ahead need per token", split_at=None, unit="tokens", clip=(0.0, 100.0),
        bins=min(31, p.max_lookahead + 2),
    )  # fmt: skip
    note = (
        f"<p class='muted'>Teacher-forced: the smallest look-ahead from which the decoder's "
        f"log-prob of the reference token stays within {p.delta:g} nats of full context "
        f"(look-aheads 0-{p.max_lookahead} tried).</p>"
    )
    return (
        head + note + f"<div class='cards'>{_need_cards(p, rows[0])}</div>"
        + f"<div class='charts'><figure><figcaption>Needs</figcaption>{chart}</figure>"
        + _need_tables(p, rows)
    )  # fmt: skip


def _cause_section(p) -> str:
    head = "<h2>Causes confirmed by their fix</h2>"
    s = p.setup
    how = f"{s.mode} decoding, look-ahead {'full' if s.lookahead is None else s.lookahead}" + (
        f", beam {s.beam}" if s.mode != "triggered" or s.triggers == "search" else ""
    )
    if not p.checks:
        return head + f"<p class='muted'>No deleted word ({esc(how)}).</p>"
    table = p.cause_table()
    cols = [
        Column("cause", lambda r: r["code"]),
        Column("fix tried", lambda r: r["fix"] or "none"),
        Column("deleted", lambda r: r["deleted"], num=True),
        Column("tested", lambda r: r["tested"], num=True),
        Column("confirmed", lambda r: r["confirmed"], num=True),
        Column("share", lambda r: r["share"], num=True, cell=lambda r: _pct(r["share"])),
        Column("not confirmed (fixes that did)", lambda r: r["not_confirmed"], css="wrap"),
    ]
    words = p.word_table()
    wcols = [
        Column("utterance", lambda r: r["id"]),
        Column("word", lambda r: r["word"]),
        Column("cause", lambda r: r["code"]),
        Column("fix", lambda r: r["fix"] or "none"),
        Column(
            "comes back",
            lambda r: r["confirmed"] or "not tested",
            css="",
            cell=lambda r: esc(r["confirmed"] or "not tested"),
        ),  # fmt: skip
        Column("brought back by", lambda r: r["fixed_by"].replace(",", ", ") or "nothing"),
    ]
    tested = int(sum(table["tested"])) if len(table) else 0
    conf = int(sum(table["confirmed"])) if len(table) else 0
    cards = (
        card("deleted words", f"{len(p.checks)}", esc(how))
        + card("tested", f"{tested}", "causes with a decoding fix")
        + card(
            "confirmed",
            _pct(conf / tested if tested else float("nan")),
            f"{conf} of {tested}",
            bad=tested > 0 and conf < tested,
        )  # fmt: skip
    )
    return (
        head + f"<div class='cards'>{cards}</div>"
        + sortable_table(cols, table, table_id="causes")
        + "<h3>Every deleted word</h3>" + sortable_table(wcols, words, table_id="deleted-words")
    )  # fmt: skip


def render_probe(p, *, title: str = "Proof by intervention", subtitle: str = "") -> str:
    """The whole ``probe.html`` page of a :class:`peekalign.probing.Probe`.

    Examples
    --------
    See :func:`write_probe`.
    """
    problems = ""
    if p.problems:
        rows = "".join(
            f"<tr><td>{esc(x.utt)}</td><td class='wrap'>{esc(x.message)}</td></tr>"
            for x in p.problems
        )
        problems = (
            "<h2>Problems</h2><div class='tablewrap problems'><table class='data'>"
            f"<tbody>{rows}</tbody></table></div>"
        )
    names = (*CSV_FILES, *(("dumps.csv",) if p.dumps is not None else ()))
    files = " ".join(f"<a href='{f}'>{f}</a>" for f in names)
    body = (
        _encoder_section(p) + _dump_section(p) + _need_section(p) + _cause_section(p)
        + problems + f"<footer class='files'>{files}</footer>"
    )  # fmt: skip
    return page(title, body, subtitle=esc(subtitle))


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
