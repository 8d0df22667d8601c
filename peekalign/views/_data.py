"""Compact, browser-sized arrays for the views (numpy only, no bokeh).

Nothing here sends a dense ``(T, V)`` matrix: per frame the most likely tokens, the blank
and the reference tokens' curves near their spans; images go out as uint8 rows cropped
to their non-zero span.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from numba import njit

from ..exceptions import ParameterError

__all__ = [
    "LogMel",
    "log_mel",
    "quantize",
    "top_tokens",
    "reference_curves",
    "SparseImages",
    "encode_images",
    "decode_images",
    "concat_images",
    "frame_hover_text",
    "attention_means",
    "three_decimals",
]


@dataclass(frozen=True, eq=False)
class LogMel:
    """A log-mel spectrogram on the shared time axis.

    Attributes
    ----------
    db : ndarray, float32, shape (n_mels, n_frames)
        Power in dB relative to the loudest bin (0 dB at the top, ``-top_db`` floor).
    hop_s, win_s : float
    sr : int
    top_db : float
    fmax : float
    """

    db: np.ndarray
    hop_s: float
    win_s: float
    sr: int
    top_db: float
    fmax: float

    @property
    def n_frames(self) -> int:
        return int(self.db.shape[1])

    @property
    def x0(self) -> float:
        """Left edge (s) of the first column: frames are centred on ``j * hop``."""
        return -self.hop_s / 2

    @property
    def width_s(self) -> float:
        return self.n_frames * self.hop_s


def _check_pos(name: str, value, func: str) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
        raise ParameterError(
            f"The {name!r} parameter of {func} must be a float in the range (0, inf). "
            f"Got {value!r} instead."
        )


def log_mel(
    y: np.ndarray,
    sr: int,
    *,
    n_mels: int = 80,
    win_s: float = 0.025,
    hop_s: float = 0.010,
    top_db: float = 80.0,
) -> LogMel:
    """Log-mel spectrogram (power mel, dB relative to the maximum) as librosa computes
    it (``librosa.feature.melspectrogram`` with a Hann window, centred frames and the
    Slaney mel filters, then ``librosa.power_to_db(S, ref=np.max)``), without
    librosa: importing it takes seconds the first time.

    Parameters
    ----------
    y : ndarray, shape (n,)
        Mono samples.
    sr : int
        Sample rate.
    n_mels : int
        Mel bands (80 by default, as most ASR front ends).
    win_s, hop_s : float
        Window and hop in seconds (25 ms / 10 ms by default); the FFT size is the next
        power of two of the window.
    top_db : float
        Dynamic range kept below the loudest bin.

    Examples
    --------
    >>> import numpy as np
    >>> sr = 16000
    >>> y = np.sin(2 * np.pi * 440 * np.arange(sr) / sr).astype(np.float32)
    >>> m = log_mel(y, sr)
    >>> m.db.shape, float(m.db.max())
    ((80, 101), 0.0)
    """
    for name, v in (("win_s", win_s), ("hop_s", hop_s), ("top_db", top_db)):
        _check_pos(name, v, "log_mel")
    if isinstance(n_mels, bool) or not isinstance(n_mels, (int, np.integer)) or n_mels < 1:
        raise ParameterError(
            f"The 'n_mels' parameter of log_mel must be an int in the range [1, inf). "
            f"Got {n_mels!r} instead."
        )
    y = np.asarray(y, dtype=np.float32).reshape(-1)
    win = max(1, int(round(win_s * sr)))
    hop = max(1, int(round(hop_s * sr)))
    n_fft = 1 << (win - 1).bit_length()
    if y.size == 0:
        y = np.zeros(1, np.float32)
    power = _power_frames(y, n_fft, hop, win)  # (frames, 1 + n_fft // 2)
    S = _mel_basis(int(sr), n_fft, int(n_mels)) @ power.T
    db = _power_to_db(S, float(top_db))
    return LogMel(db, hop / sr, win / sr, int(sr), float(top_db), sr / 2.0)


def _hann(n: int) -> np.ndarray:
    """Periodic Hann window of ``n`` samples, summed as ``scipy.signal.get_window("hann",
    n)`` sums it (a cosine over ``n + 1`` points, the last dropped)."""
    fac = np.linspace(-np.pi, np.pi, n + 1)
    w = np.zeros(n + 1)
    w += 0.5 * np.cos(0 * fac)
    w += 0.5 * np.cos(1 * fac)
    return w[:n]


def _power_frames(y: np.ndarray, n_fft: int, hop: int, win: int) -> np.ndarray:
    """Power spectrum (float32) of every centred frame, as ``librosa.stft``
    (``center=True``, zero padding) and ``abs(.) ** 2``.

    The window sits in the middle of the ``n_fft`` samples and is zero elsewhere, so
    each frame's ``win`` windowed samples are transformed with zero padding at the
    end instead: a circular shift, the same magnitudes. Frames go in blocks, in float64
    like librosa's transform (numpy's FFT: no scipy import); the windowing and the
    squares are compiled loops over reused buffers (the same float64 operations).
    """
    win = min(win, n_fft)
    padded = np.pad(y, n_fft // 2)
    n = 1 + (padded.size - n_fft) // hop
    start = padded[(n_fft - win) // 2 :]  # frame i: start[i * hop : i * hop + win]
    w = _hann(win)
    out = np.empty((n, 1 + n_fft // 2), np.float32)
    block = 512
    # one zero-padded input and one spectrum buffer for every block: no temporaries
    padded_frames = np.zeros((min(block, n), n_fft))
    spectrum = np.empty((min(block, n), 1 + n_fft // 2), np.complex128)
    for a in range(0, n, block):
        m = min(block, n - a)
        _window_frames(start, hop, a, w, padded_frames[:m])
        np.fft.rfft(padded_frames[:m], axis=1, out=spectrum[:m])
        _power(spectrum[:m].view(np.float64), out[a : a + m])
    return out


@njit(cache=True, nogil=True)
def _window_frames(start, hop, first, w, out):
    """Frames ``first, first + 1, ...`` of ``start`` (hop ``hop``), each times the
    window ``w`` in float64 (``frames * w``), into the first ``len(w)`` columns of
    ``out``'s rows."""
    win = w.shape[0]
    for i in range(out.shape[0]):
        o = (first + i) * hop
        for j in range(win):
            out[i, j] = np.float64(start[o + j]) * w[j]


