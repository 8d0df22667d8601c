"""Corpus scan: every utterance of a bundle analysed, worst cases ranked.

:func:`scan` cuts a bundle's utterance ids into small batches and hands ``(bundle
path, ids)`` to any :class:`concurrent.futures.Executor` (default: a process pool over
the machine's cores; a Dask client's ``get_executor()`` runs it on a cluster). Each
worker opens the bundle itself, analyses its batch one utterance at a time and sends
back small rows, never arrays, so memory stays bounded by a batch whatever the bundle
size. A bad utterance becomes a :class:`~peekalign.model.Problem`; a worker process
that dies takes its batch with it, and those utterances are retried once, one by one,
before they are reported.

:func:`compare` joins the scans of two models over the same utterance ids.

Tables are :class:`Table` objects (``table.py``): rows with named columns, stored
column by column and given back as tuples, written as CSV with the ``csv`` module
(byte-identical for equal inputs) and turned into a ``pandas.DataFrame`` by
:meth:`Table.to_pandas` when pandas is installed.
"""

from __future__ import annotations

import array
import concurrent.futures as cf
import contextlib
import math
import os
import sys
import threading
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .diagnosis import DELETION_CODES
from .exceptions import ParameterError, PeekalignError, describe
from .io._text import read_option_file
from .model import BRANCHES, LEGACY_BRANCH, Bundle, Problem, open_bundle
from .streaming import Sweep, _mean_wait_ms, _sweep_rows, _utterance_counts, latency_budget
from .table import Table, _Builder

__all__ = [
    "DELETION_CODES",
    "UTTERANCE_COLUMNS",
    "WORD_COLUMNS",
    "Comparison",
    "Scan",
    "Table",
    "compare",
    "scan",
]

# DELETION_CODES: the diagnosis codes in order of precedence, the utterance table's
# ``del_*`` columns in this order; ``del_other`` counts deletions without a code.

#: Partial-result columns (DEVELOPERS.md, "Partial results and shown times"), filled by
#: :func:`_shown_columns` from a traced search of each utterance.
SHOWN_UTTERANCE_COLUMNS = ("rewrite_rate", "shown_delay_p50_ms", "shown_delay_p90_ms")
SHOWN_WORD_COLUMNS = ("first_shown_s", "final_shown_s", "rewrites")
#: Settings of the traced search behind them when the analysis ran none (kept small:
#: it runs on every utterance of a scan).
PARTIAL_SEARCH = {"beam": 8, "candidates": 5}

#: Columns of :attr:`Scan.utterances`.
UTTERANCE_COLUMNS = (
    "id",
    "duration_s",
    "n_words",
    "branch",
    "wer",
    "S",
    "D",
    "I",
    *(f"wer_{b}" for b in (*BRANCHES, LEGACY_BRANCH)),
    *(f"errors_{b}" for b in (*BRANCHES, LEGACY_BRANCH)),
    *(f"del_{c}" for c in DELETION_CODES),
    "del_other",
    "worst_reach_margin_ms",
    "median_emission_delay_ms",
    "mean_cut_mass",
    "oracle_triggers",
    "word_times",
    "problems",
    *SHOWN_UTTERANCE_COLUMNS,
)

#: Columns of :attr:`Scan.words`.
WORD_COLUMNS = (
    "id",
    "index",
    "word",
    "start_s",
    "end_s",
    "time_source",
    "op",
    "hyp_word",
    "diagnosis",
    "reach_margin_ms",
    "emission_delay_ms",
    "trigger_frame",
    "window_end_frame",
    "alignment",
    "trigger_source",
    *SHOWN_WORD_COLUMNS,
)

#: Utterances per batch at most (a batch's arrays are all a worker holds at once).
MAX_BATCH = 16
#: The same on a Dask cluster, where every task costs the client and the scheduler
#: about 20 ms of CPU (measured on a LocalCluster): fewer, larger tasks.
MAX_CLUSTER_BATCH = 64


# ---------------------------------------------------------------------------
# tables
# ---------------------------------------------------------------------------


# ---------------------------------------------------------------------------
# one utterance (runs inside the workers)
# ---------------------------------------------------------------------------


def _f(x: Any) -> float:
    """A Python float (NaN for None)."""
    if x is None:
        return float("nan")
    return float(x)


def _ms(x: Any) -> float:
    """Seconds as a Python float in ms (NaN for None): table columns of durations
    are in ms (DEVELOPERS.md, "Adding a view")."""
    return _f(x) * 1000.0


def _i(x: Any) -> int | None:
    return None if x is None else int(x)


def _default_analyze():
    from .analysis import analyze

    return analyze


def _get(d: dict, *names: str, default=None):
    for n in names:
        if n in d:
            return d[n]
    return default


_OPS = {"C": "correct", "S": "substitution", "D": "deletion", "I": "insertion"}


def _utterance_row(uid: str, s: dict, notes: list[str]) -> tuple:
    dels = dict(_get(s, "deletions", "deletions_by_code", default={}) or {})
    for c in DELETION_CODES:
        if f"del_{c}" in s:
            dels[c] = s[f"del_{c}"]
    counts = [int(dels.pop(c, 0) or 0) for c in DELETION_CODES]
    known = [k for k in ("S", "D", "I") if s.get(k) is not None]
    wer = _f(s.get("wer"))
    ints = [_i(s.get(k)) for k in ("S", "D", "I")] if len(known) == 3 else [None] * 3
    # deletions the analysis gave no code
    other = sum(int(v) for v in dels.values())
    if ints[1] is not None:
        other = max(other, ints[1] - sum(counts))
    branches = (*BRANCHES, LEGACY_BRANCH)
    return (
        uid,
        _f(s.get("duration_s")),
        int(s.get("n_words", 0)),
        str(s.get("branch") or "") if len(known) == 3 else "",
        wer,
        *ints,
        *(_f(s.get(f"wer_{b}")) for b in branches),
        *(_i(s.get(f"errors_{b}")) for b in branches),
        *counts,
        other,
        _ms(s.get("worst_margin_s")),
        _ms(s.get("median_emission_delay_s")),
        _f(s.get("mean_cut_mass")),
        _i(s.get("oracle_triggers")),
        str(_get(s, "words_source", "word_times", "time_source", default="") or ""),
        "; ".join(notes),
    )


def _word_row(uid: str, k: int, w: dict) -> tuple:
    def text(*names):
        v = _get(w, *names)
        return "" if v is None else str(v)

    def flt(*names):
        return _f(_get(w, *names))

    def intg(*names):
        return _i(_get(w, *names))

    op = text("op", "error_op")
    word, hyp = text("word"), text("hyp_word", "hyp")
    if hyp == word:  # one string object for both: pickled and held once
        hyp = word
    return (
        uid,
        int(_get(w, "index", default=k)),
        word,
        flt("start_s", "start"),
        flt("end_s", "end"),
        text("source", "time_source"),
        _OPS.get(op, op),
        hyp,
        text("code", "diagnosis"),
        _ms(_get(w, "margin_s", "margin")),
        _ms(_get(w, "emission_delay_s", "emission_delay", "delay_s")),
        intg("trigger_frame", "trigger"),
        intg("window_end", "window_end_frame"),
        text("alignment"),
        text("trigger_source"),
    )


