"""Error-review sections of the scan report: slices with intervals and confusions."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from ..corpus import Scan, Table
from . import _svg
from ._html import Column, Section, esc, fmt_num, render, sortable_table

__all__ = [
    "interval_bars",
    "slices_section",
    "confusions_section",
    "frequency_section",
    "entity_section",
    "scoring_section",
    "write_review_csv",
]

#: Rows of each confusion table on the page (the CSV files have them all).
TOP = 15


def interval_bars(
    rows: Sequence[tuple[str, float, float, float]],
    *,
    label: str,
    w: int = 560,
    row_h: int = 26,
) -> str:
    """Horizontal bars of a rate per row with its interval as an error bar.

    ``rows``: ``(name, rate, lo, hi)`` with rates in [0, 1]; drawn in percent.
    """
    good = [r for r in rows if r[1] == r[1]]
    if not good:
        return _svg._empty(w, 80, label, "no scored utterances")
    top = max(max(r[3] if r[3] == r[3] else r[1] for r in good), 1e-9)
    top = _svg.nice_ticks(0, top * 100, 4)[-1] / 100 if top < 1 else 1.0
    top = max(top, max(r[3] if r[3] == r[3] else r[1] for r in good))
    left = max(90, 16 + int(6.4 * max(len(r[0]) for r in good)))
    right = 120
    span = w - left - right
    parts = []
    for k, (name, v, lo, hi) in enumerate(good):
        y = 8 + k * row_h
        x = left + span * v / top
        parts.append(
            f'<text x="{left - 8}" y="{y + row_h / 2 + 3.5:.1f}" text-anchor="end">'
            f"{esc(name)}</text>"
            f'<rect x="{left}" y="{y + 4}" width="{max(x - left, 0.0):.1f}" '
            f'height="{row_h - 8}" fill="{_svg.BLUE}" fill-opacity="0.75">'
            f"<title>{esc(name)}: {v * 100:.1f} % (95 % interval {lo * 100:.1f}"
            f"&ndash;{hi * 100:.1f} %)</title></rect>"
        )
        if lo == lo and hi == hi:
            x0, x1 = left + span * lo / top, left + span * hi / top
            yc = y + row_h / 2
            parts.append(
                f'<path d="M{x0:.1f},{yc:.1f}H{x1:.1f}M{x0:.1f},{yc - 6:.1f}V{yc + 6:.1f}'
                f'M{x1:.1f},{yc - 6:.1f}V{yc + 6:.1f}" stroke="{_svg.INK}" '
                'stroke-width="1.5" fill="none"/>'
            )
        parts.append(
            f'<text x="{max(x, left + span * (hi if hi == hi else v) / top) + 8:.1f}" '
            f'y="{y + row_h / 2 + 3.5:.1f}">{v * 100:.1f} %</text>'
        )
    return _svg._svg(w, 16 + row_h * len(good), parts, label)


def _pct(key):
    return lambda r: fmt_num(r[key] * 100, 1) if r[key] == r[key] else ""


def _interval(lo_key, hi_key):
    def cell(r):
        lo, hi = r[lo_key], r[hi_key]
        return "" if lo != lo else f"{lo * 100:.1f}–{hi * 100:.1f}"

    return cell


def slices_section(tables: Sequence[Table]) -> Section:
    """One block per sliced field: WER per slice with 95 % intervals, and the table."""
    out = []
    for t in tables:
        if not len(t):
            continue
        field = t.records()[0]["field"]
        chart = interval_bars(
            [(r["value"], r["wer"], r["wer_lo"], r["wer_hi"]) for r in t],
            label=f"WER by {field}",
        )
        cols = [
            Column(field, lambda r: r["value"]),
            Column("utterances", lambda r: r["utterances"], num=True),
            Column("words", lambda r: r["words"], num=True),
            Column("WER %", lambda r: r["wer"], num=True, cell=_pct("wer")),
            Column("95 % interval", lambda r: r["wer_lo"], cell=_interval("wer_lo", "wer_hi")),
            Column("deletion %", lambda r: r["del_rate"], num=True, cell=_pct("del_rate")),
            Column(
                "95 % interval ",
                lambda r: r["del_rate_lo"],
                cell=_interval("del_rate_lo", "del_rate_hi"),
            ),
            Column("reach %", lambda r: r["reach"], num=True, cell=_pct("reach")),
            Column(
                "median delay ms",
                lambda r: r["median_emission_delay_ms"],
                num=True,
                cell=lambda r: fmt_num(r["median_emission_delay_ms"], 0, signed=True),
            ),
        ]
        table = sortable_table(cols, t, table_id=f"slices-{field}")
        out.append({"field": field, "chart": chart, "table": table})
    files = ("slices.csv",) if out else ()
    return Section(render("sections/slices.html", slices=out) if out else None, files)


def confusions_section(s: Scan) -> Section:
    """Top substitution pairs, most deleted words (with their deletion rate) and most
    inserted words; lists the confusion CSV files (written whatever the section shows)."""
    files = ("confusions.csv", "word_errors.csv", "token_deletions.csv")
    c = s.confusions()
    if not c.occurrences:
        return Section(None, files)
    subs = [{"ref": r, "hyp": h, "count": n} for r, h, n in c.top_substitutions(TOP)]
    rows = c.word_rows()
    deleted = [r for r in rows if r["deleted"]][:TOP]
    ins = [{"word": w, "count": n} for w, n in c.top_inserted(TOP)]
    t_subs = sortable_table(
        [
            Column("reference", lambda r: r["ref"]),
            Column("recognised as", lambda r: r["hyp"]),
            Column("times", lambda r: r["count"], num=True),
        ],
        subs,
        table_id="substitutions",
    )
    t_del = sortable_table(
        [
            Column("word", lambda r: r["word"]),
            Column("deleted", lambda r: r["deleted"], num=True),
            Column("of", lambda r: r["count"], num=True),
            Column(
                "deletion %", lambda r: r["deletion_rate"], num=True, cell=_pct("deletion_rate")
            ),
        ],
        deleted,
        table_id="deleted-words",
    )
    t_ins = sortable_table(
        [Column("word", lambda r: r["word"]), Column("inserted", lambda r: r["count"], num=True)],
        ins,
        table_id="inserted-words",
    )
    tables = [("Substituted", t_subs), ("Deleted", t_del), ("Inserted", t_ins)]
    return Section(render("sections/confusions.html", top=TOP, tables=tables), files)


def write_review_csv(s: Scan, folder: Path, slices: Sequence[Table] = ()) -> list[Path]:
    """``confusions.csv`` (kind, ref_word, hyp_word, count), ``word_errors.csv`` (per
    reference word), ``token_deletions.csv`` (per vocabulary token) and, when sliced,
    ``slices.csv``."""
    c = s.confusions()
    conf = [("substitution", r, h, n) for r, h, n in c.top_substitutions(None)]
    conf += [("deletion", w, "", n) for w, n in c.top_deleted(None)]
    conf += [("insertion", "", w, n) for w, n in c.top_inserted(None)]
    out = [
        Table(("kind", "ref_word", "hyp_word", "count"), conf).write_csv(folder / "confusions.csv")
    ]
    cols = ("word", "count", "correct", "substituted", "deleted", "deletion_rate", "error_rate")
    rows = [tuple(r[k] for k in cols) for r in c.word_rows()]
    out.append(Table(cols, rows).write_csv(folder / "word_errors.csv"))
    out.append(s.token_deletions("piece").write_csv(folder / "token_deletions.csv"))
    if slices:
        columns = slices[0].columns
        all_rows = [row for t in slices for row in t.rows]
        out.append(Table(columns, all_rows).write_csv(folder / "slices.csv"))
    return out


def frequency_section(t: Table) -> Section:
    """Errors of reference words by their count in the training text (OOV first)."""
    cols = [
        Column("count in training text", lambda r: r["bin"]),
        Column("words", lambda r: r["words"], num=True),
        Column("substituted", lambda r: r["substituted"], num=True),
        Column("deleted", lambda r: r["deleted"], num=True),
        Column("error %", lambda r: r["error_rate"], num=True, cell=_pct("error_rate")),
        Column("deletion causes", lambda r: r["deletion_causes"], css="wrap"),
    ]
    table = sortable_table(cols, t, table_id="frequency-bins")
    return Section(render("sections/frequency.html", table=table), ("frequency_bins.csv",))


def _pct_or_na(x: float, digits: int = 1) -> str:
    return "n/a" if x != x else f"{x * 100:.{digits}f} %"


def entity_section(e) -> Section:
    """Entity recall, B-WER / U-WER and the entities missed most."""
    missed = [{"entity": k, "missed": v} for k, v in e.missed.most_common(TOP)]
    table = sortable_table(
        [
            Column("entity", lambda r: r["entity"]),
            Column("missed", lambda r: r["missed"], num=True),
        ],
        missed,
        table_id="missed-entities",
    )
    html = render(
        "sections/entities.html",
        e=e,
        recall=_pct_or_na(e.recall),
        b_wer=_pct_or_na(e.b_wer),
        u_wer=_pct_or_na(e.u_wer),
        missed=table,
    )
    return Section(html)


def scoring_section(r, *, glm: str | None = None) -> Section:
    """Raw and clean scoring: what normalisation and the alternates removed, MER, CER
    and the word-boundary (spacing) errors."""
    b = r.boundary

    def pct(x):
        return _pct_or_na(x, 2)

    steps = ", ".join(k for k in ("case", "punctuation", "numbers") if r.steps.get(k))
    rows = [
        ("WER as scored", pct(r.raw.rate), f"S {r.raw.S} · D {r.raw.D} · I {r.raw.I}"),
        ("WER after clean-up", pct(r.wer), f"S {r.clean.S} · D {r.clean.D} · I {r.clean.I}"),
        ("errors removed", str(r.removed), f"of {r.raw.errors}"),
        ("MER", pct(r.mer), "(S + D + I) / (C + S + D + I)"),
        ("CER", pct(r.cer), "characters, spaces count"),
        (
            "word-boundary errors",
            str(b["merge"] + b["split"]),
            f"{b['merge']} merged, {b['split']} split; {b['ops']} of the errors",
        ),
    ]
    html = render(
        "sections/scoring.html",
        steps=steps,
        glm=glm,
        glm_rules=r.steps.get("glm"),
        rows=rows,
    )
    return Section(html)