@njit(cache=True, nogil=True)
def _power(spectrum, out):
    """``re ** 2 + im ** 2`` (float64, then float32) of a complex spectrum seen as
    float64 pairs (rows, 2 * bins), as ``np.add(np.square(X.real), np.square(X.imag))``
    computes it, in one pass."""
    rows, bins = out.shape
    for i in range(rows):
        for j in range(bins):
            re = spectrum[i, 2 * j]
            im = spectrum[i, 2 * j + 1]
            out[i, j] = re * re + im * im


def mel_frequencies(n: int, fmax: float, fmin: float = 0.0) -> np.ndarray:
    """``n`` frequencies (Hz) evenly spaced on the Slaney mel scale (linear below 1 kHz,
    logarithmic above), ``librosa.mel_frequencies(n, fmin=fmin, fmax=fmax)``.

    Examples
    --------
    >>> mel_frequencies(3, 8000.0).round(1).tolist()
    [0.0, 1688.9, 8000.0]
    """
    f_sp = 200.0 / 3
    min_log_hz = 1000.0
    min_log_mel = min_log_hz / f_sp
    logstep = np.log(6.4) / 27.0

    def to_mel(hz: float) -> float:
        if hz >= min_log_hz:
            return min_log_mel + np.log(hz / min_log_hz) / logstep
        return hz / f_sp

    mels = np.linspace(to_mel(float(fmin)), to_mel(float(fmax)), n)
    hz = f_sp * mels
    log_t = mels >= min_log_mel
    hz[log_t] = min_log_hz * np.exp(logstep * (mels[log_t] - min_log_mel))
    return hz


