"""The four interventions over a bundle: :func:`probe` and its result :class:`Probe`.

Per utterance, with the user's decoder: each reference token's look-ahead need
(:mod:`peekalign.need`) and each deleted word's cause tried by its fix
(:mod:`peekalign.confirm`); with a second dump of the same audio, the two compared
frame by frame (:mod:`peekalign.dumpdiff`); with a torch encoder, its look-ahead
measured on a few utterances (:mod:`peekalign.encoder_probe`). Bad utterances (or a
decoder failing on them) are listed; the others are all in the tables. The need and
the fixes go to any :class:`concurrent.futures.Executor` by id, as in
:func:`peekalign.redecode`; the dump comparison and the encoder run in this process.
"""

from __future__ import annotations

import concurrent.futures as cf
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .confirm import CauseCheck, DecodeSetup, confirm_causes, confirmation_summary
from .corpus import (
    Table,
    _batches,
    _check_executor,
    _check_int,
    _plan_batches,
    _run_batches,
    _select_ids,
    _worker_bundle,
)
from .exceptions import ParameterError, PeekalignError
from .model import Bundle, Problem, open_bundle
from .need import DEFAULT_DELTA, DEFAULT_MAX_LOOKAHEAD, LookaheadNeed, lookahead_need, need_summary

__all__ = ["ENCODER_COLUMNS", "Probe", "probe"]

#: Columns of :meth:`Probe.encoder_table` (one row per measured encoder frame).
ENCODER_COLUMNS = (
    "id",
    "frame",
    "measured_frames",
    "declared_frames",
    "excess_frames",
    "censored",
)


@dataclass(eq=False)
class Probe:
    """Result of :func:`probe`.

    Attributes
    ----------
    needs : list of LookaheadNeed
    checks : list of CauseCheck
    dumps : DumpDiff or None
    encoder : list of (str, EncoderLookahead)
    problems : list of Problem
    setup : DecodeSetup
    max_lookahead : int
    delta : float
    """

    needs: list
    checks: list
    dumps: object | None
    encoder: list
    problems: list
    setup: DecodeSetup
    max_lookahead: int
    delta: float
    notes: list = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def need_table(self) -> Table:
        """Needs per word class at the setup's look-ahead (:func:`need_summary`)."""
        return need_summary(self.needs, lookahead=self.setup.lookahead)

    def token_table(self) -> Table:
        """Every reference token's need (:meth:`LookaheadNeed.rows`)."""
        rows = [r for n in self.needs for r in n.rows()]
        cols = ("id", "token_index", "token", "word", "class", "trigger_frame", "oracle",
                "need_frames", "log_prob_full")  # fmt: skip
        return Table(cols, [tuple(r[c] for c in cols) for r in rows])

    def cause_table(self) -> Table:
        """Per deletion code: the share confirmed (:func:`confirmation_summary`)."""
        return confirmation_summary(self.checks)

    def word_table(self) -> Table:
        """Every deleted word with its code, fix, outcome and the fixes that worked."""
        cols = ("id", "ref_index", "word", "code", "fix", "confirmed", "fixed_by")
        return Table(cols, [tuple(c.as_row()[k] for k in cols) for c in self.checks])

    def encoder_table(self) -> Table:
        """Measured against declared look-ahead of every measured encoder frame."""
        rows = []
        for uid, m in self.encoder:
            decl = m.declared if m.declared is not None else np.full(m.measured.size, -1)
            ex = m.excess if m.declared is not None else np.zeros(m.measured.size, np.int64)
            for i in range(m.measured.size):
                rows.append((uid, i, int(m.measured[i]), int(decl[i]), int(ex[i]),
                             bool(m.censored[i])))  # fmt: skip
        return Table(ENCODER_COLUMNS, rows)

    def __repr__(self) -> str:
        return (
            f"Probe(utterances={len(self.needs)}, tokens={sum(len(n) for n in self.needs)}, "
            f"deleted words={len(self.checks)}, dumps={'yes' if self.dumps else 'no'}, "
            f"encoder utterances={len(self.encoder)}, problems={len(self.problems)})"
        )


@dataclass(frozen=True)
class _Job:
    """What every worker needs to probe an utterance (picklable: no arrays)."""

    path: str
    decoder: Any  # a Decoder, or "module:factory"
    setup: DecodeSetup
    max_lookahead: int
    delta: float
    classes: Any


