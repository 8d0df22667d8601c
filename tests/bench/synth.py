"""Seeded synthetic inputs for the benchmarks.

The log-posteriors look like a trained CTC model's: every frame is a log-softmax row
dominated by one class (the blank on about 70 % of the frames, else the token being
emitted), a few runner-up tokens per frame, and Gaussian noise underneath.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

BLANK = 0
N_WORD_START = 1000  # ids 1..1000 start a word ("▁w17"), the rest continue one ("p17")


def vocabulary(V: int) -> list[str]:
    """``V`` token strings: blank, word-start pieces (``▁`` prefix), continuations."""
    starts = min(N_WORD_START, V - 1)
    return (
        ["<b>"] + [f"\u2581w{i}" for i in range(starts)] + [f"p{i}" for i in range(V - 1 - starts)]
    )


def reference_tokens(rng: np.random.Generator, U: int, V: int) -> np.ndarray:
    """``U`` token ids grouped in words: one word-start token plus 0-2 continuations."""
    starts = min(N_WORD_START, V - 1)
    out: list[int] = []
    while len(out) < U:
        out.append(int(rng.integers(1, starts + 1)))
        for _ in range(int(rng.integers(0, 3))):
            if V - 1 > starts:
                out.append(int(rng.integers(starts + 1, V)))
    return np.asarray(out[:U], dtype=np.int64)


def peaky_log_probs(
    rng: np.random.Generator,
    T: int,
    V: int,
    tokens: np.ndarray,
    *,
    dtype=np.float32,
    chunk: int = 2048,
) -> np.ndarray:
    """(T, V) log-softmax rows that emit ``tokens`` with CTC-like spikes.

    Token ``u`` sits at 1-2 frames at a random place inside its share ``T / U`` of the
    utterance (a blank always separates neighbours); the winning class gets a margin
    of 7-12 over the noise (posterior 0.6-0.99), 1-3 runner-up tokens a margin of 2-6.
    Built ``chunk`` frames at a time so long inputs need no float64 (T, V) temporary.
    """
    U = int(tokens.size)
    if U and T < 3 * U:
        raise ValueError(f"T={T} too short for U={U} synthetic tokens (need 3 per token)")
    winner = np.full(T, BLANK, dtype=np.int64)
    if U:
        share = T / U
        starts = (np.arange(U) * share).astype(np.int64)
        width = np.maximum(1, (np.diff(np.r_[starts, T]) - 2))
        dur = np.minimum(rng.integers(1, 3, size=U), width)
        off = (rng.random(U) * (width - dur + 1)).astype(np.int64)
        first = starts + off
        for d in (0, 1):
            m = dur > d
            winner[first[m] + d] = tokens[m]
    out = np.empty((T, V), dtype=dtype)
    for a in range(0, T, chunk):
        b = min(T, a + chunk)
        n = b - a
        x = rng.standard_normal((n, V), dtype=np.float32) * np.float32(1.5)
        rows = np.arange(n)
        x[rows, winner[a:b]] += rng.uniform(7.0, 12.0, size=n).astype(np.float32)
        for _ in range(int(rng.integers(1, 4))):
            x[rows, rng.integers(1, V, size=n)] += rng.uniform(2.0, 6.0, size=n).astype(np.float32)
        x -= x.max(axis=1, keepdims=True)
        x -= np.log(np.exp(x).sum(axis=1, keepdims=True, dtype=np.float64)).astype(np.float32)
        out[a:b] = x
    return out


def attention(rng: np.random.Generator, shape, spikes: np.ndarray) -> np.ndarray:
    """Decoder cross-attention (L, H, U, T): each row a bump around its token's frame."""
    L, H, U, T = shape
    t = np.arange(T, dtype=np.float32)
    centre = np.asarray(spikes, dtype=np.float32)[:U]
    base = -0.5 * ((t[None, :] - centre[:, None]) / 3.0) ** 2  # (U, T)
    out = np.empty(shape, dtype=np.float32)
    for i in range(L):
        for j in range(H):
            shift = rng.normal(0.0, 1.0)
            z = base - 0.5 * shift + rng.normal(0.0, 0.3, size=(U, T)).astype(np.float32)
            z -= z.max(axis=1, keepdims=True)
            e = np.exp(z)
            out[i, j] = e / e.sum(axis=1, keepdims=True)
    return out


def audio(rng: np.random.Generator, seconds: float, sr: int = 16000) -> np.ndarray:
    """Speech-like noise: pink-ish noise with bursts of harmonic tones."""
    n = int(seconds * sr)
    y = rng.normal(0.0, 0.02, size=n).astype(np.float32)
    t = np.arange(n, dtype=np.float32) / sr
    for start in np.arange(0.0, seconds, 0.35):
        a, b = int(start * sr), int(min(seconds, start + 0.2) * sr)
        f0 = rng.uniform(90, 220)
        seg = t[a:b]
        y[a:b] += sum(0.1 / k * np.sin(2 * np.pi * k * f0 * seg) for k in range(1, 6)).astype(
            np.float32
        )
    return np.clip(y, -1, 1)


def utterance_arrays(rng, T: int, U: int, V: int, *, dtype=np.float32):
    """Reference tokens and matching log-posteriors for one utterance."""
    tokens = reference_tokens(rng, U, V)
    return tokens, peaky_log_probs(rng, T, V, tokens, dtype=dtype)


def write_corpus(
    path: Path, *, n: int, seconds: float, V: int, seed: int, with_audio: bool = True
) -> Path:
    """A bundle of ``n`` utterances of ``seconds`` each (float16 log_probs, 40 ms frames).

    About 5 tokens per second; the hypothesis drops about 5 % of the reference words.
    Written once per (n, seconds, V, seed): a finished bundle is reused.
    """
    from peekalign import BundleWriter, Vocabulary, WordBoundary

    done = path / ".complete"
    if done.exists():
        return path
    rng = np.random.default_rng(seed)
    vocab = vocabulary(V)
    voc = Vocabulary(vocab, boundary=WordBoundary("prefix", "\u2581"))
    T = int(round(seconds / 0.04))
    U = max(1, int(seconds * 5))
    with BundleWriter(
        path,
        vocab=vocab,
        blank=BLANK,
        frame_shift_s=0.04,
        word_boundary={"kind": "prefix", "symbol": "\u2581"},
        sample_rate=16000 if with_audio else None,
        encoder={"layers": 12, "lookahead_per_layer": 1},
        decoder={"lookahead": 6},
        overwrite=True,
    ) as w:
        for i in range(n):
            tokens, lp = utterance_arrays(rng, T, U, V, dtype=np.float32)
            words = voc.words(tokens)
            keep = [k for k in range(len(words)) if rng.random() > 0.05]
            hyp_ids = [int(t) for k in keep for t in tokens[words[k][1] : words[k][2] + 1]]
            w.add(
                f"utt-{i:05d}",
                lp.astype(np.float16),
                ref=voc.decode(tokens),
                ref_tokens=tokens,
                hyp_tokens=hyp_ids,
                audio=audio(rng, seconds) if with_audio else None,
            )
    done.write_text("ok\n")
    return path
