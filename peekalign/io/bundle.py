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

import json
import os
import re
import zipfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..exceptions import BundleError, ParameterError, describe
from .atomic import atomic_write

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
_SAFE_ID = re.compile(r"[^A-Za-z0-9._-]+")


def _read_text(path: Path, what: str) -> str:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise BundleError(
            describe(
                f"no {what} at {str(path)!r}",
                f"the bundle's {what}",
                "check the bundle path (a folder holding bundle.json)",
            )
        ) from None
    except OSError as exc:
        raise BundleError(
            describe(
                f"{what} {str(path)!r} unreadable ({exc.strerror})",
                "a readable file",
                "fix the file's permissions",
            )
        ) from None
    try:
        text = raw.decode("utf-8-sig")  # tolerate a byte-order mark
    except UnicodeDecodeError as exc:
        raise BundleError(
            describe(
                f"{what} {str(path)!r} not UTF-8 (byte {exc.start})",
                "UTF-8 text",
                "re-save the file as UTF-8",
            )
        ) from None
    return text


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
        meta = json.loads(_read_text(path, "bundle.json"))
    except json.JSONDecodeError as exc:
        raise BundleError(
            describe(
                f"invalid JSON at line {exc.lineno} column {exc.colno} ({exc.msg})",
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
    if not isinstance(shift, (int, float)) or isinstance(shift, bool) or not shift > 0:
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
    return meta


def read_vocab(path: str | os.PathLike) -> list[str]:
    """Tokens of ``vocab.txt``, one a line (CRLF and a BOM are accepted).

    A line may hold ``token id`` pairs; the id must then equal the line number.
    """
    text = _read_text(Path(path), "vocab.txt")
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


class ManifestLine(dict):
    """One parsed line of ``utts.jsonl`` (a dict) with its line number."""

    lineno: int = 0


def read_manifest(bundle: str | os.PathLike) -> tuple[list[ManifestLine], list[tuple[str, str]]]:
    """Parse ``utts.jsonl``.

    Returns
    -------
    entries : list of ManifestLine
        Good lines, in file order.
    problems : list of (utt_id_or_line, message)
        Lines that could not be used (bad JSON, missing id, duplicate id, ...);
        the rest of the file is still read.
    """
    path = Path(bundle) / "utts.jsonl"
    text = _read_text(path, "utts.jsonl")
    entries: list[ManifestLine] = []
    problems: list[tuple[str, str]] = []
    seen: dict[str, int] = {}
    for n, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        where = f"utts.jsonl line {n}"
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as exc:
            problems.append(
                (
                    f"line {n}",
                    describe(
                        f"invalid JSON at column {exc.colno} ({exc.msg})",
                        "one JSON object a line",
                        "fix that line",
                        where=where,
                    ),
                )
            )
            continue
        if not isinstance(obj, dict):
            problems.append(
                (
                    f"line {n}",
                    describe(
                        f"a JSON {type(obj).__name__}",
                        "a JSON object",
                        "fix that line",
                        where=where,
                    ),
                )
            )
            continue
        uid = obj.get("id")
        if not isinstance(uid, str) or not uid:
            problems.append(
                (
                    f"line {n}",
                    describe(
                        f"id={uid!r}",
                        "a non-empty string id",
                        'add "id": "<utterance id>"',
                        where=where,
                    ),
                )
            )
            continue
        if uid in seen:
            problems.append(
                (
                    uid,
                    describe(
                        f"id {uid!r} again (first on line {seen[uid]})",
                        "unique ids",
                        "rename or drop the duplicate",
                        utt=uid,
                        where=where,
                    ),
                )
            )
            continue
        missing = [k for k in ("arrays", "ref") if k not in obj]
        if missing:
            problems.append(
                (
                    uid,
                    describe(
                        "no " + ", ".join(repr(k) for k in missing),
                        "'arrays' and 'ref' on every line",
                        'add "arrays": "arrays/<id>.npz" and "ref": "<words>"',
                        utt=uid,
                        where=where,
                    ),
                )
            )
            continue
        seen[uid] = n
        entry = ManifestLine(obj)
        entry.lineno = n
        entries.append(entry)
    return entries, problems


def read_arrays(
    bundle: str | os.PathLike, rel: str, *, utt: str | None = None
) -> dict[str, np.ndarray]:
    """Load an utterance's ``.npz`` (never with pickle) into a dict of arrays."""
    base = Path(bundle).resolve()
    path = (base / rel).resolve()
    if not isinstance(rel, str) or base not in path.parents:
        raise BundleError(
            describe(
                f"arrays path {rel!r} outside the bundle",
                "a path inside the bundle",
                "use a relative path such as arrays/<id>.npz",
                utt=utt,
            ),
            utt=utt,
        )
    try:
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}
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
    except (ValueError, OSError, zipfile.BadZipFile, EOFError, KeyError) as exc:
        raise BundleError(
            describe(
                f"unreadable arrays file {rel!r} ({type(exc).__name__}: {exc})",
                "a complete .npz written by numpy.savez without object arrays",
                "dump the arrays again",
                utt=utt,
            ),
            utt=utt,
        ) from None


def _safe_name(uid: str) -> str:
    name = _SAFE_ID.sub("_", uid).strip("._") or "utt"
    return name[:120]


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
        (self.path / "arrays").mkdir(parents=True, exist_ok=True)
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
        with atomic_write(self.path / "bundle.json", overwrite=True) as f:
            json.dump(meta, f, indent=2, ensure_ascii=False)
            f.write("\n")
        with atomic_write(self.path / "vocab.txt", overwrite=True) as f:
            f.write("".join(t + "\n" for t in self.vocab))
        self._ids: set[str] = set()
        self._names: set[str] = set()
        self._manifest = open(self.path / "utts.jsonl", "w", encoding="utf-8", newline="\n")

    def __enter__(self) -> BundleWriter:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Flush and close the manifest."""
        if not self._manifest.closed:
            self._manifest.close()

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
        extra: dict[str, Any] | None = None,
    ) -> None:
        """Write one utterance's arrays (and audio) and its manifest line."""
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
        name = _safe_name(utt_id)
        base, k = name, 1
        while name in self._names:
            k += 1
            name = f"{base}-{k}"
        self._names.add(name)
        arrays: dict[str, np.ndarray] = {"log_probs": lp}
        if attention is not None:
            arrays["attention"] = np.asarray(attention)
        if attention_tokens is not None:
            arrays["attention_tokens"] = np.asarray(attention_tokens, dtype=np.int32)
        rel = f"arrays/{name}.npz"
        with atomic_write(self.path / rel, overwrite=True, mode="wb") as f:
            np.savez_compressed(f, **arrays)
        line: dict[str, Any] = {"id": utt_id, "arrays": rel}
        if audio is not None:
            if self.sample_rate is None:
                raise ParameterError(
                    f"utt {utt_id!r}: found audio but no sample_rate; pass sample_rate= to "
                    "BundleWriter"
                )
            import soundfile as sf

            (self.path / "audio").mkdir(exist_ok=True)
            arel = f"audio/{name}.wav"
            with atomic_write(self.path / arel, overwrite=True, mode="wb") as f:
                sf.write(
                    f,
                    np.asarray(audio, dtype=np.float32),
                    self.sample_rate,
                    format="WAV",
                    subtype="PCM_16",
                )
            line["audio"] = arel
        line["ref"] = ref
        if hyp is not None:
            line["hyp"] = hyp
        if ref_tokens is not None:
            line["ref_tokens"] = [int(t) for t in ref_tokens]
        if hyp_tokens is not None:
            line["hyp_tokens"] = [int(t) for t in hyp_tokens]
        if words is not None:
            line["words"] = [[str(w), round(float(s), 6), round(float(e), 6)] for w, s, e in words]
        line.update(extra or {})
        self._manifest.write(json.dumps(line, ensure_ascii=False) + "\n")
        self._manifest.flush()
        self._ids.add(utt_id)
