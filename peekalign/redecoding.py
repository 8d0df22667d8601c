"""Re-decode a bundle with the user's own decoder at every look-ahead.

:func:`redecode` runs the decoder (any :class:`peekalign.decoder.Decoder`) over every
utterance at decoder look-aheads ``e`` and at full context, in one of two modes:

- ``"triggered"``: CTC fixes the trigger frames, the decoder emits one token per
  trigger from frames ``[0, n_u + e]`` (triggered attention (2019));
- ``"joint"``: the frame-synchronous prefix search with the decoder's log-prob added
  with weight ``decoder_weight`` when a prefix is created (hybrid CTC/attention joint
  decoding (2017)).

Per look-ahead it reports WER, S, D, I, the deleted words by diagnosis code (the
deletion diagnosis at that look-ahead), the words lost and gained against full
context, the algorithmic latency, and the paired-bootstrap interval of the WER
difference to full context (see :func:`peekalign.significance.paired_bootstrap`), from which
:meth:`Redecode.recommend` picks the smallest look-ahead that costs at most a stated
tolerance. Utterances go to any :class:`concurrent.futures.Executor` by id, like
:func:`peekalign.scan`: workers open the bundle and the decoder themselves and send
back counts and hypotheses, never arrays.
"""

from __future__ import annotations

import concurrent.futures as cf
import importlib
import json
import math
import os
import threading
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .corpus import (
    Table,
    _batches,
    _check_executor,
    _check_int,
    _plan_batches,
    _run_batches,
    _select_ids,
    _strip_utt,
    _worker_bundle,
)
from .decoder import TRIGGER_SOURCES, check_decoder, ctc_triggers, triggered_decode
from .diagnosis import DELETION_CODES
from .exceptions import ParameterError, PeekalignError, describe
from .model import Bundle, Problem, open_bundle
from .recommend import DEFAULT_TOLERANCE, Recommendation, _check_tolerance, measured_rule
from .significance import paired_bootstrap

__all__ = [
    "DEFAULT_TOLERANCE",
    "MODES",
    "REDECODE_COLUMNS",
    "Recommendation",
    "Redecode",
    "read_redecode_csv",
    "redecode",
]

MODES = ("triggered", "joint")

#: Resamples of the paired bootstrap (utterances drawn with replacement, as the slices
#: and ``compare`` draw them: :func:`peekalign.significance.paired_bootstrap`).
DEFAULT_RESAMPLES = 2000


#: Columns of :attr:`Redecode.table` (the full-context row has lookahead_frames inf).
REDECODE_COLUMNS = (
    "lookahead_frames",
    "latency_ms",
    "wer",
    "S",
    "D",
    "I",
    "n_words",
    "words_lost",
    "words_gained",
    "wer_delta",
    "wer_delta_low",
    "wer_delta_high",
    *(f"del_{c}" for c in DELETION_CODES),
    "del_other",
)

#: Columns of :attr:`Redecode.utterances` (one row per utterance and look-ahead).
UTTERANCE_COLUMNS = (
    "id",
    "lookahead_frames",
    "n_words",
    "S",
    "D",
    "I",
    "words_lost",
    "words_gained",
    "deleted",
    "hyp",
)

FULL = math.inf


# ---------------------------------------------------------------------------
# decoders in the workers
# ---------------------------------------------------------------------------

_DEC_LOCK = threading.Lock()
_DECODERS: dict[tuple[str, str], Any] = {}


def load_factory(spec: str, what: str = "decoder"):
    """The factory named by ``"package.module:function"`` (imported now); ``what`` it
    returns (``"decoder"``, ``"encoder target"``) is named in the errors.

    Examples
    --------
    >>> load_factory("math:sqrt")(4.0)
    2.0
    """
    mod, sep, name = str(spec).partition(":")
    if not sep or not mod or not name:
        raise ParameterError(
            f"found {what} factory {spec!r}, expected MODULE:FACTORY (e.g. "
            f"mypackage.asr:load_{what.split()[0]}, a function taking the bundle and "
            f"returning the {what})"
        )
    try:
        module = importlib.import_module(mod)
    except ImportError as exc:
        raise ParameterError(
            f"found no importable module {mod!r} ({exc}), expected the module of the {what} "
            f"factory {spec!r}; put it on PYTHONPATH or install its package"
        ) from None
    try:
        return getattr(module, name)
    except AttributeError:
        raise ParameterError(
            f"found no {name!r} in module {mod!r}, expected the {what} factory there; "
            f"check the name after ':' in {spec!r}"
        ) from None


