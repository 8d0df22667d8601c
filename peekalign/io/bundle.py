"""Bundle format v1 on disk: read its parts, write a new one.

A bundle is a folder::

    bundle.json   metadata (format, version, vocab file, blank, frame clock, ...)
    vocab.txt     one token a line; line i is token id i
    utts.jsonl    one utterance a line
    arrays/<id>.npz, audio/<id>.wav

This module only reads and writes files; :mod:`peekalign.model` turns them into
``Bundle`` and ``Utterance`` objects.
"""

from __future__ import annotations

import array
import codecs
import contextlib
import io
import json
import math
import os
import re
import shutil
import struct
import zipfile
import zlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..exceptions import BundleError, ParameterError, describe
from ._inflate import read_member
from ._text import _read_error, read_bytes, read_text
from .atomic import _temp_dir, _write_failed, atomic_write, replace_dir

__all__ = [
    "FORMAT",
    "VERSION",
    "ManifestLine",
    "read_meta",
    "read_vocab",
    "read_manifest",
    "read_arrays",
    "BundleWriter",
]

FORMAT = "peekalign-bundle"
VERSION = 1
_REQUIRED_META = ("format", "version", "vocab", "blank", "frame_shift_s", "word_boundary")
#: Hypothesis branches of ``hyps`` (peekalign.model.BRANCHES).
BRANCHES = ("ctc", "decoder", "joint")
_SAFE_ID = re.compile(r"[^A-Za-z0-9._-]+")


def read_meta(bundle: str | os.PathLike) -> dict[str, Any]:
    """Read and validate ``bundle.json``; every missing field is named at once.

    Examples
    --------
    >>> import tempfile, json, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / "bundle.json").write_text(json.dumps({"format": "peekalign-bundle"}))
    >>> try:
    ...     read_meta(d)
    ... except BundleError as e:
    ...     print(str(e).split(";")[0])
    bundle.json: found no fields 'version', 'vocab', 'blank', 'frame_shift_s', 'word_boundary', expected all required fields
    """
    meta = _load_meta(bundle)
    _check_required_meta(meta)
    _check_optional_meta(meta)
    return meta


def _load_meta(bundle: str | os.PathLike) -> dict[str, Any]:
    """``bundle.json`` of the bundle folder as a JSON object."""
    path = Path(bundle) / "bundle.json"
    if not Path(bundle).is_dir():
        raise BundleError(
            describe(
                f"no folder at {str(bundle)!r}",
                "a bundle folder holding bundle.json",
                "check the path",
            )
        )
    try:
        meta = _loads(read_text(path, what="bundle.json", member=True))
    except _JSONError as exc:
        raise BundleError(
            describe(
                f"invalid JSON {exc.where} ({exc.msg})",
                "one JSON object",
                "fix the syntax",
                where="bundle.json",
            )
        ) from None
    if not isinstance(meta, dict):
        raise BundleError(
            describe(
                f"a JSON {type(meta).__name__}",
                "a JSON object",
                "wrap the fields in {}",
                where="bundle.json",
            )
        )
    return meta


def _check_required_meta(meta: dict[str, Any]) -> None:
    """Every required field present (all missing ones named at once) and valid."""
    missing = [k for k in _REQUIRED_META if k not in meta]
    if missing:
        raise BundleError(
            describe(
                "no fields " + ", ".join(repr(k) for k in missing),
                "all required fields",
                "add them (see the bundle format in DEVELOPERS.md), e.g. "
                '"frame_shift_s": 0.04, "blank": 0',
                where="bundle.json",
            )
        )
    if meta["format"] != FORMAT:
        raise BundleError(
            describe(
                f"format {meta['format']!r}",
                repr(FORMAT),
                "point at a peekalign bundle",
                where="bundle.json",
            )
        )
    if meta["version"] != VERSION:
        raise BundleError(
            describe(
                f"version {meta['version']!r}",
                str(VERSION),
                "upgrade peekalign or rewrite the bundle",
                where="bundle.json",
            )
        )
    shift = meta["frame_shift_s"]
    if not _is_number(shift) or not 0 < shift < math.inf:
        raise BundleError(
            describe(
                f"frame_shift_s={shift!r}",
                "a positive number of seconds (e.g. 0.04)",
                "set the encoder frame shift",
                where="bundle.json",
            )
        )
    wb = meta["word_boundary"]
    if (
        not isinstance(wb, dict)
        or wb.get("kind") not in ("prefix", "separator")
        or not isinstance(wb.get("symbol"), str)
        or not wb.get("symbol")
    ):
        raise BundleError(
            describe(
                f"word_boundary={wb!r}",
                '{"kind": "prefix" | "separator", "symbol": "<token>"}',
                "state the word-boundary rule",
                where="bundle.json",
            )
        )
    if not isinstance(meta["blank"], int) or isinstance(meta["blank"], bool):
        raise BundleError(
            describe(
                f"blank={meta['blank']!r}",
                "an integer token id",
                "set the blank id",
                where="bundle.json",
            )
        )


