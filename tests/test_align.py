"""CTC alignment core against outside references."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from conftest import ctc_collapse, random_log_probs, require

from peekalign import AlignmentError, ParameterError, align_tokens, forward_backward
from peekalign.align import extend_labels, find_spikes, greedy_decode, required_frames


def brute_force(lp, tokens, blank):
    """All label paths of length T whose collapse is ``tokens``: (max, logsumexp)."""
    T, V = lp.shape
    scores = []
    for path in itertools.product(range(V), repeat=T):
        if ctc_collapse(path, blank) == list(tokens):
            scores.append(sum(lp[t, k] for t, k in enumerate(path)))
    return (max(scores), np.logaddexp.reduce(scores)) if scores else (-np.inf, -np.inf)


def test_viterbi_equals_brute_force_max(rng):
    # reference: brute-force enumeration of every length-T path (V**T of them)
    checked = 0
    while checked < 300:
        T = int(rng.integers(1, 9))
        V = int(rng.integers(2, 6))
        if V**T > 40000:
            continue
        U = int(rng.integers(0, 4))
        blank = int(rng.integers(0, V))
        choices = [k for k in range(V) if k != blank]
        tokens = list(rng.choice(choices, size=U)) if U else []
        if rng.random() < 0.3 and U >= 2:
            tokens[1] = tokens[0]  # force a repeat
        need, _ = required_frames(tokens)
        if need > T:
            continue
        lp = random_log_probs(rng, T, V).astype(np.float64)
        best, _ = brute_force(lp, tokens, blank)
        a = align_tokens(lp, tokens, blank)
        assert a.score == pytest.approx(best, abs=1e-9)
        # the returned path re-scores to exactly that score and collapses to the tokens
        labels = a.frame_labels()
        assert ctc_collapse(labels.tolist(), blank) == [int(t) for t in tokens]
        assert sum(lp[t, k] for t, k in enumerate(labels)) == pytest.approx(a.score, abs=1e-9)
        # the segments cover exactly the frames the path spends on each token
        for s in a.runs:
            assert np.all(a.states[s.first : s.last + 1] == 2 * s.index + 1)
            assert s.first <= s.spike <= s.last
        checked += 1


def test_forward_equals_brute_force_sum(rng):
    # reference: brute-force sum over all paths that collapse to the labels
    for _ in range(60):
        T, V = int(rng.integers(1, 7)), int(rng.integers(2, 5))
        tokens = list(rng.integers(1, V, size=int(rng.integers(0, 3))))
        if required_frames(tokens)[0] > T:
            continue
        lp = random_log_probs(rng, T, V).astype(np.float64)
        _, total = brute_force(lp, tokens, 0)
        assert forward_backward(lp, tokens).log_likelihood == pytest.approx(total, abs=1e-9)


def _torch_ctc(torch, lp, tokens, blank, *, grad=False):
    """torch's ``ctc_loss`` in float64: ``(-log P, d loss / d log_probs)``."""
    x = torch.from_numpy(lp.astype(np.float64))[:, None, :].requires_grad_(grad)
    loss = torch.nn.functional.ctc_loss(
        x,
        torch.from_numpy(np.asarray(tokens, np.int64))[None, :],
        torch.tensor([lp.shape[0]]),
        torch.tensor([len(tokens)]),
        blank=blank,
        reduction="sum",
        zero_infinity=False,
    )
    if not grad:
        return loss.item(), None
    loss.backward()
    return loss.item(), x.grad[:, 0, :].numpy()


