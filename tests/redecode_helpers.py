"""Hand-built numpy decoders for the re-decoding tests (never part of the package)."""

from __future__ import annotations

import numpy as np

from peekalign.align import greedy_decode


class LateEcho:
    """Echoes CTC greedy token ``u`` once the window reaches ``delay(u)`` frames past the
    token's first frame (``delay = token id % 4``), and emits the word separator before.

    So at look-ahead ``e`` every token with ``id % 4 <= e`` comes out right: a WER curve
    that falls with the look-ahead and is exact at ``e >= 3``.
    """

    def __init__(self, separator: int = 1, eos: int = 29):
        self.separator = separator
        self.eos = eos

    def open(self, utt):
        width = max(utt.log_probs.shape[1], self.eos + 1)
        return _Bound(greedy_decode(utt.log_probs, blank=utt.blank), width, self.separator)


class _Bound:
    def __init__(self, greedy, width, separator):
        self.g = greedy
        self.width = width
        self.separator = separator

    def log_probs(self, prefixes, last_frames):
        out = np.full((len(prefixes), self.width), np.log(1e-3))
        for b, (p, e) in enumerate(zip(prefixes, last_frames, strict=True)):
            u = len(p)
            tok = self.separator
            if u < self.g.tokens.size:
                t = int(self.g.tokens[u])
                if e >= int(self.g.first[u]) + t % 4:
                    tok = t
            out[b, tok] = np.log(0.9)
        return out


def late_echo(bundle):
    """Factory for ``--decoder redecode_helpers:late_echo``."""
    return LateEcho()


def not_a_decoder(bundle):
    return object()