def _is_number(x: object) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


# Optional bundle.json fields: (field, sub-field or None, kind, example). Kinds:
# "str" non-empty string, "rate" int > 0, "count" int >= 0, "time" finite number,
# "span" finite number >= 0.
_OPTIONAL_META = (
    ("vocab", None, "str", '"vocab.txt"'),
    ("tokenizer", None, "str", '"spm.model"'),
    ("sample_rate", None, "rate", "16000"),
    ("frame_offset_s", None, "time", "0.0"),
    ("encoder", "layers", "count", "12"),
    ("encoder", "lookahead_per_layer", "count", "1"),
    ("encoder", "chunk_size", "rate", "16"),
    ("decoder", "lookahead", "count", "18"),
    ("front_end", "subsampling", "rate", "4"),
    ("front_end", "hop_s", "span", "0.01"),
    ("front_end", "win_s", "span", "0.025"),
    ("front_end", "right_context_s", "span", "0.06"),
)
_KIND_TEXT = {
    "str": "a non-empty string",
    "rate": "a positive integer",
    "count": "an integer >= 0",
    "time": "a finite number of seconds",
    "span": "a finite number of seconds >= 0",
}


def _check_optional_meta(meta: dict[str, Any]) -> None:
    """Type-check the optional fields so a bad value is reported here, by name, rather
    than failing later deep inside an analysis. A JSON null means "not given": such
    fields are dropped, so readers need no second notion of absence."""
    for name, _sub, _kind, _example in _OPTIONAL_META:
        if name in meta and meta[name] is None and name not in _REQUIRED_META:
            del meta[name]
    for group in ("encoder", "decoder", "front_end"):
        if isinstance(meta.get(group), dict):
            meta[group] = {k: v for k, v in meta[group].items() if v is not None}
    for group in ("encoder", "decoder", "front_end"):
        value = meta.get(group)
        if value is not None and not isinstance(value, dict):
            raise BundleError(
                describe(
                    f"{group}={value!r}",
                    "a JSON object of named fields",
                    f"write it as in the bundle format, e.g. {_GROUP_EXAMPLE[group]}",
                    where="bundle.json",
                )
            )
    for name, sub, kind, example in _OPTIONAL_META:
        holder = meta if sub is None else (meta.get(name) or {})
        key = name if sub is None else sub
        value = holder.get(key)
        if value is None and name not in _REQUIRED_META:
            continue
        if kind == "str":
            ok = isinstance(value, str) and bool(value) and "\0" not in value
        elif kind in ("rate", "count"):
            ok = isinstance(value, int) and not isinstance(value, bool)
            ok = ok and (value > 0 if kind == "rate" else value >= 0)
        else:
            ok = _is_number(value) and math.isfinite(value)
            ok = ok and (value >= 0 if kind == "span" else True)
        if not ok:
            label = name if sub is None else f"{name}.{sub}"
            raise BundleError(
                describe(
                    f"{label}={value!r}",
                    _KIND_TEXT[kind],
                    f"fix {'' if name in _REQUIRED_META else 'or drop '}that field "
                    f"(e.g. {key!r}: {example})",
                    where="bundle.json",
                )
            )


_GROUP_EXAMPLE = {
    "encoder": '{"layers": 12, "lookahead_per_layer": 1}',
    "decoder": '{"lookahead": 18}',
    "front_end": '{"subsampling": 4, "hop_s": 0.01}',
}


def right_context_frames(value, T: int, *, uid: str, error=BundleError) -> np.ndarray:
    """The optional per-frame ``encoder_right_context`` (T,) as int32, checked: integers
    >= 0, one per encoder frame.

    Examples
    --------
    >>> right_context_frames([3, 2, 1, 0], 4, uid="u").tolist()
    [3, 2, 1, 0]
    """
    arr = np.asarray(value)
    ok = arr.shape == (T,) and (np.issubdtype(arr.dtype, np.integer) or arr.size == 0)
    if not ok or (arr.size and arr.min() < 0):
        raise error(
            describe(
                f"encoder_right_context of shape {arr.shape} {arr.dtype}"
                + (f" with {int(arr.min())}" if ok else ""),
                f"({T},) integers >= 0: the encoder frames past each frame it depends on",
                "store one look-ahead per encoder frame (measured or declared), or drop it",
                utt=uid,
            ),
            utt=uid,
        )
    return arr.astype(np.int32)


