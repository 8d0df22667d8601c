"""Two dumps of the same audio compared frame by frame.

The offline dump of a streaming model (one masked pass over the whole utterance) and
what the streaming engine computes with its caches should be the same numbers. Where
they are not, every streaming figure measured on the dump is wrong for the device.
:func:`compare_dumps` pairs the utterances of two bundles by id and compares their CTC
posteriors frame by frame (DEVELOPERS.md, "Dump against engine"): the KL divergence of
the frame's posteriors, whether the greedy (arg-max) labels agree, and the first frame
where the two part.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from .corpus import Table
from .exceptions import ParameterError, PeekalignError
from .model import Bundle, Problem, Utterance, open_bundle

__all__ = [
    "DEFAULT_KL_TOL",
    "DUMP_COLUMNS",
    "DumpDiff",
    "FrameDiff",
    "compare_dumps",
    "frame_diff",
]

#: KL divergence (nats) above which a frame counts as parted.
DEFAULT_KL_TOL = 1e-3


@dataclass(frozen=True, eq=False)
class FrameDiff:
    """One utterance of two dumps compared frame by frame.

    Attributes
    ----------
    utt : str
    kl : ndarray of float64, shape (T,)
        ``KL(a || b) = sum_k p_a(k) (log p_a(k) - log p_b(k))`` per frame, in nats.
    agree : ndarray of bool, shape (T,)
        The two arg-max labels are the same.
    first_kl_frame : int
        First frame with ``kl > kl_tol`` (-1: none).
    first_label_frame : int
        First frame whose arg-max labels differ (-1: none).
    same_text : bool
        The greedy (collapsed) token sequences are equal.
    kl_tol : float
    """

    utt: str
    kl: np.ndarray
    agree: np.ndarray
    first_kl_frame: int
    first_label_frame: int
    same_text: bool
    kl_tol: float

    @property
    def part_frame(self) -> int:
        """First frame where the dumps part (KL above tolerance or labels differ); -1:
        they never do."""
        f = [x for x in (self.first_kl_frame, self.first_label_frame) if x >= 0]
        return min(f) if f else -1

    @property
    def agreement(self) -> float:
        """Share of frames whose arg-max labels agree."""
        return float(self.agree.mean()) if self.agree.size else 1.0

    def __repr__(self) -> str:
        return (
            f"FrameDiff(utt={self.utt!r}, frames={self.kl.size}, mean KL={self.kl.mean():.3g}, "
            f"agreement={self.agreement:.3f}, part_frame={self.part_frame})"
        )


def _log_softmax(x: np.ndarray) -> np.ndarray:
    m = x.max(axis=1, keepdims=True)
    return x - m - np.log(np.exp(x - m).sum(axis=1, keepdims=True))


def frame_diff(
    a, b, *, blank: int = 0, kl_tol: float = DEFAULT_KL_TOL, utt: str = ""
) -> FrameDiff:
    """Compare two (T, V) log-posterior arrays of one utterance frame by frame.

    Both are renormalised (log-softmax) first, so logits compare as posteriors.

    Examples
    --------
    >>> import numpy as np
    >>> a = np.log(np.array([[.9, .1], [.2, .8], [.6, .4]]))
    >>> b = a[[0, 2, 1]]                       # frames 1 and 2 swapped
    >>> d = frame_diff(a, b)
    >>> d.part_frame, d.agree.tolist(), round(float(d.kl[0]), 12)
    (1, [True, False, False], 0.0)
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.ndim != 2 or a.shape != b.shape:
        raise ParameterError(
            f"utt {utt!r}: found posteriors of shapes {a.shape} and {b.shape}, expected the "
            "same (T, V) in both dumps; dump the same audio with the same front end and vocabulary"
        )
    la, lb = _log_softmax(a), _log_softmax(b)
    pa = np.exp(la)
    with np.errstate(invalid="ignore"):
        terms = np.where(pa > 0, pa * (la - lb), 0.0)
    kl = np.maximum(terms.sum(axis=1), 0.0)  # >= 0; rounding can leave -1e-17
    ga, gb = la.argmax(axis=1), lb.argmax(axis=1)
    agree = ga == gb
    over = np.flatnonzero(kl > kl_tol)
    differ = np.flatnonzero(~agree)

    def collapse(g):
        keep = np.ones(g.size, bool)
        keep[1:] = g[1:] != g[:-1]
        g = g[keep]
        return g[g != blank]

    return FrameDiff(
        utt=utt,
        kl=kl,
        agree=agree,
        first_kl_frame=int(over[0]) if over.size else -1,
        first_label_frame=int(differ[0]) if differ.size else -1,
        same_text=bool(np.array_equal(collapse(ga), collapse(gb))),
        kl_tol=float(kl_tol),
    )


#: Columns of :attr:`DumpDiff.table` (one row per utterance).
DUMP_COLUMNS = (
    "id",
    "frames",
    "kl_mean",
    "kl_max",
    "kl_max_frame",
    "agreement",
    "first_kl_frame",
    "first_label_frame",
    "part_frame",
    "part_s",
    "same_text",
)