@functools.cache
def _mel_basis(sr: int, n_fft: int, n_mels: int) -> np.ndarray:
    """Slaney-normalised triangular mel filters (float32, ``(n_mels, 1 + n_fft // 2)``),
    as ``librosa.filters.mel(sr=sr, n_fft=n_fft, n_mels=n_mels)``."""
    fftfreqs = np.fft.rfftfreq(n=n_fft, d=1.0 / sr)
    mel_f = mel_frequencies(n_mels + 2, sr / 2.0)
    fdiff = np.diff(mel_f)
    ramps = np.subtract.outer(mel_f, fftfreqs)
    weights = np.zeros((n_mels, 1 + n_fft // 2), np.float32)
    for i in range(n_mels):
        lower = -ramps[i] / fdiff[i]
        upper = ramps[i + 2] / fdiff[i + 1]
        weights[i] = np.maximum(0, np.minimum(lower, upper))
    weights *= (2.0 / (mel_f[2 : n_mels + 2] - mel_f[:n_mels]))[:, np.newaxis]
    weights.setflags(write=False)
    return weights


def _power_to_db(S: np.ndarray, top_db: float) -> np.ndarray:
    """dB relative to the loudest bin, floored ``top_db`` below the top, as
    ``librosa.power_to_db(S, ref=np.max, top_db=top_db)`` (amin 1e-10) in S's dtype;
    an all-zero S is taken relative to 1."""
    amin = 1e-10
    top = S.max() if S.size else S.dtype.type(0)
    ref = top if top > 0 else S.dtype.type(1.0)
    db = 10.0 * np.log10(np.maximum(amin, S))
    db -= 10.0 * np.log10(np.maximum(amin, ref))
    db = np.maximum(db, db.max() - top_db)
    return db.astype(np.float32, copy=False)


def quantize(values: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Map ``[lo, hi]`` linearly onto uint8 ``0..255`` (clipped).

    Examples
    --------
    >>> quantize(np.array([-80.0, -40.0, 0.0]), -80, 0).tolist()
    [0, 128, 255]
    """
    span = float(hi) - float(lo)
    if not span > 0:
        return np.zeros(np.shape(values), np.uint8)
    q = (np.asarray(values, dtype=np.float32) - lo) * (255.0 / span)
    return np.clip(np.rint(q), 0, 255).astype(np.uint8)


@njit(cache=True, nogil=True, inline="always")
def _block_may_enter(row, a, cut):
    """Whether any of ``row[a:a + 64]`` is not below ``cut`` (NaN included): a loop
    that vectorises."""
    hit = False
    for j in range(64):
        hit |= not row[a + j] < cut
    return hit


@njit(cache=True, nogil=True, inline="always")
def _insert_row_entries(lp, t, a, b, blank, thr, ids, vals, n):
    """Entries ``a:b`` of row ``t`` into the row's insertion-sorted buffer of ``n``
    entries (largest first); returns the new count."""
    k = ids.shape[1]
    for v in range(a, b):
        x = lp[t, v]
        if v == blank or x < thr:
            continue
        if n == k and x <= vals[t, k - 1]:
            continue
        j = n if n < k else k - 1
        while j > 0 and vals[t, j - 1] < x:
            if j < k:
                vals[t, j] = vals[t, j - 1]
                ids[t, j] = ids[t, j - 1]
            j -= 1
        vals[t, j] = x
        ids[t, j] = v
        if n < k:
            n += 1
    return n


@njit(cache=True, nogil=True)
def _top_rows(lp, blank, thr, ids, vals):
    """Per row, the k largest entries >= thr (blank excluded), largest first: one pass
    with a small insertion-sorted buffer, O(T V) whatever the vocabulary size. Blocks
    of 64 entries all below what could still enter (``thr``, then the k-th largest
    so far) are passed over after one vectorised test."""
    T, V = lp.shape
    k = ids.shape[1]
    for t in range(T):
        n = 0
        row = lp[t]
        a = 0
        while a < V:
            b = min(a + 64, V)
            cut = thr if n < k else max(thr, vals[t, k - 1])
            if b - a < 64 or _block_may_enter(row, a, cut):
                n = _insert_row_entries(lp, t, a, b, blank, thr, ids, vals, n)
            a = b


def top_tokens(log_probs: np.ndarray, k: int = 5, *, blank: int = 0, floor: float = 1e-3):
    """Per frame the ``k`` most likely non-blank tokens at or above ``floor``, and the
    blank's probability.

    Frames with fewer than ``k`` tokens above the floor pad with id -1 and probability 0
    (CTC rows are peaky: most frames have one or two tokens above 1e-3). One compiled
    pass over the (T, V) matrix, so a 5,000-token vocabulary stays cheap.

    Returns
    -------
    ids : ndarray, int32, shape (T, k)
        Token ids, most likely first; -1 where none is left above the floor.
    probs : ndarray, float32, shape (T, k)
    blank_probs : ndarray, float32, shape (T,)

    Examples
    --------
    >>> lp = np.log(np.array([[0.7, 0.2, 0.1], [0.1, 0.3, 0.6]]))
    >>> ids, p, b = top_tokens(lp, 2)
    >>> ids.tolist(), [round(float(x), 2) for x in b]
    ([[1, 2], [2, 1]], [0.7, 0.1])
    """
    lp = np.asarray(log_probs)
    T, V = lp.shape
    k = int(max(0, min(k, V - 1)))
    blank_probs = np.exp(lp[:, blank].astype(np.float32))
    ids = np.full((T, k), -1, np.int32)
    probs = np.zeros((T, k), np.float32)
    if k == 0 or T == 0:
        return ids, probs, blank_probs
    lp32 = np.ascontiguousarray(lp, dtype=np.float32)
    _top_rows(lp32, int(blank), float(np.log(floor)), ids, probs)
    probs = np.where(ids >= 0, np.exp(probs), 0.0).astype(np.float32)
    return ids, probs, blank_probs


def reference_curves(
    log_probs: np.ndarray, tokens, first, last, *, pad: int = 8, floor: float = 1e-4
):
    """Posterior curve of each reference token near its aligned span, as one polyline.

    Token ``u``'s curve covers frames ``[first_u - pad, last_u + pad]`` (clipped); the
    curves are joined with a NaN between them so one line glyph draws them all.

    Returns
    -------
    frames : ndarray, float64, shape (N,)
        Frame index per point, NaN at the breaks.
    probs : ndarray, float32, shape (N,)
        Posterior of the token (at least ``floor``, so a log axis can show it).
    owner : ndarray, int32, shape (N,)
        Index ``u`` of the token each point belongs to (-1 at the breaks).

    Examples
    --------
    >>> lp = np.log(np.full((6, 3), 1 / 3))
    >>> f, p, u = reference_curves(lp, [1, 2], [1, 4], [1, 4], pad=1)
    >>> f.tolist()[:4], u.tolist()
    ([0.0, 1.0, 2.0, nan], [0, 0, 0, -1, 1, 1, 1, -1])
    """
    lp = np.asarray(log_probs)
    T = lp.shape[0]
    tokens = np.asarray(tokens, dtype=np.int64).reshape(-1)
    U = tokens.size
    if U == 0:
        return np.zeros(0), np.zeros(0, np.float32), np.zeros(0, np.int32)
    lo = np.clip(np.asarray(first, dtype=np.int64) - pad, 0, T - 1)
    hi = np.clip(np.asarray(last, dtype=np.int64) + pad, 0, T - 1)
    hi = np.maximum(hi, lo)
    lengths = hi - lo + 1 + 1  # one NaN break after each curve
    total = int(lengths.sum())
    owner = np.repeat(np.arange(U, dtype=np.int32), lengths)
    starts = np.cumsum(lengths) - lengths
    pos = np.arange(total) - np.repeat(starts, lengths)
    frames = (np.repeat(lo, lengths) + pos).astype(np.float64)
    brk = pos == np.repeat(lengths - 1, lengths)
    frames[brk] = np.nan
    owner[brk] = -1
    good = ~brk
    probs = np.full(total, np.nan, np.float32)
    probs[good] = np.exp(lp[frames[good].astype(np.int64), tokens[owner[good]]])
    probs[good] = np.maximum(probs[good], floor)
    return frames, probs, owner


@dataclass(frozen=True, eq=False)
class SparseImages:
    """A stack of non-negative images, each row cropped to its non-zero uint8 span.

    Row ``r`` of image ``i`` has ``length[i*R + r]`` values starting at column
    ``lo[i*R + r]``, stored at ``values[offset[i*R + r]:]``; value ``q`` stands for
    ``q / 255 * scale[i]``.
    """

    shape: tuple[int, int, int]  # (N, R, C)
    scale: np.ndarray  # (N,) float32
    lo: np.ndarray  # (N*R,) int32
    length: np.ndarray  # (N*R,) int32
    offset: np.ndarray  # (N*R,) int32
    values: np.ndarray  # (sum(length),) uint8

    @property
    def nbytes(self) -> int:
        return int(
            self.values.nbytes
            + self.lo.nbytes
            + self.length.nbytes
            + self.offset.nbytes
            + self.scale.nbytes
        )


@njit(cache=True, nogil=True, inline="always")
def _row_span(row, t):
    """First and last index of ``row`` whose value is at least ``t`` (``C``, -1 when
    none), branch-free so that the loop vectorises: a whole pass over the row costs
    less than scanning its zeros from both ends one value at a time."""
    C = row.shape[0]
    first = np.int32(C)
    last = np.int32(-1)
    for j in range(C):
        jj = np.int32(j)
        hit = row[j] >= t
        first = min(first, jj if hit else np.int32(C))
        last = max(last, jj if hit else np.int32(-1))
    return first, last


@njit(cache=True, nogil=True)
def _crop_rows(flat, thr, gain, R, first, last):
    """Per row of ``flat`` (N*R, C): the span between its first and last value at or
    above its image's ``thr`` (looked for in columns ``first[r]..last[r]`` only), and
    that span quantised (``rint(v * gain)``, clipped to 0..255), rows one after
    another. One pass over the rows, one over the spans."""
    NR, C = flat.shape
    lo = np.zeros(NR, np.int32)
    length = np.zeros(NR, np.int32)
    offset = np.zeros(NR, np.int32)
    total = 0
    for r in range(NR):
        offset[r] = total
        f = max(first[r], 0)
        g = min(last[r], C - 1)
        if g < f:
            continue
        a, b = _row_span(flat[r, f : g + 1], thr[r // R])
        if b >= a:
            lo[r] = f + a
            length[r] = b - a + 1
            total += b - a + 1
    values = np.empty(total, np.uint8)
    for r in range(NR):
        g = gain[r // R]
        a = lo[r]
        o = offset[r]
        for j in range(length[r]):
            q = np.rint(flat[r, a + j] * g)
            values[o + j] = np.uint8(min(max(q, 0.0), 255.0))
    return lo, length, offset, values


@njit(cache=True, nogil=True)
def _means_and_peaks(att, out, peaks, first, last):
    """Layer means into ``out[1:]``, their mean into ``out[0]`` and each head's
    maximum into ``peaks``, in one pass over ``att`` (L, H, U', T). The sums run in
    the order of numpy's ``add`` over the head axis, then the layer axis, and divide
    as ``np.divide(sum, n)`` does: the same values as the slice-by-slice means.

    On the way, each head row's columns at or above ``bound / 510`` (``first``,
    ``last``), where ``bound`` is the largest value of the head's rows before it that
    reached their own bound: never above the head's maximum, so the row's span at half
    a level of that maximum (:func:`encode_images`) lies inside. The bound is exact once
    the maximum is positive: a larger row maximum is at or above it, inside the span.
    """
    L, H, U, T = att.shape
    lane = np.empty((L * H, T), att.dtype)  # per head and column, the largest so far
    bound = np.full(L * H, -np.inf, att.dtype)
    for u in range(U):
        tot = out[0, u]
        for layer in range(L):
            m = out[1 + layer, u]
            for h in range(H):
                k = layer * H + h
                row = att[layer, h, u]
                best = lane[k]
                cut = bound[k] / np.float32(510)
                a = np.int32(T)
                b = np.int32(-1)
                for t in range(T):
                    x = row[t]
                    m[t] = x if h == 0 else m[t] + x
                    best[t] = x if u == 0 or x > best[t] else best[t]
                    hit = x >= cut
                    a = min(a, np.int32(t) if hit else np.int32(T))
                    b = max(b, np.int32(t) if hit else np.int32(-1))
                first[k * U + u] = a
                last[k * U + u] = b
                for t in range(a, b + 1):  # the row's maximum, if it reached the bound
                    if row[t] > bound[k]:
                        bound[k] = row[t]
            for t in range(T):
                m[t] = m[t] / np.float32(H)
                tot[t] = m[t] if layer == 0 else tot[t] + m[t]
        for t in range(T):
            tot[t] = tot[t] / np.float32(L)
    for k in range(L * H):
        peaks[k] = lane[k].max()


def attention_means(att: np.ndarray) -> tuple[np.ndarray, np.ndarray, tuple]:
    """The overall mean and the layer means of float32 attention ``att`` (L, H, U', T)
    as ``(1 + L, U', T)`` images (the values numpy's mean over heads, then over the
    layer means, gives), each head's maximum ``(L * H,)`` and, for the head rows
    ``att.reshape(L * H * U', T)``, ``(first, last)`` columns outside which no value
    reaches half a level of its head's maximum (``spans`` for :func:`encode_images`),
    in one pass.

    Attention is finite (bundles refuse NaN and inf), so each head's maximum is
    ``att[l, h].max()``.

    Examples
    --------
    >>> att = np.arange(16, dtype=np.float32).reshape(2, 2, 2, 2)
    >>> means, peaks, spans = attention_means(att)
    >>> means[0].tolist(), peaks.tolist()
    ([[6.0, 7.0], [8.0, 9.0]], [3.0, 7.0, 11.0, 15.0])
    """
    att = np.ascontiguousarray(att, dtype=np.float32)
    if att.ndim != 4 or att.size == 0:
        raise ParameterError(
            f"found attention of shape {att.shape}, expected (L, H, U', T) with no axis "
            "empty; pass the dumped cross-attention"
        )
    L, H, U, T = att.shape
    out = np.empty((1 + L, U, T), np.float32)
    peaks = np.empty(L * H, np.float32)
    first = np.empty(L * H * U, np.int32)
    last = np.empty(L * H * U, np.int32)
    _means_and_peaks(att, out, peaks, first, last)
    return out, peaks, (first, last)


def encode_images(
    stack: np.ndarray, *, peaks: np.ndarray | None = None, spans: tuple | None = None
) -> SparseImages:
    """Quantise each image of ``stack`` (N, R, C) to uint8 of its own maximum and crop
    every row to the columns between its first and last non-zero level.

    ``peaks``, each image's maximum when the caller has it already (shape ``(N,)``),
    saves a pass over the stack; ``spans``, ``(first, last)`` per row (``(N * R,)``
    each) with no value reaching half a level outside (as :func:`attention_means`
    gives them), saves looking outside.

    Examples
    --------
    >>> img = np.zeros((1, 2, 6), np.float32); img[0, 0, 2:4] = [0.5, 1.0]
    >>> s = encode_images(img)
    >>> s.lo.tolist(), s.length.tolist(), s.values.tolist()
    ([2, 0], [2, 0], [128, 255])
    """
    stack = np.asarray(stack, dtype=np.float32)
    if stack.ndim != 3:
        raise ParameterError(
            f"found an image stack of shape {stack.shape}, expected (N, R, C); "
            "pass images as a 3-D array"
        )
    N, R, C = stack.shape
    if peaks is not None:
        scale = np.asarray(peaks, dtype=np.float32).reshape(N)
    else:
        scale = stack.reshape(N, -1).max(axis=1) if stack.size else np.zeros(N, np.float32)
    scale = np.where(scale > 0, scale, 1.0).astype(np.float32)
    if N * R == 0 or C == 0:
        z = np.zeros(N * R, np.int32)
        return SparseImages((N, R, C), scale, z, z.copy(), z.copy(), np.zeros(0, np.uint8))
    # a value quantises to a level >= 1 when v * 255 / scale >= 0.5 (float32 throughout)
    flat = np.ascontiguousarray(stack).reshape(N * R, C)
    if spans is None:
        spans = (np.zeros(N * R, np.int32), np.full(N * R, C - 1, np.int32))
    first, last = (np.asarray(x, dtype=np.int32).reshape(N * R) for x in spans)
    lo, length, offset, values = _crop_rows(flat, scale / 510.0, 255.0 / scale, R, first, last)
    return SparseImages((N, R, C), scale, lo, length, offset, values)


def concat_images(a: SparseImages, b: SparseImages) -> SparseImages:
    """The images of ``a`` followed by those of ``b`` (same row and column counts)."""
    if a.shape[1:] != b.shape[1:]:
        raise ParameterError(
            f"found image stacks of shapes {a.shape} and {b.shape}, expected the same rows "
            "and columns; concatenate images of one utterance"
        )
    return SparseImages(
        (a.shape[0] + b.shape[0], a.shape[1], a.shape[2]),
        np.concatenate([a.scale, b.scale]),
        np.concatenate([a.lo, b.lo]),
        np.concatenate([a.length, b.length]),
        np.concatenate([a.offset, b.offset + a.values.size]).astype(np.int32),
        np.concatenate([a.values, b.values]),
    )


def decode_images(s: SparseImages, *, only: int | None = None) -> np.ndarray:
    """Dense float32 ``(N, R, C)`` from :func:`encode_images` (the browser does the
    same); ``only=i`` decodes image ``i`` alone (shape ``(1, R, C)``)."""
    N, R, C = s.shape
    sel = range(N) if only is None else [int(only)]
    out = np.zeros((len(sel), R, C), np.float32)
    for k, i in enumerate(sel):
        length = s.length[i * R : (i + 1) * R]
        offset = s.offset[i * R : (i + 1) * R]
        lo = s.lo[i * R : (i + 1) * R]
        rows = np.repeat(np.arange(R), length)
        pos = np.arange(rows.size) - np.repeat(np.cumsum(length) - length, length)
        cols = np.repeat(lo, length) + pos
        vals = s.values[np.repeat(offset, length) + pos]
        out[k, rows, cols] = vals.astype(np.float32) * (s.scale[i] / 255.0)
    return out


def frame_hover_text(ids: np.ndarray, probs: np.ndarray, blank_probs: np.ndarray, token) -> list:
    """One line per frame: the blank's and the most likely tokens' probabilities.

    ``token`` maps an id to its text. The text is plain (bokeh escapes tooltip fields).

    Examples
    --------
    >>> frame_hover_text(np.array([[2]]), np.array([[0.25]]), np.array([0.75]), str)
    ['blank 0.750 · 2 0.250']
    """
    ids, probs = np.asarray(ids), np.asarray(probs)
    if ids.shape != probs.shape:
        raise ParameterError(
            f"found ids of shape {ids.shape} and probabilities of shape {probs.shape}, "
            "expected the same; pass top_tokens' ids and probs"
        )
    lead = {i: f" · {token(i)} " for i in _ids_present(ids)}
    k = ids.shape[1] if ids.ndim == 2 else 0
    blank_text = ["blank " + b for b in three_decimals(blank_probs)]
    if len(blank_text) != len(ids):
        raise ParameterError(
            f"found {len(blank_text)} blank probabilities for {len(ids)} frames, expected "
            "one per frame; pass top_tokens' blank_probs"
        )
    # each entry's " · name p" once, then every frame's line joined from its row
    shown = ((ids >= 0) & (probs > 0)).reshape(-1).tolist()
    parts = [
        lead[i] + p if keep else ""
        for i, p, keep in zip(ids.reshape(-1).tolist(), three_decimals(probs), shown, strict=True)
    ]
    if k == 0:
        return blank_text
    return [b + "".join(parts[t * k : t * k + k]) for t, b in enumerate(blank_text)]


def _ids_present(ids: np.ndarray) -> list:
    """The distinct non-negative ids of ``ids``, ascending (``np.unique`` of them, by
    marking a table instead of sorting or hashing: ids index a vocabulary)."""
    ids = ids[ids >= 0]
    if ids.size == 0:
        return []
    seen = np.zeros(int(ids.max()) + 1, np.bool_)
    seen[ids] = True
    return np.flatnonzero(seen).tolist()


def _milli_table() -> list:
    """``f"{m / 1000:.3f}"`` for m = 0..1000."""
    return [f"{m // 1000}.{m % 1000:03d}" for m in range(1001)]


_MILLI = _milli_table()


def three_decimals(values) -> list:
    """Each value as ``f"{float(v):.3f}"`` writes it, in C order.

    Probabilities of float32 or float16 (24 bits or fewer) times 1000 are exact in
    float64, so ``rint`` of that product rounds as Python's correctly rounded format
    does (half to even on the exact value) and the text comes from a table; anything
    else (other dtypes, values outside [0, 1], negative zeros) is formatted by Python.

    Examples
    --------
    >>> three_decimals(np.array([0.0625, 0.5, 1.0], np.float32))
    ['0.062', '0.500', '1.000']
    """
    a = np.asarray(values).reshape(-1)
    if a.dtype not in (np.float32, np.float16):
        return [f"{x:.3f}" for x in a.tolist()]
    with np.errstate(invalid="ignore"):  # NaN: formatted by Python below
        m = np.rint(a.astype(np.float64) * 1000.0)
    inside = (m >= 0) & (m <= 1000) & ~np.signbit(a)  # NaN is neither; "-0.000" is Python's
    if not inside.all():
        return [f"{x:.3f}" for x in a.tolist()]
    return [_MILLI[i] for i in m.astype(np.int64).tolist()]
