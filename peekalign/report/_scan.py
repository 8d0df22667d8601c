"""The scan report: ``index.html`` overview, ``utts/<id>.html`` pages and CSV tables."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from .. import __version__
from ..corpus import DELETION_CODES, PARTIAL_SEARCH, Scan, scan
from ..exceptions import ParameterError
from ..io.atomic import atomic_dir
from ..recommend import DEFAULT_TOLERANCE
from . import _svg
from ._html import (
    Cell,
    Column,
    Section,
    card,
    fmt_num,
    href,
    page_names,
    problems_table,
    render,
    sortable_table,
)
from ._lookahead import lookahead_card, sweep_figure
from ._pages import STATIC, PageWriter, copy_bokeh_js, fallback_page

__all__ = ["write_report", "render_index", "CODE_COLORS"]

#: Colour of each deletion cause in the overview's bar chart.
CODE_COLORS = {
    "no-spike": "#5a2d82",
    "repeat-collapsed": "#8d63c2",
    "glued": "#a57fcf",
    "overlap": "#6f4aa6",
    "weak": "#b9a3d6",
    "pruned": "#3a8fd9",
    "cut-off": "#b31b34",
    "decoder-drop": "#f08a24",
    "other": "#8b939c",
}

#: Rows of the worst-utterances table on the overview (all rows are in the CSV).
MAX_ROWS = 500

_CODE_HELP = {
    "no-spike": "its tokens never rise above the posterior floor",
    "repeat-collapsed": "it repeats the neighbouring word's token and CTC emits the pair once",
    "glued": "no word separator: it survives glued to its neighbour",
    "overlap": "a neighbouring word's token wins the frame of its spike",
    "weak": "a spike below the spike threshold",
    "pruned": "the search held it and pruned it",
    "cut-off": "its reach margin is negative",
    "decoder-drop": "CTC fired clearly; the decoder still dropped it",
    "other": "deleted, not diagnosed",
}


def _errors(r: dict) -> int | None:
    return None if r["S"] is None else r["S"] + r["D"] + r["I"]


def _dels_cell(r: dict) -> Cell:
    chips = [
        (f"{c} {r[f'del_{c}']}", _CODE_HELP[c])
        for c in (*DELETION_CODES, "other")
        if r[f"del_{c}"]
    ]
    return Cell(chips=tuple(chips))


def _worst_columns(
    names: dict[str, str], link_root: str = "utts", branches: tuple = ()
) -> list[Column]:
    def idcell(r):
        name = names.get(r["id"])
        return r["id"] if name is None else Cell(r["id"], href=href(link_root, name))

    def margin_cell(r):
        m = r["worst_reach_margin_ms"]
        return Cell(fmt_num(m, 0, signed=True), css="bad" if m == m and m < -1e-6 else "")

    return [
        Column("utterance", lambda r: r["id"], cell=idcell),
        Column("errors", _errors, num=True, tip="S + D + I"),
        Column("WER", lambda r: r["wer"], num=True, tip="of the branch in column 'branch'"),
        Column("branch", lambda r: r["branch"], tip="hypothesis branch scored and diagnosed"),
        *(
            Column(f"WER {b}", lambda r, b=b: r[f"wer_{b}"], num=True, tip=f"WER of branch {b}")
            for b in branches
        ),
        Column("S", lambda r: r["S"], num=True, tip="substitutions"),
        Column("D", lambda r: r["D"], num=True, tip="deletions"),
        Column("I", lambda r: r["I"], num=True, tip="insertions"),
        Column(
            "deleted by cause",
            lambda r: sum(r[f"del_{c}"] for c in (*DELETION_CODES, "other")),
            num=True,
            cell=_dels_cell,
        ),
        Column(
            "worst reach margin ms",
            lambda r: r["worst_reach_margin_ms"],
            num=True,
            cell=margin_cell,
            tip="smallest reach margin of its words (< 0: cut off)",
        ),
        Column(
            "median delay ms",
            lambda r: r["median_emission_delay_ms"],
            num=True,
            cell=lambda r: fmt_num(r["median_emission_delay_ms"], 0, signed=True),
        ),
        Column("cut mass", lambda r: r["mean_cut_mass"], num=True),
        Column("words", lambda r: r["n_words"], num=True),
        Column("duration s", lambda r: r["duration_s"], num=True),
        Column("notes", lambda r: r["problems"], css="wrap"),
    ]


def _branch_cards(t: dict) -> list[str]:
    """One card per other branch the set carries: its WER, scored side by side."""
    by = t.get("branches") or {}
    if len(by) < 2:
        return []
    return [
        card(
            f"WER ({b})",
            _fmt_pct(v["wer"]),
            f"{v['errors']} errors in {v['n_words']} words"
            + (
                f", {v['n_utterances']} utterances"
                if v["n_utterances"] < t["n_utterances"]
                else ""
            ),
        )
        for b, v in by.items()
        if b != t.get("branch")
    ]


def _triggers_text(t: dict) -> str:
    """Where the reach's triggers came from, oracle ones named so."""
    if t.get("triggers") == "oracle":
        return "oracle triggers (forced alignment of the reference)"
    n = t.get("oracle_triggers") or 0
    return "CTC greedy triggers" + (f", {n} word{'s' * (n != 1)} oracle" if n else "")