@dataclass(eq=False)
class DumpDiff:
    """Result of :func:`compare_dumps`.

    Attributes
    ----------
    table : Table
        One row per utterance in both dumps (:data:`DUMP_COLUMNS`; frames -1 where
        none; ``part_s`` the time of the part frame's centre, NaN when none).
    diffs : list of FrameDiff
    problems : list of Problem
        Utterances in one dump only, or not comparable (frame counts differ, ...).
    kl_tol : float
    """

    table: Table
    diffs: list
    problems: list = field(default_factory=list)
    kl_tol: float = DEFAULT_KL_TOL

    def totals(self) -> dict:
        """The set: ``utterances``, ``frames``, ``kl_mean`` (over all frames),
        ``agreement`` (share of frames), ``parted`` (utterances that part),
        ``same_text`` (utterances with the same greedy tokens)."""
        n = sum(d.kl.size for d in self.diffs)
        kl = float(sum(d.kl.sum() for d in self.diffs) / n) if n else float("nan")
        agree = float(sum(d.agree.sum() for d in self.diffs) / n) if n else float("nan")
        return {
            "utterances": len(self.diffs),
            "frames": n,
            "kl_mean": kl,
            "agreement": agree,
            "parted": sum(d.part_frame >= 0 for d in self.diffs),
            "same_text": sum(d.same_text for d in self.diffs),
        }

    def __repr__(self) -> str:
        t = self.totals()
        return (
            f"DumpDiff(utterances={t['utterances']}, parted={t['parted']}, "
            f"mean KL={t['kl_mean']:.3g}, agreement={t['agreement']:.4f}, "
            f"problems={len(self.problems)})"
        )


def _load(bundle: Bundle, uid: str) -> Utterance:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return bundle[uid]


def compare_dumps(a, b, *, kl_tol: float = DEFAULT_KL_TOL, ids=None) -> DumpDiff:
    """Compare two dumps of the same audio, utterance by utterance and frame by frame.

    Parameters
    ----------
    a, b : Bundle or path-like
        E.g. the offline (masked full-sequence) dump and the streaming engine's.
        ``b`` may also be a function ``utt -> (T, V) log-probs`` computing the second
        dump of each utterance of ``a`` (e.g.
        :func:`peekalign.encoder_probe.streamed_log_probs`).
    kl_tol : float
        KL divergence in nats above which a frame counts as parted (default
        :data:`DEFAULT_KL_TOL`).
    ids : sequence of str, optional
        Only these utterances (default: every id of ``a``).

    Returns
    -------
    DumpDiff

    Examples
    --------
    >>> d = compare_dumps("full", "full")
    >>> d.totals()["kl_mean"], d.totals()["parted"]
    (0.0, 0)
    """
    if not (isinstance(kl_tol, (int, float)) and not isinstance(kl_tol, bool)) or not (
        math.isfinite(kl_tol) and kl_tol >= 0
    ):
        raise ParameterError(
            "The 'kl_tol' parameter of compare_dumps must be a float in the range [0, inf) "
            f"(nats). Got {kl_tol!r} instead."
        )
    a = a if isinstance(a, Bundle) else open_bundle(a)
    compute = b if callable(b) and not isinstance(b, Bundle) else None
    b = a if compute is not None else b if isinstance(b, Bundle) else open_bundle(b)
    problems = [] if compute else [Problem(u, f"second dump: {m}") for u, m in b.manifest_problems]
    problems += [Problem(u, f"first dump: {m}") for u, m in a.manifest_problems]
    wanted = list(a.ids) if ids is None else list(ids)
    diffs, rows = [], []
    for uid in wanted:
        if uid not in a or uid not in b:
            where = "the first" if uid in a else "the second" if uid in b else "neither"
            problems.append(
                Problem(uid, f"only in {where} dump; expected in both (dump the same ids)")
            )
            continue
        try:
            ua = _load(a, uid)
            lb = compute(ua) if compute is not None else _load(b, uid).log_probs
            d = frame_diff(ua.log_probs, lb, blank=ua.blank, kl_tol=kl_tol, utt=uid)
        except PeekalignError as exc:
            problems.append(Problem(uid, str(exc)))
            continue
        except Exception as exc:  # a user's engine function: keep the others
            problems.append(
                Problem(uid, f"{type(exc).__name__} computing the second dump ({exc})")
            )
            continue
        diffs.append(d)
        pf = d.part_frame
        rows.append(
            (
                uid, int(d.kl.size), float(d.kl.mean()) if d.kl.size else 0.0,
                float(d.kl.max()) if d.kl.size else 0.0,
                int(d.kl.argmax()) if d.kl.size else -1, d.agreement, d.first_kl_frame,
                d.first_label_frame, pf, float(ua.clock.time(pf)) if pf >= 0 else float("nan"),
                d.same_text,
            )
        )  # fmt: skip
    return DumpDiff(Table(DUMP_COLUMNS, rows), diffs, problems, float(kl_tol))