def read_vocab(path: str | os.PathLike) -> list[str]:
    """Tokens of ``vocab.txt``, one a line (CRLF and a BOM are accepted).

    A line may hold ``token id`` pairs; the id must then equal the line number.
    """
    text = read_text(Path(path), what="vocab.txt", member=True)
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    tokens = []
    for n, line in enumerate(lines):
        line = line[:-1] if line.endswith("\r") else line
        parts = line.rsplit(" ", 1)
        if len(parts) == 2 and parts[1].isdigit() and parts[0]:
            if int(parts[1]) != n:
                raise BundleError(
                    describe(
                        f"id {parts[1]} on line {n + 1}",
                        f"id {n} (line number - 1)",
                        "write one token a line in id order",
                        where="vocab.txt",
                    )
                )
            line = parts[0]
        tokens.append(line)
    if not tokens:
        raise BundleError(
            describe(
                "an empty file", "one token a line", "write the vocabulary", where="vocab.txt"
            )
        )
    return tokens


class _JSONError(ValueError):
    def __init__(self, msg: str, lineno: int | None = None, colno: int | None = None) -> None:
        super().__init__(msg)
        self.msg, self.lineno, self.colno = msg, lineno, colno

    @property
    def where(self) -> str:
        return f"at line {self.lineno} column {self.colno}" if self.lineno else "in the file"


def _loads(text: str) -> Any:
    """``json.loads`` whose every failure is a :class:`_JSONError`: besides syntax
    errors, json raises a plain ValueError for an integer of over 4300 digits and
    RecursionError for deeply nested brackets."""
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise _JSONError(exc.msg, exc.lineno, exc.colno) from None
    except ValueError as exc:
        raise _JSONError(str(exc).split(";")[0]) from None
    except RecursionError:
        raise _JSONError("brackets nested too deeply") from None


def _id_of(line: str) -> str | None:
    """The id of a manifest line that is otherwise unusable, when it can be read."""
    try:
        obj = _loads(line)
    except _JSONError:
        return None
    uid = obj.get("id") if isinstance(obj, dict) else None
    return uid if isinstance(uid, str) and uid else None


class ManifestLine(dict):
    """One parsed line of ``utts.jsonl`` (a dict) with its line number."""

    lineno: int = 0


class CompactManifest(Sequence):
    """The good lines of ``utts.jsonl`` kept as where they are in the file, read and
    parsed again on access.

    A parsed line (lists of token ids, text) takes several times its bytes in Python
    objects, and even the lines' bytes (~0.7 KB an utterance) would grow with the set
    in every process that opens the bundle (each worker of a scan). Each line costs
    its id and four integers here: offset, length, line number and CRC-32, which each
    access checks, so a file changed since the bundle was opened is an error that says
    to open the bundle again, never another utterance's line. Items are
    :class:`ManifestLine` objects, built anew on each access; ``ids`` (manifest order)
    and ``index`` (id -> position) are kept.
    """

    def __init__(self, path: str | os.PathLike | None = None) -> None:
        self._path = None if path is None else os.path.abspath(path)
        self._where = array.array("q")  # offset and length of each line, in turn
        self._linenos = array.array("q")
        self._crcs = array.array("L")
        self.ids: list[str] = []
        self.index: dict[str, int] = {}

    def _add(self, raw_line: bytes, offset: int, lineno: int, uid: str) -> None:
        self.index[uid] = len(self.ids)
        self._where.extend((offset, len(raw_line)))
        self._linenos.append(lineno)
        self._crcs.append(zlib.crc32(raw_line))
        self.ids.append(uid)

    def __len__(self) -> int:
        return len(self.ids)

    def _entry(self, i: int, raw_line: bytes) -> ManifestLine:
        if zlib.crc32(raw_line) != self._crcs[i]:
            raise BundleError(
                describe(
                    f"line {self._linenos[i]} changed since the bundle was opened",
                    "the file as it was when opened",
                    "open the bundle again",
                    utt=self.ids[i],
                    where="utts.jsonl",
                )
            )
        entry = ManifestLine(_loads(raw_line.decode("utf-8")))
        entry.lineno = self._linenos[i]
        return entry

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[k] for k in range(*i.indices(len(self)))]
        i = range(len(self))[i]
        offset, size = self._where[2 * i], self._where[2 * i + 1]
        try:
            with open(self._path, "rb") as f:
                f.seek(offset)
                raw_line = f.read(size)
        except OSError as exc:
            raise _read_error(Path(self._path), "utts.jsonl", True, exc) from None
        return self._entry(i, raw_line)

    def __iter__(self):
        # one read of the whole file, not one per line
        raw = read_bytes(Path(self._path), what="utts.jsonl", member=True)
        for i in range(len(self)):
            offset, size = self._where[2 * i], self._where[2 * i + 1]
            yield self._entry(i, raw[offset : offset + size])

    def get(self, uid: str) -> ManifestLine | None:
        """The line of utterance ``uid`` (None when it has no good line)."""
        i = self.index.get(uid)
        return None if i is None else self[i]


