"""Exception types raised by peekalign.

Every message names what was found, what was expected and the fix; when an
utterance is involved, its id comes first (``utt 'b-0042': ...``).
"""

from __future__ import annotations

__all__ = [
    "PeekalignError",
    "ParameterError",
    "BundleError",
    "AlignmentError",
    "describe",
]


class PeekalignError(Exception):
    """Base class of every error peekalign raises on purpose.

    Parameters
    ----------
    message : str
        The full, user-facing message.
    utt : str, optional
        Id of the utterance the problem belongs to.
    """

    def __init__(self, message: str, *, utt: str | None = None) -> None:
        super().__init__(message)
        self.utt = utt


class ParameterError(PeekalignError, ValueError):
    """A function or command was called with a value outside its domain."""


class BundleError(PeekalignError):
    """Input data (a bundle, a Kaldi table, a TextGrid, a CTM, audio) is malformed."""


class AlignmentError(PeekalignError):
    """A CTC alignment is impossible for the given frames and labels."""


def describe(
    found: str, expected: str, fix: str, *, utt: str | None = None, where: str | None = None
) -> str:
    """Build the house-style one-line message.

    Parameters
    ----------
    found, expected, fix : str
        What was found, what was expected and how to fix it.
    utt : str, optional
        Utterance id, put first when given.
    where : str, optional
        A file or field name, put after the utterance id.

    Returns
    -------
    str

    Examples
    --------
    >>> describe("41 frames", "at least 57", "check the frame shift", utt="b-1")
    "utt 'b-1': found 41 frames, expected at least 57; check the frame shift"
    """
    head = []
    if utt is not None:
        head.append(f"utt {utt!r}")
    if where is not None:
        head.append(where)
    prefix = ": ".join(head)
    body = f"found {found}, expected {expected}; {fix}"
    return f"{prefix}: {body}" if prefix else body


class PeekalignWarning(UserWarning):
    """Something was fixed up on the way in (e.g. probabilities turned into log-probs)."""


__all__ += ["PeekalignWarning"]
