"""The peek widget's state: which utterance, token, look-ahead, attention view and floor.

Plain Python, no widgets: the controls write into it through :meth:`PeekState.set`
(which checks every value) and the peek widget redraws from it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace

import numpy as np

from ..exceptions import ParameterError

__all__ = ["PeekState"]


def _int(name: str, value, lo: int, hi: int | None = None) -> int:
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool)
    ok = ok and value >= lo and (hi is None or value <= hi)
    if not ok:
        rng = f"[{lo}, inf)" if hi is None else f"[{lo}, {hi}]"
        raise ParameterError(
            f"The {name!r} parameter of peek must be an int in the range {rng}. "
            f"Got {value!r} instead."
        )
    return int(value)


@dataclass(frozen=True)
class PeekState:
    """What the peek widget shows.

    Attributes
    ----------
    utt : str
        Utterance id.
    token : int
        Selected reference token (index into the reference tokens), -1 for none.
    lookahead : int
        Decoder look-ahead in encoder frames.
    attention : str
        Attention view: ``"mean"``, ``"L<l>"`` (a layer's mean of heads) or
        ``"L<l>H<h>"`` (one head), 0-based.
    floor : float
        Posterior floor of the deletion diagnosis (``no-spike`` below it).
    word : int
        Selected reference word, -1 for none (follows the token).

    Examples
    --------
    >>> s = PeekState("u1", token=0, lookahead=4)
    >>> s.set(lookahead=6, num_tokens=3).lookahead
    6
    """

    utt: str
    token: int = -1
    lookahead: int = 0
    attention: str = "mean"
    floor: float = 0.05
    word: int = -1

    def set(self, *, num_tokens: int | None = None, num_words: int | None = None, **changes):
        """A copy with ``changes`` applied, each value checked.

        ``num_tokens`` / ``num_words`` bound ``token`` / ``word`` when given.
        """
        known = {f.name for f in fields(self)}
        unknown = sorted(set(changes) - known)
        if unknown:
            raise ParameterError(
                f"found state field(s) {unknown}, expected some of {sorted(known)}; "
                "check the spelling"
            )
        if "token" in changes:
            hi = None if num_tokens is None else num_tokens - 1
            changes["token"] = _int("token", changes["token"], -1, hi)
        if "word" in changes:
            hi = None if num_words is None else num_words - 1
            changes["word"] = _int("word", changes["word"], -1, hi)
        if "lookahead" in changes:
            changes["lookahead"] = _int("lookahead", changes["lookahead"], 0)
        if "floor" in changes:
            f = changes["floor"]
            ok = isinstance(f, (int, float, np.floating)) and not isinstance(f, bool)
            if not ok or not (0.0 <= float(f) <= 1.0) or math.isnan(float(f)):
                raise ParameterError(
                    "The 'floor' parameter of peek must be a float in the range [0, 1]. "
                    f"Got {f!r} instead."
                )
            changes["floor"] = float(f)
        if "attention" in changes and not isinstance(changes["attention"], str):
            raise ParameterError(
                "The 'attention' parameter of peek must be a str such as 'mean', 'L0' "
                f"or 'L0H1'. Got {changes['attention']!r} instead."
            )
        if "utt" in changes and not isinstance(changes["utt"], str):
            raise ParameterError(
                f"The 'utt' parameter of peek must be a str (an utterance id). "
                f"Got {changes['utt']!r} instead."
            )
        return replace(self, **changes)
