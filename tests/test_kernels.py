"""The compiled CTC kernels' fast paths against brute force and the plain paths."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from conftest import ctc_collapse, random_log_probs, require

from peekalign import ParameterError, _kernels, align_tokens, forward_backward
from peekalign import align as _align
from peekalign.align import extend_labels, required_frames


def _state_path(labels, tokens, blank):
    """Extended-state index per frame of a label path that collapses to ``tokens``."""
    states, u, prev = [], -1, None
    for k in labels:
        if k == blank:
            states.append(2 * (u + 1))
        else:
            if k != prev:
                u += 1
            states.append(2 * u + 1)
        prev = k
    return states


def _random_case(rng, max_t=7, max_v=4):
    while True:
        T = int(rng.integers(1, max_t + 1))
        V = int(rng.integers(2, max_v + 1))
        U = int(rng.integers(0, 4))
        blank = int(rng.integers(0, V))
        choices = [k for k in range(V) if k != blank]
        tokens = [int(t) for t in rng.choice(choices, size=U)] if U else []
        if U >= 2 and rng.random() < 0.4:
            tokens[1] = tokens[0]
        if required_frames(tokens)[0] <= T and V**T <= 20000:
            return random_log_probs(rng, T, V, peaky=float(rng.choice([0, 3]))), tokens, blank


def test_occupancy_equals_brute_force_marginals(rng):
    # reference: brute-force enumeration; gamma[t, s] is the posterior mass of the
    # paths that sit in extended state s at frame t (Graves et al., 2006, eq. 14)
    for _ in range(40):
        lp, tokens, blank = _random_case(rng)
        lp = lp.astype(np.float64)
        T, V = lp.shape
        S = 2 * len(tokens) + 1
        gamma = np.zeros((T, S))
        for path in itertools.product(range(V), repeat=T):
            if ctc_collapse(path, blank) == tokens:
                p = np.exp(sum(lp[t, k] for t, k in enumerate(path)))
                for t, s in enumerate(_state_path(path, tokens, blank)):
                    gamma[t, s] += p
        gamma /= gamma.sum(axis=1, keepdims=True)
        got = forward_backward(lp, tokens, blank, floor=0.0).dense_states()
        np.testing.assert_allclose(got, gamma, atol=1e-9)


def test_checkpointed_viterbi_equals_brute_force(rng, monkeypatch):
    # reference: brute-force maximum over all label paths; a zero budget forces the
    # checkpointed pass (score columns every K frames, backpointers per segment)
    monkeypatch.setattr(_align, "_BP_BUDGET", 0)
    monkeypatch.setattr(_align, "_checkpoint_interval", lambda T: max(1, T // 3))
    for _ in range(80):
        lp, tokens, blank = _random_case(rng)
        T, V = lp.shape
        best = max(
            (
                sum(float(lp[t, k]) for t, k in enumerate(path))
                for path in itertools.product(range(V), repeat=T)
                if ctc_collapse(path, blank) == tokens
            ),
        )
        a = align_tokens(lp, tokens, blank)
        assert a.score == pytest.approx(best, abs=1e-9)
        assert ctc_collapse(a.frame_labels().tolist(), blank) == tokens


@pytest.mark.parametrize("scaled", [False, True])
@pytest.mark.parametrize("interval", [1, 2, 7, 50, 399])
def test_checkpointed_occupancy_is_bit_identical(rng, interval, scaled):
    # reference: the same kernel with every alpha row kept (interval 0); recomputing a
    # segment from its checkpoint repeats the same operations, so every kept value,
    # the blank occupancy, the token maxima and log P are bit-identical
    T, V = 400, 12
    blank = int(rng.integers(0, V))
    lp = random_log_probs(rng, T, V, peaky=2.0)
    tokens = rng.choice([k for k in range(V) if k != blank], size=120)
    tokens[5] = tokens[4]
    cols, idx, pen = _align._trellis(tokens, blank)
    if scaled:
        kernel, arg = _kernels.occupancy_scaled, (pen == 0).astype(float)
    else:
        kernel, arg = _kernels.occupancy_sparse, pen
    full = kernel(lp, _align._NO_TABLE, cols, idx, arg, 0, 0.0, np.inf)
    part = kernel(lp, _align._NO_TABLE, cols, idx, arg, interval, 0.0, np.inf)
    if scaled:
        assert full[0] and part[0]  # the scaled result is good on this input
        full, part = full[2:], part[2:]
    assert full[0] == part[0] and full[1] == part[1]
    n = full[1]
    for a, b in zip(full[2:5], part[2:5], strict=True):
        np.testing.assert_array_equal(a[:n], b[:n])
    np.testing.assert_array_equal(full[5], part[5])
    np.testing.assert_array_equal(full[6], part[6])


def test_long_input_takes_the_checkpointed_path(rng, monkeypatch):
    # reference: the plain pass (every row kept, the whole band computed; itself equal
    # to brute force and torch above) for the budgeted one, which checkpoints and
    # carries only the states within PRUNE_NATS (200) of each frame's best: what it
    # leaves out weighs e^-200 ~ 1e-87 (DEVELOPERS.md, "State occupancy"); entries
    # agree to 1e-12 relative or 1e-30 absolute (the tiniest shift by the pruned paths)
    calls = []
    real = _kernels.occupancy_scaled

    def spy(*args):
        calls.append(args[5])
        return real(*args)

    monkeypatch.setattr(_kernels, "occupancy_scaled", spy)
    lp = random_log_probs(rng, 300, 9, peaky=2.0)
    tokens = rng.integers(1, 9, size=50)
    plain = forward_backward(lp, tokens, floor=0.0)
    monkeypatch.setattr(_align, "_FB_BUDGET", 0)
    ck = forward_backward(lp, tokens, floor=0.0)
    assert calls == [0, int(np.sqrt(300))]
    np.testing.assert_allclose(ck.dense_states(), plain.dense_states(), rtol=1e-12, atol=1e-30)
    assert ck.log_likelihood == pytest.approx(plain.log_likelihood, rel=1e-14)
    np.testing.assert_allclose(ck.blank_occupancy, plain.blank_occupancy, rtol=1e-12)
    # and on long peaky input, where the pruning leaves out most of the band
    from bench import synth

    tokens, lp = synth.utterance_arrays(np.random.default_rng(3), 3000, 500, 200)
    monkeypatch.setattr(_align, "_FB_BUDGET", 1 << 40)
    plain = forward_backward(lp, tokens, floor=0.0)
    monkeypatch.setattr(_align, "_FB_BUDGET", 0)
    ck = forward_backward(lp, tokens, floor=0.0)
    assert ck.values.size < plain.values.size  # the pruned states were not computed
    assert ck.log_likelihood == pytest.approx(plain.log_likelihood, rel=1e-14)
    np.testing.assert_allclose(ck.dense_states(), plain.dense_states(), rtol=1e-12, atol=1e-30)


def test_occupancy_floor_drops_only_small_entries(rng):
    # reference: the floor-0 occupancy of the same input (DEVELOPERS.md, "State
    # occupancy": entries at or below the floor are not stored, the rest unchanged)
    lp = random_log_probs(rng, 200, 15, peaky=3.0)
    tokens = rng.integers(1, 15, size=40)
    exact = forward_backward(lp, tokens, floor=0.0)
    kept = forward_backward(lp, tokens, floor=1e-4)
    d0, d1 = exact.dense_states(), kept.dense_states()
    big = d0 > 1e-4
    np.testing.assert_array_equal(d1[big], d0[big])
    assert not d1[~big].any() and (~big & (d0 > 0)).any()  # something was dropped
    assert kept.values.size < exact.values.size
    np.testing.assert_array_equal(kept.blank_occupancy, exact.blank_occupancy)
    np.testing.assert_array_equal(kept.confidence(), d0[:, 1::2].max(axis=0))
    for u in (0, 17, 39):
        f, v = kept.token_frames(u)
        np.testing.assert_array_equal(f, np.flatnonzero(d1[:, 2 * u + 1]))
        np.testing.assert_array_equal(v, d1[f, 2 * u + 1])


@pytest.mark.parametrize("interval", [1, 2, 7, 50, 399])
def test_checkpointed_path_is_bit_identical(rng, interval):
    # reference: the same kernel with every backpointer kept (interval 0); both must
    # pick the same path, tie-breaks included (coarse log-probs force many ties)
    T, V = 400, 12
    lp = np.round(random_log_probs(rng, T, V, peaky=2.0), 1)
    tokens = rng.integers(1, V, size=120)
    tokens[5] = tokens[4]
    cols, idx, pen = _align._trellis(tokens, 0)
    s0, st0, _ = _kernels.viterbi(lp, _align._NO_TABLE, cols, idx, pen, 0)
    s1, st1, _ = _kernels.viterbi(lp, _align._NO_TABLE, cols, idx, pen, interval)
    assert s0 == s1
    np.testing.assert_array_equal(st0, st1)
    # and the path re-scores to the score (reference: sum of the path's log-probs)
    ext = extend_labels(tokens, 0)
    assert float(lp[np.arange(T), ext[st0]].astype(np.float64).sum()) == pytest.approx(s0)


def test_checkpoint_interval_balances_memory():
    # T/K float64 columns against K int8 rows: K = sqrt(8 T) minimises 8 T/K + K
    T = 90_000
    K = _align._checkpoint_interval(T)
    cost = lambda k: 8 * T / k + k  # noqa: E731
    assert cost(K) <= min(cost(k) for k in range(1, 5000)) * 1.001


def test_vectorisable_exp_and_log_match_libm():
    # reference: numpy's exp/log (the platform libm); the kernels' straight-line
    # versions must agree within a few ulp over the ranges the kernels use them on
    from numba import njit

    @njit
    def run(x, a):
        out = np.empty((3, x.size))
        for i in range(x.size):
            out[0, i] = _kernels._exp_small(x[i] / 708.0 * 40.0)
            out[1, i] = _kernels._exp_prob(x[i])
            out[2, i] = _kernels._log_13(a[i])
        return out

    rng = np.random.default_rng(3)
    x = np.r_[-rng.random(200_000) * 708.0, 0.0, -1e-300, 0.4, 0.5]
    a = np.r_[1.0 + rng.random(200_000) * 2.0, 1.0, 3.0, np.sqrt(2.0), 2 * np.sqrt(2.0), 2.0]
    x, a = x[: a.size], a[: x.size]
    got = run(x, a)
    want_small = np.exp(x / 708.0 * 40.0)
    want_small[x / 708.0 * 40.0 <= -_kernels._CUT] = 0.0
    for g, w in ((got[0], want_small), (got[1], np.exp(x)), (got[2], np.log(a))):
        ulp = np.spacing(np.maximum(np.abs(w), np.finfo(float).tiny))
        assert np.max(np.abs(g - w) / ulp) <= 4
    # the cut-offs give exact zeros
    assert run(np.array([-709.0, -np.inf]), np.array([1.0, 1.0]))[1].tolist() == [0.0, 0.0]


def test_float16_is_read_in_place_with_the_same_results(rng):
    # reference: the same input converted to float32 by numpy (float16 -> float32 is
    # exact), so every result must be bit-identical; and no float32 copy is made
    import tracemalloc

    T, V = 300, 2000
    lp16 = random_log_probs(rng, T, V, peaky=3.0).astype(np.float16)
    lp16[:, 7] = -np.inf
    tokens = rng.integers(8, V, size=60)
    lp32 = lp16.astype(np.float32)
    a16, a32 = align_tokens(lp16, tokens), align_tokens(lp32, tokens)
    assert a16.score == a32.score
    for name in ("states", "first", "last", "spike"):
        np.testing.assert_array_equal(getattr(a16, name), getattr(a32, name))
    f16, f32 = forward_backward(lp16, tokens), forward_backward(lp32, tokens)
    assert f16.log_likelihood == f32.log_likelihood
    np.testing.assert_array_equal(f16.dense_states(), f32.dense_states())
    tracemalloc.start()
    align_tokens(lp16, tokens)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < lp16.nbytes  # a float32 copy alone would be 2 * lp16.nbytes


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_float16_nan_and_posinf_are_refused(rng, bad):
    lp = random_log_probs(rng, 20, 10).astype(np.float16)
    lp[3, 9] = bad
    with pytest.raises(ParameterError, match=r"NaN or \+inf"):
        align_tokens(lp, [1, 2], utt="u1")
    lp[3, 9] = -np.inf  # -inf is a valid log-probability
    align_tokens(lp, [1, 2])


def _sparse(T, S, states, frames, values):
    import scipy.sparse

    return scipy.sparse.csr_matrix((values, (frames, states)), shape=(T, S))


def _log_domain(lp, tokens, blank=0, *, interval=0, margin=np.inf):
    """The log-domain kernel's ``(log P, (T, S) occupancy as a sparse matrix, blank
    occupancy, token maxima)``, every non-zero entry kept."""
    cols, idx, pen = _align._trellis(np.asarray(tokens), blank)
    data, tab = _align._kernel_input(lp)
    total, n, rs, rt, rv, blank_occ, token_max = _kernels.occupancy_sparse(
        data, tab, cols, idx, pen, interval, 0.0, margin
    )
    return total, _sparse(lp.shape[0], idx.size, rs[:n], rt[:n], rv[:n]), blank_occ, token_max


def _scaled_ok(lp, tokens, blank=0, *, interval=0, margin=np.inf) -> bool:
    """Whether the scaled kernel vouches for its own result on this input."""
    cols, idx, pen = _align._trellis(np.asarray(tokens), blank)
    data, tab = _align._kernel_input(lp)
    skip = (pen == 0.0).astype(np.float64)
    return bool(_kernels.occupancy_scaled(data, tab, cols, idx, skip, interval, 0.0, margin)[0])


def _assert_same_as_log_domain(lp, tokens, blank=0, *, scaled=True, tol=1e-9):
    """forward_backward against the log-domain kernel: log P to ``tol`` relative (or
    absolute below 1), every occupancy, the blank occupancy and token maxima to
    ``tol`` absolute, with the same checkpointing and pruning as forward_backward.
    ``scaled``: whether the scaled kernel must vouch for its result (True), must
    refuse it (False: forward_backward then falls back), or either (None)."""
    T = lp.shape[0]
    S = 2 * len(tokens) + 1
    long = T * S * 8 > _align._FB_BUDGET
    kw = {"interval": int(np.sqrt(T)), "margin": _align.PRUNE_NATS} if long else {}
    if scaled is not None:
        assert _scaled_ok(lp, tokens, blank, **kw) == scaled
    total, occ, blank_occ, token_max = _log_domain(lp, tokens, blank, **kw)
    sa = forward_backward(lp, tokens, blank, floor=0.0)
    states = np.repeat(np.arange(S), np.diff(sa.state_ptr))
    ours = _sparse(T, S, states, sa.frames, sa.values)
    assert abs(sa.log_likelihood - total) <= tol * max(1.0, abs(total))
    assert abs(ours - occ).max() <= tol
    np.testing.assert_allclose(sa.blank_occupancy, blank_occ, rtol=0, atol=tol)
    np.testing.assert_allclose(sa.confidence(), token_max, rtol=0, atol=tol)


def test_scaled_occupancy_equals_the_log_domain_on_random_inputs(rng):
    # reference: the log-domain recursion (Graves et al., 2006), itself checked against
    # brute force and torch above; the scaled one (Rabiner, 1989, scaling) differs by
    # rounding only. Random shapes, blanks, repeats, flat to peaky posteriors, float16
    # to float64; every case must take the scaled path (no fallback)
    for _ in range(60):
        T = int(rng.integers(1, 400))
        V = int(rng.integers(2, 40))
        blank = int(rng.integers(0, V))
        U = int(rng.integers(0, max(1, T // 3)))
        tokens = rng.choice([k for k in range(V) if k != blank], size=U)
        if U > 3:
            tokens[U // 2] = tokens[U // 2 - 1]
        lp = random_log_probs(rng, T, V, peaky=float(rng.choice([0.0, 2.0, 5.0])))
        lp = lp.astype(rng.choice([np.float16, np.float32, np.float64]))
        if required_frames(tokens)[0] > T:
            continue
        _assert_same_as_log_domain(lp, tokens, blank)


def test_scaled_occupancy_equals_the_log_domain_on_a_long_input():
    # reference: the log-domain recursion, checkpointed and pruned the same way; one
    # hour of frames (T = 90,000). The log-domain sums carry log alpha (thousands of
    # nats) and lose about |log alpha| * 1e-16 per frame, so its own error grows with
    # the length (~1e-9 on the raw synthetic hour); rows shifted by their maximum keep
    # that well below the 1e-9 checked here
    from bench import synth

    tokens, lp = synth.utterance_arrays(np.random.default_rng(3), 90_000, 3_000, 50)
    lp = (lp - lp.max(axis=1, keepdims=True)).astype(np.float64)
    assert 90_000 * (2 * tokens.size + 1) * 8 > _align._FB_BUDGET  # the long path
    _assert_same_as_log_domain(lp, tokens)


def test_near_degenerate_inputs_fall_back_to_the_log_domain(rng):
    # reference: torch's ctc_loss in float64 (log P and the occupancy from its
    # gradient, as in test_align.py) and the log-domain kernel. Very peaky rows (one
    # class at 0, the rest at -1e4), a reference token at -1e4 everywhere (P ~ e^-1e4:
    # every state underflows in the probability domain), emissions around exp's
    # underflow (-690 to -760), and sharp random posteriors with random references
    torch = require("torch")
    T, V = 200, 21
    tokens = rng.integers(1, V - 1, size=60)
    winner = np.zeros(T, np.int64)
    winner[np.sort(rng.choice(np.arange(1, T - 1, 3), 60, replace=False))] = tokens
    peaky = np.full((T, V), -1e4)
    peaky[np.arange(T), winner] = 0.0
    missing = tokens.copy()
    missing[30] = V - 1  # never above -1e4
    edge = peaky.copy()
    m = rng.random(edge.shape) < 0.5
    edge[m] = rng.uniform(-760.0, -690.0, size=int(m.sum()))
    sharp = random_log_probs(rng, 300, 9, peaky=30.0).astype(np.float64)
    cases = [
        (peaky, tokens, True),
        (peaky, missing, False),
        (edge, tokens, None),
        (sharp, rng.integers(1, 9, size=80), None),
    ]
    for lp, toks, scaled in cases:
        _assert_same_as_log_domain(lp, toks, scaled=scaled)
        sa = forward_backward(lp, toks, floor=0.0)
        x = torch.from_numpy(lp)[:, None, :].requires_grad_()
        loss = torch.nn.functional.ctc_loss(
            x, torch.from_numpy(np.asarray(toks, np.int64))[None, :],
            torch.tensor([lp.shape[0]]), torch.tensor([len(toks)]),
            reduction="sum",
        )  # fmt: skip
        loss.backward()
        assert sa.log_likelihood == pytest.approx(-loss.item(), rel=1e-9)
        occ = np.zeros(lp.shape)
        np.add.at(occ, (slice(None), extend_labels(toks)), sa.dense_states())
        grad = x.grad[:, 0, :].numpy()
        np.testing.assert_allclose(occ, np.exp(lp) - grad, rtol=0, atol=1e-9)
