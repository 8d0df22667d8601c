"""Praat TextGrid files (interval tiers): read and write, through ``praatio``."""

from __future__ import annotations

import math
import os
import re
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path

from praatio import textgrid as _tg
from praatio.utilities import textgrid_io as _tgio

from ..exceptions import BundleError, ParameterError, describe
from ._text import read_text
from .atomic import atomic_write, check_target

__all__ = ["write_textgrid", "read_textgrid_tiers", "read_textgrid_words"]

Interval = tuple[float, float, str]

# Times are rounded to 1 us: this removes float noise from frame arithmetic
# (0.04 * 3 = 0.12000000000000001) and stays far below one sample at 16 kHz (62.5 us).
_DECIMALS = 6


def _clean_interval(tier: str, index: int, item: object) -> Interval:
    try:
        start, end, label = item  # type: ignore[misc]
        start, end = float(start), float(end)
    except (TypeError, ValueError):
        raise ParameterError(
            f"Interval {index} of tier {tier!r} of write_textgrid must be a tuple "
            f"(start_s, end_s, label). Got {item!r} instead."
        ) from None
    if not (math.isfinite(start) and math.isfinite(end)):
        raise ParameterError(
            f"Interval {index} of tier {tier!r} of write_textgrid must have finite times. "
            f"Got {item!r} instead."
        )
    start, end = round(start, _DECIMALS), round(end, _DECIMALS)
    if not end > start:
        raise ParameterError(
            f"Interval {index} of tier {tier!r} of write_textgrid must end after it starts "
            f"(by at least 1 us). Got {item!r} instead."
        )
    return start, end, str(label)


def write_textgrid(
    path: str | os.PathLike,
    tiers: dict[str, list[tuple[float, float, str]]],
    *,
    xmax: float,
    xmin: float = 0.0,
    overwrite: bool = False,
) -> None:
    """Write interval tiers as a Praat TextGrid (long text format, UTF-8).

    Parameters
    ----------
    path : str or path-like
        Output file. Written through a temporary file and renamed into place.
    tiers : dict of str to list of (float, float, str)
        Tier name to ``(start_s, end_s, label)`` intervals, in any order; they may
        leave gaps (filled with empty intervals, as Praat expects) but must not
        overlap. Tiers are written in the dict's order.
    xmax : float
        End of the TextGrid in seconds (usually the audio duration).
    xmin : float, default 0.0
        Start of the TextGrid in seconds.
    overwrite : bool, default False
        Replace an existing file.

    Notes
    -----
    Times are rounded to 6 decimals (1 us) so frame-arithmetic noise does not reach
    the file. Labels keep their text except leading and trailing white space, which
    Praat-format readers strip.

    Raises
    ------
    ParameterError
        For an empty tier name, an interval with ``end <= start`` or outside
        ``[xmin, xmax]``, overlapping intervals, or an existing file without
        ``overwrite``.

    Examples
    --------
    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "d-01.TextGrid")
    >>> write_textgrid(p, {"words": [(0.12, 0.48, "tram"), (0.48, 0.8, "depot")]}, xmax=1.0)
    >>> read_textgrid_words(p)
    [('tram', 0.12, 0.48), ('depot', 0.48, 0.8)]
    """
    try:
        lo, hi = float(xmin), float(xmax)
    except (TypeError, ValueError):
        lo, hi = math.nan, math.nan
    if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
        raise ParameterError(
            "The 'xmax' parameter of write_textgrid must be a float greater than xmin "
            f"({xmin!r}). Got {xmax!r} instead."
        )
    lo, hi = round(lo, _DECIMALS), round(hi, _DECIMALS)
    if not isinstance(tiers, Mapping):
        raise ParameterError(
            "The 'tiers' parameter of write_textgrid must be a dict of tier name to "
            f"[(start_s, end_s, label), ...]. Got {type(tiers).__name__} instead."
        )
    check_target(path, overwrite=overwrite)

    grid = _tg.Textgrid(lo, hi)
    for name, intervals in tiers.items():
        if not isinstance(name, str) or not name.strip():
            raise ParameterError(
                f"Tier names of write_textgrid must be non-empty strings. Got {name!r} instead."
            )
        if isinstance(intervals, (str, bytes)) or not isinstance(intervals, Iterable):
            raise ParameterError(
                f"Tier {name!r} of write_textgrid must be a list of (start_s, end_s, label). "
                f"Got {intervals!r} instead."
            )
        entries = sorted(
            (_clean_interval(name, i, item) for i, item in enumerate(intervals)),
            key=lambda e: (e[0], e[1]),
        )
        for i, (start, end, label) in enumerate(entries):
            if start < lo or end > hi:
                raise ParameterError(
                    f"Intervals of tier {name!r} of write_textgrid must lie in [xmin, xmax] "
                    f"= [{lo}, {hi}]. Got {(start, end, label)!r} instead; "
                    "pass the audio duration as xmax."
                )
            if i and start < entries[i - 1][1]:
                raise ParameterError(
                    f"Intervals of tier {name!r} of write_textgrid must not overlap. Got "
                    f"{entries[i - 1]!r} and {(start, end, label)!r} instead."
                )
        grid.addTier(_tg.IntervalTier(name, entries, lo, hi))

    # praatio writes only to a named path; render into a private folder, then move the
    # text into place atomically.
    try:
        with tempfile.TemporaryDirectory(prefix="peekalign-tg-") as tmp:
            rendered = os.path.join(tmp, "out.TextGrid")
            grid.save(
                rendered,
                format="long_textgrid",
                includeBlankSpaces=True,
                minimumIntervalLength=None,
                reportingMode="error",
            )
            text = Path(rendered).read_text(encoding="utf-8")
    except OSError as exc:  # a full or unwritable temporary folder
        raise ParameterError(
            f"writing {str(path)!r} failed while rendering it in the temporary folder "
            f"{tempfile.gettempdir()!r} ({exc.strerror or exc}); nothing was written; "
            "check free space and permissions there (or set TMPDIR)"
        ) from exc
    with atomic_write(path, overwrite=overwrite) as f:
        f.write(text)


