"""Each reference token's look-ahead need, measured with the user's decoder.

The decoder is teacher-forced: for reference token ``u`` with trigger frame ``n_u``
it gets the reference prefix ``ref[:u]`` and encoder frames ``[0, min(T - 1, n_u +
e)]`` for ``e = 0, 1, ..., max_lookahead``, and once with every frame (full context).
The token's **look-ahead need** is the smallest ``e`` from which its log-probability
stays within ``delta`` nats of its full-context log-probability (DEVELOPERS.md,
"Look-ahead need"). A set's needs, per word class, say which look-ahead its words ask
for: measured on the decoder itself, not inferred from the reach windows.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .corpus import Table
from .decoder import decoder_log_probs, window_end
from .exceptions import ParameterError
from .model import Utterance

__all__ = [
    "DEFAULT_DELTA",
    "DEFAULT_MAX_LOOKAHEAD",
    "LookaheadNeed",
    "lookahead_need",
    "need_summary",
    "word_class",
]

#: Default tolerance of the need: a token's log-prob may sit this many nats below its
#: full-context log-prob (0.1 nats: about 10 % of its probability).
DEFAULT_DELTA = 0.1
#: Largest look-ahead tried by default (frames); a token needing more has need inf.
DEFAULT_MAX_LOOKAHEAD = 30

# A small closed list: the default classes are a rough first cut; pass your own.
_NUMBER_WORDS = frozenset(
    "zero oh one two three four five six seven eight nine ten eleven twelve thirteen "
    "fourteen fifteen sixteen seventeen eighteen nineteen twenty thirty forty fifty "
    "sixty seventy eighty ninety hundred thousand".split()
)
_FUNCTION_WORDS = frozenset(
    "a an the and or but if of at in on to from by for with as is are was were be been "
    "it its this that these those he she we they you i me us them his her our your their "
    "not no do does did has have had will would can could shall should may might must "
    "there here then than so up out off over into onto via per".split()
)

SEPARATOR_CLASS = "(separator)"


def word_class(word: str) -> str:
    """Default word class: ``"number"``, ``"function"`` or ``"content"``.

    Number words (zero ... ninety, hundred, thousand, and digit strings) and a short
    closed list of English function words; everything else is content.

    Examples
    --------
    >>> word_class("seven"), word_class("at"), word_class("depot"), word_class("42")
    ('number', 'function', 'content', 'number')
    """
    w = word.casefold()
    if w.isdigit() or w in _NUMBER_WORDS:
        return "number"
    return "function" if w in _FUNCTION_WORDS else "content"


@dataclass(frozen=True, eq=False)
class LookaheadNeed:
    """Look-ahead need of every reference token of one utterance.

    Attributes
    ----------
    utt : str
    tokens : ndarray of int32, shape (U,)
        Reference token ids.
    trigger : ndarray of int32, shape (U,)
        Trigger frame ``n_u`` of each token.
    oracle : ndarray of bool, shape (U,)
        True where the trigger is the forced alignment's (no emitted token matched).
    lookaheads : ndarray of int32, shape (E,)
        ``0 .. max_lookahead``.
    log_probs : ndarray of float64, shape (U, E)
        Teacher-forced ``log P(ref[u] | ref[:u], frames [0, n_u + e])``.
    full : ndarray of float64, shape (U,)
        The same with every frame visible.
    need : ndarray of float64, shape (U,)
        Smallest ``e`` from which ``log_probs[u]`` stays within ``delta`` of ``full``
        (``inf``: more than ``max_lookahead``).
    word : ndarray of int64, shape (U,)
        Index of the reference word each token belongs to (-1: a separator).
    words : tuple of str
    classes : tuple of str
        Class of each word.
    delta : float
    num_frames : int
    token_text : tuple of str
    """

    utt: str
    tokens: np.ndarray
    trigger: np.ndarray
    oracle: np.ndarray
    lookaheads: np.ndarray
    log_probs: np.ndarray
    full: np.ndarray
    need: np.ndarray
    word: np.ndarray
    words: tuple
    classes: tuple
    delta: float
    num_frames: int
    token_text: tuple

    def __len__(self) -> int:
        return int(self.tokens.size)

    @property
    def word_need(self) -> np.ndarray:
        """Need of each word: the largest need of its tokens (float, inf possible)."""
        out = np.zeros(len(self.words))
        for w in range(len(self.words)):
            sel = self.need[self.word == w]
            out[w] = sel.max() if sel.size else 0.0
        return out

    def token_class(self, u: int) -> str:
        """Word class of token ``u`` (:data:`SEPARATOR_CLASS` for a separator)."""
        w = int(self.word[u])
        return SEPARATOR_CLASS if w < 0 else self.classes[w]

    def rows(self) -> list[dict]:
        """One dict per token: ``id, token_index, token, word, class, trigger_frame,
        oracle, need_frames, log_prob_full``."""
        return [
            {
                "id": self.utt,
                "token_index": u,
                "token": self.token_text[u],
                "word": "" if self.word[u] < 0 else self.words[int(self.word[u])],
                "class": self.token_class(u),
                "trigger_frame": int(self.trigger[u]),
                "oracle": bool(self.oracle[u]),
                "need_frames": float(self.need[u]),
                "log_prob_full": float(self.full[u]),
            }
            for u in range(len(self))
        ]

    def __repr__(self) -> str:
        fin = self.need[np.isfinite(self.need)]
        mx = f"{int(fin.max())}" if fin.size else "-"
        return (
            f"LookaheadNeed(utt={self.utt!r}, tokens={len(self)}, delta={self.delta}, "
            f"max finite need={mx}, beyond={int(np.sum(~np.isfinite(self.need)))})"
        )


def _need_of(lp: np.ndarray, full: np.ndarray, lookaheads: np.ndarray, delta: float):
    """Smallest look-ahead from which each row stays within ``delta`` of ``full``."""
    ok = lp >= (full - delta)[:, None]
    # from the right: stays ok from column j on
    stays = np.flip(np.logical_and.accumulate(np.flip(ok, axis=1), axis=1), axis=1)
    need = np.full(lp.shape[0], np.inf)
    has = stays.any(axis=1)
    need[has] = lookaheads[stays[has].argmax(axis=1)]
    return need


def _classify(classes, words: Sequence[str]) -> tuple:
    if classes is None:
        return tuple(word_class(w) for w in words)
    if isinstance(classes, Mapping):
        return tuple(str(classes.get(w, classes.get(w.casefold(), "other"))) for w in words)
    if callable(classes):
        return tuple(str(classes(w)) for w in words)
    raise ParameterError(
        "The 'classes' parameter of lookahead_need must be a dict word -> class, a "
        f"callable word -> class or None. Got {type(classes).__name__} instead."
    )


def _check_params(max_lookahead, delta) -> tuple[int, float]:
    fn = "lookahead_need"
    if isinstance(max_lookahead, bool) or not isinstance(max_lookahead, (int, np.integer)):
        max_lookahead = -1
    if max_lookahead < 0:
        raise ParameterError(
            f"The 'max_lookahead' parameter of {fn} must be an int >= 0. "
            f"Got {max_lookahead!r} instead."
        )
    ok = isinstance(delta, (int, float)) and not isinstance(delta, bool)
    if not (ok and math.isfinite(delta) and delta >= 0):
        raise ParameterError(
            f"The 'delta' parameter of {fn} must be a float in the range [0, inf) (nats). "
            f"Got {delta!r} instead."
        )
    return int(max_lookahead), float(delta)


def open_decoder(decoder, utt: Utterance):
    """An :class:`~peekalign.decoder.UtteranceDecoder` for ``utt``: ``decoder.open(utt)``
    for a :class:`~peekalign.decoder.Decoder`, ``decoder`` itself when it already has
    ``log_probs``."""
    if callable(getattr(decoder, "log_probs", None)):
        return decoder
    if callable(getattr(decoder, "open", None)):
        return decoder.open(utt)
    raise ParameterError(
        "The 'decoder' parameter must follow peekalign.decoder.Decoder (open(utt)) or "
        f"UtteranceDecoder (log_probs(prefixes, last_frames)). Got {type(decoder).__name__}."
    )


def lookahead_need(
    utt: Utterance,
    decoder,
    *,
    max_lookahead: int = DEFAULT_MAX_LOOKAHEAD,
    delta: float = DEFAULT_DELTA,
    triggers: str = "greedy",
    classes: Mapping[str, str] | Callable[[str], str] | None = None,
    alignment=None,
) -> LookaheadNeed:
    """Teacher-forced look-ahead need of each reference token of ``utt``.

    Parameters
    ----------
    utt : Utterance
    decoder : Decoder or UtteranceDecoder
        The attention decoder (opened on ``utt`` when it is a :class:`Decoder`).
    max_lookahead : int
        Look-aheads ``0 .. max_lookahead`` frames are tried (plus full context).
    delta : float
        Nats below the full-context log-prob still counted as enough (default
        :data:`DEFAULT_DELTA`).
    triggers : {"greedy", "search", "oracle"}
        Trigger frames of the reference tokens (:func:`peekalign.streaming.causal_triggers`).
    classes : dict or callable, optional
        Word -> class; default :func:`word_class`.
    alignment : Alignment, optional
        Forced alignment of ``utt.ref_tokens`` (computed when not given).

    Returns
    -------
    LookaheadNeed

    Examples
    --------
    A decoder that is sure of each token only once frame 5 is visible:

    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((8, 4), 0.01); p[:, 0] = 0.97
    >>> p[1] = [.03, .01, .95, .01]; p[3] = [.03, .95, .01, .01]; p[4] = [.03, .01, .01, .95]
    >>> u = Utterance.from_arrays(np.log(p), ref="a b", vocab=v)
    >>> class SeesFrame5:
    ...     def log_probs(self, prefixes, last_frames):
    ...         return np.array([[-1.0 if end < 5 else 0.0] * 4 for end in last_frames])
    >>> lookahead_need(u, SeesFrame5(), max_lookahead=6).need.tolist()
    [4.0, 2.0, 1.0]
    """
    from .align import align_tokens
    from .streaming import causal_triggers

    max_lookahead, delta = _check_params(max_lookahead, delta)
    if alignment is None:
        alignment = align_tokens(utt.log_probs, utt.ref_tokens, utt.blank, utt=utt.id)
    trig = causal_triggers(utt, alignment, source=triggers)
    udec = open_decoder(decoder, utt)
    T = utt.num_frames
    ref = alignment.tokens.astype(np.int64)
    U = int(ref.size)
    eps = np.arange(max_lookahead + 1, dtype=np.int32)
    # one batched call: every (prefix, last frame) pair once
    keys: dict[tuple, int] = {}
    index = np.zeros((U, eps.size + 1), np.int64)
    for u in range(U):
        prefix = tuple(ref[:u].tolist())
        ends = [window_end(int(trig.frames[u]), int(e), T) for e in eps] + [T - 1]
        for j, end in enumerate(ends):
            index[u, j] = keys.setdefault((prefix, end), len(keys))
    order = list(keys)
    if order:
        out = decoder_log_probs(udec, [k[0] for k in order], [k[1] for k in order], utt=utt.id)
        lp_all = out[index, ref[:, None]] if U else np.zeros((0, eps.size + 1))
    else:
        lp_all = np.zeros((0, eps.size + 1))
    lp, full = lp_all[:, :-1], lp_all[:, -1]
    need = _need_of(lp, full, eps, delta)
    runs = utt.vocab.words(ref)
    word = np.full(U, -1, np.int64)
    for w, (_, a, b) in enumerate(runs):
        word[a : b + 1] = w
    words = tuple(w for w, _, _ in runs)
    return LookaheadNeed(
        utt=utt.id,
        tokens=ref.astype(np.int32),
        trigger=trig.frames.astype(np.int32),
        oracle=np.asarray(trig.oracle, dtype=bool),
        lookaheads=eps,
        log_probs=lp,
        full=full,
        need=need,
        word=word,
        words=words,
        classes=_classify(classes, words),
        delta=delta,
        num_frames=T,
        token_text=tuple(utt.vocab.token(int(t)) for t in ref),
    )


NEED_COLUMNS = (
    "class",
    "tokens",
    "need_p50_frames",
    "need_p90_frames",
    "need_max_frames",
    "beyond_max",
    "within_lookahead",
)


def need_summary(needs: Sequence[LookaheadNeed], *, lookahead: int | None = None) -> Table:
    """Distribution of the look-ahead needs per word class, the whole set first.

    Columns :data:`NEED_COLUMNS`: tokens, the 50th and 90th percentiles (nearest rank
    from below, ``numpy.quantile(..., method="lower")``: a need is a whole frame count)
    and the largest need (``inf`` when some token needs more than the largest
    look-ahead tried; ``beyond_max`` counts them), and ``within_lookahead``, the share of
    tokens whose need is at most ``lookahead`` (NaN without it).

    Examples
    --------
    See :func:`lookahead_need`.
    """
    groups: dict[str, list[float]] = {"all": []}
    for n in needs:
        for u in range(len(n)):
            v = float(n.need[u])
            groups["all"].append(v)
            groups.setdefault(n.token_class(u), []).append(v)
    rows = []
    for name, vals in groups.items():
        a = np.asarray(vals, dtype=np.float64)
        if not a.size:
            rows.append((name, 0, *(float("nan"),) * 3, 0, float("nan")))
            continue
        p50, p90 = (float(np.quantile(a, q, method="lower")) for q in (0.5, 0.9))
        within = float(np.mean(a <= lookahead)) if lookahead is not None else float("nan")
        rows.append(
            (name, int(a.size), p50, p90, float(a.max()), int(np.sum(np.isinf(a))), within)
        )
    return Table(NEED_COLUMNS, rows)