def _fmt_pct(x: float) -> str:
    return fmt_num(x, 3, percent=True) if x == x else "–"


#: The tables every scan report links to (sections add their own).
FILES = ("utterances.csv", "words.csv", "sweep.csv", "problems.csv")


def render_index(
    s: Scan,
    *,
    names: dict[str, str] | None = None,
    max_rows: int = MAX_ROWS,
    title: str = "peekalign scan",
    page_errors: dict[str, str] | None = None,
    sections: Sequence[Section] = (),
    measured=None,
    tolerance: float = DEFAULT_TOLERANCE,
) -> str:
    """The overview page of a scan (``names``: page file name per utterance id;
    ``sections``: more of the page after the charts, template ``templates/index.html``;
    ``measured``: a re-decoding or its table, drawn with the sweep and deciding the
    recommended look-ahead)."""
    names = names or {}
    t = s.totals()
    sw = s.sweep
    worst = s.worst(max_rows)
    n_all = len(s.utterances)
    shown = (
        f"The {len(worst)} worst of {n_all} utterances"
        if len(worst) < n_all
        else f"All {n_all} utterances"
    )
    branches = tuple(t["branches"]) if len(t["branches"]) > 1 else ()
    sections = [*_shown_section(s), *sections]
    files = list(dict.fromkeys([*FILES, *(f for x in sections for f in x.files)]))
    if measured is not None:
        files.append("redecode.csv")
    summary = {
        "totals": {k: v for k, v in t.items() if not (isinstance(v, float) and v != v)},
        "worst": [r["id"] for r in worst][:50],
        "problems": [[p.utt, p.message] for p in s.problems],
    }
    return render(
        "index.html",
        title=title,
        bundle=s.bundle,
        summary=summary,
        cards=_cards(s, t, lookahead_card(sw, measured, tolerance)),
        deletions=t["D"],
        charts=_charts(s, t),
        sweep={
            **sweep_figure(sw, measured, tolerance, current=_current_lookahead(s)),
            "encoder_frames": sw.encoder_frames,
            # the latency's tokens when per-frame right contexts decided it, else 0
            "per_frame_tokens": sw.n_tokens if sw.per_frame_right_context else 0,
            "front_end_ms": f"{sw.front_end_ms:g}",
            "triggers": sw.triggers_label,
            "max_lookahead": len(sw.rows) - 1,
            "target": f"{sw.target * 100:g}",
        },
        sections=sections,
        shown=shown,
        branch=t["branch"] or "none",
        worst=sortable_table(_worst_columns(names, branches=branches), worst, table_id="worst"),
        problems=problems_table(s.problems),
        page_errors=sorted((page_errors or {}).items()),
        files=files,
        version=__version__,
        lookahead=_lookahead_text(s),
    )


