"""NIST CTM word-time files: read and write.

One word per line, fields separated by white space, in the NIST order::

    <file> <channel> <begin_s> <duration_s> <word> [<confidence>]

NIST also allows two more fields, ``<type>`` and ``<speaker>``; they are accepted and
ignored. Lines starting with ``;;`` are comments. peekalign uses the ``<file>`` field
as the utterance id and writes channel ``1``.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable
from decimal import Decimal
from pathlib import Path

from ..exceptions import BundleError, ParameterError, describe
from ._text import read_text
from .atomic import atomic_write

__all__ = ["read_ctm", "write_ctm"]

_FIELDS = "<file> <channel> <begin_s> <duration_s> <word> [<confidence> [<type> [<speaker>]]]"


def _number(text: str, what: str, where: str, line: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise BundleError(
            describe(
                f"{what} {text!r} in {line.strip()!r}",
                "a finite number in seconds",
                f"fix that line; fields are {_FIELDS}",
                where=where,
            )
        )
    return value


def read_ctm(path: str | os.PathLike) -> dict[str, list[tuple[str, float, float]]]:
    """Read word times from a NIST CTM file.

    Parameters
    ----------
    path : str or path-like
        CTM file (UTF-8). Comment lines (``;;``) and blank lines are skipped.

    Returns
    -------
    dict of str to list of (str, float, float)
        Utterance id (the CTM ``<file>`` field) to ``(word, start_s, end_s)`` tuples
        sorted by start time (ties keep file order), with ``end_s = begin +
        duration`` (summed in decimal, so no float noise is added). Utterances appear
        in the order of their first line. The optional confidence field is checked to
        be a number, then dropped, as are the optional type and speaker fields.

    Raises
    ------
    BundleError
        When the file is missing or not UTF-8, or a line has the wrong number of
        fields, a non-numeric or negative time, a negative duration or a non-numeric
        confidence, or one utterance id appears with two channels. The message names
        the file and line number.

    Examples
    --------
    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "hyp.ctm")
    >>> with open(p, "w") as f:
    ...     _ = f.write(";; tram depot\\nd-01 1 0.480 0.320 depot 0.91\\nd-01 1 0.120 0.360 tram\\n")
    >>> read_ctm(p)
    {'d-01': [('tram', 0.12, 0.48), ('depot', 0.48, 0.8)]}
    """
    p = Path(path)
    # a byte-order mark (Windows editors write one) would otherwise stick to the first
    # utterance id, which then silently matches nothing
    text = read_text(p, what="CTM file")

    words: dict[str, list[tuple[str, float, float]]] = {}
    channels: dict[str, str] = {}
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith(";;"):
            continue
        where = f"{p}, line {number}"
        utt, channel, begin, begin_text, dur_text, word = _ctm_fields(stripped, where)
        seen = channels.setdefault(utt, channel)
        if seen != channel:
            raise BundleError(
                describe(
                    f"channel {channel!r} after channel {seen!r} for the same file id",
                    "one channel per file id",
                    "split the CTM per channel or give each channel its own file id",
                    utt=utt,
                    where=where,
                )
            )
        # Sum in decimal so "0.480" + "0.320" gives 0.8, not 0.7999999999999999.
        end = float(Decimal(begin_text) + Decimal(dur_text))
        words.setdefault(utt, []).append((word, begin, end))
    # A stable sort keeps the file order of words that start together.
    return {utt: sorted(rows, key=lambda r: r[1]) for utt, rows in words.items()}


def _ctm_fields(stripped: str, where: str) -> tuple:
    """One CTM line's fields, checked: ``(utt, channel, begin, begin_text, dur_text,
    word)``."""
    fields = stripped.split()
    if not 5 <= len(fields) <= 8:
        raise BundleError(
            describe(
                f"{len(fields)} fields in {stripped!r}",
                f"5 to 8 fields: {_FIELDS}",
                "fix that line; a word may not contain spaces",
                where=where,
            )
        )
    utt, channel, begin_text, dur_text, word = fields[:5]
    begin = _number(begin_text, "begin time", where, stripped)
    duration = _number(dur_text, "duration", where, stripped)
    if begin < 0:
        raise BundleError(
            describe(
                f"a negative begin time {begin_text}",
                "a begin time >= 0 s",
                "fix that line",
                utt=utt,
                where=where,
            )
        )
    if duration < 0:
        raise BundleError(
            describe(
                f"a negative duration {dur_text}",
                "a duration >= 0 s (the fourth field is a duration, not an end time)",
                "fix that line; write end - begin in the fourth field",
                utt=utt,
                where=where,
            )
        )
    if len(fields) >= 6:
        try:
            float(fields[5])
        except ValueError:
            raise BundleError(
                describe(
                    f"a sixth field {fields[5]!r} that is not a number",
                    "a confidence number",
                    "a word may not contain spaces; drop or fix the confidence",
                    utt=utt,
                    where=where,
                )
            ) from None
    return utt, channel, begin, begin_text, dur_text, word


def _check_token(value: object, what: str, index: int) -> str:
    if not isinstance(value, str) or not value or any(c.isspace() for c in value):
        raise ParameterError(
            f"The {what!r} field of row {index} of write_ctm must be a non-empty string "
            f"without white space. Got {value!r} instead."
        )
    return value


def _check_time(value: object, what: str, index: int) -> float:
    try:
        t = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        t = math.nan
    if not math.isfinite(t) or t < 0:
        raise ParameterError(
            f"The {what!r} field of row {index} of write_ctm must be a float in the range "
            f"[0, inf). Got {value!r} instead."
        )
    return t


def write_ctm(
    path: str | os.PathLike,
    rows: Iterable[tuple[str, str, float, float, float | None]],
    *,
    overwrite: bool = False,
) -> None:
    """Write word times as a NIST CTM file.

    Parameters
    ----------
    path : str or path-like
        Output file. Written through a temporary file and renamed into place.
    rows : iterable of (str, str, float, float, float or None)
        ``(utt_id, word, start_s, end_s, confidence)``; ``confidence`` may be None,
        which leaves out the optional sixth field for that line; otherwise a number
        in [0, 1] (the NIST confidence is a probability).
    overwrite : bool, default False
        Replace an existing file.

    Notes
    -----
    Times are written with 3 decimals (1 ms). Encoder frame times are multiples of
    the frame shift (10, 20, 40, 60 ms ...) plus an offset, so 1 ms resolution holds
    them exactly and removes float noise such as ``0.12000000000000001``. Begin and
    end are each rounded to whole milliseconds and the duration is their difference,
    so ``begin + duration`` read back gives the rounded end time. Confidence is
    written with 4 decimals. Lines are grouped by utterance (first-seen order) and
    sorted by begin time within it, so the bytes do not depend on how the rows were
    interleaved. Channel is always ``1``.

    Raises
    ------
    ParameterError
        When an id or word is empty or contains white space, a time is negative or
        not finite, ``end_s < start_s``, or the file exists and ``overwrite`` is
        false.

    Examples
    --------
    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "align.ctm")
    >>> write_ctm(p, [("d-01", "tram", 0.12, 0.48, None), ("d-01", "depot", 0.48, 0.8, 0.9)])
    >>> print(open(p).read(), end="")
    d-01 1 0.120 0.360 tram
    d-01 1 0.480 0.320 depot 0.9000
    """
    groups: dict[str, list[tuple[int, int, str, float | None]]] = {}
    for index, row in enumerate(rows):
        try:
            utt, word, start, end, conf = row
        except (TypeError, ValueError):
            raise ParameterError(
                "Each row of write_ctm must be a tuple (utt_id, word, start_s, end_s, "
                f"confidence_or_None). Got {row!r} at row {index} instead."
            ) from None
        _check_token(utt, "utt_id", index)
        _check_token(word, "word", index)
        start_ms = round(_check_time(start, "start_s", index) * 1000)
        end_ms = round(_check_time(end, "end_s", index) * 1000)
        if end_ms < start_ms:
            raise ParameterError(
                f"The 'end_s' field of row {index} of write_ctm must be >= start_s "
                f"({start!r}) for utt {utt!r}. Got {end!r} instead."
            )
        if conf is not None:
            try:
                conf = float(conf)
            except (TypeError, ValueError):
                conf = math.nan
            if not 0.0 <= conf <= 1.0:  # also rejects NaN
                raise ParameterError(
                    f"The 'confidence' field of row {index} of write_ctm must be a float "
                    f"in the range [0, 1] or None. Got {row[4]!r} instead."
                )
        groups.setdefault(utt, []).append((start_ms, end_ms - start_ms, word, conf))

    lines = []
    for utt, items in groups.items():
        for start_ms, dur_ms, word, conf in sorted(items, key=lambda r: r[0]):
            line = f"{utt} 1 {start_ms // 1000}.{start_ms % 1000:03d} "
            line += f"{dur_ms // 1000}.{dur_ms % 1000:03d} {word}"
            if conf is not None:
                line += f" {conf:.4f}"
            lines.append(line + "\n")
    with atomic_write(path, overwrite=overwrite) as f:
        f.write("".join(lines))
