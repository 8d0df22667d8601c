"""The paired bootstrap behind the look-ahead recommendation, against scipy."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import require

from peekalign.significance import paired_bootstrap


def _data(rng, n=80):
    words = rng.integers(3, 25, size=n)
    a = rng.binomial(words, 0.12).astype(float)
    b = np.maximum(a - rng.binomial(words, 0.04), 0).astype(float)
    return a, b, words.astype(float)


def test_paired_difference_reproducible_and_agrees_with_scipy(rng):
    stats = require("scipy.stats")
    a, b, w = _data(rng)
    R = 4000
    ours = paired_bootstrap(a, b, w, resamples=R, seed=1)
    # reference: hand-worked (same seed, same draws; the observed difference of ratios)
    assert ours == paired_bootstrap(a, b, w, resamples=R, seed=1)
    assert ours.delta == pytest.approx((b.sum() - a.sum()) / w.sum())

    def delta(x, y, n, axis=-1):
        return (y.sum(axis=axis) - x.sum(axis=axis)) / n.sum(axis=axis)

    ref = stats.bootstrap(
        (a, b, w), delta, paired=True, vectorized=True, n_resamples=R, method="percentile",
        confidence_level=0.95, random_state=np.random.default_rng(2),
    ).confidence_interval  # fmt: skip
    width = ref.high - ref.low
    # reference: scipy.stats.bootstrap (percentile, paired); equal within resampling noise
    assert ours.lo == pytest.approx(ref.low, abs=0.08 * width)
    assert ours.hi == pytest.approx(ref.high, abs=0.08 * width)


def test_identical_systems_give_a_zero_interval(rng):
    a, _, w = _data(rng)
    iv = paired_bootstrap(a, a, w, resamples=300)
    # reference: hand-worked (every resampled difference is 0)
    assert (iv.delta, iv.lo, iv.hi) == (0.0, 0.0, 0.0)