def _cards(s: Scan, t: dict, recommended: dict) -> list[dict]:
    """The totals boxes at the top of the overview (``recommended``: the look-ahead's)."""
    delay = t["median_emission_delay_ms"]
    return [
        card("utterances", f"{t['n_utterances']}", "analysed"),
        card(
            "problems",
            f"{t['n_problems']}",
            "utterances not analysed (see below)" if t["n_problems"] else "none",
            bad=bool(t["n_problems"]),
        ),
        card("audio", f"{t['duration_s'] / 60:.1f} min", f"{t['duration_s']:.1f} s"),
        card("reference words", f"{t['n_words']}", f"{t['n_scored_words']} with a hypothesis"),
        card(
            f"WER ({t['branch']})" if t.get("branch") else "WER",
            _fmt_pct(t["wer"]),
            f"S {t['S']} · D {t['D']} · I {t['I']}",
        ),
        *_branch_cards(t),
        card(
            "reach",
            _fmt_pct(t["reach"]),
            f"words with margin ≥ 0 at look-ahead {_lookahead_text(s)}; " + _triggers_text(t),
        ),
        card(
            "median emission delay",
            f"{fmt_num(delay, 0, signed=True)} ms" if np.isfinite(delay) else "not measured",
            (
                "after the word's reference end"
                if np.isfinite(delay)
                else "needs reference word times (a forced alignment would give ~0 by "
                "construction)"
            ),
        ),
        recommended,
        card("mean cut attention", fmt_num(t["mean_cut_mass"]) or "–", "outside the window"),
    ]


def _charts(s: Scan, t: dict) -> dict:
    """The overview's SVG charts: deletion causes, margins, delays (the look-ahead sweep:
    :func:`peekalign.report._lookahead.sweep_figure`)."""
    dels = [(c, t["deletions"][c]) for c in (*DELETION_CODES, "other")]
    margins = s.words["reach_margin_ms"] if len(s.words) else np.zeros(0)
    delays = s.words["emission_delay_ms"] if len(s.words) else np.zeros(0)
    return {
        "deletions": _svg.bars(dels, label="deleted words by cause", colors=CODE_COLORS),
        "margins": _svg.histogram(
            margins, xlabel="reach margin (ms)", label="reach margin distribution"
        ),
        "delays": _svg.histogram(
            delays,
            xlabel="emission delay after the word's end (ms)",
            label="emission delay distribution",
            colors=("#3a8fd9", "#1f5fa8"),
            empty="no reference word times: not measured",
        ),
    }


def _shown_section(s: Scan) -> list[Section]:
    """What a listener sees: the shown delay per word and the rewrite rate per utterance
    (DEVELOPERS.md, "Partial results and shown times")."""
    w, u = s.words, s.utterances
    if "final_shown_s" not in w.columns:  # tables from before partial results
        return []
    delay = (w["final_shown_s"] - w["end_s"]) * 1000.0 if len(w) else np.zeros(0)
    rate = u["rewrite_rate"] if len(u) else np.zeros(0)
    d_chart = _svg.histogram(
        delay,
        xlabel="shown delay: final shown minus the word's end (ms)",
        label="shown delay distribution",
        colors=("#3a8fd9", "#1f5fa8"),
    )
    r_chart = _svg.histogram(
        rate,
        xlabel="rewrite rate (rewritten shown words / shown words)",
        label="rewrite rate distribution",
        split_at=None,
        colors=("#1f5fa8", "#1f5fa8"),
        clip=(0.0, 100.0),
        unit="utterances",
    )
    d = delay[np.isfinite(delay)]
    p = (
        f"median {float(np.median(d)):+.0f} ms, 90th percentile "
        f"{float(np.percentile(d, 90)):+.0f} ms over {d.size} words".replace("-", "\u2212")
        if d.size
        else "no word was shown"
    )
    html = render(
        "sections/shown.html",
        beam=PARTIAL_SEARCH["beam"],
        candidates=PARTIAL_SEARCH["candidates"],
        delay_chart=d_chart,
        delay_text=p,
        rate_chart=r_chart,
    )
    return [Section(html)]


