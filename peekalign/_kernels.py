"""Compiled CTC kernels (numba, cached on disk).

The kernels read the frame log-posteriors ``lp`` (T, V) in place and never build a
(T, S) copy of the emissions. The extended label sequence ``ext`` (S,) =
(blank, l1, blank, ..., lU, blank) comes as ``cols`` (its distinct token ids, sorted)
and ``idx`` (S,) with ``ext = cols[idx]``: each frame first copies its row's ``cols``
entries, in ascending order, into a small buffer. Reading a row in order lets the
hardware prefetcher stream it; gathering ``lp[t, ext[s]]`` in label order instead
stalls on a cache miss per label (4x slower at V = 5,000).

``pen`` (S,) is 0 where the skip ``s-2 -> s`` is allowed (``l'_s`` not blank and not
equal to ``l'_{s-2}``) and -inf elsewhere, so the inner loops have no label tests.

Band: at frame ``t`` only states ``lo(t) <= s <= hi(t)`` can lie on a complete path
(reachable from the start and still able to reach the end); nothing outside is
computed and it holds -inf (log space) or 0 (occupancy).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

NEG_INF = -np.inf
# exp(-40) < 2**-57: a log-sum-exp term this far below the maximum cannot change a
# sum that already holds exp(0) = 1, so skipping it leaves the result unchanged.
_CUT = 40.0
# Below this exp() returns a subnormal (a slow path in libm); such occupancies are 0.
_EXP_MIN = -708.0


@njit(cache=True, nogil=True, inline="always")
def _band(t, T, S):
    return max(0, S - 2 - 2 * (T - 1 - t)), min(S - 1, 2 * t + 1)


@njit(cache=True, nogil=True, inline="always")
def _gather(lp, t, cols, buf):
    row = lp[t]
    for j in range(cols.shape[0]):
        buf[j] = row[cols[j]]


# Not inlined on purpose: compiled as its own function over 0-based slices, the loop
# has no index wrap-around checks and LLVM vectorises it (8x faster than inlined).
@njit(cache=True, nogil=True)
def _vstep(buf, idx, e, pen, prev, cur, lo, hi, bprow):
    """One Viterbi frame over states [lo, hi]; columns are padded (state s at s + 2).

    Ties keep the earlier candidate (stay, then s-1, then s-2). Resets the two states
    on either side of the band, which is all the next frame reads outside it.
    """
    n = hi + 1 - lo
    ids = idx[lo : hi + 1]
    em = e[:n]
    for i in range(n):
        em[i] = buf[ids[i]]
    p0 = prev[lo + 2 : hi + 3]
    p1 = prev[lo + 1 : hi + 2]
    p2 = prev[lo : hi + 1]
    pn = pen[lo : hi + 1]
    out = cur[lo + 2 : hi + 3]
    bps = bprow[lo : hi + 1]
    for i in range(n):
        c1 = p1[i]
        c2 = p2[i] + pn[i]
        m1 = c1 > p0[i]
        best = c1 if m1 else p0[i]
        m2 = c2 > best
        best = c2 if m2 else best
        out[i] = best + em[i]
        bps[i] = np.int8(2) if m2 else (np.int8(1) if m1 else np.int8(0))
    cur[lo] = NEG_INF
    cur[lo + 1] = NEG_INF
    m = cur.shape[0]
    if hi + 3 < m:
        cur[hi + 3] = NEG_INF
    if hi + 4 < m:
        cur[hi + 4] = NEG_INF


@njit(cache=True, nogil=True)
def viterbi(lp, cols, idx, pen, interval):
    """Best CTC path: ``(score, states (T,) int32)``; score -inf when there is none.

    Backpointers are int8 (0 stay, 1 from s-1, 2 from s-2). With ``interval`` K > 0
    the pass keeps only every K-th score column and, during the backtrace, recomputes
    one K-frame segment of backpointers at a time (K*S bytes plus T/K columns instead
    of T*S bytes); path and score are bit-identical either way.
    """
    T = lp.shape[0]
    S = idx.shape[0]
    buf = np.empty(cols.shape[0])
    e = np.empty(S)
    prev = np.full(S + 2, NEG_INF)
    cur = np.full(S + 2, NEG_INF)
    _gather(lp, 0, cols, buf)
    prev[2] = buf[idx[0]]
    if S > 1:
        prev[3] = buf[idx[1]]
    states = np.zeros(T, np.int32)
    full = interval <= 0 or interval >= T
    K = T if full else interval
    n_ck = 0 if full else (T - 1) // K + 1
    ck = np.empty((n_ck, S + 2))
    if full:
        bp = np.zeros((T, S), np.int8)
        for t in range(1, T):
            lo, hi = _band(t, T, S)
            _gather(lp, t, cols, buf)
            _vstep(buf, idx, e, pen, prev, cur, lo, hi, bp[t])
            prev, cur = cur, prev
    else:
        ck[0] = prev
        bp = np.zeros((K + 1, S), np.int8)
        for t in range(1, T):
            lo, hi = _band(t, T, S)
            _gather(lp, t, cols, buf)
            _vstep(buf, idx, e, pen, prev, cur, lo, hi, bp[0])
            prev, cur = cur, prev
            if t % K == 0:
                ck[t // K] = prev
    s = S - 1
    if S > 1 and prev[S] > prev[S + 1]:
        s = S - 2
    score = prev[s + 2]
    states[T - 1] = s
    if score == NEG_INF:
        return score, states
    if full:
        for t in range(T - 1, 0, -1):
            s -= bp[t, s]
            states[t - 1] = s
        return score, states
    for j in range(n_ck - 1, -1, -1):
        t0 = j * K
        t1 = min(t0 + K, T - 1)
        if t1 <= t0:
            continue
        prev[:] = ck[j]
        for t in range(t0 + 1, t1 + 1):
            lo, hi = _band(t, T, S)
            _gather(lp, t, cols, buf)
            _vstep(buf, idx, e, pen, prev, cur, lo, hi, bp[t - t0])
            prev, cur = cur, prev
        for t in range(t1, t0, -1):
            s -= bp[t - t0, s]
            states[t - 1] = s
    return score, states


@njit(cache=True, nogil=True)
def segments(lp, states, tokens):
    """First frame, last frame and spike frame (first highest posterior) per token."""
    U = tokens.shape[0]
    first = np.full(U, -1, np.int32)
    last = np.full(U, -1, np.int32)
    spike = np.full(U, -1, np.int32)
    for t in range(states.shape[0]):
        s = states[t]
        if s % 2 == 1:
            u = s // 2
            if first[u] < 0:
                first[u] = t
                spike[u] = t
            elif lp[t, tokens[u]] > lp[spike[u], tokens[u]]:
                spike[u] = t
            last[u] = t
    return first, last, spike


@njit(cache=True, nogil=True, inline="always")
def _lse3(c0, c1, c2):
    """log(exp(c0) + exp(c1) + exp(c2)) for values in [-inf, inf).

    The largest term contributes exp(0) = 1 without a call; terms more than _CUT
    below it are skipped.
    """
    if c0 >= c1 and c0 >= c2:
        m, x, y = c0, c1, c2
    elif c1 >= c2:
        m, x, y = c1, c0, c2
    else:
        m, x, y = c2, c0, c1
    if m == NEG_INF:
        return NEG_INF
    acc = 1.0
    d = x - m
    if d > -_CUT:
        acc += math.exp(d)
    d = y - m
    if d > -_CUT:
        acc += math.exp(d)
    return m + math.log(acc)


@njit(cache=True, nogil=True)
def _fstep(buf, idx, pen, prev, row, lo, hi):
    """alpha[t, lo:hi+1] from alpha[t-1] (``prev``) into ``row``."""
    s = lo
    while s < 2 and s <= hi:
        a = _lse3(prev[s], prev[s - 1] if s >= 1 else NEG_INF, NEG_INF)
        row[s] = a + buf[idx[s]] if a != NEG_INF else NEG_INF
        s += 1
    if s > hi:
        return
    p0 = prev[s : hi + 1]
    p1 = prev[s - 1 : hi]
    p2 = prev[s - 2 : hi - 1]
    pn = pen[s : hi + 1]
    ids = idx[s : hi + 1]
    out = row[s : hi + 1]
    for i in range(hi + 1 - s):
        a = _lse3(p0[i], p1[i], p2[i] + pn[i])
        out[i] = a + buf[ids[i]] if a != NEG_INF else NEG_INF


@njit(cache=True, nogil=True)
def forward(lp, cols, idx, pen):
    """Forward variables alpha (T, S) in log space (-inf outside the band)."""
    T = lp.shape[0]
    S = idx.shape[0]
    buf = np.empty(cols.shape[0])
    alpha = np.empty((T, S))
    alpha[0, :] = NEG_INF
    _gather(lp, 0, cols, buf)
    alpha[0, 0] = buf[idx[0]]
    if S > 1:
        alpha[0, 1] = buf[idx[1]]
    for t in range(1, T):
        lo, hi = _band(t, T, S)
        _gather(lp, t, cols, buf)
        row = alpha[t]
        row[:lo] = NEG_INF
        row[hi + 1 :] = NEG_INF
        _fstep(buf, idx, pen, alpha[t - 1], row, lo, hi)
    return alpha


@njit(cache=True, nogil=True)
def _bstep(buf, idx, pen, nxt, cur, row, lo, hi, log_total, last):
    """beta's column t into ``cur`` from column t+1 (``nxt``) and gamma over ``row``.

    Columns hold state s at index s and -inf at S and S+1, so s+1 and s+2 are always
    readable; ``pen`` is padded the same way.
    """
    n = hi + 1 - lo
    q0 = nxt[lo : hi + 1]
    q1 = nxt[lo + 1 : hi + 2]
    q2 = nxt[lo + 2 : hi + 3]
    pn = pen[lo + 2 : hi + 3]
    ids = idx[lo : hi + 1]
    out = cur[lo : hi + 1]
    g = row[lo : hi + 1]
    for i in range(n):
        # rest = beta[t, s] - y[t, l'_s]; 0 at the last frame (whose band is the end)
        rest = 0.0 if last else _lse3(q0[i], q1[i], q2[i] + pn[i])
        out[i] = rest + buf[ids[i]] if rest != NEG_INF else NEG_INF
        x = g[i] + rest - log_total
        g[i] = math.exp(x) if x > _EXP_MIN else 0.0


@njit(cache=True, nogil=True)
def backward_occupancy(lp, cols, idx, pen, alpha, log_total):
    """Backward pass that turns ``alpha`` into the state occupancy, in place.

    Keeps one column of beta at a time and writes
    ``gamma[t, s] = exp(alpha[t, s] + beta[t, s] - y[t, l'_s] - log P)`` (a
    probability) over ``alpha[t, s]`` as soon as beta's column ``t`` is known.
    """
    T = lp.shape[0]
    S = idx.shape[0]
    buf = np.empty(cols.shape[0])
    pad = np.full(S + 2, NEG_INF)
    pad[:S] = pen
    nxt = np.full(S + 2, NEG_INF)
    cur = np.full(S + 2, NEG_INF)
    for t in range(T - 1, -1, -1):
        lo, hi = _band(t, T, S)
        _gather(lp, t, cols, buf)
        row = alpha[t]
        row[:lo] = 0.0
        row[hi + 1 :] = 0.0
        _bstep(buf, idx, pad, nxt, cur, row, lo, hi, log_total, t == T - 1)
        if lo >= 1:
            cur[lo - 1] = NEG_INF
        if lo >= 2:
            cur[lo - 2] = NEG_INF
        nxt, cur = cur, nxt