def _shown_columns(utt, res, words: list[dict]) -> tuple[tuple, list[tuple], str | None]:
    """Partial-result cells of one utterance: its row's, each word row's, and a note.

    Partials come from the analysis' traced search when it ran one, else from a traced
    prefix search with :data:`PARTIAL_SEARCH` (CTC only: no decoder look-ahead); a search
    that fails leaves the cells empty and says why in the note.
    """
    from .partials import partials, shown_words
    from .search import prefix_search

    nan = float("nan")
    empty = ((nan, nan, nan), [(nan, nan, None)] * len(words))
    try:
        result = getattr(res, "search", None)
        if result is None or result.trace is None:
            result = prefix_search(
                utt.log_probs, blank=utt.blank, trace=True, utt=utt.id, **PARTIAL_SEARCH
            )
        pt = partials(result, utt.vocab, utt.clock, encoder_lookahead=utt.encoder_ahead)
        sw = shown_words(pt, [str(w.get("word", "")) for w in words],
                         [_f(w.get("end_s")) for w in words])  # fmt: skip
    except PeekalignError as exc:
        return (*empty, f"partial results not computed: {_strip_utt(utt.id, str(exc))}")
    s = sw.summary()
    # durations in ms, time points (first / final shown) in s, as the other columns
    row = (s["rewrite_rate"], _ms(s["shown_delay_p50_s"]), _ms(s["shown_delay_p90_s"]))
    cells = [
        (float(a), float(b), int(k) if k >= 0 else None)
        for a, b, k in zip(sw.first_shown_s, sw.final_shown_s, sw.rewrites, strict=True)
    ]
    return row, cells, None


def _strip_utt(uid: str, msg: str) -> str:
    prefix = f"utt {uid!r}: "
    return msg[len(prefix) :] if msg.startswith(prefix) else msg


@dataclass(frozen=True)
class _Job:
    """What every batch needs besides its ids (small and picklable)."""

    path: str
    lookahead: int | None
    max_lookahead: int
    target: float
    front_end_ms: float
    analyze: Callable | None = None
    on_utterance: Callable | None = None
    branch: str | None = None
    triggers: str = "greedy"


@dataclass(slots=True)  # no __dict__: the client keeps one per utterance
class _UttResult:
    uid: str
    row: tuple | None = None
    words: list[tuple] = field(default_factory=list)
    problem: str | None = None
    # sweep contribution: words, reached words per look-ahead, kept attention per
    # look-ahead (mean over the utterance's rows) and how many rows entered it
    n_words: int = 0
    n_oracle_words: int = 0
    n_reached: np.ndarray | None = None
    kept: np.ndarray | None = None
    kept_rows: int = 0
    # frames the tokens wait for past their triggers, summed per look-ahead, and
    # whether a per-frame encoder right context decided them
    wait_frames: np.ndarray | None = None
    n_tokens: int = 0
    per_frame_rc: bool = False
    shift_s: float | None = None
    encoder_frames: int = 0
    audio_s: float = 0.0
    extra: Any = None
    inserted: list[tuple[str, int]] = field(default_factory=list)


_CACHE_LOCK = threading.Lock()
_LOAD_LOCK = threading.Lock()
_BUNDLES: dict[str, tuple[float, Bundle]] = {}


def _bundle(path: str) -> Bundle:
    """The worker's own open bundle (opened once per process and manifest version)."""
    try:
        stamp = os.stat(os.path.join(path, "utts.jsonl")).st_mtime_ns
    except OSError:
        stamp = -1
    with _CACHE_LOCK:
        hit = _BUNDLES.get(path)
        if hit is not None and hit[0] == stamp:
            return hit[1]
        b = open_bundle(path)
        _BUNDLES.clear()  # one bundle at a time keeps the worker small
        _BUNDLES[path] = (stamp, b)
        return b


def _scan_one(bundle: Bundle, uid: str, job: _Job) -> _UttResult:
    out = _UttResult(uid)
    try:
        # loading may warn (e.g. logits normalised): keep it as a note of this utterance
        with _LOAD_LOCK, warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            utt = bundle[uid]
        notes = [_strip_utt(uid, str(w.message)) for w in caught]
        analyze = job.analyze or _default_analyze()
        # a custom analyze need not know branches: pass it only when one was picked
        kw = {} if job.branch is None else {"branch": job.branch}
        if job.triggers != "greedy":
            kw["triggers"] = job.triggers
        res = analyze(utt, lookahead=job.lookahead, **kw)
        summary = res.summary()
        words = res.word_table()
        # the analysis' forced alignment and greedy path are the sweep's own inputs
        sw = _utterance_counts(
            utt,
            max_lookahead=job.max_lookahead,
            front_end_ms=job.front_end_ms,
            triggers=job.triggers,
            alignment=_same_path(getattr(res, "alignment", None), utt.ref_tokens),
            greedy=_greedy_of(res),
        )
    except PeekalignError as exc:
        out.problem = _strip_utt(uid, str(exc))
        return out
    except Exception as exc:  # a bug must not stop the other utterances
        out.problem = (
            f"unexpected {type(exc).__name__} while analysing it ({exc}); this is a bug in "
            "peekalign or in the analysis function: please report it with this utterance"
        )
        return out
    # the analysis' own notes already say when attention was skipped (the sweep's
    # problems repeat it)
    notes += [_strip_utt(uid, str(n)) for n in getattr(res, "notes", None) or ()]
    if not hasattr(res, "notes"):
        notes += [_strip_utt(uid, p.message) for p in sw.problems]
    shown_row, shown_cells, note = _shown_columns(utt, res, words)
    if note:
        notes.append(note)
    out.row = _utterance_row(uid, summary, notes) + shown_row
    out.words = [
        _word_row(uid, k, w) + c for k, (w, c) in enumerate(zip(words, shown_cells, strict=True))
    ]
    errs = getattr(res, "errors", None)
    if errs is not None and hasattr(errs, "ops"):
        out.inserted = _insertions(errs)
    out.n_words = sw.n_words
    out.n_oracle_words = sw.n_oracle_words
    out.n_reached, out.kept, out.wait_frames = sw.n_reached, sw.kept, sw.wait_frames
    out.n_tokens, out.per_frame_rc = sw.n_tokens, sw.per_frame_right_context
    if utt.attention is not None and not any(p.message for p in sw.problems):
        out.kept_rows = int((utt.attention.sum(axis=-1) > 0).any(axis=(0, 1)).sum())
    out.shift_s = utt.clock.frame_shift_s
    out.encoder_frames = sw.encoder_frames
    out.audio_s = utt.duration_s
    if job.on_utterance is not None:
        try:
            out.extra = job.on_utterance(utt, res)
        except Exception as exc:  # keep the rows; say what went wrong
            out.extra = {"error": f"{type(exc).__name__}: {exc}"}
    return out


def _same_path(alignment, tokens):
    """``alignment`` when it is a forced alignment of exactly ``tokens`` (a custom
    ``analyze`` may return anything), else None: the sweep then aligns by itself."""
    got = getattr(alignment, "tokens", None)
    if got is None or not np.array_equal(np.asarray(got), np.asarray(tokens)):
        return None
    return alignment


def _greedy_of(res):
    """The analysis' greedy decoding when it made one (a :class:`Greedy`), else None."""
    from .align import Greedy

    g = getattr(res, "greedy", None)
    return g if isinstance(g, Greedy) else None


def _insertions(errs) -> list[tuple[str, int]]:
    """Inserted words with the index of the reference word they come before."""
    out, next_ref = [], 0
    for op, r, h in errs.ops:
        if r is not None:
            next_ref = r + 1
        elif op == "I":
            out.append((errs.hyp[h], next_ref))
    return out


def _scan_batch(job: _Job, ids: Sequence[str]) -> list[_UttResult]:
    """Analyse a batch of utterances in this process (the unit of work of a worker)."""
    import multiprocessing

    if multiprocessing.parent_process() is not None:  # a worker process, not the caller's
        _keep_heap()
    bundle = _worker_bundle(job.path)
    return [_scan_one(bundle, uid, job) for uid in ids]


#: glibc's mallopt(3) parameters and what a scan's worker sets them to: blocks up to
#: 32 MB come from the heap, and up to 64 MB free at its top stay there.
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_HEAP = {"trim": 64 << 20, "mmap": 32 << 20, "done": False}