def _resolve(spec, bundle: Bundle):
    """The decoder object: ``spec`` itself, or ``FACTORY(bundle)`` for a string spec
    (built once per process and bundle)."""
    if not isinstance(spec, str):
        return spec
    key = (spec, str(bundle.path))
    with _DEC_LOCK:
        dec = _DECODERS.get(key)
        if dec is None:
            dec = load_factory(spec)(bundle)
            check_decoder(dec)
            _DECODERS.clear()
            _DECODERS[key] = dec
        return dec


# ---------------------------------------------------------------------------
# one utterance (runs inside the workers)
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class _Job:
    path: str
    decoder: Any  # a Decoder, or "module:factory"
    lookaheads: tuple[int, ...]
    mode: str
    triggers: str
    decoder_weight: float
    search_options: dict
    trigger_rule: str = "first"


@dataclass
class _UttOut:
    uid: str
    n_words: int = 0
    audio_s: float = 0.0
    # one entry per look-ahead, full context last: (S, D, I), hyp text, lost, gained,
    # deletion codes
    counts: list[tuple[int, int, int]] = field(default_factory=list)
    hyps: list[str] = field(default_factory=list)
    lost: list[int] = field(default_factory=list)
    gained: list[int] = field(default_factory=list)
    deleted: list[dict] = field(default_factory=list)
    shift_ms: float = float("nan")
    encoder_frames: int = 0
    front_end_ms: float = 0.0
    # per look-ahead (full context left out): frames the tokens wait for past their
    # triggers (summed) and tokens; whether a per-frame encoder right context decided it
    wait_frames: list[int] = field(default_factory=list)
    n_tokens: list[int] = field(default_factory=list)
    per_frame_rc: bool = False
    problem: str | None = None