_TIME_LINE = re.compile(r"^\s*(xmin|xmax|number)\s*=\s*(\S+)\s*$")


def _line_of(text: str, tier_number: int, interval_number: int | None) -> str:
    """Line of ``item [k]`` / ``intervals [n]`` in a long-format file, else ''."""
    m = re.search(rf"item \[{tier_number}\]:", text)
    if m is None:
        return ""
    pos = m.start()
    if interval_number is not None:
        m2 = re.compile(rf"intervals \[{interval_number}\]:").search(text, pos)
        if m2 is None:
            return ""
        pos = m2.start()
    return f", line {text.count(chr(10), 0, pos) + 1}"


def _parse(p: Path) -> tuple[str, dict]:
    """Read and parse a TextGrid with praatio, after checks that name the place of a
    bad value."""
    # Praat saves UTF-16 (with BOM) when the text needs it, UTF-8 otherwise.
    text = read_text(
        p,
        what="TextGrid file",
        utf16=True,
        expected="a Praat text TextGrid",
        fix="open it in Praat and save it as a text file",
    )
    if "ooTextFile" not in text[:200] or "TextGrid" not in text[:200]:
        raise BundleError(
            describe(
                f"a file starting {text[:40]!r}",
                'a Praat text TextGrid (File type = "ooTextFile", Object class = "TextGrid")',
                "open it in Praat and save it as a text file",
                where=str(p),
            )
        )
    _check_time_lines(text, p)
    try:
        data = _tgio.parseTextgridStr(text, includeEmptyIntervals=True)
    except Exception as exc:  # praatio raises bare ValueError/IndexError on bad text
        raise BundleError(
            describe(
                f"text praatio cannot parse ({type(exc).__name__}: {exc})",
                "a well-formed TextGrid",
                "open it in Praat and save it again as a text file",
                where=str(p),
            )
        ) from None
    _check_intervals(text, data, p)
    return text, data


def _check_time_lines(text: str, p: Path) -> None:
    """A non-finite xmin/xmax line, by its line number (praatio reports a bad number
    without its place)."""
    # long format: one time a line
    for number, line in enumerate(text.splitlines(), start=1):
        m = _TIME_LINE.match(line)
        if m is None:
            continue
        try:
            value = float(m.group(2))
        except ValueError:
            value = math.nan
        if not math.isfinite(value):
            raise BundleError(
                describe(
                    f"{m.group(1)} = {m.group(2)!r}",
                    "finite numbers of seconds",
                    f"fix that {m.group(1)} value",
                    where=f"{p}, line {number}",
                )
            )


def _check_intervals(text: str, data: dict, p: Path) -> None:
    """A bad interval (times not finite, end <= start, overlap), with its tier, number
    and line."""
    for k, tier in enumerate(data["tiers"], start=1):
        if tier["class"] != "IntervalTier":
            continue
        prev_end = -math.inf
        for n, (start_text, end_text, _label) in enumerate(tier["entries"], start=1):
            where = f"{p}{_line_of(text, k, n)}"
            try:
                start, end = float(start_text), float(end_text)
            except (TypeError, ValueError):
                start = end = math.nan
            if not (math.isfinite(start) and math.isfinite(end)):
                raise BundleError(
                    describe(
                        f"interval {n} of tier {tier['name']!r} with times "
                        f"{start_text!r}, {end_text!r}",
                        "finite numbers of seconds",
                        "fix that interval's xmin/xmax",
                        where=where,
                    )
                )
            if not end > start:
                raise BundleError(
                    describe(
                        f"interval {n} of tier {tier['name']!r} from {start} to {end} s",
                        "end > start",
                        "fix or delete that interval in Praat",
                        where=where,
                    )
                )
            if start < prev_end:
                raise BundleError(
                    describe(
                        f"interval {n} of tier {tier['name']!r} starting at {start} s "
                        f"before the previous one ends ({prev_end} s)",
                        "intervals in time order without overlap",
                        "fix the interval times in Praat",
                        where=where,
                    )
                )
            prev_end = end


