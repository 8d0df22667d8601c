"""The comparison report of two models over the same utterances."""

from __future__ import annotations

import os
from pathlib import Path

from .. import __version__
from ..corpus import DELETION_CODES, Comparison, Scan, compare, scan
from ..io.atomic import atomic_dir
from ..model import Bundle, open_bundle
from . import _svg
from ._html import (
    Cell,
    Column,
    card,
    fmt_num,
    href,
    page_names,
    problems_table,
    render,
    sortable_table,
)
from ._pages import PageWriter
from ._scan import CODE_COLORS, finish_pages

__all__ = ["write_comparison", "render_comparison"]


def side_by_side_page(uid: str, name: str, labels, stats, *, back: str = "../index.html") -> str:
    """A page showing the two models' views of one utterance next to each other."""
    sides = [
        {"label": lab, "stats": st, "src": href(sub, name)}
        for sub, lab, st in zip(("a", "b"), labels, stats, strict=True)
    ]
    return render("side_by_side.html", uid=uid, sides=sides, back=back)


def _grouped_bars(ta: dict, tb: dict, labels) -> str:
    items = []
    colors = {}
    for c in (*DELETION_CODES, "other"):
        if not (ta["deletions"][c] or tb["deletions"][c]):
            continue  # a cause neither model has
        for lab, t, shade in ((labels[0], ta, ""), (labels[1], tb, "b")):
            key = f"{c} ({lab})"
            items.append((key, t["deletions"][c]))
            colors[key] = CODE_COLORS[c] if not shade else CODE_COLORS[c] + "99"
    return _svg.bars(items, label="deleted words by cause, both models", colors=colors, row_h=18)


def _significance_tables(c: Comparison, by: str | None = None):
    """ "Is B better than A?": the verdict in words, the three tests over all common
    utterances and, with ``by``, per slice of that meta field (with each one's verdict)."""
    sig = c.significance(by=by)
    la, lb = c.label_a, c.label_b

    def pct(key):
        return lambda r: fmt_num(r[key], 3, percent=True)

    def interval(r):
        lo, hi = r["boot_delta_lo"], r["boot_delta_hi"]
        return "" if lo != lo else f"{lo * 100:+.2f} to {hi * 100:+.2f} points"

    cols = [
        Column("utterances", lambda r: r["utterances"], num=True),
        Column("words", lambda r: r["words"], num=True),
        Column(f"WER {la}", lambda r: r["wer_a"], num=True, cell=pct("wer_a")),
        Column(f"WER {lb}", lambda r: r["wer_b"], num=True, cell=pct("wer_b")),
        Column("segments", lambda r: r["segments"], num=True),
        Column("matched-pairs p", lambda r: r["mp_p"], num=True),
        Column(
            f"utts {la} / {lb} better", lambda r: f"{r['sign_a_better']} / {r['sign_b_better']}"
        ),
        Column("sign test p", lambda r: r["sign_p"], num=True),
        Column("bootstrap 95 % of Δ", lambda r: r["boot_delta_lo"], cell=interval),
        Column("bootstrap p", lambda r: r["boot_p"], num=True),
    ]
    rows = sig.records()
    overall = [r for r in rows if r["field"] == "all"]
    verdict = overall[0]["verdict"] if overall else ""
    sliced = [r for r in rows if r["field"] != "all"]
    per_slice = None
    if by is not None:
        slice_cols = [
            Column(by, lambda r: r["value"]),
            Column("in words", lambda r: r["verdict"], css="wrap"),
            *cols,
        ]
        per_slice = sortable_table(slice_cols, sliced, table_id=f"significance-{by}")
    return verdict, sortable_table(cols, overall, table_id="significance"), per_slice


def render_comparison(
    c: Comparison, *, names: dict[str, str] | None = None, by: str | None = None
) -> str:
    """The comparison's overview page (``by``: the significance per slice of that
    manifest meta field, too)."""
    names = names or {}
    t = c.totals()
    ta, tb = t["a"], t["b"]
    la, lb = c.label_a, c.label_b
    idcell = _id_cell(names)

    def order(r):
        w = r["wer_delta"]
        return (-(w if w == w else -1e9), -r["changed_words"], r["id"])

    rows = sorted(c.utterances, key=order)
    verdict, significance, per_slice = _significance_tables(c, by)
    summary = {
        "a": c.a.bundle,
        "b": c.b.bundle,
        "n_common": t["n_common"],
        "n_changed_words": t["n_changed_words"],
    }
    return render(
        "compare.html",
        title=f"peekalign compare: {la} vs {lb}",
        summary=summary,
        la=la,
        lb=lb,
        a=c.a.bundle,
        b=c.b.bundle,
        cards=_summary_cards(c, t),
        verdict=verdict,
        significance=significance,
        by=by,
        per_slice=per_slice,
        deletions_chart=_grouped_bars(ta, tb, (la, lb)),
        deltas=sortable_table(_utterance_columns(la, lb, idcell), rows, table_id="deltas"),
        changed=sortable_table(_word_columns(la, lb, idcell), c.words, table_id="changed"),
        problems=problems_table(c.problems),
        files=FILES,
        version=__version__,
    )