def read_manifest(
    bundle: str | os.PathLike, *, compact: bool = False
) -> tuple[list[ManifestLine] | CompactManifest, list[tuple[str, str]]]:
    """Parse ``utts.jsonl``.

    Returns
    -------
    entries : list of ManifestLine, or CompactManifest with ``compact=True``
        Good lines, in file order.
    problems : list of (utt_id_or_line, message)
        Lines that could not be used (bad JSON, missing id, duplicate id, ...);
        the rest of the file is still read.
    """
    path = Path(bundle) / "utts.jsonl"
    raw = read_bytes(path, what="utts.jsonl", member=True)
    offset = len(codecs.BOM_UTF8) if raw.startswith(codecs.BOM_UTF8) else 0
    entries: list[ManifestLine] | CompactManifest = CompactManifest(path) if compact else []
    problems: list[tuple[str, str]] = []
    seen: dict[str, int] = {}
    # Split on LF only (CR LF tolerated): str.splitlines would also cut at U+2028,
    # U+0085, ... which JSON strings may hold unescaped. Decode line by line so one
    # badly encoded line is reported by its utterance and the rest is still read.
    for n, (start, raw_line) in enumerate(_lines(raw, offset), start=1):
        obj, problem = _manifest_line_object(raw_line, n, seen)
        if problem is not None:
            problems.append(problem)
        elif obj is not None:
            seen[obj["id"]] = n
            if compact:
                entries._add(raw_line, start, n, obj["id"])
                continue
            entry = ManifestLine(obj)
            entry.lineno = n
            entries.append(entry)
    return entries, problems


def _lines(raw: bytes, offset: int):
    """``(offset, line)`` of each LF-separated line of ``raw`` from ``offset`` on, one
    at a time (a list of them all would take the file's size again)."""
    while True:
        end = raw.find(b"\n", offset)
        if end < 0:
            yield offset, raw[offset:]
            return
        yield offset, raw[offset:end]
        offset = end + 1


def _manifest_line_object(
    raw_line: bytes, n: int, seen: dict[str, int]
) -> tuple[dict | None, tuple[str, str] | None]:
    """Line ``n`` of ``utts.jsonl`` as ``(object, None)``, ``(None, problem)`` when it
    cannot be used (``seen``: the line of each id read so far), or ``(None, None)`` for
    a blank line."""
    try:
        line = raw_line.decode("utf-8")
    except UnicodeDecodeError as exc:
        guess = _id_of(raw_line.decode("utf-8", "replace"))
        return None, (
            guess or f"line {n}",
            describe(
                f"bytes that are not UTF-8 (line byte {exc.start}: "
                f"{raw_line[exc.start : exc.start + 4]!r})",
                "UTF-8 text",
                "re-save utts.jsonl as UTF-8 (e.g. iconv -f latin1 -t utf-8)",
                utt=guess,
                where=f"utts.jsonl line {n}",
            ),
        )
    if not line.strip():
        return None, None
    where = f"utts.jsonl line {n}"
    try:
        obj = _loads(line)
    except _JSONError as exc:
        return None, (
            f"line {n}",
            describe(
                f"invalid JSON {f'at column {exc.colno}' if exc.colno else 'in it'} ({exc.msg})",
                "one JSON object a line",
                "fix that line",
                where=where,
            ),
        )
    if not isinstance(obj, dict):
        return None, (
            f"line {n}",
            describe(
                f"a JSON {type(obj).__name__}",
                "a JSON object",
                "fix that line",
                where=where,
            ),
        )
    uid = obj.get("id")
    if not isinstance(uid, str) or not uid:
        return None, (
            f"line {n}",
            describe(
                f"id={uid!r}",
                "a non-empty string id",
                'add "id": "<utterance id>"',
                where=where,
            ),
        )
    if uid in seen:
        return None, (
            uid,
            describe(
                f"id {uid!r} again (first on line {seen[uid]})",
                "unique ids",
                "rename or drop the duplicate",
                utt=uid,
                where=where,
            ),
        )
    missing = [k for k in ("arrays", "ref") if k not in obj]
    if missing:
        return None, (
            uid,
            describe(
                "no " + ", ".join(repr(k) for k in missing),
                "'arrays' and 'ref' on every line",
                'add "arrays": "arrays/<id>.npz" and "ref": "<words>"',
                utt=uid,
                where=where,
            ),
        )
    return obj, None


