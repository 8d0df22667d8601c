"""Kaldi archive (ark) and script (scp) tables of matrices, through ``kaldiio``.

A Kaldi rxspecifier may be a shell command (``gunzip -c x.ark.gz |``). Reading one
runs that command, so peekalign refuses pipes unless the caller says the file is
trusted (``allow_pipes=True``, ``--allow-pipes`` on the command line).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path

import kaldiio
import numpy as np
from kaldiio.matio import read_kaldi, read_token

from ..exceptions import BundleError, ParameterError, describe
from .atomic import atomic_write, check_target

__all__ = ["read_kaldi_matrices", "write_kaldi_matrices"]

_PIPE_FIX = (
    "reading it would run a shell command; pass allow_pipes=True (--allow-pipes) "
    "only for files you trust, or convert the table to a plain ark first"
)


def _is_pipe(rx: str) -> bool:
    rx = rx.strip()
    return rx.endswith("|") or rx.startswith("|")


_FLAGS = {"ark", "scp", "t", "b", "o", "s", "cs", "p"}


def _parse_spec(spec: str | os.PathLike) -> tuple[str, str]:
    """Return ``(kind, target)`` with kind 'ark' or 'scp'."""
    text = os.fspath(spec)
    bad = ParameterError(
        "The 'spec' parameter of read_kaldi_matrices must be 'scp:PATH', 'ark:PATH' or "
        f"a path ending in .scp or .ark. Got {text!r} instead."
    )
    head, sep, rest = text.partition(":")
    flags = head.split(",")
    if sep and ({"ark", "scp"} & set(flags)) and not os.path.exists(text):
        # A Kaldi rspecifier: exactly one of ark/scp, known flags (ignored), a target.
        if ("ark" in flags) == ("scp" in flags) or not set(flags) <= _FLAGS or not rest.strip():
            raise bad
        return ("ark" if "ark" in flags else "scp"), rest
    if text.endswith(".scp"):
        return "scp", text
    if text.endswith(".ark"):
        return "ark", text
    raise bad


def _check_value(value: object, key: str, where: str) -> np.ndarray:
    if isinstance(value, np.ndarray) and value.ndim in (1, 2):
        return value
    found = "audio (rate, samples)" if isinstance(value, tuple) else type(value).__name__
    raise BundleError(
        describe(
            f"an entry holding {found}",
            "a Kaldi matrix or vector",
            "point the spec at a feature/posterior table (audio goes through load_audio)",
            utt=key,
            where=where,
        )
    )


def _open_source(target: str, mode: str, *, what: str):
    try:
        return kaldiio.utils.open_like_kaldi(target, mode)
    except FileNotFoundError:
        raise BundleError(
            describe(
                "no file",
                f"a Kaldi {what} file",
                "check the path (relative paths are taken from the current folder)",
                where=target,
            )
        ) from None
    except OSError as exc:
        raise BundleError(
            describe(
                f"an unreadable file ({exc.strerror})",
                f"a readable Kaldi {what} file",
                "check the path and its permissions",
                where=target,
            )
        ) from None


def _close(fd, target: str) -> None:
    status = fd.close()
    if status:  # a pipe whose command failed
        raise BundleError(
            describe(
                f"the command exiting with status {status >> 8}",
                "a command that succeeds",
                "run the command in a shell to see its error",
                where=target,
            )
        )


def _iter_ark(target: str) -> Iterator[tuple[str, np.ndarray]]:
    fd = _open_source(target, "rb", what="ark")
    count = 0
    key = None
    done = False
    try:
        while True:
            where = f"{target}, entry {count + 1}"
            try:
                key = read_token(fd)
                if key is None:
                    break
                value = read_kaldi(fd)
            except Exception as exc:  # kaldiio raises asserts/struct errors on bad bytes
                raise BundleError(
                    describe(
                        f"bytes kaldiio cannot read ({type(exc).__name__}: {exc})",
                        "a Kaldi binary or text archive of matrices",
                        "check the file is a complete ark (not truncated, not an scp)",
                        utt=key,
                        where=where,
                    )
                ) from None
            count += 1
            yield key, _check_value(value, key, where)
        done = True
    finally:
        if done:
            _close(fd, target)  # reports a failed pipe command
        else:  # stopped early or failed: a pipe's exit status means nothing here
            with contextlib.suppress(Exception):
                fd.close()


def _scp_entries(target: str, *, allow_pipes: bool) -> list[tuple[int, str, str]]:
    if _is_pipe(target) and not allow_pipes:
        raise BundleError(describe("a pipe as the scp source", "a file path", _PIPE_FIX))
    fd = _open_source(target, "r", what="scp")
    try:
        try:
            lines = list(fd)
        except UnicodeDecodeError:
            raise BundleError(
                describe(
                    "bytes that are not UTF-8",
                    "a text scp file (key rxspecifier per line)",
                    "pass a binary archive as ark:PATH, not scp:PATH",
                    where=target,
                )
            ) from None
    finally:
        _close(fd, target)
    entries = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        parts = line.strip().split(None, 1)
        where = f"{target}, line {number}"
        if len(parts) != 2:
            raise BundleError(
                describe(
                    f"{line.strip()!r}",
                    "'<key> <rxspecifier>' (e.g. 'utt1 feats.ark:9')",
                    "fix that line",
                    where=where,
                )
            )
        key, rx = parts
        if _is_pipe(rx) and not allow_pipes:
            raise BundleError(
                describe(f"the pipe {rx!r}", "a path[:offset]", _PIPE_FIX, utt=key, where=where)
            )
        entries.append((number, key, rx))
    return entries


def _iter_scp(target: str, entries: list[tuple[int, str, str]]):
    fds: dict = {}  # kaldiio keeps one open handle per ark here
    try:
        for number, key, rx in entries:
            where = f"{target}, line {number}"
            try:
                value = kaldiio.load_mat(rx, fd_dict=None if _is_pipe(rx) else fds)
            except FileNotFoundError as exc:
                raise BundleError(
                    describe(
                        f"no file {exc.filename!r} for entry {rx!r}",
                        "an existing ark",
                        "relative paths in an scp are taken from the current folder, as "
                        "in Kaldi: run from the folder the scp was made in or make the "
                        "paths absolute",
                        utt=key,
                        where=where,
                    )
                ) from None
            except Exception as exc:
                raise BundleError(
                    describe(
                        f"entry {rx!r} kaldiio cannot read ({type(exc).__name__}: {exc})",
                        "a path:offset pointing at a Kaldi matrix",
                        "check the offset and that the ark is complete",
                        utt=key,
                        where=where,
                    )
                ) from None
            yield key, _check_value(value, key, where)
    finally:
        for fd in fds.values():
            with contextlib.suppress(OSError):
                fd.close()


def read_kaldi_matrices(
    spec: str | os.PathLike, *, allow_pipes: bool = False
) -> Iterator[tuple[str, np.ndarray]]:
    """Iterate over the matrices of a Kaldi ark or scp table.

    Parameters
    ----------
    spec : str or path-like
        ``scp:PATH``, ``ark:PATH`` (Kaldi flags such as ``ark,t:`` are accepted and
        ignored; text and binary are detected), or a bare path ending in ``.scp`` or
        ``.ark``.
    allow_pipes : bool, default False
        Allow rxspecifiers that are shell commands (``cmd |``), in the spec or in any
        scp line. Reading them runs the command: enable only for trusted files.

    Returns
    -------
    iterator of (str, numpy.ndarray)
        ``(key, matrix)`` in table order; matrices are ``(T, D)``, vectors ``(D,)``.
        The spec and every scp line are checked before anything is read.

    Raises
    ------
    ParameterError
        When ``spec`` is not an ark/scp specifier.
    BundleError
        When a pipe is found and ``allow_pipes`` is false (naming the entry), a file
        is missing, an scp line is malformed (naming file and line), or an entry is
        unreadable or not a matrix.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> d = tempfile.mkdtemp()
    >>> ark, scp = os.path.join(d, "post.ark"), os.path.join(d, "post.scp")
    >>> write_kaldi_matrices(ark, {"d-01": np.zeros((3, 2), np.float32)}, scp=scp)
    >>> [(k, m.shape) for k, m in read_kaldi_matrices("scp:" + scp)]
    [('d-01', (3, 2))]
    """
    kind, target = _parse_spec(spec)
    if target.strip() == "-":
        raise BundleError(
            describe(
                "'-' (standard input)",
                "a file path",
                "write the table to a file first",
                where=os.fspath(spec),
            )
        )
    if kind == "scp":
        entries = _scp_entries(target, allow_pipes=allow_pipes)
        return _iter_scp(target, entries)
    if _is_pipe(target) and not allow_pipes:
        raise BundleError(
            describe(f"the pipe {target!r} as the ark source", "a file path", _PIPE_FIX)
        )
    if not _is_pipe(target) and not Path(target).is_file():
        raise BundleError(
            describe(
                "no file",
                "a Kaldi ark file",
                "check the path (relative paths are taken from the current folder)",
                where=target,
            )
        )
    return _iter_ark(target)


def write_kaldi_matrices(
    path_ark: str | os.PathLike,
    items: Mapping[str, np.ndarray] | Iterable[tuple[str, np.ndarray]],
    *,
    scp: str | os.PathLike | None = None,
    overwrite: bool = False,
) -> None:
    """Write matrices as a binary Kaldi archive, optionally with its scp index.

    Parameters
    ----------
    path_ark : str or path-like
        Output ark file (written through a temporary file, then renamed).
    items : mapping or iterable of (str, numpy.ndarray)
        Key to float matrix ``(T, D)`` or vector ``(D,)``; keys must be unique and
        free of white space. Integer arrays are stored as float32.
    scp : str or path-like, optional
        Also write a script file ``<key> <path_ark>:<offset>``. The ark path is
        written as given: Kaldi resolves relative paths from the current folder.
    overwrite : bool, default False
        Replace existing files.

    Raises
    ------
    ParameterError
        For a bad key, a duplicate key, an array that is not a 1-D/2-D numeric
        array, or an existing output without ``overwrite``.

    Examples
    --------
    >>> import os, tempfile
    >>> import numpy as np
    >>> ark = os.path.join(tempfile.mkdtemp(), "post.ark")
    >>> write_kaldi_matrices(ark, [("d-01", np.eye(2, dtype=np.float32))])
    >>> next(read_kaldi_matrices(ark))[1]
    array([[1., 0.],
           [0., 1.]], dtype=float32)
    """
    pairs = list(items.items() if isinstance(items, Mapping) else items)
    seen: set[str] = set()
    clean = []
    for index, pair in enumerate(pairs):
        try:
            key, array = pair
        except (TypeError, ValueError):
            raise ParameterError(
                "Each item of write_kaldi_matrices must be a (key, array) pair. "
                f"Got {pair!r} at item {index} instead."
            ) from None
        if not isinstance(key, str) or not key or any(c.isspace() for c in key):
            raise ParameterError(
                "Keys of write_kaldi_matrices must be non-empty strings without white "
                f"space. Got {key!r} at item {index} instead."
            )
        if key in seen:
            raise ParameterError(
                f"Keys of write_kaldi_matrices must be unique. Got {key!r} twice instead."
            )
        seen.add(key)
        arr = np.asarray(array)
        if arr.ndim not in (1, 2) or not (
            np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)
        ):
            raise ParameterError(
                f"The array of key {key!r} of write_kaldi_matrices must be a 1-D or 2-D "
                f"numeric array. Got shape {arr.shape} dtype {arr.dtype} instead."
            )
        if arr.dtype not in (np.float32, np.float64):
            arr = arr.astype(np.float32)
        clean.append((key, np.ascontiguousarray(arr)))

    check_target(path_ark, overwrite=overwrite)
    if scp is not None:
        check_target(scp, overwrite=overwrite)
    index_lines = []
    with atomic_write(path_ark, overwrite=overwrite, mode="wb") as f:
        for key, arr in clean:
            # The scp offset points just past "<key> ", where the matrix header starts.
            offset = f.tell() + len(key.encode("utf-8")) + 1
            kaldiio.save_ark(f, {key: arr})
            index_lines.append(f"{key} {os.fspath(path_ark)}:{offset}\n")
        if scp is not None:
            # Both files are complete on disk before either is renamed into place: an
            # old scp beside a new ark would point at wrong offsets.
            f.flush()
            os.fsync(f.fileno())
            with atomic_write(scp, overwrite=overwrite) as g:
                g.write("".join(index_lines))