def _summary_cards(c: Comparison, t: dict) -> list:
    """The headline cards: WER, deletions, reach, delay and changed words, a → b."""
    ta, tb, d = t["a"], t["b"], t["delta"]

    def pair(key, fmt, *, pct=False):
        def f(x):
            if pct:
                return fmt_num(x, 3, percent=True)
            return fmt(x)

        return f"{f(ta[key])} → {f(tb[key])}"

    def delta_txt(key, *, pct=False, unit="", digits=3):
        v = d[key]
        if pct:
            return f"{v * 100:+.2f} points".replace("-", "−") if v == v else ""
        return f"{fmt_num(v, digits, signed=True)}{unit}"

    return [
        card("common utterances", str(t["n_common"]), f"{len(c.problems)} problem(s)"),
        card("WER", pair("wer", None, pct=True), delta_txt("wer", pct=True)),
        card("deletions", f"{ta['D']} → {tb['D']}", f"{d['D']:+d}".replace("-", "−")),
        card(
            "reach",
            pair("reach", None, pct=True),
            delta_txt("reach", pct=True),
        ),
        card(
            "median emission delay",
            pair("median_emission_delay_ms", lambda x: fmt_num(x, 0, signed=True) + " ms"),
            delta_txt("median_emission_delay_ms", unit=" ms", digits=0),
        ),
        card("changed words", str(t["n_changed_words"]), "op, diagnosis or reach"),
    ]


def _id_cell(names: dict):
    """A cell maker for the utterance column, linked to its page when there is one."""

    def idcell(r):
        n = names.get(r["id"])
        return Cell(r["id"], href=href("utts", n)) if n else r["id"]

    return idcell


def _signed(key, digits=3):
    """A cell maker writing the row's ``key`` with its sign."""
    return lambda r: fmt_num(r[key], digits, signed=True)


def _signed_ms(label, key):
    """A numeric column of signed milliseconds."""
    return Column(label, lambda r: r[key], num=True, cell=_signed(key, 0))


def _utterance_columns(la: str, lb: str, idcell) -> list:
    """The columns of the per-utterance deltas table."""
    return [
        Column("utterance", lambda r: r["id"], cell=idcell),
        Column("WER Δ", lambda r: r["wer_delta"], num=True, cell=_signed("wer_delta")),
        Column(f"WER {la}", lambda r: r["wer_a"], num=True),
        Column(f"WER {lb}", lambda r: r["wer_b"], num=True),
        Column("D Δ", lambda r: r["D_delta"], num=True, cell=_signed("D_delta")),
        Column(f"D {la}", lambda r: r["D_a"], num=True),
        Column(f"D {lb}", lambda r: r["D_b"], num=True),
        _signed_ms("delay Δ ms", "emission_delay_delta_ms"),
        _signed_ms(f"worst reach margin {la} ms", "worst_reach_margin_a_ms"),
        _signed_ms(f"worst reach margin {lb} ms", "worst_reach_margin_b_ms"),
        Column("changed words", lambda r: r["changed_words"], num=True),
        Column("words", lambda r: r["n_words"], num=True),
    ]


def _word_columns(la: str, lb: str, idcell) -> list:
    """The columns of the changed-words table."""
    return [
        Column("utterance", lambda r: r["id"], cell=idcell),
        Column("#", lambda r: r["index"], num=True),
        Column("word", lambda r: r["word"]),
        Column("change", lambda r: r["change"], css="wrap"),
        Column(f"op {la}", lambda r: r["op_a"]),
        Column(f"op {lb}", lambda r: r["op_b"]),
        _signed_ms(f"reach margin {la} ms", "reach_margin_a_ms"),
        _signed_ms(f"reach margin {lb} ms", "reach_margin_b_ms"),
        _signed_ms(f"delay {la} ms", "emission_delay_a_ms"),
        _signed_ms(f"delay {lb} ms", "emission_delay_b_ms"),
    ]