def read_arrays(
    bundle: str | os.PathLike, rel: str, *, utt: str | None = None
) -> dict[str, np.ndarray]:
    """Load an utterance's ``.npz`` (never with pickle) into a dict of arrays."""
    base = Path(bundle).resolve()
    try:
        # a non-string or a NUL byte cannot name a file inside the bundle
        path = (base / rel).resolve() if isinstance(rel, str) and "\0" not in rel else None
    except (OSError, ValueError, RuntimeError):
        path = None
    if path is None or base not in path.parents:
        raise BundleError(
            describe(
                f"arrays path {rel!r} outside the bundle"
                if isinstance(rel, str)
                else f"arrays={rel!r}, a {type(rel).__name__}",
                "a path inside the bundle",
                "use a relative path such as arrays/<id>.npz",
                utt=utt,
            ),
            utt=utt,
        )
    try:
        return _load_npz(path, rel, utt)
    except FileNotFoundError:
        raise BundleError(
            describe(
                f"no arrays file {rel!r}",
                "the file named in utts.jsonl",
                "copy it into the bundle or fix the 'arrays' path",
                utt=utt,
            ),
            utt=utt,
        ) from None
    except _NPZ_ERRORS as exc:
        raise BundleError(
            describe(
                f"unreadable arrays file {rel!r} ({type(exc).__name__}: {exc})",
                "a complete .npz written by numpy.savez without object arrays",
                "dump the arrays again",
                utt=utt,
            ),
            utt=utt,
        ) from None


# What zipfile, zlib and numpy.lib.format raise on damaged bytes.
_NPZ_ERRORS = (
    ValueError,
    OSError,
    zipfile.BadZipFile,
    zipfile.LargeZipFile,
    zlib.error,
    EOFError,
    KeyError,
    NotImplementedError,  # intended: zipfile raises it for an unknown compression method
    RuntimeError,  # encrypted member
    struct.error,
    OverflowError,
    MemoryError,
)


def _load_npz(path: Path, rel: str, utt: str | None) -> dict[str, np.ndarray]:
    """Read every member of an .npz; check each header against the stored size first,
    so a damaged header cannot make numpy allocate gigabytes."""

    def bad(found: str, expected: str, fix: str) -> BundleError:
        return BundleError(describe(found, expected, fix, utt=utt), utt=utt)

    with open(path, "rb") as f:
        head = f.read(6)
    if head == b"\x93NUMPY":
        raise bad(
            f"a single array in {rel!r}, not an .npz archive",
            "an .npz holding named arrays ('log_probs', ...)",
            "save with numpy.savez(path, log_probs=...) instead of numpy.save",
        )
    arrays: dict[str, np.ndarray] = {}
    with open(path, "rb") as f, zipfile.ZipFile(f) as zf:
        for info in zf.infolist():
            key = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
            data = read_member(f, info)  # one inflate call when libdeflate is there
            if data is not None:
                member = io.BytesIO(bytes(data[:_HEADER_BYTES]))
                shape, fortran, dtype = _npy_header(member, key, rel, info, bad)
                arrays[key] = _from_bytes(data, member.tell(), shape, fortran, dtype)
                continue
            with zf.open(info) as member:
                _npy_header(member, key, rel, info, bad)
            with zf.open(info) as member:
                arrays[key] = np.lib.format.read_array(member, allow_pickle=False)
    return arrays


#: Bytes of an inflated member enough for any .npy header numpy reads by default.
_HEADER_BYTES = 1 << 16