def _keep_heap() -> None:
    """Let this worker process reuse the memory of its freed arrays (glibc only).

    Each utterance allocates and frees ~10 MB of arrays (the inflated member, its
    float32 copy, the log-sum-exp's temporary). With glibc's defaults they are handed
    back to the kernel and faulted in again, page by page, for the next utterance: ~20 %
    of a worker's CPU. Kept in the heap they are reused. Set once per process; a no-op
    where the C library has no ``mallopt``.
    """
    if _HEAP["done"]:
        return
    _HEAP["done"] = True
    try:
        import ctypes

        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError, TypeError):  # not glibc
        return
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    mallopt(_M_TRIM_THRESHOLD, _HEAP["trim"])
    mallopt(_M_MMAP_THRESHOLD, _HEAP["mmap"])


def _worker_bundle(path: str) -> Bundle:
    """The bundle at ``path``, opened in a worker (cached per process); an error that
    says every worker needs the bundle at the same path."""
    try:
        return _bundle(path)
    except PeekalignError as exc:
        raise type(exc)(
            f"a worker could not open the bundle ({exc}); on a cluster every worker needs "
            f"the bundle at the same path {path!r}"
        ) from None


# ---------------------------------------------------------------------------
# executors
# ---------------------------------------------------------------------------


class _InlineExecutor(cf.Executor):
    """Runs each call at submission, in this process (``workers=0``)."""

    def submit(self, fn, /, *args, **kwargs):
        fut: cf.Future = cf.Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as exc:
            fut.set_exception(exc)
        return fut


def _cpu_count() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


def _worker_init() -> None:
    # one thread per worker: the pool is the parallelism
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")


def _new_pool(workers: int) -> cf.Executor:
    if workers == 0:
        return _InlineExecutor()
    return cf.ProcessPoolExecutor(max_workers=workers, initializer=_worker_init)


def _is_broken(exc: BaseException) -> bool:
    return isinstance(exc, cf.BrokenExecutor)


def _in_notebook() -> bool:
    shell = sys.modules.get("IPython")
    if shell is None:
        return False
    try:
        ip = shell.get_ipython()
    except Exception:
        return False
    return ip is not None and "IPKernelApp" in getattr(ip, "config", {})


def _progress(total: int, enabled: bool | None, desc: str):
    if enabled is None:
        enabled = _in_notebook() or bool(getattr(sys.stderr, "isatty", lambda: False)())
    if not enabled:
        return contextlib.nullcontext(None)
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="utt", dynamic_ncols=True, leave=True)


def _check_int(name: str, value, lo: int, func: str = "scan", *, none_ok: bool = True):
    if value is None and none_ok:
        return None
    if isinstance(value, np.integer):
        value = int(value)
    if isinstance(value, bool) or not isinstance(value, int) or value < lo:
        raise ParameterError(
            f"The {name!r} parameter of {func} must be an int in the range [{lo}, inf)"
            f"{' or None' if none_ok else ''}. Got {value!r} instead."
        )
    return value


@dataclass
class _Runner:
    """Submits batches with a bounded number in flight; survives dead workers.

    ``fn(job, ids)`` runs in the workers and returns one result (with a ``uid``) per
    id; ``lost(uid, message)`` stands in for an utterance whose worker died twice.
    """

    fn: Callable
    job: Any
    executor: cf.Executor | None
    workers: int
    max_pending: int
    bar: Any = None
    lost: Callable = field(default=lambda uid, msg: _UttResult(uid, problem=msg))
    # what is kept of each result as it arrives (default: the result itself)
    keep: Callable = field(default=lambda r: r)
    own: cf.Executor | None = None
    restarts: int = 0
    retried: int = 0

    def _pool(self) -> cf.Executor:
        if self.executor is not None:
            return self.executor
        if self.own is None:
            self.own = _new_pool(self.workers)
        return self.own

    def _restart(self, exc: BaseException) -> None:
        """Replace a broken pool (ours, or the caller's, by one of ours)."""
        if self.executor is not None:
            warnings.warn(
                f"the executor broke ({type(exc).__name__}: {exc}); the rest of the scan "
                f"runs on a new local process pool of {max(self.workers, 1)} workers",
                stacklevel=4,
            )
            self.executor = None
            self.workers = max(self.workers, 1)
        if self.own is not None:
            self.own.shutdown(wait=False, cancel_futures=True)
        self.own = None
        self.restarts += 1

    def close(self) -> None:
        if self.own is not None:
            self.own.shutdown(wait=True, cancel_futures=True)
            self.own = None

    def _submit(self, ids: list[str]) -> cf.Future:
        while True:
            try:
                return self._pool().submit(self.fn, self.job, ids)
            except (cf.BrokenExecutor, RuntimeError) as exc:
                # submitting to a broken (or shut down) pool: start another
                self._restart(exc)

    def run(self, batches: list[list[str]]) -> dict[str, Any]:
        results: dict[str, Any] = {}
        failed: list[tuple[list[str], BaseException]] = []
        todo = list(reversed(batches))
        pending: dict[cf.Future, list[str]] = {}

        def collect(futures) -> BaseException | None:
            broke = None
            for fut in futures:
                ids = pending.pop(fut)
                try:
                    for r in fut.result():
                        results[r.uid] = self.keep(r)
                except PeekalignError:
                    raise  # the worker could not open the bundle: retrying will not help
                except Exception as exc:  # a dead worker, a lost cluster task, ...
                    failed.append((ids, exc))
                    broke = exc if _is_broken(exc) else broke
                    continue
                if self.bar is not None:
                    self.bar.update(len(ids))
            return broke

        while todo or pending:
            while todo and len(pending) < self.max_pending:
                ids = todo.pop()
                pending[self._submit(ids)] = ids
            done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
            broke = collect(done)
            if broke is not None:
                # the broken pool fails every batch in flight; keep those that finished
                collect(cf.wait(list(pending)).done)
                self._restart(broke)
        # retry each lost utterance once, alone, one at a time: a second death is
        # then surely this utterance's own
        for ids, first in failed:
            for uid in ids:
                self.retried += 1
                try:
                    res = self._submit([uid]).result()
                    results[uid] = self.keep(res[0])
                except Exception as exc:
                    if _is_broken(exc):
                        self._restart(exc)
                    results[uid] = self.keep(
                        self.lost(
                            uid,
                            f"the worker analysing it died ({_reason(first)}), and again when "
                            f"retried alone ({_reason(exc)}); nothing of it is in the tables. "
                            "Run peekalign view on it to see the error, or report it",
                        )
                    )
                if self.bar is not None:
                    self.bar.update(1)
        return results