def _random_blank_case(rng, T, V, U):
    blank = int(rng.integers(0, V))
    lp = random_log_probs(rng, T, V, peaky=2.0).astype(np.float64)
    tokens = rng.choice([k for k in range(V) if k != blank], size=U)
    tokens[U // 2] = tokens[U // 2 - 1]  # one repeat: the skip rule matters
    return lp, tokens, blank


@pytest.mark.parametrize("T,V,U", [(50, 10, 12), (300, 60, 80), (1000, 500, 200)])
def test_log_likelihood_matches_torch_ctc_loss(rng, T, V, U):
    torch = require("torch")
    # reference: torch.nn.functional.ctc_loss(reduction='sum') is -log P(l|x); both in
    # float64 with a random blank index, so they must agree to rounding (1e-9 relative)
    for _ in range(3):
        lp, tokens, blank = _random_blank_case(rng, T, V, U)
        ours = forward_backward(lp, tokens, blank).log_likelihood
        ref, _ = _torch_ctc(torch, lp, tokens, blank)
        assert ours == pytest.approx(-ref, rel=1e-9, abs=0)


@pytest.mark.parametrize("T,V,U", [(50, 10, 12), (300, 60, 80)])
def test_occupancy_matches_torch_gradient(rng, T, V, U, monkeypatch):
    torch = require("torch")
    # reference: torch's ctc_loss gradient w.r.t. the log-probs is exp(y) - (occupancy
    # summed over the states of each token id) (Graves et al., 2006, eq. 16); float64,
    # random blank, checked with every alpha row kept and with the checkpointed pass
    from peekalign import align as _align

    for budget in (1 << 27, 0):
        monkeypatch.setattr(_align, "_FB_BUDGET", budget)
        lp, tokens, blank = _random_blank_case(rng, T, V, U)
        sa = forward_backward(lp, tokens, blank, floor=0.0)
        _, grad = _torch_ctc(torch, lp, tokens, blank, grad=True)
        occ = np.zeros(lp.shape)
        np.add.at(occ, (slice(None), extend_labels(tokens, blank)), sa.dense_states())
        ref = np.exp(lp) - grad
        np.testing.assert_allclose(occ, ref, rtol=1e-9, atol=1e-12)


def test_occupancy_rows_sum_to_one(rng):
    # reference: occupancy is a posterior over states; each frame sits in exactly one
    lp = random_log_probs(rng, 120, 20, peaky=1.0)
    sa = forward_backward(lp, rng.integers(1, 20, size=30), floor=0.0)
    assert np.allclose(sa.dense_states().sum(axis=1), 1.0, atol=1e-9)
    assert np.allclose(sa.dense_tokens().sum(axis=1) + sa.blank_occupancy, 1.0, atol=1e-9)


def _numpy_viterbi(lp, tokens, blank):
    """Best CTC path score by a plain dynamic programme over the extended labels,
    written independently of the package (Graves et al., 2006: a state may stay, move
    one on, or skip a blank between two different labels)."""
    ext = [blank]
    for k in tokens:
        ext += [int(k), blank]
    S, T = len(ext), lp.shape[0]
    d = np.full(S, -np.inf)
    d[0] = lp[0, ext[0]]
    if S > 1:
        d[1] = lp[0, ext[1]]
    for t in range(1, T):
        new = d.copy()
        new[1:] = np.maximum(new[1:], d[:-1])
        skip = np.array([s >= 2 and ext[s] != blank and ext[s] != ext[s - 2] for s in range(S)])
        shifted = np.full(S, -np.inf)
        shifted[2:] = d[:-2]
        new = np.where(skip, np.maximum(new, shifted), new)
        d = new + lp[t, ext]
    return max(d[-1], d[-2]) if S > 1 else d[-1]


def test_viterbi_equals_an_independent_numpy_dp_on_larger_cases(rng):
    # reference: the plain numpy dynamic programme above (U up to 60, T up to 400,
    # random blank, repeated tokens); the path must also re-score to the score and
    # collapse to the tokens
    for _ in range(30):
        V = int(rng.integers(3, 40))
        blank = int(rng.integers(0, V))
        U = int(rng.integers(1, 61))
        T = int(rng.integers(2 * U + 1, 401))
        tokens = rng.choice([k for k in range(V) if k != blank], size=U)
        if U > 3:
            tokens[2] = tokens[1]
        lp = random_log_probs(rng, T, V, peaky=float(rng.uniform(0, 3))).astype(np.float64)
        a = align_tokens(lp, tokens, blank)
        expect = _numpy_viterbi(lp, tokens, blank)
        assert a.score == pytest.approx(expect, rel=1e-12, abs=1e-9)
        labels = a.frame_labels()
        assert float(lp[np.arange(T), labels].sum()) == pytest.approx(a.score, rel=1e-12)
        assert ctc_collapse(labels.tolist(), blank) == tokens.tolist()


def test_hand_worked_example():
    # hand-worked: T=3, V=2 uniform probabilities, label "1": paths 011, 001, 110, 100,
    # 111, 010 collapse to "1" (6 of 8) so P = 6/8; best path probability = 1/8
    lp = np.log(np.full((3, 2), 0.5))
    assert np.exp(forward_backward(lp, [1]).log_likelihood) == pytest.approx(0.75)
    assert np.exp(align_tokens(lp, [1]).score) == pytest.approx(0.125)


def test_empty_reference_aligns_to_all_blank(rng):
    lp = random_log_probs(rng, 7, 4)
    a = align_tokens(lp, [])
    assert a.score == pytest.approx(float(lp[:, 0].sum()))  # hand-worked: only path
    assert a.runs == () and np.all(a.states == 0)


def test_too_short_names_counts():
    lp = np.log(np.full((4, 3), 1 / 3))
    with pytest.raises(AlignmentError, match=r"needs 5 frames \(3 tokens \+ 2 repeats\).*has 4"):
        align_tokens(lp, [1, 1, 1], utt="u7")
    with pytest.raises(AlignmentError, match="utt 'u7'"):
        align_tokens(lp, [1, 1, 1], utt="u7")


@pytest.mark.parametrize(
    "lp,tokens,match",
    [
        (np.zeros((3,)), [1], "2-D"),
        (np.full((3, 2), np.nan), [1], "NaN"),
        (np.log(np.full((3, 2), 0.5)), [5], "token id 5"),
        (np.log(np.full((3, 2), 0.5)), [0], "blank"),
    ],
)
def test_bad_arguments(lp, tokens, match):
    with pytest.raises(ParameterError, match=match):
        align_tokens(lp, tokens, utt="x")


def test_zero_probability_token_is_clear():
    with np.errstate(divide="ignore"):  # log 0 = -inf is the point of the test
        lp = np.log(np.array([[0.5, 0.5, 0.0]] * 4))
    with pytest.raises(AlignmentError, match="probability 0"):
        align_tokens(lp, [2])


def test_greedy_and_spikes_hand_worked():
    # hand-worked: argmax path 1 1 - 2 2 - 2 collapses to 1 2 2
    p = np.array(
        [
            [0.1, 0.8, 0.1],
            [0.2, 0.7, 0.1],
            [0.9, 0.05, 0.05],
            [0.1, 0.1, 0.8],
            [0.1, 0.1, 0.8],
            [0.6, 0.2, 0.2],
            [0.2, 0.1, 0.7],
        ]
    )
    g = greedy_decode(np.log(p))
    assert g.tokens.tolist() == [1, 2, 2]
    assert g.first.tolist() == [0, 3, 6] and g.last.tolist() == [1, 4, 6]
    s = find_spikes(np.log(p), floor=0.75)
    assert s.frames.tolist() == [0, 3] and s.tokens.tolist() == [1, 2]


def test_extend_labels_is_graves_form():
    # reference: l' = (b, l1, b, ..., lU, b), S = 2U + 1 (Graves et al., 2006)
    assert extend_labels([4, 2], blank=1).tolist() == [1, 4, 1, 2, 1]


def test_backpointers_are_one_byte():
    # int8 backpointers for T=20000, S=4001 take 80 MB; int64 ones would take 640 MB.
    # Peak memory growth is read from /proc (VmHWM, this process only) in a fresh
    # process: numba's allocations bypass tracemalloc, and ru_maxrss of a child
    # starts at its parent's size.
    import subprocess
    import sys

    code = """
import numpy as np
from peekalign import align_tokens
def kib(key):
    for line in open('/proc/self/status'):
        if line.startswith(key):
            return int(line.split()[1])
lp = np.log(np.full((20000, 50), 1 / 50, dtype=np.float32))
tokens = np.arange(2000) % 49 + 1
align_tokens(lp[:4100], tokens)
before = kib('VmRSS:')
align_tokens(lp, tokens)
print(kib('VmHWM:') - before)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    grown_kib = int(out.stdout.strip())
    assert 0 <= grown_kib < 250_000, grown_kib