def _current_lookahead(s: Scan) -> int | None:
    return s.stats.get("lookahead", s.lookahead)


def _lookahead_text(s: Scan) -> str:
    cur = _current_lookahead(s)
    if cur is None:
        return "?"
    return f"{cur} frame" if cur == 1 else f"{cur} frames"


def write_report(
    bundle,
    out: str | os.PathLike,
    *,
    lookahead: int | None = None,
    overwrite: bool = False,
    pages: bool | int = True,
    max_rows: int = MAX_ROWS,
    executor=None,
    workers: int | None = None,
    progress: bool | None = None,
    by: Sequence[str] = (),
    figures: str | os.PathLike | None = None,
    word_counts=None,
    entities=None,
    glm=None,
    measured=None,
    tolerance: float = DEFAULT_TOLERANCE,
    **scan_options,
) -> Scan:
    """Scan a bundle and write its report folder.

    Writes ``index.html`` (totals, deletion causes, margin and delay distributions, the
    look-ahead sweep with its recommendation, a sortable table of the worst
    utterances, the problems), ``utts/<id>.html`` (each utterance's views and words,
    BokehJS shared from ``static/js``), ``utterances.csv``, ``words.csv``, ``sweep.csv``
    and ``problems.csv``. The folder is built under a temporary name and renamed into
    place: a crash leaves the old report or the new one, never half of one.

    Parameters
    ----------
    bundle : Bundle or path-like
    out : path-like
        The report folder; refused when it exists and is not empty, unless
        ``overwrite``.
    lookahead : int, optional
        Decoder look-ahead (default: the bundle's own).
    pages : bool or int
        Draw every utterance's page (True; in the same pass as the scan), none
        (False), or those of the ``pages`` worst utterances only (a second pass over
        them after the ranking). Drawing is the slow part of a report.
    max_rows : int
        Rows of the overview's worst-utterances table.
    by : sequence of str
        Manifest ``meta`` fields to slice by: a "WER by ..." section each (bars with
        95 % bootstrap intervals) and ``slices.csv``. The confusions section and
        ``confusions.csv`` / ``word_errors.csv`` are always written.
    figures : path-like, optional
        Also write every chart of the overview as a 16:9 slide figure there (SVG, and
        PNG when playwright is installed); see :mod:`peekalign.report._figures`.
    word_counts : path-like or mapping, optional
        Word counts of the training text: an "Errors by word frequency" section and
        ``frequency_bins.csv`` (see :meth:`peekalign.corpus.Scan.frequency_bins`).
    entities : path-like or list of str, optional
        Entity list: an "Entity list" section with recall and B-WER / U-WER.
    glm : path-like, optional
        NIST GLM alternates for the "Scoring" section (raw and clean WER, errors
        removed, MER, CER, word-boundary errors), which is there in any case.
    measured : Redecode, Table or path-like, optional
        The decoder re-run at each look-ahead (:func:`peekalign.redecode`, its table, or
        the CSV ``redecode --csv`` wrote): its WER curve joins the sweep figure, the
        recommended look-ahead comes from it (``tolerance``, absolute WER, default 0.5
        points) and ``redecode.csv`` is written.
    executor, workers, progress, **scan_options
        As for :func:`peekalign.corpus.scan`.

    Returns
    -------
    Scan

    Examples
    --------
    >>> from peekalign import open_bundle
    >>> s = write_report("bundle", "report", pages=2, workers=1, progress=False)
    >>> len(s.utterances) == len(open_bundle("bundle"))
    True
    """
    if not isinstance(max_rows, int) or isinstance(max_rows, bool) or max_rows < 1:
        raise ParameterError(
            f"The 'max_rows' parameter of write_report must be an int in the range [1, inf). "
            f"Got {max_rows!r} instead."
        )
    from ..model import Bundle, open_bundle

    if not isinstance(pages, (bool, int)) or (not isinstance(pages, bool) and pages < 0):
        raise ParameterError(
            "The 'pages' parameter of write_report must be a bool or an int in the range "
            f"[0, inf). Got {pages!r} instead."
        )
    if not isinstance(bundle, Bundle):
        bundle = open_bundle(bundle)
    if isinstance(measured, (str, os.PathLike)):
        from ..redecoding import read_redecode_csv

        measured = read_redecode_csv(measured)  # fail before the long scan
    all_pages = pages is True
    some = 0 if isinstance(pages, bool) else int(pages)
    with atomic_dir(out, overwrite=overwrite) as tmp:
        names = page_names(bundle.ids)
        hook = None
        if all_pages or some:
            utts = tmp / "utts"
            utts.mkdir()
            clash = frozenset(u for u, n in names.items() if n != f"{u}.html")
            hook = PageWriter(str(utts), depth=1, clash=clash, lookahead=lookahead)
        opts = dict(lookahead=lookahead, executor=executor, workers=workers, progress=progress)
        s = scan(bundle, on_utterance=hook if all_pages else None, **opts, **scan_options)
        wanted = None
        if some:
            # the worst first: rank, then draw only those (analysed once more)
            wanted = s.worst(some)["id"].tolist()
            if wanted:
                rest = {k: v for k, v in scan_options.items() if k != "ids"}
                again = scan(bundle, ids=wanted, on_utterance=hook, **opts, **rest)
                s.extras.update(again.extras)
        drawn, errors = finish_pages(
            s, tmp, tmp / "utts", names, pages=all_pages or bool(some), only=wanted
        )
        s.write_csv(tmp)
        if measured is not None:
            getattr(measured, "table", measured).write_csv(tmp / "redecode.csv")
        from ._review import (
            confusions_section,
            entity_section,
            frequency_section,
            scoring_section,
            slices_section,
            write_review_csv,
        )

        slices = [s.by(f) for f in by]
        write_review_csv(s, tmp, slices)
        sections = []
        if s.alignments():
            sections.append(
                scoring_section(s.scoring(glm=glm), glm=None if glm is None else str(glm))
            )
        sections += [slices_section(slices), confusions_section(s)]
        if word_counts is not None:
            bins = s.frequency_bins(word_counts)
            bins.write_csv(tmp / "frequency_bins.csv")
            sections.append(frequency_section(bins))
        if entities is not None:
            sections.append(entity_section(s.entity_scores(entities)))
        text = render_index(
            s, names=drawn, max_rows=max_rows, page_errors=errors, sections=sections,
            measured=measured, tolerance=tolerance,
        )  # fmt: skip
        (tmp / "index.html").write_text(text, encoding="utf-8")
    if figures is not None:
        from ._figures import write_figures

        write_figures(text, figures, overwrite=overwrite)
    return s