def _reason(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


# ---------------------------------------------------------------------------
# scan
# ---------------------------------------------------------------------------


@dataclass(eq=False)
class Scan:
    """Result of :func:`scan`.

    Attributes
    ----------
    utterances : Table
        One row per good utterance (:data:`UTTERANCE_COLUMNS`), in manifest order.
        ``wer``/``S``/``D``/``I`` are empty (NaN/None) without a hypothesis; ``del_*``
        count deleted reference words by diagnosis code; ``problems`` holds notes
        that did not stop the analysis (normalised logits, unused word times, ...).
    words : Table
        One row per reference word of the good utterances (:data:`WORD_COLUMNS`).
    problems : list of Problem
        Utterances (or manifest lines) that could not be analysed, with the reason.
    sweep : Sweep
        Reach, kept attention and latency per decoder look-ahead over the good
        utterances, with the recommended look-ahead.
    bundle : str
        Path of the scanned bundle.
    lookahead : int or None
        Decoder look-ahead asked for (None: each bundle's own).
    branch : str or None
        Branch asked for (None: each utterance's system output); the ``branch``
        column says which one each row's ``wer``, ``S``, ``D``, ``I`` and diagnoses use.
    stats : dict
        ``lookahead`` (the look-ahead used), ``workers``, ``batches``, ``batch_size``, ``elapsed_s``, ``audio_s``, ``rtf``,
        ``retried`` (utterances retried after a worker died), ``restarts``.
    extras : dict
        What ``on_utterance`` returned, by utterance id.
    inserted : dict
        Inserted hypothesis words with the index of the reference word they come
        before, by utterance id (for :meth:`alignments`).
    """

    utterances: Table
    words: Table
    problems: list[Problem]
    sweep: Sweep
    bundle: str
    lookahead: int | None
    stats: dict = field(default_factory=dict)
    extras: dict = field(default_factory=dict)
    inserted: dict = field(default_factory=dict)
    branch: str | None = None

    def alignments(self) -> dict:
        """Word alignments rebuilt from the tables, by utterance id (scored ones).

        Each reference word keeps its operation and hypothesis word, each insertion
        its place before a reference word: the same alignment the analysis made.
        """
        from .errors import ErrorAlignment

        codes = {v: k for k, v in _OPS.items()}
        by_id: dict[str, list[dict]] = {}
        for w in self.words:
            by_id.setdefault(w["id"], []).append(w)
        out = {}
        for r in self.utterances:
            if r["S"] is None:
                continue
            words = by_id.get(r["id"], [])
            ins: dict[int, list[str]] = {}
            for word, before in self.inserted.get(r["id"], []):
                ins.setdefault(before, []).append(word)
            ref, hyp, ops = [], [], []
            for i in range(len(words) + 1):
                for word in ins.get(i, []):
                    ops.append(("I", None, len(hyp)))
                    hyp.append(word)
                if i == len(words):
                    break
                op = codes.get(words[i]["op"], words[i]["op"]) or "D"
                h = None
                if op in ("C", "S"):
                    h = len(hyp)
                    hyp.append(words[i]["hyp_word"])
                ops.append((op, len(ref), h))
                ref.append(words[i]["word"])
            out[r["id"]] = ErrorAlignment(tuple(ref), tuple(hyp), ops)
        return out

    def confusions(self):
        """Substitution pairs, deleted and inserted words and per-word rates
        (:class:`peekalign.confusions.Confusions`) over the scored utterances."""
        from .confusions import confusions

        return confusions(self.alignments().values())

    def scoring(self, **options):
        """Raw and clean scoring of the scored utterances
        (:class:`peekalign.normalize.ScoreReport`: WER before and after normalisation
        and GLM alternates, errors removed, MER, CER, word-boundary errors).

        ``options`` go to :func:`peekalign.normalize.score` (``glm``, ``case``,
        ``punctuation``, ``numbers``, ``weights``).
        """
        from .normalize import score

        pairs = [(" ".join(e.ref), " ".join(e.hyp)) for e in self.alignments().values()]
        return score(pairs, **options)

    def frequency_bins(self, counts, **options) -> Table:
        """Errors of reference words binned by their count in the training text, with
        the deletion causes per bin (see :func:`peekalign.confusions.frequency_bins`).

        ``counts``: a word-count file path or a mapping word -> count.
        """
        from .confusions import frequency_bins, read_word_counts

        al = self.alignments()
        causes = {}
        for w in self.words:
            causes.setdefault(w["id"], []).append(w["diagnosis"] or None)
        bins = frequency_bins(
            al.values(),
            read_word_counts(counts),
            causes=[causes.get(u, []) for u in al],
            **options,
        )
        cols = ("bin", "words", "substituted", "deleted", "error_rate", "deletion_causes")
        rows = [
            (
                b.label,
                b.words,
                b.substituted,
                b.deleted,
                b.error_rate,
                "; ".join(f"{k} {v}" for k, v in sorted(b.causes.items())),
            )
            for b in bins
        ]
        return Table(cols, rows)

    def entity_scores(self, entities):
        """Entity recall and B-WER / U-WER over the scored utterances
        (:func:`peekalign.confusions.entity_scores`); ``entities``: a list of
        entries or a file with one entry a line."""
        from .confusions import entity_scores

        if isinstance(entities, (str, os.PathLike)):
            text = read_option_file(entities, what="entity list")
            entities = [x.strip() for x in text.splitlines() if x.strip()]
        return entity_scores(self.alignments().values(), entities)

    def token_deletions(self, unit: str = "piece") -> Table:
        """Deletion rate per token over the scored utterances: ``unit="char"``
        (characters, spaces dropped) or ``"piece"`` (the bundle vocabulary's tokens;
        word separators dropped). Columns ``token, count, deleted, deletion_rate``,
        highest rate first (see :func:`peekalign.confusions.token_deletions`)."""
        from .confusions import token_deletions

        if unit not in ("char", "piece"):
            raise ParameterError(
                "The 'unit' parameter of token_deletions must be one of ('char', 'piece'). "
                f"Got {unit!r} instead."
            )
        al = self.alignments().values()
        if unit == "char":
            pairs = [("".join(e.ref), "".join(e.hyp)) for e in al]
        else:
            vocab = open_bundle(self.bundle).vocab
            sep = getattr(vocab, "separator_id", None)

            def pieces(words):
                out = []
                for w in words:
                    try:
                        ids = vocab.encode(w)
                    except PeekalignError:
                        ids = []
                    out += [vocab.tokens[i] for i in ids if i != sep]
                return out

            pairs = [(pieces(e.ref), pieces(e.hyp)) for e in al]
        rows = token_deletions(pairs)
        cols = ("token", "count", "deleted", "deletion_rate")
        return Table(cols, [tuple(r[c] for c in cols) for r in rows])

    def by(self, field: str, **options) -> Table:
        """Per-slice rates by a manifest ``meta`` field, with bootstrap intervals.

        ``options`` go to :func:`peekalign.slices.slice_rows` (``bins``,
        ``max_levels``, ``resamples``, ``seed``, ``level``). Columns:
        :data:`peekalign.slices.SLICE_COLUMNS` then the ``del_*`` counts.
        """
        from .slices import slice_rows

        meta = open_bundle(self.bundle).utterance_meta()
        rows = slice_rows(self.utterances, meta, field, words=self.words, **options)
        columns = tuple(rows[0]) if rows else ("field", "value")
        return Table(columns, [tuple(r[c] for c in columns) for r in rows])

    @property
    def ok(self) -> bool:
        """True when every utterance was analysed."""
        return not self.problems

    @property
    def problems_table(self) -> Table:
        """The problems as a table (``id``, ``problem``)."""
        return Table(("id", "problem"), [(p.utt, p.message) for p in self.problems])

    def totals(self) -> dict:
        """Totals over the good utterances.

        ``S``, ``D``, ``I``, ``n_scored_words`` and ``wer`` count utterances with a
        hypothesis only; ``wer = (S + D + I) / n_scored_words``, on the scan's branch
        (``branch``: its name, or ``"mixed: ..."`` when the system output differs
        between utterances); ``branches`` holds every branch's (:meth:`branch_totals`). ``reach`` is the
        share of words with margin >= 0 at the scan's look-ahead; ``triggers`` the
        source of the trigger frames and ``oracle_triggers`` the words whose last
        token's trigger is an oracle (forced-alignment) one.
        """
        u = self.utterances
        n = len(u)
        scored = [r for r in u if r["S"] is not None]
        out: dict[str, Any] = {
            "n_utterances": n,
            "n_problems": len(self.problems),
            "duration_s": float(sum(r["duration_s"] for r in u)),
            "n_words": int(sum(r["n_words"] for r in u)),
            "n_scored": len(scored),
            "n_scored_words": int(sum(r["n_words"] for r in scored)),
        }
        for k in ("S", "D", "I"):
            out[k] = int(sum(r[k] for r in scored))
        out["errors"] = out["S"] + out["D"] + out["I"]
        nw = out["n_scored_words"]
        out["wer"] = out["errors"] / nw if nw else (float("nan") if not scored else 0.0)
        used = sorted({r["branch"] for r in scored if r["branch"]})
        out["branch"] = (
            used[0] if len(used) == 1 else ("mixed: " + ", ".join(used) if used else None)
        )
        out["branches"] = self.branch_totals()
        out["deletions"] = {
            c: int(sum(r[f"del_{c}"] for r in u)) for c in (*DELETION_CODES, "other")
        }
        margins = self.words["reach_margin_ms"] if len(self.words) else np.zeros(0)
        margins = np.asarray(margins, dtype=np.float64)
        good = margins[np.isfinite(margins)]
        out["reach"] = float(np.mean(good >= -1e-6)) if good.size else float("nan")
        out["triggers"] = self.sweep.triggers
        out["oracle_triggers"] = int(sum(r["oracle_triggers"] or 0 for r in u))
        delay = np.asarray(
            self.words["emission_delay_ms"] if len(self.words) else [], dtype=np.float64
        )
        delay = delay[np.isfinite(delay)]
        out["median_emission_delay_ms"] = float(np.median(delay)) if delay.size else float("nan")
        cm = np.asarray(u["mean_cut_mass"] if n else [], dtype=np.float64)
        cm = cm[np.isfinite(cm)]
        out["mean_cut_mass"] = float(cm.mean()) if cm.size else float("nan")
        out["recommended_lookahead"] = self.sweep.recommended
        return out

    def branch_totals(self) -> dict:
        """WER of every branch over the utterances that carry it.

        Returns
        -------
        dict
            ``{branch: {"wer", "errors", "n_words", "n_utterances"}}`` for each branch
            present in at least one utterance, in the order ctc, decoder, joint, hyp;
            ``wer = errors / n_words`` summed over those utterances.
        """
        out = {}
        for b in (*BRANCHES, LEGACY_BRANCH):
            rows = [r for r in self.utterances if r[f"errors_{b}"] is not None]
            if not rows:
                continue
            errors = int(sum(r[f"errors_{b}"] for r in rows))
            nw = int(sum(r["n_words"] for r in rows))
            wer = errors / nw if nw else (0.0 if errors == 0 else float("inf"))
            out[b] = {"wer": wer, "errors": errors, "n_words": nw, "n_utterances": len(rows)}
        return out

    def worst(self, n: int | None = None) -> Table:
        """Utterances ranked worst first (by the errors of the scan's branch).

        Ranked by errors (``S + D + I``), then WER, then the smallest reach margin;
        utterances without a hypothesis rank by their margin after those with errors.
        """
        ix = {c: i for i, c in enumerate(self.utterances.columns)}

        def key(r):
            errs = sum(r[ix[k]] for k in ("S", "D", "I")) if r[ix["S"]] is not None else 0
            w = r[ix["wer"]]
            m = r[ix["worst_reach_margin_ms"]]
            return (
                -errs,
                -(w if w == w else -1.0),
                m if m == m else math.inf,
                r[ix["id"]],
            )

        rows = sorted(self.utterances.rows, key=key)
        return Table(self.utterances.columns, rows if n is None else rows[:n])

    def write_csv(self, folder: str | os.PathLike, *, overwrite: bool = False) -> list[Path]:
        """Write ``utterances.csv``, ``words.csv``, ``sweep.csv`` and ``problems.csv``
        into an existing folder."""
        d = Path(folder)
        out = [
            self.utterances.write_csv(d / "utterances.csv", overwrite=overwrite),
            self.words.write_csv(d / "words.csv", overwrite=overwrite),
        ]
        self.sweep.write_csv(d / "sweep.csv", overwrite=overwrite)
        out.append(d / "sweep.csv")
        out.append(self.problems_table.write_csv(d / "problems.csv", overwrite=overwrite))
        return out

    def to_pandas(self):
        """``(utterances, words)`` as pandas DataFrames."""
        return self.utterances.to_pandas(), self.words.to_pandas()

    def __repr__(self) -> str:
        t = self.totals()
        return (
            f"Scan({t['n_utterances']} utterances, {t['n_words']} words, "
            f"WER {t['wer']:.4f} ({t['branch']}), problems={t['n_problems']}, "
            f"recommended look-ahead={self.sweep.recommended})"
        )


class _SweepTotals:
    """The set's sweep summed from the per-utterance counts (kept attention weighted by
    the rows each utterance contributed). Utterances are added in manifest order, so
    the float sums do not depend on the order results arrive in."""

    def __init__(self, max_lookahead: int) -> None:
        E = max_lookahead + 1
        self.n_words = self.n_tokens = self.n_utts = self.n_oracle = 0
        self.n_cov = np.zeros(E, dtype=np.int64)
        self.kept_sum, self.kept_n = np.zeros(E), np.zeros(E)
        self.wait = np.zeros(E, dtype=np.int64)
        self.per_frame_rc = False
        self.shift: float | None = None
        self.enc = 0

    def add(self, r: _UttResult) -> None:
        """Add one utterance's counts (nothing for one that was not analysed)."""
        if r.n_reached is None:
            return
        self.n_utts += 1
        if self.shift is None:
            self.shift, self.enc = r.shift_s, r.encoder_frames
        self.n_words += r.n_words
        self.n_oracle += r.n_oracle_words
        self.n_cov += np.asarray(r.n_reached, dtype=np.int64)
        self.wait += np.asarray(r.wait_frames, dtype=np.int64)
        self.n_tokens += r.n_tokens
        self.per_frame_rc |= r.per_frame_rc
        if r.kept_rows:
            k = np.asarray(r.kept, dtype=np.float64)
            good = np.isfinite(k)
            self.kept_sum += np.where(good, k * r.kept_rows, 0.0)
            self.kept_n += np.where(good, r.kept_rows, 0)

    def sweep(self, target: float, front, triggers: str = "greedy") -> Sweep:
        """The :class:`Sweep` of the utterances added."""
        front_ms = front if front is not None else 0.0
        shift, wait, n_tokens, per_frame_rc = (
            self.shift,
            self.wait,
            self.n_tokens,
            self.per_frame_rc,
        )

        def latency(e: int) -> float:
            if per_frame_rc:  # what the tokens wait for, on average
                return _mean_wait_ms(wait[e], n_tokens, shift * 1000, front_ms)
            return latency_budget(
                frame_shift_ms=shift * 1000,
                layers=int(self.enc),
                per_layer=1,
                lookahead=e,
                front_end_ms=front_ms,
            ).total_ms

        rows, recommended = _sweep_rows(
            self.n_cov,
            self.n_words,
            self.kept_sum,
            self.kept_n,
            latency if shift else None,
            target,
        )
        return Sweep(
            rows=rows,
            recommended=recommended,
            target=float(target),
            problems=[],
            n_utterances=self.n_utts,
            n_words=self.n_words,
            frame_shift_ms=shift * 1000 if shift else float("nan"),
            front_end_ms=front_ms,
            encoder_frames=int(self.enc),
            triggers=triggers,
            n_oracle_words=int(self.n_oracle),
            per_frame_right_context=per_frame_rc,
            wait_frames=wait,
            n_tokens=n_tokens,
        )


#: Distinct strings a scan's client shares between its table cells, at most (one object
#: per distinct word, code, ...; past this new strings are kept as they come).
_SHARED_CELLS = 200_000


class _Collector:
    """What the client keeps of each result as it arrives, in manifest order: its
    sweep counts go to the totals, its rows to the tables' columns, its duration,
    problem, extra and inserted words to lists of their own; the result itself is
    dropped. Text cells share one str object per distinct value, so a large scan
    holds each word once."""

    def __init__(self, ids: Sequence[str], max_lookahead: int) -> None:
        self.ids, self.next = ids, 0
        self.waiting: dict[str, _UttResult] = {}
        self.totals = _SweepTotals(max_lookahead)
        self.utterances = _Builder(UTTERANCE_COLUMNS)
        self.words = _Builder(WORD_COLUMNS)
        self.shared: dict[str, str] = {}
        self.audio_s = array.array("d")  # of each analysed utterance, in order
        self.problems: list[Problem] = []
        self.extras: dict[str, Any] = {}
        self.inserted: dict[str, list] = {}

    def keep(self, r: _UttResult) -> None:
        """Take ``r`` in once every earlier id's result is in (nothing is returned:
        the runner keeps no result)."""
        self.waiting[r.uid] = r
        while self.next < len(self.ids) and self.ids[self.next] in self.waiting:
            self._add(self.waiting.pop(self.ids[self.next]))
            self.next += 1

    def _add(self, r: _UttResult) -> None:
        self.totals.add(r)
        if r.row is None:
            self.problems.append(Problem(r.uid, r.problem or "not analysed"))
            return
        self.utterances.add(self._share(r.row))
        for w in r.words:
            self.words.add(self._share(w))
        self.audio_s.append(r.audio_s)
        if r.extra is not None:
            self.extras[r.uid] = r.extra
        if r.inserted:
            self.inserted[r.uid] = r.inserted

    def tables(self) -> tuple[Table, Table]:
        """The utterance and word tables of every result kept (all must be)."""
        if self.next != len(self.ids):
            raise RuntimeError(f"scan: {len(self.ids) - self.next} results never arrived")
        return (
            self.utterances.table(UTTERANCE_COLUMNS),
            self.words.table(WORD_COLUMNS),
        )

    def _share(self, row: tuple) -> tuple:
        memo = self.shared
        out = []
        for v in row:
            if type(v) is str:
                got = memo.get(v)
                if got is None:
                    if len(memo) < _SHARED_CELLS:
                        memo[v] = v
                    got = v
                v = got
            out.append(v)
        return tuple(out)


def _batches(ids: list[str], size: int) -> list[list[str]]:
    return [ids[i : i + size] for i in range(0, len(ids), size)]


def scan(
    bundle,
    *,
    lookahead: int | None = None,
    executor: cf.Executor | None = None,
    workers: int | None = None,
    batch_size: int | None = None,
    ids: Sequence[str] | None = None,
    max_lookahead: int = 30,
    target: float = 0.95,
    front_end_ms: float | None = None,
    progress: bool | None = None,
    analyze: Callable | None = None,
    on_utterance: Callable | None = None,
    branch: str | None = None,
    triggers: str = "greedy",
) -> Scan:
    """Analyse every utterance of a bundle; tables of utterances and words.

    Parameters
    ----------
    bundle : Bundle or path-like
        The bundle (its folder is what the workers open).
    lookahead : int, optional
        Decoder look-ahead in frames for the windows and margins; default: the
        bundle's own (bundle.json ``decoder.lookahead``).
    executor : concurrent.futures.Executor, optional
        Runs the batches; e.g. ``dask.distributed.Client(...).get_executor()``.
        Default: a process pool of ``workers`` processes, shut down at the end.
    workers : int, optional
        Processes of the default pool (default: the machine's cores); ``0`` runs
        everything in this process (no protection against a crashing utterance).
        With an ``executor``, how many batches to keep in flight per worker.
    batch_size : int, optional
        Utterances per batch (default: up to 16, or 64 on a Dask cluster, with at least
        4 batches per worker).
    ids : sequence of str, optional
        Scan only these utterances.
    max_lookahead, target : int, float
        Range and reach target of the look-ahead sweep.
    front_end_ms : float, optional
        Front end's own look-ahead in the sweep's algorithmic look-ahead; default: the
        bundle's frame clock (bundle.json ``front_end``), as the view uses it (see
        :func:`peekalign.streaming.latency_budget`).
    progress : bool, optional
        Progress bar (tqdm; the notebook widget in Jupyter). Default: shown in a
        terminal or a notebook.
    analyze : callable, optional
        ``analyze(utt, lookahead=...)`` returning an object with ``summary()`` and
        ``word_table()``; default :func:`peekalign.analysis.analyze`. With a process
        pool it must be importable by name (a module-level function).
    branch : str, optional
        Hypothesis branch the WER, the worst-first ranking and the diagnoses use
        (``"ctc"``, ``"decoder"``, ``"joint"`` or ``"hyp"``); default each utterance's
        system output (joint, else decoder, else ctc). Every branch is scored side by
        side anyway (``wer_<branch>`` columns, :meth:`Scan.branch_totals`); an
        utterance without the branch asked for is a problem.
    triggers : {"greedy", "oracle"}
        Source of the trigger frames of windows, margins, cut mass and the sweep:
        CTC greedy (causal, default; tokens it never emitted fall back to the forced
        alignment, counted in ``oracle_triggers``) or the forced alignment of the
        whole reference (oracle). See DEVELOPERS.md, "Causal triggers".

    Returns
    -------
    Scan
        Tables in manifest order, identical whatever the executor.

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> from peekalign import BundleWriter
    >>> d = tempfile.mkdtemp() + "/b"
    >>> with BundleWriter(d, vocab=["<b>", "|", "a", "b"], frame_shift_s=0.04,
    ...                   word_boundary={"kind": "separator", "symbol": "|"}) as w:
    ...     w.add("u1", np.log(np.full((8, 4), 0.25)), ref="ab a", hyp="ab")
    >>> s = scan(d, workers=0, progress=False)
    >>> s.utterances["wer"].tolist(), s.totals()["D"], s.words["op"].tolist()
    ([0.5], 1, ['correct', 'deletion'])

    On a cluster: ``scan(d, executor=dask.distributed.Client(...).get_executor())``.
    """
    lookahead = _check_int("lookahead", lookahead, 0)
    workers = _check_int("workers", workers, 0)
    batch_size = _check_int("batch_size", batch_size, 1)
    max_lookahead = _check_int("max_lookahead", max_lookahead, 0, none_ok=False)
    _check_scan_options(target, front_end_ms, executor, branch, triggers, analyze)
    if not isinstance(bundle, Bundle):
        bundle = open_bundle(bundle)
    if front_end_ms is None:  # the front end bundle.json declares, as the view uses it
        front_end_ms = bundle.clock.right_context_s * 1000
    path = str(bundle.path.resolve())
    all_ids, problems = _select_ids(bundle, ids)
    cap = MAX_CLUSTER_BATCH if _is_dask(executor) else MAX_BATCH
    n_workers, per, size = _plan_batches(len(all_ids), workers, executor, batch_size, cap)
    batches = _batches(all_ids, size)
    if on_utterance is not None and not callable(on_utterance):
        raise ParameterError(
            "The 'on_utterance' parameter of scan must be callable or None. "
            f"Got {on_utterance!r} instead."
        )
    job = _Job(
        path,
        lookahead,
        max_lookahead,
        float(target),
        front_end_ms,
        analyze,
        on_utterance,
        branch,
        triggers,
    )
    collector = _Collector(all_ids, max_lookahead)
    _, elapsed, runner = _run_batches(
        _scan_batch, job, batches, executor, n_workers, per, progress, "scan",
        keep=collector.keep,
    )  # fmt: skip
    utts, words = collector.tables()
    problems += collector.problems
    sw = collector.totals.sweep(float(target), front_end_ms, triggers)
    sw.problems = list(problems)
    audio_s = float(sum(collector.audio_s))
    stats = {
        # the look-ahead the analyses used (analyze's default: the bundle's own, else 0)
        "lookahead": lookahead if lookahead is not None else (bundle.decoder_lookahead or 0),
        "workers": n_workers,
        "batches": len(batches),
        "batch_size": size,
        "elapsed_s": elapsed,
        "audio_s": audio_s,
        "rtf": elapsed / audio_s if audio_s else float("nan"),
        "retried": runner.retried,
        "restarts": runner.restarts,
    }
    return Scan(
        utts, words, problems, sw, path, lookahead, stats, collector.extras,
        collector.inserted, branch,
    )  # fmt: skip


def _check_scan_options(target, front_end_ms, executor, branch, triggers, analyze) -> None:
    """Raise :class:`ParameterError` for the first bad option of :func:`scan` among these."""
    ok = isinstance(target, (int, float)) and not isinstance(target, bool) and 0 < target <= 1
    if not ok:
        raise ParameterError(
            f"The 'target' parameter of scan must be a float in the range (0, 1]. "
            f"Got {target!r} instead; write 0.95 for 95 %."
        )
    ok = isinstance(front_end_ms, (int, float)) and not isinstance(front_end_ms, bool)
    if front_end_ms is not None and not (ok and math.isfinite(front_end_ms) and front_end_ms >= 0):
        raise ParameterError(
            "The 'front_end_ms' parameter of scan must be a float in the range [0, inf). "
            f"Got {front_end_ms!r} instead."
        )
    _check_executor(executor, "scan")
    scored = (*BRANCHES, LEGACY_BRANCH)
    if branch is not None and branch not in scored:
        raise ParameterError(
            f"The 'branch' parameter of scan must be one of {scored} or None. "
            f"Got {branch!r} instead."
        )
    if triggers not in ("greedy", "oracle"):
        raise ParameterError(
            f"The 'triggers' parameter of scan must be 'greedy' or 'oracle'. "
            f"Got {triggers!r} instead."
        )
    if analyze is not None and not callable(analyze):
        raise ParameterError(
            f"The 'analyze' parameter of scan must be callable or None. Got {analyze!r} instead."
        )


def _is_dask(executor: cf.Executor | None) -> bool:
    """Whether ``executor`` sends its tasks to a Dask cluster (``client.get_executor()``)."""
    return executor is not None and type(executor).__module__.split(".")[0] == "distributed"


def _check_executor(executor, fn: str) -> None:
    """Raise :class:`ParameterError` unless ``executor`` is an Executor or None."""
    if executor is not None and not isinstance(executor, cf.Executor):
        raise ParameterError(
            f"The 'executor' parameter of {fn} must be a concurrent.futures.Executor or None. "
            f"Got {type(executor).__name__} instead; for Dask pass client.get_executor()."
        )


def _select_ids(bundle: Bundle, ids: Sequence[str] | None) -> tuple[list[str], list[Problem]]:
    """The ids to run, in manifest order, and the manifest's problems among them.

    ``ids`` None is every utterance; an id the bundle lacks raises :class:`ParameterError`.
    """
    all_ids = bundle.ids
    problems = [Problem(u, m) for u, m in bundle.manifest_problems]
    if ids is not None:
        ids = list(ids)
        missing = [u for u in ids if u not in bundle]
        if missing:
            raise ParameterError(
                describe(
                    f"{len(missing)} id(s) not in the bundle (e.g. {missing[0]!r})",
                    "ids of the bundle's utterances",
                    "check the ids (Bundle.ids lists them)",
                )
            )
        keep = set(ids)
        all_ids = [u for u in all_ids if u in keep]
        problems = [p for p in problems if p.utt in keep]
    return all_ids, problems


def _plan_batches(
    n_ids: int,
    workers: int | None,
    executor: cf.Executor | None,
    batch_size: int | None,
    cap: int = MAX_BATCH,
) -> tuple[int, int, int]:
    """Workers, batches in flight per worker's share, and the batch size.

    Returns ``(n_workers, per, size)``: the default pool's processes (or the executor's),
    ``per = max(n_workers, 1)``, and ``batch_size`` or up to ``cap`` utterances
    with at least 4 batches per worker.
    """
    n_workers = workers if workers is not None else _cpu_count()
    if executor is not None:
        n_workers = workers or getattr(executor, "_max_workers", None) or _cpu_count()
    per = max(n_workers, 1)
    size = batch_size or max(1, min(cap, math.ceil(n_ids / (4 * per))))
    return n_workers, per, size


def _run_batches(
    fn: Callable,
    job: Any,
    batches: list[list[str]],
    executor: cf.Executor | None,
    n_workers: int,
    per: int,
    progress: bool | None,
    label: str,
    lost: Callable | None = None,
    keep: Callable | None = None,
) -> tuple[dict, float, _Runner]:
    """Run ``fn(job, ids)`` over the batches with a progress bar.

    Returns the results by id, the seconds it took and the runner (its ``retried`` and
    ``restarts`` counts). ``lost`` and ``keep`` as in :class:`_Runner` (default: a scan
    result; each result kept as it is).
    """
    extra = {} if lost is None else {"lost": lost}
    if keep is not None:
        extra["keep"] = keep
    t0 = time.perf_counter()
    with _progress(sum(map(len, batches)), progress, label) as bar:
        runner = _Runner(fn, job, executor, n_workers, max_pending=2 * per, bar=bar, **extra)
        try:
            results = runner.run(batches)
        finally:
            runner.close()
    return results, time.perf_counter() - t0, runner


# ---------------------------------------------------------------------------
# compare
# ---------------------------------------------------------------------------

#: Columns of :attr:`Comparison.utterances`.
COMPARE_COLUMNS = (
    "id",
    "n_words",
    "wer_a",
    "wer_b",
    "wer_delta",
    "D_a",
    "D_b",
    "D_delta",
    "median_emission_delay_a_ms",
    "median_emission_delay_b_ms",
    "emission_delay_delta_ms",
    "worst_reach_margin_a_ms",
    "worst_reach_margin_b_ms",
    "changed_words",
)

#: Columns of :attr:`Comparison.words` (words whose status changed).
CHANGED_COLUMNS = (
    "id",
    "index",
    "word",
    "op_a",
    "op_b",
    "diagnosis_a",
    "diagnosis_b",
    "reach_margin_a_ms",
    "reach_margin_b_ms",
    "emission_delay_a_ms",
    "emission_delay_b_ms",
    "change",
)


@dataclass(eq=False)
class Comparison:
    """Result of :func:`compare`: two scans joined by utterance id.

    Attributes
    ----------
    a, b : Scan
    utterances : Table
        Per common utterance (ids of A's manifest order): WER, deletions, median
        emission delay and worst margin of both models and B minus A.
    words : Table
        Reference words whose status changed between the models: error operation,
        diagnosis, or reached/cut-off.
    problems : list of Problem
        Both scans' problems (prefixed ``A:``/``B:``), ids in only one bundle and
        utterances whose reference words differ.
    """

    a: Scan
    b: Scan
    utterances: Table
    words: Table
    problems: list[Problem]
    label_a: str = "A"
    label_b: str = "B"
    # significance tables by (by, options): the bootstrap is seeded, so the page, the
    # CSV and the command's lines share one computation
    _significance: dict = field(default_factory=dict, repr=False)

    def totals(self) -> dict:
        """Both scans' totals over the common utterances, and B minus A."""
        ids = set(self.utterances["id"].tolist()) if len(self.utterances) else set()
        ta = _subset(self.a, ids).totals()
        tb = _subset(self.b, ids).totals()
        keys = ("wer", "S", "D", "I", "reach", "median_emission_delay_ms")
        return {
            "n_common": len(ids),
            "a": ta,
            "b": tb,
            "delta": {k: tb[k] - ta[k] for k in keys},
            "n_changed_words": len(self.words),
        }

    def significance(self, by: str | None = None, **options) -> Table:
        """Is B better than A? Matched-pairs segment test, sign test and paired
        bootstrap over the common scored utterances, overall and per slice.

        Parameters
        ----------
        by : str, optional
            A manifest ``meta`` field of A's bundle: one more row per slice (sliced
            as :meth:`Scan.by` does).
        **options
            ``resamples``, ``seed``, ``level`` of the bootstrap.

        Returns
        -------
        Table
            :data:`peekalign.significance.SIGNIFICANCE_COLUMNS`; ``verdict`` says it in
            plain words.
        """
        key = (by, tuple(sorted(options.items())))
        if key not in self._significance:
            self._significance[key] = self._significance_table(by, options)
        return self._significance[key]

    def _significance_table(self, by: str | None, options: dict) -> Table:
        """The table :meth:`significance` returns, computed."""
        from .significance import SIGNIFICANCE_COLUMNS, significance_row
        from .slices import slice_values

        al_a, al_b = self.a.alignments(), self.b.alignments()
        ids = [u for u in self.utterances["id"].tolist() if u in al_a and u in al_b]
        ids = [u for u in ids if al_a[u].ref == al_b[u].ref]
        names = (self.label_a, self.label_b)

        def row(field, value, members):
            r = significance_row(
                [al_a[u] for u in members],
                [al_b[u] for u in members],
                field=field,
                value=value,
                names=names,
                **options,
            )
            return tuple(r[c] for c in SIGNIFICANCE_COLUMNS)

        rows = [row("all", "all", ids)]
        if by is not None:
            meta = open_bundle(self.a.bundle).utterance_meta()
            labels, order = slice_values([(meta.get(u) or {}).get(by) for u in ids])
            for value in order:
                rows.append(
                    row(by, value, [u for u, k in zip(ids, labels, strict=True) if k == value])
                )
        return Table(SIGNIFICANCE_COLUMNS, rows)

    def write_csv(
        self, folder: str | os.PathLike, *, overwrite: bool = False, by: str | None = None
    ) -> list[Path]:
        """``utterances.csv``, ``changed_words.csv``, ``significance.csv`` (per slice of
        the meta field ``by`` too) and ``problems.csv``."""
        d = Path(folder)
        return [
            self.utterances.write_csv(d / "utterances.csv", overwrite=overwrite),
            self.words.write_csv(d / "changed_words.csv", overwrite=overwrite),
            self.significance(by=by).write_csv(d / "significance.csv", overwrite=overwrite),
            Table(("id", "problem"), [(p.utt, p.message) for p in self.problems]).write_csv(
                d / "problems.csv", overwrite=overwrite
            ),
        ]


def _subset(s: Scan, ids: set) -> Scan:
    u = Table(s.utterances.columns, [r for r in s.utterances.rows if r[0] in ids])
    w = Table(s.words.columns, [r for r in s.words.rows if r[0] in ids])
    ins = {k: v for k, v in s.inserted.items() if k in ids}
    return Scan(u, w, [], s.sweep, s.bundle, s.lookahead, inserted=ins, branch=s.branch)


def _reached(m: float) -> bool | None:
    return None if m != m else m >= -1e-6  # ms


def compare(
    a,
    b,
    *,
    lookahead: int | None = None,
    lookahead_b: int | None = None,
    labels: tuple[str, str] = ("A", "B"),
    **scan_options,
) -> Comparison:
    """Compare two models over the same utterance ids (e.g. streaming vs full context).

    Parameters
    ----------
    a, b : Scan, Bundle or path-like
        Scans, or bundles to scan with ``scan_options``.
    lookahead, lookahead_b : int, optional
        Decoder look-ahead for A (and for B; default: the same as A's), when scanning.
    labels : (str, str)
        Names of the two models in reports.
    **scan_options
        Passed to :func:`scan` (``executor``, ``workers``, ``progress``, ...).

    Returns
    -------
    Comparison

    Examples
    --------
    >>> c = compare("streaming", "full", workers=1, progress=False)
    >>> r = c.utterances.records()[0]
    >>> r["wer_delta"] == r["wer_b"] - r["wer_a"]
    True
    """
    if not isinstance(a, Scan):
        a = scan(a, lookahead=lookahead, **scan_options)
    if not isinstance(b, Scan):
        b = scan(b, lookahead=lookahead if lookahead_b is None else lookahead_b, **scan_options)
    problems = _unpaired(a, b, labels)
    words_a = _words_by_id(a.words)
    words_b = _words_by_id(b.words)
    ua = {r["id"]: r for r in a.utterances}
    ub = {r["id"]: r for r in b.utterances}
    rows = []
    changed = []
    for uid, ra in ua.items():
        rb = ub.get(uid)
        if rb is None:
            continue
        wa, wb = words_a.get(uid, []), words_b.get(uid, [])
        if [w["word"] for w in wa] != [w["word"] for w in wb]:
            problems.append(
                Problem(
                    uid,
                    describe(
                        f"{len(wa)} reference words in {labels[0]} and {len(wb)} in "
                        f"{labels[1]} (or different words)",
                        "the same reference in both bundles",
                        "compare bundles dumped from the same test set",
                    ),
                )
            )
            continue
        word_rows = _changed_words(uid, wa, wb)
        changed += word_rows
        rows.append(_delta_row(uid, ra, rb, len(word_rows)))
    return Comparison(
        a,
        b,
        Table(COMPARE_COLUMNS, rows),
        Table(CHANGED_COLUMNS, changed),
        problems,
        labels[0],
        labels[1],
    )


def _unpaired(a: Scan, b: Scan, labels: tuple[str, str]) -> list[Problem]:
    """Both scans' problems, labelled, and the ids scanned in one but not the other."""
    problems = [Problem(p.utt, f"{labels[0]}: {p.message}") for p in a.problems]
    problems += [Problem(p.utt, f"{labels[1]}: {p.message}") for p in b.problems]
    ua = {r["id"]: r for r in a.utterances}  # dicts: ids in scan order
    ub = {r["id"]: r for r in b.utterances}
    bad_a = {p.utt for p in a.problems}
    bad_b = {p.utt for p in b.problems}
    for uid in ua:
        if uid not in ub and uid not in bad_b:
            problems.append(Problem(uid, f"only in {labels[0]}; not compared"))
    for uid in ub:
        if uid not in ua and uid not in bad_a:
            problems.append(Problem(uid, f"only in {labels[1]}; not compared"))
    return problems


def _changed_words(uid: str, wa: list[dict], wb: list[dict]) -> list[tuple]:
    """Rows of :data:`CHANGED_COLUMNS` for the words of one utterance whose op,
    diagnosis or reach differ between A and B."""
    changed = []
    for x, y in zip(wa, wb, strict=True):
        why = []
        if x["op"] != y["op"]:
            why.append(f"{x['op'] or 'not scored'} → {y['op'] or 'not scored'}")
        if x["diagnosis"] != y["diagnosis"]:
            why.append(f"cause {x['diagnosis'] or 'none'} → {y['diagnosis'] or 'none'}")
        ca, cb = _reached(x["reach_margin_ms"]), _reached(y["reach_margin_ms"])
        if ca is not None and cb is not None and ca != cb:
            why.append("reached → cut off" if ca else "cut off → reached")
        if why:
            changed.append(
                (
                    uid,
                    x["index"],
                    x["word"],
                    x["op"],
                    y["op"],
                    x["diagnosis"],
                    y["diagnosis"],
                    x["reach_margin_ms"],
                    y["reach_margin_ms"],
                    x["emission_delay_ms"],
                    y["emission_delay_ms"],
                    "; ".join(why),
                )
            )
    return changed


def _delta_row(uid: str, ra: dict, rb: dict, n_changed: int) -> tuple:
    """One utterance's row of :data:`COMPARE_COLUMNS`: A's and B's figures and B - A."""
    da = ra["median_emission_delay_ms"]
    db = rb["median_emission_delay_ms"]
    return (
        uid,
        ra["n_words"],
        ra["wer"],
        rb["wer"],
        rb["wer"] - ra["wer"],
        ra["D"],
        rb["D"],
        None if ra["D"] is None or rb["D"] is None else rb["D"] - ra["D"],
        da,
        db,
        db - da,
        ra["worst_reach_margin_ms"],
        rb["worst_reach_margin_ms"],
        n_changed,
    )


def _words_by_id(t: Table) -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for r in t:
        out.setdefault(r["id"], []).append(r)
    return out