def _open(p: Path):
    _parse(p)  # clear messages for malformed files before praatio's own checks
    try:
        return _tg.openTextgrid(
            str(p),
            includeEmptyIntervals=False,
            duplicateNamesMode="rename",
            reportingMode="silence",
        )
    except Exception as exc:
        raise BundleError(
            describe(
                f"a TextGrid praatio rejects ({type(exc).__name__}: {exc})",
                "a well-formed TextGrid",
                "open it in Praat and save it again as a text file",
                where=str(p),
            )
        ) from None


def read_textgrid_tiers(path: str | os.PathLike) -> dict[str, list[tuple[float, float, str]]]:
    """Read every interval tier of a TextGrid.

    Parameters
    ----------
    path : str or path-like
        A Praat TextGrid in long or short text format (UTF-8 or UTF-16).

    Returns
    -------
    dict of str to list of (float, float, str)
        Tier name to ``(start_s, end_s, label)`` intervals in time order, intervals
        with an empty label dropped, in the file's tier order. Point tiers are left
        out. Repeated tier names get a suffix (``words_2``).

    Raises
    ------
    BundleError
        When the file is missing, is not a text TextGrid, or has an interval with
        ``end <= start`` or overlapping intervals (naming tier, interval and line).

    Examples
    --------
    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "d-01.TextGrid")
    >>> write_textgrid(p, {"words": [(0.1, 0.5, "tram")], "phones": [(0.1, 0.2, "t")]},
    ...                xmax=0.6)
    >>> read_textgrid_tiers(p)
    {'words': [(0.1, 0.5, 'tram')], 'phones': [(0.1, 0.2, 't')]}
    """
    grid = _open(Path(path))
    out = {}
    for name in grid.tierNames:
        tier = grid.getTier(name)
        if isinstance(tier, _tg.IntervalTier):
            out[name] = [(float(e.start), float(e.end), e.label) for e in tier.entries]
    return out


def read_textgrid_words(
    path: str | os.PathLike, *, tier: str | None = None
) -> list[tuple[str, float, float]]:
    """Read word times from one interval tier of a TextGrid.

    Parameters
    ----------
    path : str or path-like
        A Praat TextGrid in long or short text format.
    tier : str, optional
        Tier to read. By default the tier named ``words`` (any case; an exact
        match wins), else the first interval tier.

    Returns
    -------
    list of (str, float, float)
        ``(word, start_s, end_s)`` in time order; empty labels are dropped.

    Raises
    ------
    BundleError
        When the file is malformed (see :func:`read_textgrid_tiers`), the tier is
        missing or a point tier (the message lists the tiers found), or the file has
        no interval tier.

    Examples
    --------
    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "d-01.TextGrid")
    >>> write_textgrid(p, {"phones": [(0.1, 0.2, "t")], "Words": [(0.1, 0.5, "tram")]},
    ...                xmax=0.6)
    >>> read_textgrid_words(p)
    [('tram', 0.1, 0.5)]
    >>> read_textgrid_words(p, tier="phones")
    [('t', 0.1, 0.2)]
    """
    p = Path(path)
    grid = _open(p)
    kinds = {
        name: ("interval" if isinstance(grid.getTier(name), _tg.IntervalTier) else "point")
        for name in grid.tierNames
    }
    found = ", ".join(f"{n!r} ({k})" for n, k in kinds.items()) or "no tiers"
    intervals = [n for n, k in kinds.items() if k == "interval"]
    if tier is None:
        named = [n for n in intervals if n.lower() == "words"]
        if "words" in named:
            chosen = "words"
        elif named:
            chosen = named[0]
        elif intervals:
            chosen = intervals[0]
        else:
            raise BundleError(
                describe(
                    f"tiers {found}",
                    "at least one interval tier",
                    "add a word tier in Praat or pass another file",
                    where=str(p),
                )
            )
    elif kinds.get(tier) != "interval":
        raise BundleError(
            describe(
                f"no interval tier {tier!r} among {found}",
                f"an interval tier named {tier!r}",
                "pass one of the interval tiers found as tier=",
                where=str(p),
            )
        )
    else:
        chosen = tier
    return [(e.label, float(e.start), float(e.end)) for e in grid.getTier(chosen).entries]
