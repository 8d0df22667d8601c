"""A small back-off n-gram language model read from an ARPA file.

Meant for scoring prefixes in :func:`peekalign.search.prefix_search`: an
:class:`ArpaLM` is a callable ``lm(history, word) -> natural-log probability``.

Back-off (the ARPA convention): with ``h = (h1, ..., hn)``,
``P(w | h) = P*(h w)`` when the n-gram ``h w`` is listed, else
``bow(h) * P(w | h2 ... hn)``, where ``bow(h)`` is 1 when ``h`` is not listed as an
n-gram. The file stores log10 values; this class returns natural logs.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Sequence
from pathlib import Path

from .exceptions import BundleError, ParameterError, describe
from .io._text import read_text

__all__ = ["ArpaLM", "BOS", "EOS", "UNK"]

BOS = "<s>"
EOS = "</s>"
UNK = "<unk>"
LN10 = math.log(10.0)
# log10 probability of an unknown word when the model lists no <unk> (the value
# KenLM uses for a missing <unk>, from memory)
MISSING_UNK_LOG10 = -100.0


def _arpa_fail(name: str, lineno: int, found: str, expected: str, fix: str):
    """Raise the :class:`BundleError` of a bad ARPA line."""
    raise BundleError(describe(found, expected, fix, where=f"{name}:{lineno}"))


def _arpa_counts(lines: Sequence[str], name: str) -> tuple[dict[int, int], int]:
    """The ``\\data\\`` section's n-gram counts by order, and the index of the line
    after it."""

    def fail(lineno: int, found: str, expected: str, fix: str):
        _arpa_fail(name, lineno, found, expected, fix)

    i = 0
    n = len(lines)
    while i < n and lines[i].strip() != "\\data\\":
        i += 1
    if i == n:
        fail(1, "no '\\data\\' line", "an ARPA header '\\data\\'", "check the file is ARPA text")
    i += 1
    counts: dict[int, int] = {}
    while i < n:
        line = lines[i].strip()
        if line.startswith("\\"):
            break
        if line:
            key, _, value = line.partition("=")
            parts = key.split()
            if len(parts) != 2 or parts[0] != "ngram" or not parts[1].isdigit():
                fail(i + 1, repr(line), "'ngram N=COUNT'", "fix the \\data\\ section")
            try:
                count = int(value)
            except ValueError:
                fail(i + 1, repr(line), "'ngram N=COUNT' with an integer count",
                     "fix the \\data\\ section")  # fmt: skip
            order = int(parts[1])
            if order < 1 or count < 0 or order in counts:
                fail(i + 1, repr(line), "one line per order N >= 1 with COUNT >= 0",
                     "fix the \\data\\ section")  # fmt: skip
            counts[order] = count
        i += 1
    if not counts:
        fail(i + 1, "no 'ngram N=COUNT' lines", "at least 'ngram 1=...'",
             "fix the \\data\\ section")  # fmt: skip
    top = max(counts)
    if sorted(counts) != list(range(1, top + 1)):
        fail(i + 1, f"orders {sorted(counts)}", f"orders 1..{top} without gaps",
             "fix the \\data\\ section")  # fmt: skip
    return counts, i


def _arpa_entries(
    lines: Sequence[str], i: int, counts: dict[int, int], name: str
) -> tuple[dict, dict]:
    """The n-gram sections from line index ``i`` to ``\\end\\``: log10-probabilities
    and back-off weights by n-gram, checked against the declared ``counts``."""

    def fail(lineno: int, found: str, expected: str, fix: str):
        _arpa_fail(name, lineno, found, expected, fix)

    n = len(lines)
    top = max(counts)
    probs: dict[tuple[str, ...], float] = {}
    backoffs: dict[tuple[str, ...], float] = {}
    seen: dict[int, int] = {}
    order = 0
    ended = False
    while i < n:
        raw = lines[i]
        line = raw.strip()
        lineno = i + 1
        i += 1
        if not line:
            continue
        if line == "\\end\\":
            ended = True
            break
        if line.startswith("\\"):
            head = line[1:].removesuffix(":")
            num = head.removesuffix("-grams")
            if not line.endswith("-grams:") or not num.isdigit():
                fail(lineno, repr(line), "a section header '\\N-grams:' or '\\end\\'",
                     "fix the header")  # fmt: skip
            new = int(num)
            if new != order + 1 or new not in counts:
                fail(lineno, f"section '\\{new}-grams:' after order {order}",
                     f"'\\{order + 1}-grams:' (orders 1..{top} in turn)",
                     "reorder the sections or fix \\data\\")  # fmt: skip
            order = new
            seen[order] = 0
            continue
        if order == 0:
            fail(lineno, repr(line), "a '\\1-grams:' header before the entries",
                 "add the section header")  # fmt: skip
        fields = line.split()
        if len(fields) not in (order + 1, order + 2):
            fail(lineno, f"{len(fields)} fields in {line!r}",
                 f"log10-prob, {order} word(s) and an optional back-off weight",
                 f"fix the entry of the {order}-grams section")  # fmt: skip
        try:
            logp = float(fields[0])
            bow = float(fields[order + 1]) if len(fields) == order + 2 else None
        except ValueError:
            fail(lineno, repr(line), "numbers for the log10-prob and back-off weight",
                 "fix the entry")  # fmt: skip
        if math.isnan(logp) or logp > 0 or (bow is not None and math.isnan(bow)):
            fail(lineno, repr(line), "a log10 probability <= 0 (and a numeric back-off)",
                 "fix the entry")  # fmt: skip
        gram = tuple(fields[1 : order + 1])
        if gram in probs:
            fail(lineno, f"the {order}-gram {' '.join(gram)!r} a second time",
                 "each n-gram once", "remove the duplicate")  # fmt: skip
        probs[gram] = logp
        if bow is not None:
            backoffs[gram] = bow
        seen[order] += 1
    if not ended:
        fail(n, "no '\\end\\' line", "the file to end with '\\end\\'",
             "the file may be truncated; re-export it")  # fmt: skip
    for o, c in counts.items():
        if seen.get(o, 0) != c:
            fail(n, f"{seen.get(o, 0)} {o}-grams", f"{c} as declared in \\data\\",
                 "fix the count or the entries")  # fmt: skip
    return probs, backoffs


class ArpaLM:
    """Back-off n-gram LM.

    Parameters
    ----------
    probs : dict
        ``{ngram tuple: log10 probability}`` for every listed n-gram.
    backoffs : dict
        ``{ngram tuple: log10 back-off weight}`` (absent means 0).
    order : int
        Highest n-gram order.
    name : str
        Where the model came from (for messages).

    Examples
    --------
    >>> text = '''\\\\data\\\\
    ... ngram 1=3
    ... ngram 2=1
    ...
    ... \\\\1-grams:
    ... -1.0 <s> -0.5
    ... -0.5 tram -0.2
    ... -0.5 </s>
    ...
    ... \\\\2-grams:
    ... -0.1 <s> tram
    ...
    ... \\\\end\\\\
    ... '''
    >>> lm = ArpaLM.from_string(text)
    >>> round(lm.log10_prob((), "tram"), 6)   # listed bigram "<s> tram"
    -0.1
    >>> round(lm.log10_prob(("tram",), "tram"), 6)   # bow(tram) + P(tram)
    -0.7
    """

    def __init__(
        self, probs: dict, backoffs: dict | None = None, *, order: int, name: str = "<memory>"
    ) -> None:
        self._p: dict[tuple[str, ...], float] = dict(probs)
        self._bow: dict[tuple[str, ...], float] = dict(backoffs or {})
        self.order = int(order)
        self.name = name
        self.vocab = frozenset(k[0] for k in self._p if len(k) == 1)
        self.unk_log10 = self._p.get((UNK,), MISSING_UNK_LOG10)

    def __repr__(self) -> str:
        counts = [0] * self.order
        for k in self._p:
            counts[len(k) - 1] += 1
        return f"ArpaLM({self.name!r}, order={self.order}, ngrams={counts})"

    def __contains__(self, word: str) -> bool:
        return word in self.vocab

    # -- reading -------------------------------------------------------------
    @classmethod
    def from_file(cls, path: str | os.PathLike) -> ArpaLM:
        """Read an ARPA file (plain text, UTF-8; a byte-order mark is dropped)."""
        path = os.fspath(path)
        text = read_text(
            Path(path),
            what="ARPA language model file",
            expected="a UTF-8 text ARPA file",
            fix="decompress it (.gz) or re-encode it as UTF-8",
        )
        lines = text.splitlines()
        return cls._parse(lines, path)

    @classmethod
    def from_string(cls, text: str, *, name: str = "<string>") -> ArpaLM:
        """Parse ARPA text."""
        return cls._parse(text.splitlines(), name)

    @classmethod
    def _parse(cls, lines: Sequence[str], name: str) -> ArpaLM:
        counts, i = _arpa_counts(lines, name)
        probs, backoffs = _arpa_entries(lines, i, counts, name)
        return cls(probs, backoffs, order=max(counts), name=name)

    # -- scoring ---------------------------------------------------------------
    def log10_prob(self, history: Iterable[str], word: str, *, bos: bool = True) -> float:
        """log10 P(word | history) with back-off.

        Parameters
        ----------
        history : sequence of str
            Earlier words, oldest first (only the last ``order - 1`` matter).
        word : str
            The predicted word; ``"</s>"`` for the end of the sentence. Words not in
            the model are scored as ``<unk>`` (or log10 -100 when it has none).
        bos : bool
            Put ``<s>`` before ``history`` (history counts from the sentence start).

        Returns
        -------
        float
        """
        if word == BOS:
            raise ParameterError(
                f"The 'word' parameter of ArpaLM.log_prob must not be {BOS!r} (the "
                "sentence start is a context, never predicted). Got '<s>' instead."
            )
        ctx = tuple(w if w in self.vocab or w == BOS else UNK for w in history)
        if bos:
            ctx = (BOS,) + ctx
        ctx = ctx[len(ctx) - self.order + 1 :] if len(ctx) >= self.order else ctx
        if word not in self.vocab:
            word = UNK
        total = 0.0
        while True:
            p = self._p.get(ctx + (word,))
            if p is not None:
                return total + p
            if not ctx:
                return total + self.unk_log10
            total += self._bow.get(ctx, 0.0)
            ctx = ctx[1:]

    def log_prob(self, history: Iterable[str], word: str, *, bos: bool = True) -> float:
        """Natural-log P(word | history); see :meth:`log10_prob`."""
        return self.log10_prob(history, word, bos=bos) * LN10

    def __call__(self, history: Iterable[str], word: str) -> float:
        """``lm(history, word)``: the search's LM protocol (natural log)."""
        return self.log_prob(history, word)

    def sentence_log_prob(self, words: Sequence[str], *, eos: bool = True) -> float:
        """Natural-log probability of a whole sentence (``<s>`` ... ``</s>``)."""
        words = list(words)
        total = sum(self.log_prob(words[:i], w) for i, w in enumerate(words))
        if eos:
            total += self.log_prob(words, EOS)
        return total
