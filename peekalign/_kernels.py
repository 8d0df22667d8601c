"""Compiled CTC kernels (numba, cached on disk).

All kernels take the frame log-posteriors ``lp`` (T, V) and the extended label
sequence ``ext`` (S,) = (blank, l1, blank, ..., lU, blank) and never build a (T, S)
float copy of the emissions.
"""

from __future__ import annotations

import numpy as np
from numba import njit

NEG_INF = -np.inf


@njit(cache=True, nogil=True)
def _skip_allowed(ext, blank):
    S = ext.shape[0]
    skip = np.zeros(S, np.bool_)
    for s in range(2, S):
        skip[s] = ext[s] != blank and ext[s] != ext[s - 2]
    return skip


@njit(cache=True, nogil=True)
def viterbi(lp, ext, blank):
    """Best CTC path. Returns (score, states (T,) int32); score -inf if none."""
    T = lp.shape[0]
    S = ext.shape[0]
    skip = _skip_allowed(ext, blank)
    prev = np.full(S, NEG_INF)
    cur = np.full(S, NEG_INF)
    # 0 = stay, 1 = from s-1, 2 = from s-2: int8 keeps T*S bytes, not 8*T*S
    bp = np.zeros((T, S), np.int8)
    prev[0] = lp[0, ext[0]]
    if S > 1:
        prev[1] = lp[0, ext[1]]
    for t in range(1, T):
        # states that can still reach the end / were reachable from the start
        lo = max(0, S - 2 - 2 * (T - 1 - t))
        hi = min(S - 1, 2 * t + 1)
        for s in range(0, lo):
            cur[s] = NEG_INF
        for s in range(hi + 1, S):
            cur[s] = NEG_INF
        for s in range(lo, hi + 1):
            best = prev[s]
            arg = 0
            if s >= 1 and prev[s - 1] > best:
                best = prev[s - 1]
                arg = 1
            if skip[s] and prev[s - 2] > best:
                best = prev[s - 2]
                arg = 2
            cur[s] = best + lp[t, ext[s]]
            bp[t, s] = arg
        tmp = prev
        prev = cur
        cur = tmp
    s = S - 1
    if S > 1 and prev[S - 2] > prev[S - 1]:
        s = S - 2
    score = prev[s]
    states = np.empty(T, np.int32)
    states[T - 1] = s
    for t in range(T - 1, 0, -1):
        s -= bp[t, s]
        states[t - 1] = s
    return score, states


@njit(cache=True, nogil=True, inline="always")
def _lae(a, b):
    if a == NEG_INF:
        return b
    if b == NEG_INF:
        return a
    if a > b:
        return a + np.log1p(np.exp(b - a))
    return b + np.log1p(np.exp(a - b))


@njit(cache=True, nogil=True)
def forward(lp, ext, blank):
    """Forward variables alpha (T, S) in log space."""
    T = lp.shape[0]
    S = ext.shape[0]
    skip = _skip_allowed(ext, blank)
    alpha = np.full((T, S), NEG_INF)
    alpha[0, 0] = lp[0, ext[0]]
    if S > 1:
        alpha[0, 1] = lp[0, ext[1]]
    for t in range(1, T):
        hi = min(S - 1, 2 * t + 1)
        for s in range(0, hi + 1):
            a = alpha[t - 1, s]
            if s >= 1:
                a = _lae(a, alpha[t - 1, s - 1])
            if skip[s]:
                a = _lae(a, alpha[t - 1, s - 2])
            if a != NEG_INF:
                alpha[t, s] = a + lp[t, ext[s]]
    return alpha


@njit(cache=True, nogil=True)
def backward(lp, ext, blank):
    """Backward variables beta (T, S) in log space (beta includes frame t's emission)."""
    T = lp.shape[0]
    S = ext.shape[0]
    skip = _skip_allowed(ext, blank)
    beta = np.full((T, S), NEG_INF)
    beta[T - 1, S - 1] = lp[T - 1, ext[S - 1]]
    if S > 1:
        beta[T - 1, S - 2] = lp[T - 1, ext[S - 2]]
    for t in range(T - 2, -1, -1):
        lo = max(0, S - 2 - 2 * (T - 1 - t))
        for s in range(lo, S):
            b = beta[t + 1, s]
            if s + 1 < S:
                b = _lae(b, beta[t + 1, s + 1])
            if s + 2 < S and skip[s + 2]:
                b = _lae(b, beta[t + 1, s + 2])
            if b != NEG_INF:
                beta[t, s] = b + lp[t, ext[s]]
    return beta


@njit(cache=True, nogil=True)
def occupancy(alpha, beta, lp, ext, log_total):
    """gamma[t, s] = alpha + beta - y - log P, returned as probabilities (T, S)."""
    T, S = alpha.shape
    gamma = np.zeros((T, S))
    for t in range(T):
        for s in range(S):
            a = alpha[t, s]
            b = beta[t, s]
            if a != NEG_INF and b != NEG_INF:
                gamma[t, s] = np.exp(a + b - lp[t, ext[s]] - log_total)
    return gamma
