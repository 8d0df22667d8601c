"""Safe file writing: refuse to overwrite unless asked, write to a temporary file in
the same folder and rename it into place, so a crash never leaves half a file."""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

from ..exceptions import ParameterError

__all__ = ["atomic_write", "atomic_dir", "check_target"]


def check_target(path: str | os.PathLike, *, overwrite: bool = False) -> Path:
    """Raise when ``path`` exists and ``overwrite`` is false; return it as a Path."""
    p = Path(path)
    if p.exists() and not overwrite:
        raise ParameterError(
            f"found an existing file {str(p)!r}, expected a new path; "
            "choose another name or pass overwrite=True (--overwrite)"
        )
    return p


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
        raise ParameterError(
            f"found no folder {str(parent)!r} for output {str(p)!r}, expected an existing "
            "folder; create it first"
        )
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".tmp", dir=parent)
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
            raise ParameterError(
                f"writing {str(p)!r} failed ({exc.strerror or exc}); nothing was written; "
                "check free space and permissions"
            ) from exc
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
    parent = p.resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{p.name}.", suffix=".tmp", dir=parent))
    try:
        yield tmp
        old = None
        if p.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{p.name}.", suffix=".old", dir=parent))
            os.rmdir(old)
            os.replace(p, old)
        os.replace(tmp, p)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
