"""Shared test helpers.

``require(name)`` imports an optional reference library. Outside CI a missing one
skips the test; under CI (env ``CI`` set) it fails, so a reference can never drop
out of the suite silently.
"""

from __future__ import annotations

import importlib
import os
import shutil

import numpy as np
import pytest


def require(name: str):
    """Import module ``name`` or skip (locally) / fail (under CI)."""
    try:
        return importlib.import_module(name)
    except ImportError as exc:  # pragma: no cover - depends on the machine
        if os.environ.get("CI"):
            pytest.fail(f"reference library {name!r} is missing under CI: {exc}")
        pytest.skip(f"reference library {name!r} not installed")  # intended: CI fails instead


def require_program(path: str) -> str:
    """Return ``path`` if that program exists, else skip (locally) / fail (under CI)."""
    found = shutil.which(path) or (path if os.path.exists(path) else None)
    if found is None:  # pragma: no cover - depends on the machine
        if os.environ.get("CI"):
            pytest.fail(f"reference program {path!r} is missing under CI")
        pytest.skip(f"reference program {path!r} not installed")  # intended: CI fails instead
    return found


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261202)


def random_log_probs(rng: np.random.Generator, T: int, V: int, *, peaky: float = 0.0):
    """Random (T, V) log-softmax rows; ``peaky`` > 0 sharpens them."""
    logits = rng.normal(size=(T, V)) * (1.0 + peaky)
    logits -= logits.max(axis=1, keepdims=True)
    return (logits - np.log(np.exp(logits).sum(axis=1, keepdims=True))).astype(np.float32)


def prefix_words(vocab, trace, p) -> str:
    """The words of search prefix ``p``, read back through the trace's parent links."""
    toks = []
    j = int(p)
    while j > 0:
        toks.append(int(trace.token[j]))
        j = int(trace.parent[j])
    return " ".join(w for w, _, _ in vocab.words(toks[::-1]))


def ctc_collapse(path, blank) -> list:
    """The CTC many-to-one map B: merge repeats, then drop blanks (Graves et al., 2006)."""
    out = []
    prev = None
    for k in path:
        if k != prev and k != blank:
            out.append(k)
        prev = k
    return out