def _hyp_tokens(job: _Job, utt, udec, eos: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Hypothesis token ids and their trigger frames per look-ahead (full context
    last)."""
    eps: list[int | None] = [*job.lookaheads, None]
    lp = utt.log_probs
    if job.mode == "triggered":
        trig = ctc_triggers(
            lp, blank=utt.blank, source=job.triggers, search_options=job.search_options, utt=utt.id
        )
        out = triggered_decode(
            udec, trig, num_frames=utt.num_frames, lookaheads=eps, eos=eos, blank=utt.blank,
            utt=utt.id,
        )  # fmt: skip
        return [(d.tokens, d.trigger_frames) for d in out]
    from .search import prefix_search

    hyps = []
    for e in eps:
        res = prefix_search(
            lp, blank=utt.blank, decoder=udec, decoder_weight=job.decoder_weight,
            lookahead=e, decoder_eos=eos, trace=False, nbest=1, utt=utt.id,
            **job.search_options,
        )  # fmt: skip
        hyps.append((res.best.tokens, res.best.trigger_frames))
    return hyps


def _token_waits(utt, triggers, lookaheads) -> tuple[list[int], list[int]]:
    """Per look-ahead ``e``: the frames the hypothesis' tokens wait for past their
    triggers, summed (``H(n_u + e) - n_u``; DEVELOPERS.md, "Latency with a per-frame
    right context"), and how many tokens there are."""
    from .streaming import _wait_frames

    ahead, T = utt.encoder_ahead, utt.num_frames
    waits = [
        int(_wait_frames(n, [e], ahead, T, "redecode")[0])
        for n, e in zip(triggers, lookaheads, strict=True)
    ]
    return waits, [len(n) for n in triggers]


def _deletion_codes(utt, alignment, errors, e: int | None, job: _Job) -> dict:
    """Deleted reference words by diagnosis code at look-ahead ``e`` (None: full
    context, where nothing is cut off)."""
    from .diagnosis import diagnose_deletions
    from .streaming import token_windows, trigger_frames, word_reach

    words = None
    if e is not None:
        w = token_windows(
            trigger_frames(alignment, job.trigger_rule),
            num_frames=utt.num_frames,
            clock=utt.clock,
            lookahead=e,
            encoder_lookahead=utt.encoder_ahead,
        )
        words = word_reach(utt, alignment, w)
    diag = diagnose_deletions(utt, alignment, errors, words=words, cut_off=e is not None)
    out: dict[str, int] = {}
    for d in diag:
        out[d.code] = out.get(d.code, 0) + 1
    return out


def _redecode_one(bundle: Bundle, uid: str, job: _Job) -> _UttOut:
    from .align import align_tokens
    from .errors import align_words

    out = _UttOut(uid)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            utt = bundle[uid]
        dec = _resolve(job.decoder, bundle)
        udec = dec.open(utt)
        hyps, trigs = zip(*_hyp_tokens(job, utt, udec, int(dec.eos)), strict=True)
        alignment = align_tokens(utt.log_probs, utt.ref_tokens, utt.blank, utt=uid)
        ref_words = [w for w, _, _ in utt.vocab.words(alignment.tokens)]
        ops_full = None
        per = []
        for e, toks in zip([*job.lookaheads, None], hyps, strict=True):
            hyp_words = [w for w, _, _ in utt.vocab.words(toks)]
            errs = align_words(ref_words, hyp_words)
            codes = _deletion_codes(utt, alignment, errs, e, job) if errs.D else {}
            per.append((errs, hyp_words, codes))
        ops_full = per[-1][0].op_of_ref()
        for errs, hyp_words, codes in per:
            ops = errs.op_of_ref()
            out.counts.append((errs.S, errs.D, errs.I))
            out.hyps.append(" ".join(hyp_words))
            out.lost.append(sum(f == "C" and o != "C" for f, o in zip(ops_full, ops, strict=True)))
            out.gained.append(
                sum(f != "C" and o == "C" for f, o in zip(ops_full, ops, strict=True))
            )
            out.deleted.append(codes)
        out.n_words = len(ref_words)
        out.audio_s = utt.duration_s
        out.shift_ms = utt.clock.frame_shift_s * 1000
        enc = utt.encoder_lookahead
        out.encoder_frames = int(enc[0] * enc[1]) if enc else 0
        out.front_end_ms = utt.clock.right_context_s * 1000
        out.wait_frames, out.n_tokens = _token_waits(utt, trigs[:-1], job.lookaheads)
        out.per_frame_rc = isinstance(utt.encoder_ahead, np.ndarray)
    except PeekalignError as exc:
        out.problem = _strip_utt(uid, str(exc))
    except Exception as exc:  # the user's decoder or a bug: keep the other utterances
        out.problem = (
            f"{type(exc).__name__} while re-decoding it ({exc}); check the decoder on this "
            "utterance (bundle[id], decoder.open(utt).log_probs(...))"
        )
    return out


def _redecode_batch(job: _Job, ids: Sequence[str]) -> list[_UttOut]:
    """Re-decode a batch of utterances in this process (a worker's unit of work)."""
    bundle = _worker_bundle(job.path)
    return [_redecode_one(bundle, uid, job) for uid in ids]


# ---------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------


@dataclass(eq=False)
class Redecode:
    """Result of :func:`redecode`.

    Attributes
    ----------
    table : Table
        One row per look-ahead (:data:`REDECODE_COLUMNS`), then the full-context row
        (``lookahead_frames`` and ``latency_ms`` inf). ``wer`` is a fraction;
        ``words_lost`` / ``words_gained`` count reference words correct at full context
        but not at this look-ahead / the other way round; ``wer_delta`` is ``wer`` minus
        full context's, with its paired-bootstrap interval ``wer_delta_low`` /
        ``wer_delta_high``; ``del_<code>`` count deleted words by diagnosis code at this
        look-ahead (``cut-off`` from the reach margin at this look-ahead; ``pruned``
        is not diagnosed here), ``del_other`` the rest.
    utterances : Table
        One row per utterance and look-ahead (``lookahead_frames`` inf for full
        context): counts, ``deleted`` (codes as ``code:n`` pairs) and ``hyp``.
    problems : list of Problem
    mode : str
    lookaheads : tuple of int
    errors : ndarray, shape (E + 1, n)
        Errors (S + D + I) per look-ahead (full context last) and good utterance.
    words : ndarray, shape (n,)
        Reference words per good utterance.
    ids : list of str
        The good utterances, in manifest order.
    stats : dict
        ``workers``, ``batches``, ``elapsed_s``, ``audio_s``, ``rtf`` (per look-ahead:
        elapsed / audio / (E + 1)), ``n_resamples``, ``seed``, ``confidence``.
    """

    table: Table
    utterances: Table
    problems: list[Problem]
    mode: str
    lookaheads: tuple[int, ...]
    errors: np.ndarray
    words: np.ndarray
    ids: list[str]
    stats: dict = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return not self.problems

    def hyps(self) -> list[dict]:
        """``{"id", "lookahead_frames", "hyp"}`` per utterance and look-ahead
        (``lookahead_frames`` None for full context)."""
        return [
            {
                "id": r["id"],
                "lookahead_frames": None
                if r["lookahead_frames"] == FULL
                else r["lookahead_frames"],
                "hyp": r["hyp"],
            }
            for r in self.utterances
        ]

    def write_csv(self, path: str | os.PathLike, *, overwrite: bool = False) -> Path:
        """Write :attr:`table` as CSV (``inf`` in the full-context row)."""
        return self.table.write_csv(path, overwrite=overwrite)

    def write_hyps(self, path: str | os.PathLike, *, overwrite: bool = False) -> Path:
        """Write the hypotheses as JSON lines ``{"id", "lookahead_frames", "hyp"}``
        (``lookahead_frames`` null for full context)."""
        from .io.atomic import atomic_write

        with atomic_write(path, overwrite=overwrite, encoding="utf-8") as f:
            for h in self.hyps():
                f.write(json.dumps(h, ensure_ascii=False) + "\n")
        return Path(path)

    def recommend(
        self,
        *,
        tolerance: float = DEFAULT_TOLERANCE,
        confidence: float = 0.95,
        n_resamples: int | None = None,
        seed: int | None = None,
    ) -> Recommendation:
        """The smallest look-ahead whose WER is within ``tolerance`` of full context's
        at the upper bound of the paired-bootstrap interval.

        ``tolerance`` is absolute (0.005 = 0.5 WER points). The interval resamples
        utterances (:func:`peekalign.significance.paired_bootstrap`).

        Examples
        --------
        See :func:`redecode`.
        """
        tolerance = _check_tolerance(tolerance)
        n_res = (
            self.stats.get("n_resamples", DEFAULT_RESAMPLES)
            if n_resamples is None
            else n_resamples
        )
        seed = self.stats.get("seed", 0) if seed is None else seed
        n = len(self.ids)
        how = f"paired bootstrap over {n} utterances, {n_res} resamples, seed {seed}"
        rule = measured_rule(tolerance, confidence, how)
        if n == 0 or not self.words.sum():
            return Recommendation(None, "measured WER", rule + "; no scored utterance")
        lat = self.table["latency_ms"]
        for j, e in enumerate(self.lookaheads):
            iv = paired_bootstrap(
                self.errors[-1], self.errors[j], self.words, level=confidence,
                resamples=n_res, seed=seed,
            )  # fmt: skip
            if iv.hi <= tolerance + 1e-12:
                return Recommendation(int(e), "measured WER", rule, float(lat[j]), iv)
        return Recommendation(
            None, "measured WER", rule + f"; none up to {self.lookaheads[-1]} frames qualifies"
        )

    def __repr__(self) -> str:
        full = self.table.rows[-1] if len(self.table) else None
        w = f"{full[2]:.4f}" if full else "-"
        return (
            f"Redecode(mode={self.mode!r}, lookaheads={list(self.lookaheads)}, "
            f"utterances={len(self.ids)}, full-context WER {w}, problems={len(self.problems)})"
        )


def read_redecode_csv(path: str | os.PathLike) -> Table:
    """Read back the per-look-ahead table ``redecode --csv`` (``Redecode.write_csv``)
    wrote: numbers as floats, ``inf`` in the full-context row, the last row.

    Examples
    --------
    >>> import tempfile
    >>> p = tempfile.mkdtemp() + "/r.csv"
    >>> _ = Table(REDECODE_COLUMNS[:3] + ("wer_delta_high",),
    ...           [(0, 200.0, 0.12, 0.03), (math.inf, math.inf, 0.1, 0.0)]).write_csv(p)
    >>> t = read_redecode_csv(p)
    >>> t["lookahead_frames"].tolist(), t["wer"].tolist()
    ([0.0, inf], [0.12, 0.1])
    """
    import csv

    need = ("lookahead_frames", "latency_ms", "wer", "wer_delta_high")
    where = str(path)
    fix = "pass the CSV that peekalign redecode --csv wrote"
    if not Path(path).is_file():
        raise ParameterError(describe(f"no file at {where!r}", "a redecode CSV", fix))
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    head = rows[0] if rows else []
    missing = [c for c in need if c not in head]
    if missing:
        raise ParameterError(
            describe(
                f"no column(s) {', '.join(missing)}",
                f"a header with {', '.join(need)}",
                fix,
                where=where,
            )
        )
    out = []
    for k, r in enumerate(rows[1:], 2):
        try:
            vals = tuple(float(v) if v != "" else math.nan for v in r)
        except ValueError:
            vals = ()
        if len(vals) != len(head):
            raise ParameterError(
                describe(
                    repr(",".join(r)), f"{len(head)} numbers", fix, where=f"{where}, line {k}"
                )
            )
        out.append(vals)
    e = [v[head.index("lookahead_frames")] for v in out]
    if not out or e[-1] != math.inf or any(not (0 <= x < math.inf) for x in e[:-1]):
        raise ParameterError(
            describe(
                f"look-aheads {e}",
                "frames >= 0, then the full-context row (inf)",
                fix,
                where=where,
            )
        )
    return Table(head, out)


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------


def _check_lookaheads(lookaheads) -> tuple[int, ...]:
    if isinstance(lookaheads, (int, np.integer)) and not isinstance(lookaheads, bool):
        lookaheads = range(int(lookaheads) + 1)
    try:
        vals = list(lookaheads)
    except TypeError:
        vals = None
    bad = (
        vals is None
        or not vals
        or any(isinstance(e, bool) or not isinstance(e, (int, np.integer)) or e < 0 for e in vals)
    )
    if bad:
        raise ParameterError(
            "The 'lookaheads' parameter of redecode must be an int N (0..N) or a non-empty "
            f"sequence of ints >= 0. Got {lookaheads!r} instead."
        )
    return tuple(sorted({int(e) for e in vals}))


def _latency_ms(outs: list[_UttOut], j: int, e: int, front: float) -> float:
    """The latency column at the ``j``-th look-ahead ``e``: the algorithmic look-ahead
    (:func:`peekalign.streaming.latency_budget`), or with per-frame encoder right
    contexts the mean over the hypothesis tokens of what each waits for past its
    trigger (DEVELOPERS.md, "Latency with a per-frame right context"); NaN without a
    frame shift."""
    from .streaming import _mean_wait_ms, latency_budget

    first = outs[0] if outs else None
    if first is None or first.shift_ms != first.shift_ms:
        return float("nan")
    if any(o.per_frame_rc for o in outs):
        waited = sum(o.wait_frames[j] for o in outs)
        return _mean_wait_ms(waited, sum(o.n_tokens[j] for o in outs), first.shift_ms, front)
    return latency_budget(
        frame_shift_ms=first.shift_ms, layers=first.encoder_frames, per_layer=1,
        lookahead=e, front_end_ms=front,
    ).total_ms  # fmt: skip


def _aggregate(outs: list[_UttOut], lookaheads, n_resamples, seed, front_end_ms):
    """The per-look-ahead table, the per-utterance table and the error matrix."""
    E = len(lookaheads) + 1
    words = np.array([o.n_words for o in outs], dtype=np.float64)
    errors = np.array([[sum(o.counts[j]) for o in outs] for j in range(E)], dtype=np.float64)
    errors = errors.reshape(E, len(outs))
    first = outs[0] if outs else None
    front = front_end_ms if front_end_ms is not None else (first.front_end_ms if first else 0.0)
    rows = []
    N = int(words.sum())
    for j in range(E):
        e = lookaheads[j] if j < E - 1 else None
        S, D, I = (int(sum(o.counts[j][k] for o in outs)) for k in range(3))  # noqa: E741
        wer = (S + D + I) / N if N else float("nan")
        codes = {c: int(sum(o.deleted[j].get(c, 0) for o in outs)) for c in DELETION_CODES}
        if e is None:
            lat = FULL
            delta = (0.0, 0.0, 0.0)
        else:
            lat = _latency_ms(outs, j, e, front)
            if N:
                iv = paired_bootstrap(
                    errors[-1], errors[j], words, resamples=n_resamples, seed=seed
                )
                delta = (iv.delta, iv.lo, iv.hi)
            else:
                delta = (float("nan"),) * 3
        rows.append(
            (
                FULL if e is None else e,
                lat,
                wer,
                S,
                D,
                I,
                N,
                int(sum(o.lost[j] for o in outs)),
                int(sum(o.gained[j] for o in outs)),
                *delta,
                *codes.values(),
                D - sum(codes.values()),
            )
        )
    utt_rows = []
    for o in outs:
        for j in range(E):
            e = lookaheads[j] if j < E - 1 else FULL
            dele = " ".join(f"{c}:{n}" for c, n in o.deleted[j].items())
            utt_rows.append(
                (o.uid, e, o.n_words, *o.counts[j], o.lost[j], o.gained[j], dele, o.hyps[j])
            )
    return Table(REDECODE_COLUMNS, rows), Table(UTTERANCE_COLUMNS, utt_rows), errors, words


def redecode(
    bundle,
    decoder,
    *,
    lookaheads=30,
    mode: str = "triggered",
    executor: cf.Executor | None = None,
    workers: int | None = None,
    batch_size: int | None = None,
    ids: Sequence[str] | None = None,
    triggers: str = "greedy",
    decoder_weight: float = 1.0,
    search_options: dict | None = None,
    front_end_ms: float | None = None,
    n_resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
    progress: bool | None = None,
) -> Redecode:
    """Decode every utterance with ``decoder`` at each look-ahead and at full context.

    Parameters
    ----------
    bundle : Bundle or path-like
    decoder : Decoder or str
        A :class:`peekalign.decoder.Decoder`, or ``"module:factory"`` naming a function
        ``factory(bundle) -> Decoder`` that each worker calls once. With a process pool
        a decoder object is pickled to the workers; a factory name avoids that.
    lookaheads : int or sequence of int
        Decoder look-aheads in frames (``N``: 0..N). Full context is always added.
    mode : {"triggered", "joint"}
        Triggered decoding (one decoder token per CTC trigger) or joint decoding (the
        prefix search with the decoder's score, weight ``decoder_weight``).
    executor : concurrent.futures.Executor, optional
        Runs the batches (default: a process pool of ``workers``; ``workers=0`` runs
        in this process).
    workers, batch_size, ids, progress :
        As in :func:`peekalign.scan`.
    triggers : {"greedy", "search"}
        Trigger source of triggered mode: CTC greedy or the prefix search's best
        hypothesis (``search_options``).
    decoder_weight : float
        Weight ``lambda`` of the decoder in joint mode.
    search_options : dict, optional
        Options of :func:`peekalign.search.prefix_search` (e.g. ``{"beam": 8}``).
    front_end_ms : float, optional
        Front-end look-ahead in the latency; default the bundle's (its clock's right
        context). The encoder look-ahead comes from the bundle.
    n_resamples, seed : int
        Paired bootstrap of the WER differences (see :func:`peekalign.significance.paired_bootstrap`).

    Returns
    -------
    Redecode
        Bad utterances (or a decoder failing on them) are listed in ``problems``; the
        others are all in the tables.

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> from peekalign import BundleWriter
    >>> d = tempfile.mkdtemp() + "/b"
    >>> p = np.full((6, 4), 0.01); p[:, 0] = 0.97
    >>> p[1] = [.03, .01, .95, .01]; p[3] = [.03, .95, .01, .01]; p[4] = [.03, .01, .01, .95]
    >>> with BundleWriter(d, vocab=["-", "|", "a", "b"], frame_shift_s=0.04,
    ...                   word_boundary={"kind": "separator", "symbol": "|"}) as w:
    ...     w.add("u1", np.log(p), ref="a b")
    >>> class NeedsFrame3:  # right only once frame 3 is visible, "|" before
    ...     eos = 4
    ...     def open(self, utt):
    ...         return self
    ...     def log_probs(self, prefixes, last_frames):
    ...         out = np.full((len(prefixes), 5), -9.0)
    ...         for b, (pre, end) in enumerate(zip(prefixes, last_frames)):
    ...             out[b, [2, 1, 3][len(pre)] if end >= 3 else 1] = 0.0
    ...         return out
    >>> r = redecode(d, NeedsFrame3(), lookaheads=[0, 3], workers=0, progress=False)
    >>> r.table["wer"].tolist(), r.recommend().lookahead
    ([0.5, 0.0, 0.0], 3)
    """
    fn = "redecode"
    if mode not in MODES:
        raise ParameterError(
            f"The 'mode' parameter of {fn} must be one of {MODES}. Got {mode!r} instead."
        )
    if triggers not in TRIGGER_SOURCES:
        raise ParameterError(
            f"The 'triggers' parameter of {fn} must be one of {TRIGGER_SOURCES}. "
            f"Got {triggers!r} instead."
        )
    eps = _check_lookaheads(lookaheads)
    workers = _check_int("workers", workers, 0, fn)
    batch_size = _check_int("batch_size", batch_size, 1, fn)
    n_resamples = _check_int("n_resamples", n_resamples, 1, fn, none_ok=False)
    seed = _check_int("seed", seed, 0, fn, none_ok=False)
    ok = isinstance(decoder_weight, (int, float)) and not isinstance(decoder_weight, bool)
    if not (ok and math.isfinite(decoder_weight)):
        raise ParameterError(
            f"The 'decoder_weight' parameter of {fn} must be a finite float. "
            f"Got {decoder_weight!r} instead."
        )
    if front_end_ms is not None:
        ok = isinstance(front_end_ms, (int, float)) and not isinstance(front_end_ms, bool)
        if not (ok and math.isfinite(front_end_ms) and front_end_ms >= 0):
            raise ParameterError(
                f"The 'front_end_ms' parameter of {fn} must be a float in the range [0, inf) "
                f"or None (the bundle's). Got {front_end_ms!r} instead."
            )
    _check_executor(executor, fn)
    if not isinstance(bundle, Bundle):
        bundle = open_bundle(bundle)
    # fail here, once, rather than in every worker
    check_decoder(_resolve(decoder, bundle) if isinstance(decoder, str) else decoder, fn)
    path = str(bundle.path.resolve())
    all_ids, problems = _select_ids(bundle, ids)
    n_workers, per, size = _plan_batches(len(all_ids), workers, executor, batch_size)
    job = _Job(
        path, decoder, eps, mode, triggers, float(decoder_weight), dict(search_options or {})
    )
    results, elapsed, _ = _run_batches(
        _redecode_batch, job, _batches(all_ids, size), executor, n_workers, per, progress,
        f"redecode ({mode})", lost=lambda uid, msg: _UttOut(uid, problem=msg),
    )  # fmt: skip
    ordered = [results[u] for u in all_ids]
    good = [o for o in ordered if o.problem is None]
    problems += [Problem(o.uid, o.problem) for o in ordered if o.problem is not None]
    table, utts, errors, words = _aggregate(good, eps, n_resamples, seed, front_end_ms)
    audio_s = float(sum(o.audio_s for o in good))
    stats = {
        "workers": n_workers,
        "batches": math.ceil(len(all_ids) / size) if all_ids else 0,
        "elapsed_s": elapsed,
        "audio_s": audio_s,
        "rtf": elapsed / audio_s / (len(eps) + 1) if audio_s else float("nan"),
        "n_resamples": n_resamples,
        "seed": seed,
        "confidence": 0.95,
        "decoder_weight": float(decoder_weight) if mode == "joint" else None,
        "triggers": triggers if mode == "triggered" else None,
    }
    return Redecode(table, utts, problems, mode, eps, errors, words, [o.uid for o in good], stats)
