"""Vocabulary, word-boundary rule and tokenisation of text."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .exceptions import BundleError, ParameterError, describe

__all__ = ["Vocabulary", "WordBoundary"]

_KINDS = ("prefix", "separator")


@dataclass(frozen=True)
class WordBoundary:
    """How tokens group into words.

    ``kind="prefix"``: a token starting with ``symbol`` (e.g. ``"▁"``) starts a word.
    ``kind="separator"``: the token ``symbol`` (e.g. ``"|"`` or ``" "``) stands between
    words and belongs to none.
    """

    kind: str = "prefix"
    symbol: str = "\u2581"

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise ParameterError(
                f"The 'kind' parameter of WordBoundary must be one of {_KINDS}. "
                f"Got {self.kind!r} instead."
            )
        if not isinstance(self.symbol, str) or not self.symbol:
            raise ParameterError(
                "The 'symbol' parameter of WordBoundary must be a non-empty str. "
                f"Got {self.symbol!r} instead."
            )


class Vocabulary:
    """Token inventory of a model: id ``i`` is ``tokens[i]``.

    Parameters
    ----------
    tokens : sequence of str
        One entry per output unit, blank included.
    blank : int
        Id of the CTC blank.
    boundary : WordBoundary
        The word-boundary rule.
    spm : object, optional
        A loaded ``sentencepiece.SentencePieceProcessor``; when given, text is cut into
        pieces by it and the pieces are looked up in ``tokens``.

    Examples
    --------
    >>> v = Vocabulary(["<b>", "|", "a", "b", "ab"], blank=0,
    ...                boundary=WordBoundary("separator", "|"))
    >>> v.encode("ab a").tolist()
    [4, 1, 2]
    >>> v.decode([4, 1, 2])
    'ab a'
    >>> v.words([4, 1, 2])
    [('ab', 0, 0), ('a', 2, 2)]
    """

    def __init__(
        self,
        tokens: Sequence[str],
        *,
        blank: int = 0,
        boundary: WordBoundary | None = None,
        spm=None,
    ) -> None:
        self.tokens: tuple[str, ...] = tuple(str(t) for t in tokens)
        if not self.tokens:
            raise ParameterError("The vocabulary is empty; vocab.txt needs one token a line.")
        if not (isinstance(blank, (int, np.integer)) and 0 <= blank < len(self.tokens)):
            raise ParameterError(
                f"The 'blank' parameter must be an int in the range [0, {len(self.tokens)}). "
                f"Got {blank!r} instead; it is the blank token's id (its line in vocab.txt, "
                "counting from 0)."
            )
        self.blank = int(blank)
        self.boundary = boundary or WordBoundary()
        self.spm = spm
        self._index: dict[str, int] = {}
        for i, t in enumerate(self.tokens):
            self._index.setdefault(t, i)
        self.separator_id: int | None = None
        if self.boundary.kind == "separator":
            self.separator_id = self._index.get(self.boundary.symbol)
            if self.separator_id is None:
                # without it no token ends a word: every transcript would be one word
                raise ParameterError(
                    f"The word separator {self.boundary.symbol!r} must be a token of the "
                    f"vocabulary. Got {len(self.tokens)} tokens without it instead; add it "
                    "to vocab.txt or state the model's own rule (word_boundary in "
                    "bundle.json)."
                )
        self._max_len = max(len(t) for t in self.tokens)
        self._has_upper = any(t != t.lower() for t in self.tokens)

    def __len__(self) -> int:
        return len(self.tokens)

    def __repr__(self) -> str:
        return (
            f"Vocabulary({len(self)} tokens, blank={self.blank}, "
            f"boundary={self.boundary.kind}:{self.boundary.symbol!r})"
        )

    def id(self, token: str) -> int:
        """Id of ``token``; raises ``KeyError`` when absent."""
        return self._index[token]

    def __contains__(self, token: str) -> bool:
        return token in self._index

    # -- text -> ids ---------------------------------------------------------
    def encode(self, text: str, *, utt: str | None = None) -> np.ndarray:
        """Token ids of ``text`` by the word-boundary rule.

        Words are split on white space. Each word is cut by greedy longest match over
        the vocabulary (or by the SentencePiece model when one was given). When the
        vocabulary has no upper-case token, the text is lower-cased first.

        Raises
        ------
        BundleError
            A word that cannot be tokenised, naming the word and the characters
            missing from the vocabulary.
        """
        if not self._has_upper:
            text = text.lower()
        words = text.split()
        if self.spm is not None:
            return self._encode_spm(words, utt=utt)
        ids: list[int] = []
        kind = self.boundary.kind
        if kind == "separator" and words and self.separator_id is None:
            raise BundleError(
                describe(
                    f"no token {self.boundary.symbol!r} in the vocabulary",
                    "the separator token of the word-boundary rule",
                    "add it to vocab.txt or fix 'word_boundary' in bundle.json",
                    utt=utt,
                ),
                utt=utt,
            )
        for n, word in enumerate(words):
            if kind == "separator":
                if n:
                    ids.append(self.separator_id)  # type: ignore[arg-type]
                ids.extend(self._greedy(word, word, utt=utt))
            else:
                ids.extend(self._greedy(self.boundary.symbol + word, word, utt=utt))
        return np.asarray(ids, dtype=np.int32)

    def _greedy(self, piece: str, word: str, *, utt: str | None) -> list[int]:
        out: list[int] = []
        i = 0
        while i < len(piece):
            for j in range(min(len(piece), i + self._max_len), i, -1):
                tid = self._index.get(piece[i:j])
                if tid is not None and tid != self.blank:
                    out.append(tid)
                    i = j
                    break
            else:
                self._untokenisable(word, utt=utt)
        return out

    def _untokenisable(self, word: str, *, utt: str | None) -> None:
        chars = sorted({c for c in word if c not in self._index})
        found = f"word {word!r}"
        if chars:
            found += f" with characters {''.join(chars)!r} not in the vocabulary"
        raise BundleError(
            describe(
                found,
                "words made of vocabulary tokens",
                "normalise the reference text or give 'ref_tokens' in utts.jsonl",
                utt=utt,
            ),
            utt=utt,
        )

    def _encode_spm(self, words: list[str], *, utt: str | None) -> np.ndarray:
        ids: list[int] = []
        for word in words:
            for piece in self.spm.encode(word, out_type=str):
                tid = self._index.get(piece)
                if tid is None:
                    self._untokenisable(word, utt=utt)
                ids.append(tid)  # type: ignore[arg-type]
        return np.asarray(ids, dtype=np.int32)

    # -- ids -> text ---------------------------------------------------------
    def token(self, token_id: int) -> str:
        """Text of one token id."""
        return self.tokens[int(token_id)]

    def words(self, ids: Iterable[int]) -> list[tuple[str, int, int]]:
        """Group token ids into words.

        Returns
        -------
        list of (word, first_index, last_index)
            Indices into ``ids``, inclusive. Separator tokens belong to no word;
            blanks are ignored.
        """
        out: list[tuple[str, int, int]] = []
        sym = self.boundary.symbol
        cur: list[str] = []
        first = -1
        last = -1
        for i, tid in enumerate(np.asarray(list(ids), dtype=np.int64).tolist()):
            if tid == self.blank:
                continue
            tok = self.tokens[tid]
            if self.boundary.kind == "separator":
                if tid == self.separator_id or tok == sym:
                    if cur:
                        out.append(("".join(cur), first, last))
                    cur, first = [], -1
                    continue
                if first < 0:
                    first = i
                cur.append(tok)
                last = i
            else:
                if tok.startswith(sym):
                    if cur:
                        out.append(("".join(cur), first, last))
                    cur, first = [tok[len(sym) :]], i
                else:
                    if first < 0:
                        first = i
                    cur.append(tok)
                last = i
        if first >= 0:
            out.append(("".join(cur), first, last))
        return out

    def decode(self, ids: Iterable[int]) -> str:
        """Text of token ids: words joined by single spaces."""
        return " ".join(w for w, _, _ in self.words(ids) if w)