def _scan_model(
    bundle: Bundle, tmp: Path, sub: str, names: dict, *, lookahead, pages, width, run: dict
) -> Scan:
    """Scan one model's bundle; with ``pages``, its utterance pages go to
    ``utts/<sub>/`` (``sub`` is ``a`` or ``b``) as they are analysed. ``run`` holds the
    scan's ``executor``, ``workers`` and ``progress``."""
    hook = None
    if pages:
        folder = tmp / "utts" / sub
        folder.mkdir(parents=True)
        clash = frozenset(u for u, n in names.items() if n != f"{u}.html")
        hook = PageWriter(
            str(folder), depth=2, clash=clash, lookahead=lookahead, width=width, nav=False
        )
    s = scan(bundle, lookahead=lookahead, on_utterance=hook, **run)
    finish_pages(s, tmp, tmp / "utts" / sub, names, pages=pages, back="../../index.html")
    return s


def _write_side_by_side(c: Comparison, scans: list, tmp: Path, names: dict, labels) -> dict:
    """Write ``utts/<id>.html`` for every common utterance (each model's view with its
    WER and deletions above it); returns the page name of each id written."""
    stats = [{r["id"]: r for r in s.utterances} for s in scans]
    drawn = {}
    for r in c.utterances:
        uid = r["id"]
        st = [
            f"WER {fmt_num(x['wer'])} · D {x['D']}" if x["D"] is not None else ""
            for x in (stats[0][uid], stats[1][uid])
        ]
        (tmp / "utts" / names[uid]).write_text(
            side_by_side_page(uid, names[uid], labels, st), encoding="utf-8"
        )
        drawn[uid] = names[uid]
    return drawn


#: The tables of a comparison report.
FILES = ("utterances.csv", "changed_words.csv", "significance.csv", "problems.csv")


def write_comparison(
    a,
    b,
    out: str | os.PathLike,
    *,
    labels: tuple[str, str] = ("A", "B"),
    lookahead: int | None = None,
    lookahead_b: int | None = None,
    overwrite: bool = False,
    pages: bool = True,
    executor=None,
    workers: int | None = None,
    progress: bool | None = None,
    width: int = 560,
    by: str | None = None,
) -> Comparison:
    """Scan two bundles and write the comparison report folder.

    Writes ``index.html`` (totals of both models and their differences, per-utterance
    deltas of WER, deletions and emission delay, the words whose status changed),
    ``utts/<id>.html`` (the two models' views side by side), ``utterances.csv``,
    ``changed_words.csv``, ``significance.csv`` and ``problems.csv``; atomically,
    like :func:`write_report`.

    Parameters
    ----------
    a, b : Bundle or path-like
        The two models' bundles over the same utterance ids.
    out : path-like
    labels : (str, str)
        Names of the models in the report.
    lookahead, lookahead_b : int, optional
        Decoder look-ahead of A and B (default: each bundle's own).
    pages : bool
        Draw the side-by-side pages.
    width : int
        Plot width of each model's views.
    by : str, optional
        A manifest ``meta`` field of A's bundle: "Is B better than A?" per slice too,
        on the page and in ``significance.csv``.

    Returns
    -------
    Comparison

    Examples
    --------
    >>> c = write_comparison("streaming", "full", "cmp", labels=("streaming", "full"),
    ...                      pages=False, workers=1, progress=False)
    >>> import os; os.path.isfile("cmp/index.html")
    True
    """
    a = a if isinstance(a, Bundle) else open_bundle(a)
    b = b if isinstance(b, Bundle) else open_bundle(b)
    with atomic_dir(out, overwrite=overwrite) as tmp:
        names = page_names(list(dict.fromkeys([*a.ids, *b.ids])))
        run = {"executor": executor, "workers": workers, "progress": progress}
        scans = [
            _scan_model(bundle, tmp, sub, names, lookahead=eps, pages=pages, width=width, run=run)
            for sub, bundle, eps in (("a", a, lookahead), ("b", b, lookahead_b))
        ]
        c = compare(scans[0], scans[1], labels=labels)
        drawn = _write_side_by_side(c, scans, tmp, names, labels) if pages else {}
        c.write_csv(tmp, by=by)
        (tmp / "index.html").write_text(render_comparison(c, names=drawn, by=by), encoding="utf-8")
    return c


__all__ += ["side_by_side_page"]