@dataclass
class _UttOut:
    uid: str
    need: LookaheadNeed | None = None
    checks: list = field(default_factory=list)
    problem: str | None = None


def _probe_one(bundle: Bundle, uid: str, job: _Job) -> _UttOut:
    """One utterance's look-ahead need and its deleted words tried by their fixes."""
    from .redecoding import _resolve

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            utt = bundle[uid]
        decoder = _resolve(job.decoder, bundle)
        need = lookahead_need(
            utt, decoder, max_lookahead=job.max_lookahead, delta=job.delta, classes=job.classes
        )
        return _UttOut(uid, need, confirm_causes(utt, decoder, job.setup))
    except PeekalignError as exc:
        return _UttOut(uid, problem=str(exc))
    except Exception as exc:  # the user's decoder or a bug: keep the others
        return _UttOut(uid, problem=f"{type(exc).__name__} while probing it ({exc})")


def _probe_batch(job: _Job, ids: Sequence[str]) -> list[_UttOut]:
    """Probe a batch of utterances in this process (a worker's unit of work)."""
    bundle = _worker_bundle(job.path)
    return [_probe_one(bundle, uid, job) for uid in ids]


#: ``engine=STREAMED``: the second dump is the encoder replayed on the input as it
#: arrives (:func:`peekalign.encoder_probe.streamed_log_probs`).
STREAMED = "streamed"


def _streamed(target: dict | None):
    if not target or "log_probs" not in target:
        raise ParameterError(
            "found engine='streamed' without an encoder target holding 'log_probs', "
            "expected encoder={'encoder', 'features', 'log_probs', ...} (see "
            "peekalign.encoder_probe.demo_target); or pass a second dump"
        )
    from .encoder_probe import streamed_log_probs

    return lambda utt: streamed_log_probs(target, utt)


def _measure_encoder(bundle, target: dict, ids: Sequence[str], max_input_frames):
    from .encoder_probe import measure_encoder_lookahead

    out, problems = [], []
    for uid in ids:
        try:
            x = np.asarray(target["features"](bundle[uid]))
            if max_input_frames:
                x = x[: int(max_input_frames)]
            m = measure_encoder_lookahead(
                target["encoder"], x, declared=target.get("declared"),
                layers=target.get("layers"), layer_names=target.get("layer_names"),
                subsampling=int(target.get("subsampling", 1)),
                front_end_frames=int(target.get("front_end_frames", 0)),
            )  # fmt: skip
        except Exception as exc:  # the user's encoder: keep the rest
            problems.append(Problem(uid, f"encoder look-ahead not measured: {exc}"))
            continue
        out.append((uid, m))
    return out, problems