def finish_pages(
    s: Scan,
    root: Path,
    folder: Path,
    names: dict,
    *,
    pages: bool,
    back: str = "../index.html",
    only: list | None = None,
):
    """Copy BokehJS once, write a plain page where a worker drew none; return the page
    name per drawn utterance and the drawing errors (``only``: the ids meant to get a
    page; default every utterance of the scan)."""
    if not pages:
        return {}, {}
    js: set[str] = set()
    drawn: dict[str, str] = {}
    errors: dict[str, str] = {}
    by_id = {}
    for r in s.words:
        by_id.setdefault(r["id"], []).append(r)
    ids = s.utterances["id"].tolist() if len(s.utterances) else []
    if only is not None:
        keep = set(only)
        ids = [u for u in ids if u in keep]
    for uid in ids:
        info = s.extras.get(uid) or {}
        name = info.get("page") or names[uid]
        if info.get("error") or "page" not in info:
            msg = info.get("error") or "no page came back from the worker"
            errors[uid] = msg
            if not (folder / name).exists():
                (folder / name).write_text(
                    fallback_page(uid, msg, by_id.get(uid, []), back=back), encoding="utf-8"
                )
        js.update(info.get("js", ()))
        drawn[uid] = name
    if js:
        copy_bokeh_js(root, js)
    return drawn, errors


__all__ += ["STATIC"]
