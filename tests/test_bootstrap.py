"""peekalign.bootstrap: seeded, reproducible, and in agreement with scipy's bootstrap."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import require

from peekalign import ParameterError
from peekalign.bootstrap import rate_difference_interval, rate_interval


def _data(rng, n=60):
    words = rng.integers(3, 25, size=n).astype(float)
    a = rng.binomial(words.astype(int), 0.12).astype(float)
    b = np.maximum(a - rng.binomial(words.astype(int), 0.04), 0).astype(float)
    return a, b, words


def test_fixed_seed_reproduces_and_other_seeds_move_a_little(rng):
    a, b, w = _data(rng)
    one = rate_difference_interval(a, b, w, seed=7)
    # reference: hand-worked (same seed, same generator, same draws)
    assert one == rate_difference_interval(a, b, w, seed=7)
    other = rate_difference_interval(a, b, w, seed=8)
    assert other.estimate == one.estimate
    assert other.high != one.high and abs(other.high - one.high) < 0.01
    assert one.low < one.estimate < one.high
    # reference: hand-worked (ratio of sums)
    assert one.estimate == pytest.approx((a.sum() - b.sum()) / w.sum())


def test_agrees_with_scipy_percentile_bootstrap(rng):
    stats = require("scipy.stats")
    a, b, w = _data(rng, n=80)

    def paired_delta(x, y, n, axis=-1):
        return (x.sum(axis=axis) - y.sum(axis=axis)) / n.sum(axis=axis)

    def rate(x, n, axis=-1):
        return x.sum(axis=axis) / n.sum(axis=axis)

    R = 4000
    ours = rate_difference_interval(a, b, w, n_resamples=R, seed=1)
    ref = stats.bootstrap(
        (a, b, w), paired_delta, paired=True, vectorized=True, n_resamples=R,
        method="percentile", confidence_level=0.95, random_state=np.random.default_rng(2),
    ).confidence_interval  # fmt: skip
    width = ref.high - ref.low
    # reference: scipy.stats.bootstrap (percentile, paired); equal within resampling noise
    assert ours.low == pytest.approx(ref.low, abs=0.08 * width)
    assert ours.high == pytest.approx(ref.high, abs=0.08 * width)
    one = rate_interval(a, w, n_resamples=R, seed=1)
    ref1 = stats.bootstrap(
        (a, w), rate, paired=True, vectorized=True, n_resamples=R, method="percentile",
        random_state=np.random.default_rng(3),
    ).confidence_interval  # fmt: skip
    width1 = ref1.high - ref1.low
    assert one.low == pytest.approx(ref1.low, abs=0.08 * width1)
    assert one.high == pytest.approx(ref1.high, abs=0.08 * width1)


def test_identical_systems_give_a_zero_interval(rng):
    a, _, w = _data(rng)
    iv = rate_difference_interval(a, a, w, n_resamples=300)
    # reference: hand-worked (every resampled difference is 0)
    assert (iv.estimate, iv.low, iv.high) == (0.0, 0.0, 0.0)


def test_bad_input():
    with pytest.raises(ParameterError, match="'words'"):
        rate_interval([1, 2], [3])
    with pytest.raises(ParameterError, match="NaN or inf"):
        rate_difference_interval([1, np.nan], [1, 1], [2, 2])
    with pytest.raises(ParameterError, match="'confidence'"):
        rate_interval([1], [2], confidence=95)
    with pytest.raises(ParameterError, match="'n_resamples'"):
        rate_interval([1], [2], n_resamples=0)
