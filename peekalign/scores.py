"""Turn whatever a model dumped (log-probs, probabilities or logits) into log-probs."""

from __future__ import annotations

import warnings

import numpy as np

from .exceptions import BundleError, PeekalignWarning, describe

__all__ = ["to_log_probs"]

# A row of log-probs has logsumexp 0; float16 dumps drift by up to ~1e-2.
_LSE_TOL = 0.05
# float32 rounding of a log-sum-exp over a few thousand entries stays below this
_KEEP_TOL = 1e-4


def _logsumexp_rows(x: np.ndarray, top: np.ndarray) -> np.ndarray:
    m = np.where(np.isfinite(top), top, 0.0).astype(x.dtype)
    # one (T, V) temporary, exponentiated in place: a scan runs this on every utterance
    e = np.subtract(x, m)
    np.exp(e, out=e)
    with np.errstate(divide="ignore"):
        return (m + np.log(np.sum(e, axis=1, keepdims=True)))[:, 0]


def to_log_probs(scores, *, utt: str | None = None, warn: bool = True) -> tuple[np.ndarray, str]:
    """Detect what ``scores`` (T, V) holds and return float32 log-probs.

    Rows whose log-sum-exp is ~0 are log-probs (renormalised exactly); rows of
    values in [0, 1] summing to 1 are probabilities (logged); anything else is taken
    as logits (log-softmax). The last two emit a :class:`PeekalignWarning` saying
    what was found.

    Returns
    -------
    log_probs : ndarray, float32, shape (T, V)
    kind : {"log_probs", "probs", "logits"}

    Examples
    --------
    >>> import numpy as np
    >>> lp, kind = to_log_probs(np.array([[0.25, 0.75]]), warn=False)
    >>> kind, np.round(np.exp(lp), 2).tolist()
    ('probs', [[0.25, 0.75]])
    """
    x, top = _checked_scores(scores, utt)
    lse = _logsumexp_rows(x, top)
    drift = np.abs(lse)
    if np.all(drift < _LSE_TOL):
        # float32 log-softmax output is kept bit for bit; only visibly drifted rows
        # (float16 dumps) are renormalised
        if drift.max() <= _KEEP_TOL:
            return (x.copy() if x is scores else x), "log_probs"
        if x is scores or x.base is not None:  # the caller's memory: leave it alone
            return x - lse[:, None], "log_probs"
        # x is our own float32 conversion: renormalise it in place
        return np.subtract(x, lse[:, None], out=x), "log_probs"
    if x.min() >= 0 and x.max() <= 1 and np.all(np.abs(x.sum(axis=1) - 1) < 1e-2):
        kind = "probs"
        with np.errstate(divide="ignore"):
            out = np.log(x / x.sum(axis=1, keepdims=True))
    else:
        kind = "logits"
        if np.isneginf(x).all(axis=1).any():
            raise BundleError(
                describe(
                    "a frame whose scores are all -inf",
                    "at least one finite score a frame",
                    "check the dump",
                    utt=utt,
                ),
                utt=utt,
            )
        out = x - lse[:, None]
    if warn:
        where = f"utt {utt!r}: " if utt is not None else ""
        what = (
            "probabilities (rows sum to 1)" if kind == "probs" else "logits (rows not normalised)"
        )
        warnings.warn(
            f"{where}log_probs holds {what}; normalised to log-probs. Dump log_softmax "
            "output to skip this step.",
            PeekalignWarning,
            stacklevel=2,
        )
    return out.astype(np.float32), kind


def _checked_scores(scores, utt: str | None) -> tuple[np.ndarray, np.ndarray]:
    """``scores`` as a float32 (T, V) array with no NaN or +inf, and each row's maximum."""
    x = np.asarray(scores)
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise BundleError(
            describe(
                f"log_probs of shape {x.shape}",
                "a non-empty 2-D array (T, V)",
                "dump one (frames, vocabulary) matrix per utterance",
                utt=utt,
            ),
            utt=utt,
        )
    if not np.issubdtype(x.dtype, np.floating):
        raise BundleError(
            describe(
                f"log_probs of dtype {x.dtype}",
                "floating-point scores",
                "dump the model's float output",
                utt=utt,
            ),
            utt=utt,
        )
    # float32 throughout: a row's log-sum-exp needs no more, and a test set's worth of
    # (T, V) matrices goes through here
    x = np.asarray(x, dtype=np.float32)
    top = x.max(axis=1, keepdims=True)  # NaN or +inf anywhere shows up here, in one pass
    bad = np.isnan(x) | np.isposinf(x) if not np.isfinite(top).all() else None
    if bad is not None and bad.any():
        t, k = np.argwhere(bad)[0]
        raise BundleError(
            describe(
                f"{int(bad.sum())} NaN/+inf values in log_probs (first at frame {t}, token {k})",
                "finite scores",
                "fix the model's output (overflow, division by zero) and dump again",
                utt=utt,
            ),
            utt=utt,
        )
    return x, top
