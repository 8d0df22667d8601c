"""Read a text file's bytes and decode them, with a clear :class:`BundleError` for
every way that can fail (missing, a folder, unreadable, undecodable).

Two kinds of file are read, and the messages speak of them differently:

- a file the user names (a CTM, a TextGrid): the message starts with its path and
  says what kind of file was expected (``what="CTM file"``);
- a member of a bundle (``member=True``; ``bundle.json``, ``vocab.txt``,
  ``utts.jsonl``): the message names the member and its path, and the fix points at
  the bundle folder.
"""

from __future__ import annotations

import codecs
from pathlib import Path

from ..exceptions import BundleError, ParameterError, describe

_UTF16_BOMS = (codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)


def read_bytes(path: Path, *, what: str, member: bool = False, bom: bool = False) -> bytes:
    """The bytes of ``path``, or a :class:`BundleError` naming the file and the fix.

    Parameters
    ----------
    path : Path
        File to read.
    what : str
        What the file is, as the message names it: a kind of file (``"CTM file"``),
        or with ``member=True`` the bundle member (``"utts.jsonl"``).
    member : bool, default False
        The file is part of a bundle (see the module notes).
    bom : bool, default False
        Drop a leading UTF-8 byte-order mark (for callers that decode the bytes
        piecewise themselves).

    Returns
    -------
    bytes

    Raises
    ------
    BundleError
        When the file is missing, is a folder (``member=True``; otherwise reported as
        unreadable) or cannot be read.
    """
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise _read_error(path, what, member, exc) from None
    return raw.removeprefix(codecs.BOM_UTF8) if bom else raw


def _read_error(path: Path, what: str, member: bool, exc: OSError) -> BundleError:
    # A named file leads with its path; a bundle member is named by its role, and
    # the fix points at the bundle folder the user passed.
    if not member:
        if isinstance(exc, FileNotFoundError):
            return BundleError(describe("no file", f"a {what}", "check the path", where=str(path)))
        return BundleError(
            describe(
                f"an unreadable file ({exc.strerror})",
                f"a readable {what}",
                "check the path and its permissions",
                where=str(path),
            )
        )
    if isinstance(exc, IsADirectoryError):
        found, expected = f"a folder at {str(path)!r}", f"the bundle's {what} file"
        fix = f"point the bundle at its {what} file"
    elif isinstance(exc, FileNotFoundError):
        found, expected = f"no {what} at {str(path)!r}", f"the bundle's {what}"
        fix = "check the bundle path (a folder holding bundle.json)"
    else:
        found = f"{what} {str(path)!r} unreadable ({exc.strerror})"
        expected, fix = "a readable file", "fix the file's permissions"
    return BundleError(describe(found, expected, fix))


def read_text(
    path: Path,
    *,
    what: str,
    member: bool = False,
    bom: bool = True,
    utf16: bool = False,
    expected: str = "a UTF-8 text file",
    fix: str = "re-encode the file as UTF-8 (e.g. iconv -t utf-8)",
) -> str:
    """The text of a UTF-8 file (or UTF-16 with a byte-order mark, when allowed).

    Parameters
    ----------
    path : Path
        File to read.
    what : str
        What the file is, as the message names it (see :func:`read_bytes`).
    member : bool, default False
        The file is part of a bundle (see the module notes).
    bom : bool, default True
        Drop a leading UTF-8 byte-order mark. With False it stays in the text as
        U+FEFF.
    utf16 : bool, default False
        Decode a file that starts with a UTF-16 byte-order mark as UTF-16 (Praat
        saves a TextGrid so when its text needs it). Without the mark UTF-16 cannot
        be told from other bytes, so UTF-8 is assumed.
    expected, fix : str
        The expected-and-fix part of the message for bytes that do not decode, for a
        file the user names (a bundle member's message is fixed).

    Returns
    -------
    str
        The decoded text; line ends are left as they are in the file.

    Raises
    ------
    BundleError
        As :func:`read_bytes`, and for bytes that do not decode. That message gives
        the byte offset of the first bad byte (counted after a dropped byte-order
        mark), except when UTF-16 was allowed (the offset would be in whichever
        encoding was tried).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "hyp.ctm"
    >>> _ = p.write_bytes(b"d-01 1 0.1 0.2 tram\\n\\xff\\n")
    >>> try:
    ...     read_text(p, what="CTM file")
    ... except BundleError as e:
    ...     print(str(e).split(": ", 1)[1])
    found bytes that are not UTF-8 at offset 20, expected a UTF-8 text file; re-encode the file as UTF-8 (e.g. iconv -t utf-8)
    """
    raw = read_bytes(path, what=what, member=member)
    # A file starting FF FE / FE FF is never valid UTF-8, so the mark decides alone.
    encoding = "utf-16" if utf16 and raw[:2] in _UTF16_BOMS else "utf-8"
    if encoding == "utf-8" and bom:
        encoding = "utf-8-sig"
    try:
        return raw.decode(encoding)
    except UnicodeDecodeError as exc:
        if member:
            found = f"{what} {str(path)!r} not UTF-8 (byte {exc.start})"
            raise BundleError(describe(found, "UTF-8 text", "re-save the file as UTF-8")) from None
        if utf16:
            found = "bytes that are neither UTF-8 nor UTF-16"
        else:
            found = f"bytes that are not UTF-8 at offset {exc.start}"
        raise BundleError(describe(found, expected, fix, where=str(path))) from None


def read_option_file(source, *, what: str) -> str:
    """The text of a file the user passes as an option (a GLM file, word counts, an
    entity list): :class:`ParameterError` when there is no such file, otherwise as
    :func:`read_text` (UTF-8, a byte-order mark dropped, a clear message for bytes that
    do not decode).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "counts.txt"
    >>> _ = p.write_text("tram 3\\n", encoding="utf-8")
    >>> read_option_file(p, what="word-count file")
    'tram 3\\n'
    """
    path = Path(source)
    if not path.is_file():
        raise ParameterError(describe(f"no file at {str(path)!r}", f"a {what}", "check the path"))
    return read_text(path, what=what)
