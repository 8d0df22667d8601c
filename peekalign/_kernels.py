"""Compiled CTC kernels (numba, cached on disk).

The kernels read the frame log-posteriors ``lp`` (T, V) in place and never build a
(T, S) copy of the emissions. ``lp`` is float32 or float64, or float16 given as its
uint16 bits with ``tab`` (65,536 float32 values, one per bit pattern), so that
float16 dumps are read without a float32 copy; ``tab`` is unused otherwise. The extended label sequence ``ext`` (S,) =
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

Inner loops are small functions over 0-based slices compiled on their own: numba then
emits no negative-index wrap-around tests and (with ``error_model="numpy"``) no
division checks, and LLVM vectorises them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, types
from numba.extending import overload

NEG_INF = -np.inf
# exp(-40) < 2**-57: a log-sum-exp term this far below the maximum cannot change a
# sum that already holds exp(0) = 1, so skipping it leaves the result unchanged.
_CUT = 40.0
# Below this exp() is subnormal; such occupancies (< 1e-307) are written as 0.
_EXP_MIN = -708.0


@njit(cache=True, nogil=True, inline="always")
def _band(t, T, S):
    return max(0, S - 2 - 2 * (T - 1 - t)), min(S - 1, 2 * t + 1)


def _load(row, c, tab):
    """``row[c]`` as a float; float16 rows come as uint16 bits read through ``tab``."""
    raise NotImplementedError  # intended: numba stub, compiled code only (the overload below)


@overload(_load, inline="always")
def _load_impl(row, c, tab):
    if isinstance(row.dtype, types.Integer):
        return lambda row, c, tab: tab[row[c]]
    return lambda row, c, tab: row[c]


def _bad(row):
    """Whether a row holds NaN or +inf (-inf is a valid log-probability)."""
    raise NotImplementedError  # intended: numba stub, compiled code only (the overload below)


@overload(_bad)
def _bad_impl(row):
    if isinstance(row.dtype, types.Integer):  # float16 as its uint16 bits

        def bits(row):
            bad = False
            for i in range(row.shape[0]):
                b = row[i]
                bad |= ((b & 0x7C00) == 0x7C00) & (b != 0xFC00)  # exponent all ones, not -inf
            return bad

        return bits

    def floats(row):
        bad = False
        for i in range(row.shape[0]):
            bad |= not row[i] < np.inf
        return bad

    return floats


@njit(cache=True, nogil=True)
def has_nan_or_posinf16(bits):
    """Whether float16 values, given as their uint16 bits, hold NaN or +inf."""
    return _bad(bits)


@njit(cache=True, nogil=True, inline="always")
def _gather(lp, tab, t, cols, buf):
    row = lp[t]
    for j in range(cols.shape[0]):
        buf[j] = _load(row, cols[j], tab)


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
def _vframes(lp, tab, cols, idx, pen, buf, e, prev, cur, t0, t1, bp, base, stride, ck, K, check):
    """Viterbi frames ``t0..t1`` from column ``prev`` (frame ``t0 - 1``).

    Frame t's backpointers go to row ``bp[(t - base) * stride]`` (stride 0: one scratch
    row, as the checkpointed forward pass needs); with ``K`` > 0 the column of every
    frame t with ``t % K == 0`` is kept in ``ck[t // K]``. With ``check`` each row is
    first scanned for NaN and +inf (which brings it into the cache for the gather: one
    pass over the input instead of two). Returns ``(prev, cur, bad)``: the last frame's
    column, the other buffer, and the first frame holding NaN or +inf (-1: none; the
    pass stops there).
    """
    T = lp.shape[0]
    S = idx.shape[0]
    for t in range(t0, t1 + 1):
        if check and _bad(lp[t]):
            return prev, cur, t
        lo, hi = _band(t, T, S)
        _gather(lp, tab, t, cols, buf)
        _vstep(buf, idx, e, pen, prev, cur, lo, hi, bp[(t - base) * stride])
        prev, cur = cur, prev
        if K > 0 and t % K == 0:
            ck[t // K] = prev
    return prev, cur, -1


@njit(cache=True, nogil=True)
def viterbi(lp, tab, cols, idx, pen, interval):
    """Best CTC path: ``(score, states (T,) int32, bad)``; score -inf when there is none.

    ``bad`` is the first frame whose row holds NaN or +inf (checked on the way, the
    whole row, not only the reference's columns), -1 when none does; the other values
    are then meaningless.

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
    states = np.zeros(T, np.int32)
    if _bad(lp[0]):
        return NEG_INF, states, 0
    _gather(lp, tab, 0, cols, buf)
    prev[2] = buf[idx[0]]
    if S > 1:
        prev[3] = buf[idx[1]]
    full = interval <= 0 or interval >= T
    K = T if full else interval
    n_ck = 0 if full else (T - 1) // K + 1
    ck = np.empty((n_ck, S + 2))
    if full:
        bp = np.zeros((T, S), np.int8)
        prev, cur, bad = _vframes(
            lp, tab, cols, idx, pen, buf, e, prev, cur, 1, T - 1, bp, 0, 1, ck, 0, True
        )
    else:
        ck[0] = prev
        bp = np.zeros((K + 1, S), np.int8)
        prev, cur, bad = _vframes(
            lp, tab, cols, idx, pen, buf, e, prev, cur, 1, T - 1, bp, 0, 0, ck, K, True
        )
    if bad >= 0:
        return NEG_INF, states, bad
    s = S - 1
    if S > 1 and prev[S] > prev[S + 1]:
        s = S - 2
    score = prev[s + 2]
    states[T - 1] = s
    if score == NEG_INF:
        return score, states, -1
    if full:
        for t in range(T - 1, 0, -1):
            s -= bp[t, s]
            states[t - 1] = s
        return score, states, -1
    for j in range(n_ck - 1, -1, -1):
        t0 = j * K
        t1 = min(t0 + K, T - 1)
        if t1 <= t0:
            continue
        prev[:] = ck[j]
        prev, cur, _ = _vframes(
            lp, tab, cols, idx, pen, buf, e, prev, cur, t0 + 1, t1, bp, t0, 1, ck, 0, False
        )
        for t in range(t1, t0, -1):
            s -= bp[t - t0, s]
            states[t - 1] = s
    return score, states, -1


@njit(cache=True, nogil=True)
def segments(lp, tab, states, tokens):
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
            elif _load(lp[t], tokens[u], tab) > _load(lp[spike[u]], tokens[u], tab):
                spike[u] = t
            last[u] = t
    return first, last, spike


# exp and log as straight-line arithmetic (no libm calls, no branches the compiler
# cannot turn into selects), so that the forward and backward loops vectorise. Both
# are within 1-3 ulp of libm over the ranges they are used on (checked in
# tests/test_kernels.py).
_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_LOG2E = 1.44269504088896338700e00
_ROUND = 6755399441055744.0  # 1.5 * 2**52: x + _ROUND - _ROUND rounds x to an integer


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _exp_core(x):
    """``(p, n)`` with exp(x) = p * 2**-n, p in [0.7, 1.42] (Taylor, degree 13)."""
    k = (x * _LOG2E + _ROUND) - _ROUND
    r = (x - k * _LN2_HI) - k * _LN2_LO
    p = 1.0 / 6227020800.0
    p = p * r + 1.0 / 479001600.0
    p = p * r + 1.0 / 39916800.0
    p = p * r + 1.0 / 3628800.0
    p = p * r + 1.0 / 362880.0
    p = p * r + 1.0 / 40320.0
    p = p * r + 1.0 / 5040.0
    p = p * r + 1.0 / 720.0
    p = p * r + 1.0 / 120.0
    p = p * r + 1.0 / 24.0
    p = p * r + 1.0 / 6.0
    p = p * r + 0.5
    p = p * r + 1.0
    p = p * r + 1.0
    return p, -k


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _exp_small(d):
    """exp(d) for d in (-_CUT, 0]; 0 at or below -_CUT (also for -inf and NaN)."""
    x = d if d > -_CUT else -_CUT
    p, n = _exp_core(x)
    # 2**-n for n in [0, 58] by its binary digits (_exp_prob's ladder, cut to the
    # steps this range needs: each step is a select in the state loop)
    if n >= 32.0:
        p *= 2.3283064365386963e-10
        n -= 32.0
    if n >= 16.0:
        p *= 1.52587890625e-05
        n -= 16.0
    if n >= 8.0:
        p *= 0.00390625
        n -= 8.0
    if n >= 4.0:
        p *= 0.0625
        n -= 4.0
    if n >= 2.0:
        p *= 0.25
        n -= 2.0
    if n >= 1.0:
        p *= 0.5
    return p if d > -_CUT else 0.0


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _exp_prob(d):
    """exp(d) for d in (_EXP_MIN, 0.5]; 0 at or below _EXP_MIN."""
    x = min(max(d, _EXP_MIN), 0.5)
    p, n = _exp_core(x)
    if n < 0.0:
        p *= 2.0
        n += 1.0
    if n >= 512.0:
        p *= 7.458340731200207e-155
        n -= 512.0
    if n >= 256.0:
        p *= 8.636168555094445e-78
        n -= 256.0
    if n >= 128.0:
        p *= 2.938735877055719e-39
        n -= 128.0
    if n >= 64.0:
        p *= 5.421010862427522e-20
        n -= 64.0
    if n >= 32.0:
        p *= 2.3283064365386963e-10
        n -= 32.0
    if n >= 16.0:
        p *= 1.52587890625e-05
        n -= 16.0
    if n >= 8.0:
        p *= 0.00390625
        n -= 8.0
    if n >= 4.0:
        p *= 0.0625
        n -= 4.0
    if n >= 2.0:
        p *= 0.25
        n -= 2.0
    if n >= 1.0:
        p *= 0.5
        n -= 1.0
    return p if d > _EXP_MIN else 0.0


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _log_13(a):
    """log(a) for a in [1, 3]: a = 2**e * m, m in [0.7, 1.42], log m = 2 atanh(z)."""
    e = 0.0
    m = a
    if m > 1.4142135623730951:
        m *= 0.5
        e = 1.0
    if m > 1.4142135623730951:
        m *= 0.5
        e = 2.0
    z = (m - 1.0) / (m + 1.0)
    z2 = z * z
    p = 1.0 / 21.0
    p = p * z2 + 1.0 / 19.0
    p = p * z2 + 1.0 / 17.0
    p = p * z2 + 1.0 / 15.0
    p = p * z2 + 1.0 / 13.0
    p = p * z2 + 1.0 / 11.0
    p = p * z2 + 1.0 / 9.0
    p = p * z2 + 1.0 / 7.0
    p = p * z2 + 1.0 / 5.0
    p = p * z2 + 1.0 / 3.0
    p = p * z2 + 1.0
    return e * _LN2_HI + (e * _LN2_LO + 2.0 * z * p)


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _lse3(c0, c1, c2):
    """log(exp(c0) + exp(c1) + exp(c2)) for values in [-inf, inf).

    The largest term contributes exp(0) = 1 exactly; a term more than _CUT below it
    contributes 0 (exp(-40) < 2**-57 cannot change a sum >= 1).
    """
    lo = min(c0, c1)
    hi = max(c0, c1)
    m = max(hi, c2)
    mid = min(hi, c2)
    acc = (1.0 + _exp_small(mid - m)) + _exp_small(lo - m)
    return m + _log_13(acc) if m != NEG_INF else NEG_INF


@njit(cache=True, nogil=True, error_model="numpy")
def _fstep(buf, idx, e, pen, prev, row, lo, hi):
    """alpha[t, lo:hi+1] from alpha[t-1] (``prev``) into ``row``."""
    s = lo
    while s < 2 and s <= hi:
        a = _lse3(prev[s], prev[s - 1] if s >= 1 else NEG_INF, NEG_INF)
        row[s] = a + buf[idx[s]]
        s += 1
    if s > hi:
        return
    n = hi + 1 - s
    ids = idx[s : hi + 1]
    em = e[:n]
    for i in range(n):
        em[i] = buf[ids[i]]
    p0 = prev[s : hi + 1]
    p1 = prev[s - 1 : hi]
    p2 = prev[s - 2 : hi - 1]
    pn = pen[s : hi + 1]
    out = row[s : hi + 1]
    for i in range(n):
        out[i] = _lse3(p0[i], p1[i], p2[i] + pn[i]) + em[i]


@njit(cache=True, nogil=True)
def _forward_pruned(lp, tab, t, T, S, cols, idx, pen, buf, e, prev, row, plo, phi, margin):
    """alpha's row ``t`` over the states reachable from ``prev``'s kept range
    ``[plo, phi]``; returns the kept range of row ``t``: the states within ``margin`` of
    the row's best. Cells just outside the kept range are set to -inf, which is all the
    next row reads; with an infinite margin the kept range is the whole band.
    """
    blo, bhi = _band(t, T, S)
    lo = max(blo, plo)
    hi = min(bhi, phi + 2)
    if lo > hi:
        return 1, 0
    _gather(lp, tab, t, cols, buf)
    _fstep(buf, idx, e, pen, prev, row, lo, hi)
    best = NEG_INF
    for s in range(lo, hi + 1):
        if row[s] > best:
            best = row[s]
    keep_lo, keep_hi = lo, hi
    if margin < np.inf and best > NEG_INF:
        cut = best - margin
        while row[keep_lo] < cut:
            keep_lo += 1
        while row[keep_hi] < cut:
            keep_hi -= 1
    for s in range(max(lo - 2, 0), keep_lo):
        row[s] = NEG_INF
    for s in range(keep_hi + 1, min(hi + 3, S)):
        row[s] = NEG_INF
    return keep_lo, keep_hi


@njit(cache=True, nogil=True)
def _forward_first(lp, tab, S, cols, idx, buf, row):
    """alpha's row 0: only the first blank and the first token can start a path."""
    row[:] = NEG_INF
    _gather(lp, tab, 0, cols, buf)
    row[0] = buf[idx[0]]
    if S > 1:
        row[1] = buf[idx[1]]


@njit(cache=True, nogil=True, error_model="numpy")
def _bstep(buf, idx, e, pen, nxt, cur, row, lo, hi, log_total, last):
    """beta's column t into ``cur`` from column t+1 (``nxt``) and gamma over ``row``.

    Columns hold state s at index s and -inf at S and S+1, so s+1 and s+2 are always
    readable; ``pen`` is padded the same way.
    """
    n = hi + 1 - lo
    ids = idx[lo : hi + 1]
    em = e[:n]
    for i in range(n):
        em[i] = buf[ids[i]]
    q0 = nxt[lo : hi + 1]
    q1 = nxt[lo + 1 : hi + 2]
    q2 = nxt[lo + 2 : hi + 3]
    pn = pen[lo + 2 : hi + 3]
    out = cur[lo : hi + 1]
    g = row[lo : hi + 1]
    for i in range(n):
        # rest = beta[t, s] - y[t, l'_s]; 0 at the last frame (whose band is the end)
        rest = 0.0 if last else _lse3(q0[i], q1[i], q2[i] + pn[i])
        out[i] = rest + em[i]
        g[i] = _exp_prob(g[i] + rest - log_total)


@njit(cache=True, nogil=True)
def _grow(rs, rt, rv, n, need):
    """The record arrays with room for ``need`` entries (doubled as often as needed),
    their first ``n`` entries kept."""
    cap = rs.shape[0]
    if need <= cap:
        return rs, rt, rv
    while cap < need:
        cap *= 2
    rs2 = np.empty(cap, np.int32)
    rt2 = np.empty(cap, np.int32)
    rv2 = np.empty(cap)
    rs2[:n] = rs[:n]
    rt2[:n] = rt[:n]
    rv2[:n] = rv[:n]
    return rs2, rt2, rv2


@njit(cache=True, nogil=True)
def _keep(n, cap, rs, rt, rv, s, t, v):
    """Append ``(s, t, v)`` to the record arrays, doubling them when full."""
    if n == cap:
        rs, rt, rv = _grow(rs, rt, rv, n, n + 1)
        cap = rs.shape[0]
    rs[n] = s
    rt[n] = t
    rv[n] = v
    return cap, rs, rt, rv


@njit(cache=True, nogil=True)
def _forward_checkpointed(
    lp, tab, cols, idx, pen, buf, e, ck, seg, tmp, klo, khi, K, last0, margin
):
    """alpha over all frames: rows before ``last0`` in the two rows of ``tmp`` (every
    K-th kept in ``ck``), rows of the last segment in ``seg``; each row's kept range in
    ``klo``, ``khi``. False when a row keeps no state (no path)."""
    T = lp.shape[0]
    S = idx.shape[0]
    row = seg[0] if last0 == 0 else tmp[0]
    _forward_first(lp, tab, S, cols, idx, buf, row)
    lo0, hi0 = _band(0, T, S)  # with T = 1 the first blank cannot reach the end
    for s in range(0, lo0):
        row[s] = NEG_INF
    klo[0], khi[0] = lo0, hi0
    ck[0] = row
    for t in range(1, T):
        prev = row
        row = seg[t - last0] if t >= last0 else tmp[t & 1]
        a, b = _forward_pruned(
            lp, tab, t, T, S, cols, idx, pen, buf, e, prev, row, klo[t - 1], khi[t - 1], margin
        )
        if a > b:
            return False
        klo[t], khi[t] = a, b
        if t % K == 0:
            ck[t // K] = row
    return True


@njit(cache=True, nogil=True)
def _end_total(row, lo, hi, S):
    """log P: alpha of the last frame summed over the two end states kept in [lo, hi]."""
    log_total = row[S - 1] if hi >= S - 1 else NEG_INF
    if S > 1 and lo <= S - 2:
        a, b = log_total, row[S - 2]
        m = max(a, b)
        if m != NEG_INF:
            log_total = m + np.log(np.exp(a - m) + np.exp(b - m))
    return log_total


@njit(cache=True, nogil=True)
def _record_frame(g, t, lo, hi, floor, token_max, n, cap, rs, rt, rv):
    """Frame t's occupancy row ``g`` over [lo, hi]: its blank sum, each token's maximum
    (into ``token_max``) and the records above ``floor``. Returns ``(blank, n, cap, rs,
    rt, rv)``."""
    acc = 0.0
    for s in range(lo, hi + 1):
        v = g[s]
        if s % 2 == 0:
            acc += v
        elif v > token_max[s // 2]:
            token_max[s // 2] = v
        if v > floor and v > 0.0:
            cap, rs, rt, rv = _keep(n, cap, rs, rt, rv, s, t, v)
            n += 1
    return acc, n, cap, rs, rt, rv


@njit(cache=True, nogil=True)
def occupancy_sparse(lp, tab, cols, idx, pen, interval, floor, margin):
    """Checkpointed forward-backward; the occupancy above ``floor`` as records.

    The forward pass keeps alpha's row every K = ``interval`` frames (all rows of the
    last segment); the backward pass walks the segments from the end, recomputes one
    segment's K alpha rows from its checkpoint, and turns each row into the occupancy
    ``gamma[t, s] = exp(alpha + beta - y[t, l'_s] - log P)`` with one beta column at a
    time: (T/K + K) rows of S floats instead of T. ``interval`` <= 0 or >= T keeps
    every row (no recomputation). The values are bit-identical either way.

    ``margin`` (nats) limits each frame to the states whose alpha is within it of the
    frame's best (and those reachable from them); ``inf`` computes the whole band.

    Returns ``(log_total, n, states, frames, values, blank, token_max)``: the first
    ``n`` records (state, frame, occupancy) with occupancy > ``floor`` (and > 0), in
    decreasing frame order; the blank occupancy per frame (every blank state summed,
    floor or not) and each token's largest occupancy over all frames. ``log_total`` is
    -inf when no path exists (nothing else is then computed).
    """
    T = lp.shape[0]
    S = idx.shape[0]
    U = (S - 1) // 2
    K = T if interval <= 0 or interval >= T else interval
    n_seg = (T - 1) // K + 1
    last0 = (n_seg - 1) * K
    buf = np.empty(cols.shape[0])
    e = np.empty(S)
    ck = np.empty((n_seg, S))
    seg = np.empty((K, S))
    tmp = np.empty((2, S))
    klo = np.zeros(T, np.int64)
    khi = np.zeros(T, np.int64)
    blank = np.zeros(T)
    token_max = np.zeros(U)
    cap = 1024
    rs = np.empty(cap, np.int32)
    rt = np.empty(cap, np.int32)
    rv = np.empty(cap)
    n = 0
    # forward: rows of earlier segments in two alternating buffers (checkpoint each
    # segment's first row), rows of the last segment straight into ``seg``
    ok = _forward_checkpointed(
        lp, tab, cols, idx, pen, buf, e, ck, seg, tmp, klo, khi, K, last0, margin
    )
    if not ok:
        return NEG_INF, n, rs, rt, rv, blank, token_max
    row = seg[T - 1 - last0]
    log_total = _end_total(row, klo[T - 1], khi[T - 1], S)
    if log_total == NEG_INF:
        return log_total, n, rs, rt, rv, blank, token_max
    pad = np.full(S + 2, NEG_INF)
    pad[:S] = pen
    nxt = np.full(S + 2, NEG_INF)
    cur = np.full(S + 2, NEG_INF)
    for j in range(n_seg - 1, -1, -1):
        t0 = j * K
        t1 = min(t0 + K, T) - 1
        if j < n_seg - 1:
            seg[0] = ck[j]
            for t in range(t0 + 1, t1 + 1):
                _forward_pruned(
                    lp, tab, t, T, S, cols, idx, pen, buf, e, seg[t - 1 - t0], seg[t - t0],
                    klo[t - 1], khi[t - 1], margin,
                )  # fmt: skip
        for t in range(t1, t0 - 1, -1):
            lo, hi = klo[t], khi[t]
            _gather(lp, tab, t, cols, buf)
            g = seg[t - t0]
            _bstep(buf, idx, e, pad, nxt, cur, g, lo, hi, log_total, t == T - 1)
            # the next column (t - 1) reads this one over [klo[t-1], khi[t-1] + 2]:
            # -inf wherever it was not computed
            if t > 0:
                for s in range(klo[t - 1], lo):
                    cur[s] = NEG_INF
                for s in range(hi + 1, min(khi[t - 1] + 3, S + 2)):
                    cur[s] = NEG_INF
            nxt, cur = cur, nxt
            blank[t], n, cap, rs, rt, rv = _record_frame(
                g, t, lo, hi, floor, token_max, n, cap, rs, rt, rv
            )
    return log_total, n, rs, rt, rv, blank, token_max


# ----------------------------------------------------------------------------------
# Scaled forward-backward in the probability domain (Rabiner, 1989, "A tutorial on
# hidden Markov models", section V.A "Scaling"). Per frame one exp per distinct token
# column, then multiply-adds per state; the per-frame normalisers c_t carry the scale
# and log P = sum_t (log c_t + m_t) + log E (m_t the frame's shift, E the end states'
# share of the last frame). Rows are padded: state s at index s + 2 (alpha) or s
# (beta), with zeros around the computed range, so the steps need no edge tests.
#
#   alpha~_t = (A' alpha~_{t-1} / c_{t-1}) * y_t      c_t = sum alpha~_t
#   beta^_t  = A (y_{t+1} / c_{t+1} * beta^_{t+1})    beta^_{T-1} = 1 at the end
#   gamma_t  = alpha~_t * beta^_t / (c_t E)           y_t = exp(lp_t - m_t)
#
# Nothing is exact below the smallest normal double: a value that underflows loses
# at most ~1e-307 (in units of its frame), which moves P by at most that times
# beta^ / (c E). ``occupancy_scaled`` bounds this over the whole trellis and reports
# whether the result is good to ~1e-13 (``ok``); callers fall back to the log-domain
# ``occupancy_sparse`` otherwise (near-degenerate inputs).
# ----------------------------------------------------------------------------------

# exp(_EXP_MIN): occupancies at or below it are written as 0, as the log-domain kernel
# does (its exp flushes there).
_TINY = 3.307553003638408e-308
# ``ok`` needs (sum of beta^ + T * S) / (min c * E) below this: the T * S cells then
# lose less than 1e-307 * 1e290 = 1e-17 of P to underflow together.
_SCALED_LIMIT = 1e290


@njit(cache=True, nogil=True, error_model="numpy", fastmath={"contract"})
def _emission_row(lp, tab, t, cols, y, bits):
    """Frame t's emissions ``y = exp(lp[t, cols] - m)``; returns the shift ``m`` (their
    maximum; -inf, with zeros, when no token of the reference is possible there).

    exp as ``_exp_prob`` computes it (the same values), with 2**-n built from its
    exponent bits in ``bits`` (int64 scratch, as long as ``y``) instead of the ladder:
    both loops vectorise.
    """
    row = lp[t]
    m = NEG_INF
    for j in range(cols.shape[0]):
        v = _load(row, cols[j], tab)
        y[j] = v
        m = max(m, v)
    if m == NEG_INF:
        y[:] = 0.0
        return m
    two = bits.view(np.float64)
    for j in range(y.shape[0]):
        d = y[j] - m
        p, n = _exp_core(max(d, _EXP_MIN))
        bits[j] = (1023 - np.int64(n)) << 52  # 2**-n, n in [-1, 1022]
        y[j] = p if d > _EXP_MIN else 0.0
    for j in range(y.shape[0]):
        y[j] *= two[j]
    return m


@njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
def _sfstep(y, scale, idx, e, skip, prev, row, lo, hi):
    """Scaled alpha~ of states [lo, hi] into ``row`` from ``prev`` and the emissions
    ``y * scale``; returns their sum.

    ``skip`` (S,) is 1.0 where s-2 -> s is allowed, else 0.0. Summing in any order
    (``reassoc``) moves the sum by a few ulp at most: all terms are >= 0.
    """
    n = hi + 1 - lo
    ids = idx[lo : hi + 1]
    em = e[:n]
    for i in range(n):
        em[i] = y[ids[i]] * scale
    p0 = prev[lo + 2 : hi + 3]
    p1 = prev[lo + 1 : hi + 2]
    p2 = prev[lo : hi + 1]
    sk = skip[lo : hi + 1]
    out = row[lo + 2 : hi + 3]
    c = 0.0
    for i in range(n):
        v = (p0[i] + p1[i] + sk[i] * p2[i]) * em[i]
        out[i] = v
        c += v
    return c


@njit(cache=True, nogil=True)
def _sforward_row(lp, tab, t, cols, idx, skip, scratch, y, prev, row, plo, phi, c_prev, margin):
    """Scaled alpha~'s row ``t`` from row ``t - 1`` (kept range ``[plo, phi]``, sum
    ``c_prev``), the frame's emissions into ``y``. Returns ``(keep_lo, keep_hi, c_t,
    m_t)``: the states within ``margin`` nats of the row's best (all of them with an
    infinite margin), the row's sum and shift; ``keep_lo > keep_hi`` when nothing is
    left. The two cells on either side of the kept range are zeroed: all the next row
    reads outside it.
    """
    bits, e = scratch
    blo, bhi = _band(t, lp.shape[0], idx.shape[0])
    lo = max(blo, plo)
    hi = min(bhi, phi + 2)
    if lo > hi:
        return 1, 0, 0.0, NEG_INF
    m = _emission_row(lp, tab, t, cols, y, bits)
    c = _sfstep(y, 1.0 / c_prev, idx, e, skip, prev, row, lo, hi)
    keep_lo, keep_hi = lo, hi
    if margin < np.inf and c > 0.0:
        best = 0.0
        for s in range(lo, hi + 1):
            best = max(best, row[s + 2])
        cut = best * np.exp(-margin)
        while row[keep_lo + 2] < cut:
            keep_lo += 1
        while row[keep_hi + 2] < cut:
            keep_hi -= 1
    row[keep_lo] = 0.0
    row[keep_lo + 1] = 0.0
    row[keep_hi + 3] = 0.0
    row[keep_hi + 4] = 0.0
    return keep_lo, keep_hi, c, m


@njit(cache=True, nogil=True)
def _sforward_first(lp, tab, cols, idx, scratch, y, row):
    """Scaled alpha~'s row 0 (only the first blank and first token can start a path):
    ``(lo, hi, c_0, m_0)`` as :func:`_sforward_row`."""
    row[:] = 0.0
    m = _emission_row(lp, tab, 0, cols, y, scratch[0])
    lo, hi = _band(0, lp.shape[0], idx.shape[0])  # T = 1: the first blank cannot end
    hi = min(hi, 1)
    c = 0.0
    for s in range(lo, hi + 1):
        row[s + 2] = y[idx[s]]
        c += row[s + 2]
    return lo, hi, c, m


@njit(cache=True, nogil=True)
def _sforward(lp, tab, cols, idx, skip, scratch, rows, kept, K, last0, margin):
    """Scaled alpha~ over all frames, stored as ``_forward_checkpointed`` stores alpha
    (``rows`` = (ck, seg, tmp, ys), the last segment's emissions in ``ys``); each row's
    kept range, sum and shift in ``kept`` = (klo, khi, cs, ms). Each row of ``lp`` is
    scanned for NaN and +inf first (in the cache then for the gather). Returns -1
    when done, the frame of the first row holding NaN or +inf, or -2 when a row keeps
    no state or sums to 0 (no path, or everything underflowed; rows after it are not
    scanned)."""
    ck, seg, tmp, ys = rows
    klo, khi, cs, ms = kept
    T = lp.shape[0]
    y = np.empty(cols.shape[0])
    row = seg[0] if last0 == 0 else tmp[0]
    y0 = ys[0] if last0 == 0 else y
    if _bad(lp[0]):
        return 0
    klo[0], khi[0], cs[0], ms[0] = _sforward_first(lp, tab, cols, idx, scratch, y0, row)
    if not cs[0] > 0.0:
        return -2
    ck[0] = row
    for t in range(1, T):
        if _bad(lp[t]):
            return t
        prev = row
        last = t >= last0
        row = seg[t - last0] if last else tmp[t & 1]
        a, b, c, m = _sforward_row(
            lp, tab, t, cols, idx, skip, scratch, ys[t - last0] if last else y, prev, row,
            klo[t - 1], khi[t - 1], cs[t - 1], margin,
        )  # fmt: skip
        if a > b or not c > 0.0:
            return -2
        klo[t], khi[t], cs[t], ms[t] = a, b, c, m
        if t % K == 0:
            ck[t // K] = row
    return -1


@njit(cache=True, nogil=True)
def _sforward_again(lp, tab, cols, idx, skip, scratch, rows, kept, j, t0, t1, margin):
    """Rows ``t0..t1`` of alpha~ and their emissions again, from checkpoint ``j`` (frame
    ``t0``): the same operations as the first pass, so the same values."""
    ck, seg, _, ys = rows
    klo, khi, cs, _ = kept
    seg[0] = ck[j]
    _emission_row(lp, tab, t0, cols, ys[0], scratch[0])
    for t in range(t0 + 1, t1 + 1):
        _sforward_row(
            lp, tab, t, cols, idx, skip, scratch, ys[t - t0], seg[t - 1 - t0], seg[t - t0],
            klo[t - 1], khi[t - 1], cs[t - 1], margin,
        )  # fmt: skip


@njit(cache=True, nogil=True, error_model="numpy", fastmath={"reassoc", "contract"})
def _sbstep(y, scale, idx, e, skip, q, alpha, lo, hi, last, to_gamma, occ):
    """Frame t of the backward pass over states [lo, hi].

    beta^_t from ``q`` = y_{t+1} / c_{t+1} * beta^_{t+1} (beta^ = 1 at the ``last``
    frame); then ``q`` <- ``y * scale`` * beta^_t (``scale`` = 1 / c_t) in place and
    ``alpha`` (alpha~_t, an unpadded view) <- gamma_t = alpha~_t * beta^_t *
    ``to_gamma``, 0 at or below _TINY as in the log-domain kernel. ``skip`` is padded
    with two zeros at the end. ``occ`` = (blank (S,): 1.0 on blank states, peak (S,):
    each state's largest gamma so far, updated, floor). Returns the sum of beta^, the
    frame's blank occupancy and how many gammas lie above the floor (and above 0).
    """
    is_blank, peak, floor = occ
    n = hi + 1 - lo
    ids = idx[lo : hi + 1]
    em = e[:n]
    for i in range(n):
        em[i] = y[ids[i]] * scale
    q0 = q[lo : hi + 1]
    q1 = q[lo + 1 : hi + 2]
    q2 = q[lo + 2 : hi + 3]
    sk = skip[lo + 2 : hi + 3]
    a = alpha[lo : hi + 1]
    bl = is_blank[lo : hi + 1]
    pk = peak[lo : hi + 1]
    total = 0.0
    blank = 0.0
    count = 0
    # q0 is overwritten below; q1, q2 (its shifted views) are read in this loop only
    for i in range(n):
        b = 1.0 if last else q0[i] + q1[i] + sk[i] * q2[i]
        total += b
        v = a[i] * b * to_gamma
        v = v if v > _TINY else 0.0
        a[i] = v
        blank += v * bl[i]
        pk[i] = v if v > pk[i] else pk[i]
        count += (v > floor) & (v > 0.0)
        em[i] *= b
    for i in range(n):
        q0[i] = em[i]
    return total, blank, count


@njit(cache=True, nogil=True)
def _write_records(g, t, lo, hi, floor, rs, rt, rv, n):
    """Append frame t's entries above ``floor`` (and 0), states increasing; returns
    the new count."""
    for s in range(lo, hi + 1):
        v = g[s]
        if v > floor and v > 0.0:
            rs[n] = s
            rt[n] = t
            rv[n] = v
            n += 1
    return n


@njit(cache=True, nogil=True)
def _sbackward(idx, pad, scratch, q, rows, t0, t1, kept, end, out):
    """Backward pass over frames ``t1`` down to ``t0`` (alpha~ rows and emissions in
    ``rows``' seg and ys, row 0 = frame t0), turning each row into its occupancy and
    recording it in ``out`` = (blank, occ as :func:`_sbstep` takes it, records); returns
    ``(records, sum of beta^)``."""
    e = scratch[1]
    _, seg, _, ys = rows
    klo, khi, cs, _ = kept
    blank, occ, records = out
    rs, rt, rv, n = records
    floor = occ[2]
    T = klo.shape[0]
    S = idx.shape[0]
    big = 0.0
    for t in range(t1, t0 - 1, -1):
        lo, hi = klo[t], khi[t]
        g = seg[t - t0, 2:]
        scale = 1.0 / cs[t]
        b, blank[t], count = _sbstep(
            ys[t - t0], scale, idx, e, pad, q, g, lo, hi, t == T - 1, scale / end, occ
        )
        big += b
        # the next step (t - 1) reads q over [klo[t-1], khi[t-1] + 2]: zero wherever
        # this one did not write
        if t > 0:
            for s in range(klo[t - 1], lo):
                q[s] = 0.0
            for s in range(hi + 1, min(khi[t - 1] + 3, S + 2)):
                q[s] = 0.0
        if count:
            rs, rt, rv = _grow(rs, rt, rv, n, n + count)
            n = _write_records(g, t, lo, hi, floor, rs, rt, rv, n)
    return (rs, rt, rv, n), big


@njit(cache=True, nogil=True)
def occupancy_scaled(lp, tab, cols, idx, skip, interval, floor, margin):
    """:func:`occupancy_sparse` by the scaled probability-domain recursion.

    Same arguments (but ``skip`` (S,): 1.0 where ``pen`` is 0, else 0.0), storage and
    returns, after two more: ``ok``, False when no row keeps any mass (no path, or every
    state underflowed) or when underflow could have moved the result by more than
    ~1e-17 of P (see the section comment), and ``bad``, the first frame whose row
    holds NaN or +inf (-1: none; -2: not known, the pass stopped before). Unless
    ``ok`` the other values are meaningless: check the input (``bad`` -2) and use the
    log-domain kernel. Emissions are computed once per frame and pass
    (kept for the backward pass with their alpha~ rows).
    """
    T = lp.shape[0]
    S = idx.shape[0]
    K = T if interval <= 0 or interval >= T else interval
    n_seg = (T - 1) // K + 1
    last0 = (n_seg - 1) * K
    nc = cols.shape[0]
    scratch = (np.empty(nc, np.int64), np.empty(S))
    rows = (
        np.empty((n_seg, S + 4)), np.empty((K, S + 4)), np.empty((2, S + 4)), np.empty((K, nc))
    )  # fmt: skip
    kept = (np.zeros(T, np.int64), np.zeros(T, np.int64), np.zeros(T), np.zeros(T))
    klo, khi, cs, ms = kept
    blank = np.zeros(T)
    token_max = np.zeros((S - 1) // 2)
    records = (np.empty(1024, np.int32), np.empty(1024, np.int32), np.empty(1024), 0)
    is_blank = np.zeros(S)
    is_blank[::2] = 1.0
    occ = (is_blank, np.zeros(S), floor)
    done = _sforward(lp, tab, cols, idx, skip, scratch, rows, kept, K, last0, margin)
    if done != -1:
        return False, done, NEG_INF, 0, records[0], records[1], records[2], blank, token_max
    row = rows[1][T - 1 - last0]
    end = 0.0
    for s in range(max(klo[T - 1], S - 2), khi[T - 1] + 1):
        end += row[s + 2]
    end /= cs[T - 1]
    if not end > 0.0:
        return False, -2, NEG_INF, 0, records[0], records[1], records[2], blank, token_max
    pad = np.zeros(S + 2)
    pad[:S] = skip
    q = np.zeros(S + 2)
    big = 0.0
    for j in range(n_seg - 1, -1, -1):
        t0 = j * K
        t1 = min(t0 + K, T) - 1
        if j < n_seg - 1:
            _sforward_again(lp, tab, cols, idx, skip, scratch, rows, kept, j, t0, t1, margin)
        out = (blank, occ, records)
        records, b = _sbackward(idx, pad, scratch, q, rows, t0, t1, kept, end, out)
        big += b
    rs, rt, rv, n = records
    token_max[:] = occ[1][1::2]
    bound = (big + T * S) / (cs.min() * end)
    ok = bound < _SCALED_LIMIT  # False for inf and NaN too
    log_total = np.log(end) + np.sum(np.log(cs)) + np.sum(ms)
    return ok, -1, log_total, n, rs, rt, rv, blank, token_max