def _npy_header(member, key: str, rel: str, info, bad) -> tuple:
    """``(shape, fortran_order, dtype)`` of a member's .npy header, checked: no
    objects, and no more data than the member holds (so a damaged header cannot make
    numpy allocate gigabytes)."""
    version = np.lib.format.read_magic(member)
    if version == (1, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_1_0(member)
    elif version == (2, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_2_0(member)
    else:
        raise ValueError(f"member {key!r}: .npy format version {version}")
    if dtype.hasobject:
        raise bad(
            f"member {key!r} of {rel!r} holding Python objects ({dtype})",
            "numeric arrays (objects would need pickle, which is never used)",
            "convert the array to a numeric dtype and dump it again",
        )
    need = math.prod(shape) * dtype.itemsize
    if need > info.file_size:
        raise bad(
            f"member {key!r} of {rel!r} whose header says shape {shape} "
            f"{dtype} ({need} bytes) in a {info.file_size}-byte entry",
            "a complete .npy entry",
            "the file is damaged or truncated; dump the arrays again",
        )
    return shape, fortran, dtype


def _from_bytes(data: bytearray, offset: int, shape, fortran: bool, dtype) -> np.ndarray:
    """The array of an inflated .npy member, over its bytes (as ``numpy.lib.format``
    builds it: Fortran order read reversed and transposed)."""
    array = np.frombuffer(data, dtype=dtype, count=math.prod(shape), offset=offset)
    if fortran:
        return array.reshape(shape[::-1]).transpose()
    return array.reshape(shape)


def _check_meta(meta: Any, uid: str) -> None:
    """``meta`` must be a dict of strings, finite numbers, booleans or None."""
    ok = isinstance(meta, dict) and all(
        isinstance(k, str)
        and (
            v is None
            or isinstance(v, (str, bool, int))
            or (isinstance(v, float) and np.isfinite(v))
        )
        for k, v in meta.items()
    )
    if not ok:
        raise ParameterError(
            describe(
                f"meta={meta!r}"[:80],
                "a dict of str names to strings, finite numbers, booleans or None",
                "flatten lists and objects into separate fields",
                utt=uid,
            )
        )


def _safe_name(uid: str) -> str:
    name = _SAFE_ID.sub("_", uid).strip("._") or "utt"
    return name[:120]


def _manifest_line(
    line: dict[str, Any], utt_id: str, *, hyp, ref_tokens, hyp_tokens, hyps, hyps_tokens, words,
    meta, extra,
) -> str:  # fmt: skip
    """Complete ``line`` (id, arrays, audio and ref already in) with the optional
    fields, in the manifest's order, and return it as one JSON line."""
    if hyp is not None:
        line["hyp"] = hyp
    if ref_tokens is not None:
        line["ref_tokens"] = [int(t) for t in ref_tokens]
    if hyp_tokens is not None:
        line["hyp_tokens"] = [int(t) for t in hyp_tokens]
    if hyps:
        line["hyps"] = {b: str(t) for b, t in hyps.items()}
    if hyps_tokens:
        line["hyps_tokens"] = {b: [int(t) for t in v] for b, v in hyps_tokens.items()}
    if words is not None:
        line["words"] = [[str(w), round(float(s), 6), round(float(e), 6)] for w, s, e in words]
    if meta is not None:
        _check_meta(meta, utt_id)
        line["meta"] = dict(meta)
    line.update(extra or {})
    try:
        text = json.dumps(line, ensure_ascii=False, allow_nan=False) + "\n"
    except (TypeError, ValueError) as exc:
        raise ParameterError(
            f"utt {utt_id!r}: found a manifest field JSON cannot hold ({exc}); expected "
            "strings, finite numbers, lists and dicts; fix the values passed to add()"
        ) from None
    return text


class BundleWriter:
    """Write a bundle v1, one utterance at a time.

    Parameters
    ----------
    path : path-like
        New folder (refused when it exists and is not empty, unless ``overwrite``).
    vocab : sequence of str
        Tokens; line i of vocab.txt is token id i.
    blank : int
    frame_shift_s, frame_offset_s : float
        The frame clock.
    word_boundary : dict
        ``{"kind": "prefix" | "separator", "symbol": ...}``.
    sample_rate : int, optional
        Rate of the audio written with :meth:`add`.
    encoder, decoder : dict, optional
        ``{"layers": L, "lookahead_per_layer": r}``, ``{"lookahead": eps}``.
    extra : dict, optional
        More bundle.json fields (e.g. ``front_end``).
    overwrite : bool
        Replace an existing bundle at ``path``.

    Notes
    -----
    The bundle is built in a hidden folder beside ``path`` and moved into place by
    :meth:`close` (called at the end of a ``with`` block). When the block raises, or
    :meth:`abort` is called, the hidden folder is deleted and ``path`` is left as it
    was: a crash or a full disk never leaves half a bundle. Equal inputs give
    byte-identical bundles.

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> d = tempfile.mkdtemp() + "/b"
    >>> with BundleWriter(d, vocab=["<b>", "a"], frame_shift_s=0.04,
    ...                   word_boundary={"kind": "prefix", "symbol": "a"}) as w:
    ...     w.add("u1", np.log(np.full((3, 2), 0.5)), ref="a")
    >>> sorted(p.name for p in __import__("pathlib").Path(d).iterdir())
    ['arrays', 'bundle.json', 'utts.jsonl', 'vocab.txt']
    """

    def __init__(
        self,
        path: str | os.PathLike,
        *,
        vocab: Sequence[str],
        blank: int = 0,
        frame_shift_s: float,
        frame_offset_s: float = 0.0,
        word_boundary: dict[str, str],
        sample_rate: int | None = None,
        encoder: dict[str, int] | None = None,
        decoder: dict[str, int] | None = None,
        tokenizer: str | None = None,
        extra: dict[str, Any] | None = None,
        overwrite: bool = False,
    ) -> None:
        self.path = Path(path)
        self._done = True  # nothing to clean up until the hidden folder exists
        if self.path.exists() and not self.path.is_dir():
            raise ParameterError(
                f"found a file at {str(self.path)!r}, expected a new bundle folder; "
                "choose another path"
            )
        if self.path.exists() and any(self.path.iterdir()) and not overwrite:
            raise ParameterError(
                f"found a non-empty folder {str(self.path)!r}, expected a new bundle folder; "
                "choose another path or pass overwrite=True"
            )
        if any("\n" in t or "\r" in t for t in vocab):
            raise ParameterError(
                "a vocabulary token contains a newline; vocab.txt is one token a line"
            )
        self.vocab = list(vocab)
        self.sample_rate = sample_rate
        self._ids: set[str] = set()
        self._names: set[str] = set()
        self._broken: OSError | None = None
        self._overwrite = overwrite
        meta: dict[str, Any] = {
            "format": FORMAT,
            "version": VERSION,
            "vocab": "vocab.txt",
            "blank": int(blank),
            "frame_shift_s": float(frame_shift_s),
            "frame_offset_s": float(frame_offset_s),
            "word_boundary": dict(word_boundary),
        }
        if sample_rate is not None:
            meta["sample_rate"] = int(sample_rate)
        if encoder is not None:
            meta["encoder"] = dict(encoder)
        if decoder is not None:
            meta["decoder"] = dict(decoder)
        if tokenizer is not None:
            meta["tokenizer"] = tokenizer
        meta.update(extra or {})
        parent = self.path.absolute().parent
        try:
            parent.mkdir(parents=True, exist_ok=True)
            self._tmp = _temp_dir(parent, self.path.name)
        except OSError as exc:
            raise ParameterError(
                f"cannot create a folder in {str(parent)!r} ({exc.strerror or exc}); "
                "expected a writable folder; choose another path or fix its permissions"
            ) from exc
        self._done = False
        try:
            self._start(meta)
        except BaseException as exc:
            self.abort()
            if isinstance(exc, OSError):
                raise _write_failed(self.path, exc) from exc
            raise

    def _start(self, meta: dict[str, Any]) -> None:
        (self._tmp / "arrays").mkdir()
        with atomic_write(self._tmp / "bundle.json", overwrite=True) as f:
            json.dump(meta, f, indent=2, ensure_ascii=False)
            f.write("\n")
        with atomic_write(self._tmp / "vocab.txt", overwrite=True) as f:
            f.write("".join(t + "\n" for t in self.vocab))
        self._manifest = open(self._tmp / "utts.jsonl", "w", encoding="utf-8", newline="\n")

    def __enter__(self) -> BundleWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()

    def close(self) -> None:
        """Finish the bundle: close the manifest and move the folder into ``path``."""
        if self._done:
            return
        try:
            self._manifest.flush()
            os.fsync(self._manifest.fileno())
            self._manifest.close()
        except OSError as exc:
            self._broken = self._broken or exc
        if self._broken is not None:
            self.abort()
            raise _write_failed(self.path, self._broken) from self._broken
        if not self._overwrite and self.path.exists() and any(self.path.iterdir()):
            self.abort()  # someone filled the folder meanwhile: never clobber it
            raise ParameterError(
                f"found a non-empty folder {str(self.path)!r} at close, expected a new "
                "bundle folder; nothing was written; choose another path or pass "
                "overwrite=True"
            )
        try:
            replace_dir(self._tmp, self.path)
        except OSError as exc:
            self.abort()
            raise _write_failed(self.path, exc) from exc
        self._done = True

    def abort(self) -> None:
        """Drop everything written so far; ``path`` is left as it was."""
        if self._done:
            return
        self._done = True
        manifest = getattr(self, "_manifest", None)
        if manifest is not None:
            with contextlib.suppress(OSError):
                manifest.close()
        shutil.rmtree(self._tmp, ignore_errors=True)

    def add(
        self,
        utt_id: str,
        log_probs: np.ndarray,
        *,
        ref: str,
        hyp: str | None = None,
        ref_tokens: Sequence[int] | None = None,
        hyp_tokens: Sequence[int] | None = None,
        words: Sequence[tuple[str, float, float]] | None = None,
        attention: np.ndarray | None = None,
        attention_tokens: Sequence[int] | None = None,
        audio: np.ndarray | None = None,
        encoder_out: np.ndarray | None = None,
        attention_triggers: Sequence[int] | None = None,
        encoder_right_context: Sequence[int] | None = None,
        extra: dict[str, Any] | None = None,
        meta: dict[str, Any] | None = None,
        hyps: dict[str, str] | None = None,
        hyps_tokens: dict[str, Sequence[int]] | None = None,
    ) -> None:
        """Write one utterance's arrays (and audio) and its manifest line.

        ``encoder_out`` (T, D), optional: the encoder output the decoder attends to, one
        row per frame of ``log_probs``, so a decoder can be re-run without the audio.
        ``meta`` (speaker, condition, SNR, ...: string, number, boolean or null
        values) goes to the line's ``"meta"`` object, for slicing a scan.

        ``hyps`` (and ``hyps_tokens``) give one hypothesis per branch, keys among
        ``"ctc"``, ``"decoder"``, ``"joint"``; ``hyp``/``hyp_tokens`` is the legacy
        single hypothesis (its branch: ``hyp_branch`` in ``extra`` of the writer).
        ``attention_triggers`` (U,), optional: the trigger frame each attention row was
        decoded at (a streaming run); analyses then take the rows' windows from it.
        ``encoder_right_context`` (T,), optional: how many encoder frames past each frame
        the encoder output depends on (e.g. measured by
        :func:`peekalign.encoder_probe.measure_encoder_lookahead`); heard-until times and
        right contexts then use it instead of the declared look-ahead.
        """
        lp = self._check_add(utt_id, log_probs, encoder_out, audio, hyps, hyps_tokens)
        if encoder_right_context is not None:
            right_context_frames(
                encoder_right_context, lp.shape[0], uid=utt_id, error=ParameterError
            )
        name = self._unique_name(utt_id)
        arrays: dict[str, np.ndarray] = {"log_probs": lp}
        for key, value, dtype in (
            ("attention", attention, None),
            ("attention_tokens", attention_tokens, np.int32),
            ("encoder_out", encoder_out, None),
            ("attention_triggers", attention_triggers, np.int32),
            ("encoder_right_context", encoder_right_context, np.int32),
        ):
            if value is not None:
                arrays[key] = np.asarray(value, dtype=dtype)
        rel = f"arrays/{name}.npz"
        line: dict[str, Any] = {"id": utt_id, "arrays": rel}
        if audio is not None:
            line["audio"] = f"audio/{name}.wav"
        line["ref"] = ref
        text = _manifest_line(
            line, utt_id, hyp=hyp, ref_tokens=ref_tokens, hyp_tokens=hyp_tokens, hyps=hyps,
            hyps_tokens=hyps_tokens, words=words, meta=meta, extra=extra,
        )  # fmt: skip
        self._write_utterance(utt_id, name, rel, arrays, line, text, audio)

    def _check_add(self, utt_id, log_probs, encoder_out, audio, hyps, hyps_tokens) -> np.ndarray:
        """Check :meth:`add`'s id and arrays before anything is written; the log_probs
        as an array."""
        if self._done:
            raise ParameterError(
                f"utt {utt_id!r}: found a closed BundleWriter, expected an open one; "
                "add every utterance before close() or the end of the with block"
            )
        if not isinstance(utt_id, str) or not utt_id:
            raise ParameterError(f"utterance id must be a non-empty str. Got {utt_id!r} instead.")
        if utt_id in self._ids:
            raise ParameterError(
                f"utt {utt_id!r}: found a second utterance with this id, "
                "expected unique ids; rename one"
            )
        lp = np.asarray(log_probs)
        if lp.ndim != 2 or lp.shape[1] != len(self.vocab):
            raise ParameterError(
                describe(
                    f"log_probs of shape {lp.shape}",
                    f"(T, {len(self.vocab)})",
                    "pass (frames, vocabulary) scores matching vocab",
                    utt=utt_id,
                )
            )
        if encoder_out is not None:
            enc = np.asarray(encoder_out)
            if enc.ndim != 2 or enc.shape[0] != lp.shape[0]:
                raise ParameterError(
                    describe(
                        f"encoder_out of shape {enc.shape}",
                        f"({lp.shape[0]}, D): one row per frame of log_probs",
                        "pass the encoder output of this utterance without batch or padding",
                        utt=utt_id,
                    )
                )
        if audio is not None and self.sample_rate is None:
            raise ParameterError(
                f"utt {utt_id!r}: found audio but no sample_rate; pass sample_rate= to "
                "BundleWriter"
            )
        for what, given in (("hyps", hyps), ("hyps_tokens", hyps_tokens)):
            bad = [b for b in (given or {}) if b not in BRANCHES]
            if given is not None and (not isinstance(given, dict) or bad):
                raise ParameterError(
                    describe(
                        f"{what} with " + (f"branch {bad[0]!r}" if bad else repr(given)[:40]),
                        f"a dict keyed by branch ({', '.join(BRANCHES)})",
                        "name each hypothesis by the branch that produced it",
                        utt=utt_id,
                    )
                )
        return lp

    def _unique_name(self, utt_id: str) -> str:
        """A file name for the utterance's arrays (and audio) no other utterance uses."""
        name = _safe_name(utt_id)
        base, k = name, 1
        while name in self._names:
            k += 1
            name = f"{base}-{k}"
        return name

    def _write_utterance(self, utt_id, name, rel, arrays, line, text, audio) -> None:
        """Write the arrays (to ``rel``) and audio, then the manifest line."""
        wav = None
        if audio is not None:
            from .audio import wav_bytes  # soundfile loads only when audio is written

            wav = wav_bytes(np.asarray(audio, dtype=np.float32), self.sample_rate)
        # files first, the manifest line last: a failed write leaves no line behind
        self._names.add(name)
        with atomic_write(self._tmp / rel, overwrite=True, mode="wb") as f:
            np.savez_compressed(f, **arrays)
        if wav is not None:
            (self._tmp / "audio").mkdir(exist_ok=True)
            with atomic_write(self._tmp / line["audio"], overwrite=True, mode="wb") as f:
                f.write(wav)
        try:
            self._manifest.write(text)
            self._manifest.flush()
        except OSError as exc:
            self._broken = exc  # maybe half a line: close() must not publish this
            raise _write_failed(self.path, exc) from exc
        self._ids.add(utt_id)
