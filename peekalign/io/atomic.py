"""Safe file writing: refuse to overwrite unless asked, write to a temporary file in
the same folder and rename it into place, so a crash never leaves half a file."""

from __future__ import annotations

import contextlib
import errno
import os
import secrets
import shutil
from collections.abc import Iterator
from pathlib import Path

from ..exceptions import ParameterError

__all__ = ["atomic_write", "atomic_dir", "check_target", "replace_dir"]


def check_target(path: str | os.PathLike, *, overwrite: bool = False) -> Path:
    """Raise when ``path`` exists and ``overwrite`` is false; return it as a Path."""
    p = Path(path)
    if p.exists() and not overwrite:
        raise ParameterError(
            f"found an existing file {str(p)!r}, expected a new path; "
            "choose another name or pass overwrite=True (--overwrite)"
        )
    return p


def _temp_name(parent: Path, name: str, suffix: str) -> Path:
    return parent / f".{name}.{secrets.token_hex(4)}{suffix}"


def _temp_file(parent: Path, name: str) -> tuple[int, Path]:
    """Create a new hidden file beside the target. Unlike ``tempfile.mkstemp`` (mode
    0600) it gets the mode a plain ``open`` would give (0666 less the umask)."""
    for _ in range(100):
        tmp = _temp_name(parent, name, ".tmp")
        try:
            return os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666), tmp
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, "no free temporary name", str(parent))


def _temp_dir(parent: Path, name: str, suffix: str = ".tmp") -> Path:
    """Create a new hidden folder beside the target, mode 0777 less the umask."""
    for _ in range(100):
        tmp = _temp_name(parent, name, suffix)
        try:
            os.mkdir(tmp, 0o777)
            return tmp
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, "no free temporary name", str(parent))


def _write_failed(p: Path, exc: OSError) -> ParameterError:
    return ParameterError(
        f"writing {str(p)!r} failed ({exc.strerror or exc}); nothing was written; "
        "check free space and permissions"
    )


def replace_dir(tmp: str | os.PathLike, path: str | os.PathLike) -> None:
    """Move the finished folder ``tmp`` onto ``path`` (same parent folder).

    An existing ``path`` is moved aside first and deleted only after the new folder is
    in place; if the move fails it is put back, so ``path`` is never left half-made.
    """
    tmp, p = Path(tmp), Path(path)
    old = None
    if p.exists():
        old = _temp_name(p.absolute().parent, p.name, ".old")
        os.replace(p, old)
    try:
        os.replace(tmp, p)
    except BaseException:
        if old is not None:
            os.replace(old, p)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


@contextlib.contextmanager
def atomic_write(
    path: str | os.PathLike, *, overwrite: bool = False, mode: str = "w", encoding="utf-8"
) -> Iterator:
    """Open a temporary file beside ``path``; rename it onto ``path`` on success.

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> with atomic_write(os.path.join(d, "a.txt")) as f:
    ...     _ = f.write("hello")
    >>> open(os.path.join(d, "a.txt")).read()
    'hello'
    """
    p = check_target(path, overwrite=overwrite)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        what = "a file, not a folder," if parent.exists() else "no folder"
        raise ParameterError(
            f"found {what} at {str(parent)!r} for output {str(p)!r}, expected an existing "
            "folder; create it first or choose another output path"
        )
    try:
        fd, tmp = _temp_file(parent, p.name)
    except OSError as exc:
        raise ParameterError(
            f"cannot write in {str(parent)!r} ({exc.strerror}); expected a writable folder; "
            "choose another output path or fix its permissions"
        ) from exc
    kwargs = {} if "b" in mode else {"encoding": encoding, "newline": ""}
    try:
        with os.fdopen(fd, mode, **kwargs) as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        if p.exists() and not overwrite:  # appeared meanwhile
            raise ParameterError(
                f"found an existing file {str(p)!r}, expected a new path; "
                "choose another name or pass overwrite=True (--overwrite)"
            )
        os.replace(tmp, p)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        if isinstance(exc, OSError):
            raise _write_failed(p, exc) from exc
        raise


@contextlib.contextmanager
def atomic_dir(path: str | os.PathLike, *, overwrite: bool = False) -> Iterator[Path]:
    """Build a folder under a temporary name; swap it into ``path`` on success.

    An existing non-empty ``path`` is refused unless ``overwrite``; on failure the old
    folder (if any) is left as it was.
    """
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise ParameterError(
            f"found a file at {str(p)!r}, expected a folder path; choose another --out"
        )
    if p.is_dir() and any(p.iterdir()) and not overwrite:
        raise ParameterError(
            f"found a non-empty folder {str(p)!r}, expected a new or empty one; "
            "choose another --out or pass --overwrite"
        )
    parent = p.absolute().parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        tmp = _temp_dir(parent, p.name)
    except OSError as exc:
        raise ParameterError(
            f"cannot create a folder in {str(parent)!r} ({exc.strerror or exc}); expected a "
            "writable folder; choose another output path or fix its permissions"
        ) from exc
    try:
        yield tmp
        replace_dir(tmp, p)
    except BaseException as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError):
            raise _write_failed(p, exc) from exc
        raise