def probe(
    bundle,
    decoder,
    *,
    setup: DecodeSetup | None = None,
    max_lookahead: int = DEFAULT_MAX_LOOKAHEAD,
    delta: float = DEFAULT_DELTA,
    classes=None,
    engine=None,
    encoder: dict | None = None,
    encoder_utts: int = 1,
    max_input_frames: int | None = None,
    ids: Sequence[str] | None = None,
    executor: cf.Executor | None = None,
    workers: int | None = None,
    batch_size: int | None = None,
    progress: bool | None = None,
) -> Probe:
    """Run the four interventions over ``bundle`` (see the module notes).

    Parameters
    ----------
    bundle : Bundle or path-like
    decoder : Decoder or str
        The attention decoder (:class:`peekalign.decoder.Decoder`), or
        ``"module:factory"`` naming a function ``factory(bundle) -> Decoder`` that each
        worker calls once (with a process pool a decoder object is pickled to the
        workers; a factory name avoids that).
    setup : DecodeSetup, optional
        How the recognizer decodes (default: triggered at the bundle's decoder
        look-ahead, or 0).
    max_lookahead, delta, classes :
        Of :func:`peekalign.need.lookahead_need`.
    engine : Bundle, path-like, callable or "streamed", optional
        A second dump of the same audio (e.g. the streaming engine's), compared with
        ``bundle`` frame by frame; a function ``utt -> log-probs``; or ``"streamed"``:
        the encoder target replayed on the input as it arrives.
    encoder : dict, optional
        ``encoder``, ``features`` (utt -> (T_in, F)) and optionally ``layers``,
        ``layer_names``, ``declared``, ``subsampling``, ``front_end_frames`` (see
        :func:`peekalign.encoder_probe.demo_target`); measured on the first
        ``encoder_utts`` utterances, their first ``max_input_frames`` input frames.
    ids : sequence of str, optional
    executor : concurrent.futures.Executor, optional
        Runs the batches of utterances (default: a process pool of ``workers``).
    workers : int, optional
        Worker processes (default: one per core; 0 runs in this process). The tables
        are the same whatever the number.
    batch_size, progress :
        As in :func:`peekalign.scan`.

    Returns
    -------
    Probe

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> from peekalign import BundleWriter
    >>> d = tempfile.mkdtemp() + "/b"
    >>> p = np.full((8, 4), 0.01); p[:, 0] = 0.97
    >>> p[1] = [.03, .01, .95, .01]; p[3] = [.03, .95, .01, .01]; p[4:7] = [.03, .01, .01, .95]
    >>> with BundleWriter(d, vocab=["-", "|", "a", "b"], frame_shift_s=0.04,
    ...                   word_boundary={"kind": "separator", "symbol": "|"}) as w:
    ...     w.add("u1", np.log(p), ref="a b")
    >>> class NeedsFrame6:  # "b" only once frame 6 is visible, "|" before
    ...     eos = 4
    ...     def open(self, utt):
    ...         return self
    ...     def log_probs(self, prefixes, last_frames):
    ...         out = np.full((len(prefixes), 5), -9.0)
    ...         for b, (pre, end) in enumerate(zip(prefixes, last_frames)):
    ...             out[b, [2, 1, 3][len(pre)] if len(pre) < 2 or end >= 6 else 1] = 0.0
    ...         return out
    >>> r = probe(d, NeedsFrame6(), setup=DecodeSetup(lookahead=1), workers=0, progress=False)
    >>> r.needs[0].need.tolist(), [(c.word, c.code, c.confirmed) for c in r.checks]
    ([0.0, 0.0, 2.0], [('b', 'cut-off', True)])
    """
    from .decoder import check_decoder
    from .redecoding import _resolve

    fn = "probe"
    workers = _check_int("workers", workers, 0, fn)
    batch_size = _check_int("batch_size", batch_size, 1, fn)
    _check_executor(executor, fn)
    bundle = bundle if isinstance(bundle, Bundle) else open_bundle(bundle)
    # fail here, once, rather than in every worker
    check_decoder(_resolve(decoder, bundle), fn)
    if setup is None:
        setup = DecodeSetup(lookahead=bundle.decoder_lookahead or 0)
    if not isinstance(setup, DecodeSetup):
        raise ParameterError(
            f"The 'setup' parameter of probe must be a DecodeSetup. Got {type(setup).__name__}."
        )
    all_ids, problems = _select_ids(bundle, ids)
    job = _Job(str(bundle.path.resolve()), decoder, setup, int(max_lookahead), delta, classes)
    n_workers, per, size = _plan_batches(len(all_ids), workers, executor, batch_size)
    results, _, _ = _run_batches(
        _probe_batch, job, _batches(all_ids, size), executor, n_workers, per, progress,
        "probe", lost=lambda uid, msg: _UttOut(uid, problem=msg),
    )  # fmt: skip
    ordered = [results[u] for u in all_ids]  # manifest order, whatever the workers did
    needs: list[LookaheadNeed] = [o.need for o in ordered if o.problem is None]
    checks: list[CauseCheck] = [c for o in ordered if o.problem is None for c in o.checks]
    problems += [Problem(o.uid, o.problem) for o in ordered if o.problem is not None]
    dumps = None
    if engine is not None:
        from .dumpdiff import compare_dumps

        if isinstance(engine, str) and engine == STREAMED:
            engine = _streamed(encoder)
        dumps = compare_dumps(bundle, engine, ids=[n.utt for n in needs] or all_ids)
        problems += dumps.problems
    enc: list = []
    if encoder is not None:
        good = [n.utt for n in needs][: max(0, int(encoder_utts))]
        enc, bad = _measure_encoder(bundle, encoder, good, max_input_frames)
        problems += bad
    return Probe(needs, checks, dumps, enc, problems, setup, int(max_lookahead), float(delta))
