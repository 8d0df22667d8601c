"""In-memory model: ``Utterance`` and the lazy ``Bundle``.

Everything a bundle, a Kaldi table or a notebook user hands us ends up as an
:class:`Utterance`: normalised log-probs, the vocabulary, the frame clock, the
reference (text and token ids), optional hypothesis, word times, attention and audio.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from .align import required_frames
from .clock import FrameClock, declared_lookahead
from .exceptions import BundleError, ParameterError, PeekalignError, describe
from .io import bundle as _fmt
from .scores import to_log_probs
from .vocab import Vocabulary, WordBoundary

__all__ = [
    "BRANCHES",
    "Utterance",
    "Bundle",
    "Problem",
    "open_bundle",
    "check_bundle",
    "read_kaldi_utterances",
]


#: Hypothesis branches a bundle may carry (``hyps`` in utts.jsonl), from the CTC branch
#: alone to the system's final output. ``Utterance.system_branch`` picks the last one
#: present; a legacy single ``hyp`` whose branch ``bundle.json`` does not state is the
#: branch ``"hyp"``.
BRANCHES = _fmt.BRANCHES
LEGACY_BRANCH = "hyp"


class Problem(NamedTuple):
    """One thing wrong with a bundle: the utterance (or line) and the message."""

    utt: str
    message: str


@dataclass(eq=False)
class Utterance:
    """One utterance with everything the analyses need.

    Attributes
    ----------
    id : str
    log_probs : ndarray, float32, shape (T, V)
    vocab : Vocabulary
    clock : FrameClock
    ref : str
        Reference words.
    ref_tokens : ndarray, int32, shape (U,)
        The model's own token ids when given, else the tokenised ``ref``.
    hyp, hyp_tokens : optional
        The system's hypothesis: the one of ``system_branch``.
    hyps : dict of str to str
        Hypothesis text per branch (``"ctc"``, ``"decoder"``, ``"joint"``, or
        ``"hyp"`` for a legacy single hypothesis of unstated branch); see
        DEVELOPERS.md, "Hypotheses per branch".
    hyps_tokens : dict of str to ndarray
        Token ids per branch, where given.
    words : list of (word, start_s, end_s), optional
        Reference word times given with the utterance (``words_source`` says from
        where).
    attention : ndarray, float32, shape (L, H, U', T), optional
        Decoder cross-attention, one row per ``attention_tokens`` entry.
    attention_triggers : ndarray, int32, shape (U',), optional
        Trigger frame each attention row was decoded at, when the bundle records it
        (a streaming run); the rows' windows are then taken from it.
    encoder_out : ndarray, float32, shape (T, D), optional
        The encoder output the decoder attends to (None when the bundle has none); lets
        a decoder be re-run without the audio.
    audio_path : Path, optional
    sample_rate : int, optional
    encoder_lookahead : tuple (layers, per_layer), optional
    encoder_right_context : ndarray, int32, shape (T,), optional
        Encoder frames past each frame its output depends on, when the bundle stores
        them (``arrays/<id>.npz``) or declares a chunk size (``encoder.chunk_size``);
        the heard-until times and right contexts then use it (:attr:`encoder_ahead`).
    decoder_lookahead : int, optional
    extra : dict
        Other manifest fields, kept as given.
    meta : dict
        The manifest line's ``"meta"`` object (speaker, condition, SNR, ...): string,
        number, boolean or null values, used to slice a scan (``Scan.by``).

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign.vocab import Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> u = Utterance.from_arrays(np.log(np.full((6, 4), .25)), ref="ab a", vocab=v)
    >>> u.ref_tokens.tolist(), u.num_frames
    ([2, 3, 1, 2], 6)
    """

    id: str
    log_probs: np.ndarray
    vocab: Vocabulary
    clock: FrameClock
    ref: str
    ref_tokens: np.ndarray
    hyp: str | None = None
    hyp_tokens: np.ndarray | None = None
    words: list[tuple[str, float, float]] | None = None
    words_source: str | None = None
    attention: np.ndarray | None = None
    attention_tokens: np.ndarray | None = None
    encoder_out: np.ndarray | None = None
    attention_triggers: np.ndarray | None = None
    audio_path: Path | None = None
    sample_rate: int | None = None
    encoder_lookahead: tuple[int, int] | None = None
    decoder_lookahead: int | None = None
    extra: dict[str, Any] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)
    hyps: dict[str, str] = field(default_factory=dict)
    hyps_tokens: dict[str, np.ndarray] = field(default_factory=dict)
    encoder_right_context: np.ndarray | None = None

    @property
    def encoder_ahead(self):
        """What heard-until times take as the encoder's look-ahead: the per-frame
        :attr:`encoder_right_context` when known, else ``encoder_lookahead``."""
        if self.encoder_right_context is not None:
            return self.encoder_right_context
        return self.encoder_lookahead

    @property
    def system_branch(self) -> str | None:
        """The branch whose hypothesis the system emits: ``"joint"`` if present, else
        ``"decoder"``, else ``"ctc"``, else the legacy ``"hyp"``; None without any."""
        for b in (*reversed(BRANCHES), LEGACY_BRANCH):
            if b in self.hyps:
                return b
        return None

    def hypothesis(self, branch: str | None = None) -> tuple[str, str, np.ndarray | None]:
        """``(branch, text, token ids or None)`` of one branch (default: the system's).

        Raises
        ------
        ParameterError
            When the utterance has no hypothesis of that branch (the message lists
            the branches it has).

        Examples
        --------
        >>> import numpy as np
        >>> v = Vocabulary(["-", "|", "a"], boundary=WordBoundary("separator", "|"))
        >>> u = Utterance.from_arrays(np.log(np.full((6, 3), 1 / 3)), ref="a", vocab=v,
        ...                           hyps={"ctc": "a a", "decoder": "a"})
        >>> u.system_branch, u.hypothesis()[:2], u.hypothesis("ctc")[:2]
        ('decoder', ('decoder', 'a'), ('ctc', 'a a'))
        """
        if branch is None:
            branch = self.system_branch
            if branch is None:
                raise ParameterError(
                    describe(
                        "no hypothesis",
                        "'hyps' or 'hyp' in utts.jsonl",
                        "add the recognizer's output to the bundle",
                        utt=self.id,
                    )
                )
        if branch not in self.hyps:
            has = ", ".join(self.hyps) or "none"
            raise ParameterError(
                describe(
                    f"no hypothesis of branch {branch!r} (branches: {has})",
                    f"one of {(*BRANCHES, LEGACY_BRANCH)} present in the utterance",
                    "pick a branch it has (--branch / branch=) or add it to 'hyps'",
                    utt=self.id,
                )
            )
        return branch, self.hyps[branch], self.hyps_tokens.get(branch)

    @property
    def num_frames(self) -> int:
        return int(self.log_probs.shape[0])

    @property
    def duration_s(self) -> float:
        """End time of the last encoder frame."""
        return float(self.clock.end(self.num_frames - 1))

    @property
    def blank(self) -> int:
        return self.vocab.blank

    def load_audio(self) -> tuple[np.ndarray, int]:
        """Audio samples (float32 mono) and rate, resampled to the bundle's rate."""
        if self.audio_path is None:
            raise BundleError(
                describe(
                    "no audio",
                    "an 'audio' entry in utts.jsonl",
                    "add the wav file to the bundle",
                    utt=self.id,
                ),
                utt=self.id,
            )
        from .io.audio import load_audio

        _check_audio(self)  # a clip that does not match the frames is an error here too
        return load_audio(self.audio_path, sr=self.sample_rate, utt=self.id)

    def __repr__(self) -> str:
        att = "" if self.attention is None else f", attention={self.attention.shape}"
        return (
            f"Utterance({self.id!r}, frames={self.num_frames}, vocab={len(self.vocab)}, "
            f"ref={self.ref!r}{att})"
        )

    @classmethod
    def from_arrays(
        cls,
        log_probs,
        *,
        ref: str,
        vocab: Vocabulary | Sequence[str],
        id: str = "utt",
        clock: FrameClock | None = None,
        ref_tokens=None,
        hyp: str | None = None,
        hyp_tokens=None,
        words=None,
        attention=None,
        attention_tokens=None,
        encoder_out=None,
        attention_triggers=None,
        encoder_right_context=None,
        encoder_lookahead: tuple[int, int] | None = None,
        decoder_lookahead: int | None = None,
        meta: dict[str, Any] | None = None,
        hyps: dict[str, str] | None = None,
        hyps_tokens: dict | None = None,
        hyp_branch: str | None = None,
    ) -> Utterance:
        """Build an utterance from arrays in memory (validated like a bundle's).

        ``hyps``/``hyps_tokens`` give a hypothesis per branch; a single ``hyp`` is the
        branch ``hyp_branch`` (default ``"hyp"``, branch not stated).
        """
        if not isinstance(vocab, Vocabulary):
            vocab = Vocabulary(list(vocab))
        entry: dict[str, Any] = {"id": id, "ref": ref}
        if ref_tokens is not None:
            entry["ref_tokens"] = np.asarray(ref_tokens).tolist()
        if hyp is not None:
            entry["hyp"] = hyp
        if hyp_tokens is not None:
            entry["hyp_tokens"] = np.asarray(hyp_tokens).tolist()
        if words is not None:
            entry["words"] = [list(w) for w in words]
        if meta is not None:
            entry["meta"] = meta
        if hyps is not None:
            entry["hyps"] = dict(hyps)
        if hyps_tokens is not None:
            entry["hyps_tokens"] = {k: np.asarray(v).tolist() for k, v in hyps_tokens.items()}
        arrays = {"log_probs": np.asarray(log_probs)}
        if attention is not None:
            arrays["attention"] = np.asarray(attention)
        if attention_tokens is not None:
            arrays["attention_tokens"] = np.asarray(attention_tokens)
        if encoder_out is not None:
            arrays["encoder_out"] = np.asarray(encoder_out)
        if attention_triggers is not None:
            arrays["attention_triggers"] = np.asarray(attention_triggers)
        if encoder_right_context is not None:
            arrays["encoder_right_context"] = np.asarray(encoder_right_context)
        return _build_utterance(
            entry,
            arrays,
            vocab=vocab,
            clock=clock or FrameClock(),
            base=None,
            sample_rate=None,
            encoder=encoder_lookahead,
            decoder=decoder_lookahead,
            hyp_branch=hyp_branch,
        )


def _show(value: object, limit: int = 60) -> str:
    """A value for a one-line message: repr (so a newline shows as \\n), cut short."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _exact_int(x: object) -> object:
    """``x`` as an int when it is a whole number (e.g. 7.0 from a float dump), else as is."""
    if isinstance(x, float) and x.is_integer():
        return int(x)
    return x


def _int_list(value, what: str, uid: str, V: int) -> np.ndarray:
    if not isinstance(value, list) or not all(
        isinstance(t, int) and not isinstance(t, bool) for t in value
    ):
        raise BundleError(
            describe(
                f"{what}={_show(value)}",
                "a list of integer token ids",
                f"write {what} as [id, id, ...]",
                utt=uid,
            ),
            utt=uid,
        )
    # compare as Python ints first: JSON ids may not fit in int64
    bad = [t for t in value if not 0 <= t < V]
    if bad:
        shown = str(bad[0])
        shown = shown if len(shown) <= 24 else f"{shown[:12]}... ({len(shown)} digits)"
        raise BundleError(
            describe(
                f"token id {shown} in {what}",
                f"ids in [0, {V})",
                "use the model's vocabulary (vocab.txt)",
                utt=uid,
            ),
            utt=uid,
        )
    return np.asarray(value, dtype=np.int32).reshape(-1)


def parse_meta(value: Any, uid: str) -> dict[str, Any]:
    """Check a manifest line's ``meta`` object: a JSON object whose values are
    strings, finite numbers, booleans or null. None (absent) gives ``{}``.

    Examples
    --------
    >>> parse_meta({"speaker": "s07", "snr_db": 12.5}, "u1")
    {'speaker': 's07', 'snr_db': 12.5}
    """
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise BundleError(
            describe(
                f"meta={_show(value)}",
                'a JSON object such as {"speaker": "s07", "snr_db": 12.5}',
                "write meta as an object of named values",
                utt=uid,
            ),
            utt=uid,
        )
    for k, v in value.items():
        ok = (
            v is None
            or isinstance(v, (str, bool, int))
            or (isinstance(v, float) and math.isfinite(v))
        )
        if not ok:
            raise BundleError(
                describe(
                    f"meta field {k!r} = {_show(v)}",
                    "a string, a finite number, true/false or null",
                    "flatten lists and objects into separate fields",
                    utt=uid,
                ),
                utt=uid,
            )
    return dict(value)


def _build_utterance(
    entry: dict[str, Any],
    arrays: dict[str, np.ndarray],
    *,
    vocab: Vocabulary,
    clock: FrameClock,
    base: Path | None,
    sample_rate: int | None,
    encoder: tuple[int, int] | None,
    decoder: int | None,
    hyp_branch: str | None = None,
    chunk: int | None = None,
) -> Utterance:
    """One manifest entry and its arrays as a checked :class:`Utterance`; a
    :class:`BundleError` naming the utterance for the first thing wrong."""
    uid = entry["id"]
    log_probs, _ = to_log_probs(_log_probs_array(arrays, uid, len(vocab)), utt=uid)
    T, V = log_probs.shape
    ref, ref_tokens = _reference(entry, uid, vocab, T)

    hyps, hyps_tokens = _branch_hyps(entry, vocab, V, hyp_branch)
    legacy_tokens = hyps_tokens.get(hyp_branch or LEGACY_BRANCH) if _has_legacy(entry) else None
    system = next((b for b in (*reversed(BRANCHES), LEGACY_BRANCH) if b in hyps), None)
    hyp = hyps.get(system) if system else None
    hyp_tokens = hyps_tokens.get(system) if system else None

    words = None
    if entry.get("words") is not None:
        words = _parse_words(entry["words"], uid)

    attention = att_tokens = None
    if "attention" in arrays:
        # rows default to the tokens the decoder emitted: the legacy hypothesis', the
        # system output's, else the reference's
        fallback = next(t for t in (legacy_tokens, hyp_tokens, ref_tokens) if t is not None)
        attention, att_tokens = _attention(arrays, uid, T, V, fallback)

    encoder_out = _encoder_out(arrays, uid, T)
    att_triggers = _attention_triggers(arrays, uid, T, attention)
    right_context = _right_context(arrays, uid, T, encoder, chunk)
    audio_path = _audio_path(entry, uid, base)

    known = {"id", "arrays", "audio", "ref", "hyp", "ref_tokens", "hyp_tokens", "words", "meta"}
    meta = parse_meta(entry.get("meta"), uid)
    known |= {"hyps", "hyps_tokens"}
    return Utterance(
        id=uid,
        log_probs=log_probs,
        vocab=vocab,
        clock=clock,
        ref=ref,
        ref_tokens=ref_tokens,
        hyp=hyp,
        hyp_tokens=hyp_tokens,
        words=words,
        words_source="reference" if words is not None else None,
        attention=attention,
        attention_tokens=att_tokens,
        encoder_out=encoder_out,
        attention_triggers=att_triggers,
        audio_path=audio_path,
        sample_rate=sample_rate,
        encoder_lookahead=encoder,
        decoder_lookahead=decoder,
        extra={k: v for k, v in entry.items() if k not in known},
        meta=meta,
        hyps=hyps,
        hyps_tokens=hyps_tokens,
        encoder_right_context=right_context,
    )


def _right_context(arrays, uid: str, T: int, encoder, chunk: int | None) -> np.ndarray | None:
    """The per-frame encoder right context: the stored array, else the one a declared
    chunk size gives (plus ``layers x lookahead_per_layer``), else None."""
    if "encoder_right_context" in arrays:
        return _fmt.right_context_frames(arrays["encoder_right_context"], T, uid=uid)
    if chunk is None:
        return None
    layers, per = encoder or (0, 0)
    return declared_lookahead(T, layers=layers, per_layer=per, chunk=chunk)


def _log_probs_array(arrays: dict[str, np.ndarray], uid: str, V: int) -> np.ndarray:
    """The utterance's ``log_probs`` array as stored: present, rank 2, ``V`` wide."""
    if "log_probs" not in arrays:
        raise BundleError(
            describe(
                "arrays " + (", ".join(sorted(arrays)) or "none"),
                "a 'log_probs' array",
                "save the CTC output as log_probs in the .npz",
                utt=uid,
            ),
            utt=uid,
        )
    raw = arrays["log_probs"]
    if raw.ndim != 2:
        raise BundleError(
            describe(
                f"log_probs of rank {raw.ndim} (shape {raw.shape})",
                "rank 2 (T, V)",
                "drop the batch axis before dumping",
                utt=uid,
            ),
            utt=uid,
        )
    if raw.shape[1] != V:
        raise BundleError(
            describe(
                f"log_probs with V={raw.shape[1]}",
                f"V={V} (lines of vocab.txt)",
                "use the vocabulary the model was trained with",
                utt=uid,
            ),
            utt=uid,
        )
    return raw


def _reference(
    entry: dict[str, Any], uid: str, vocab: Vocabulary, T: int
) -> tuple[str, np.ndarray]:
    """The reference text and its token ids (given, or encoded with the vocabulary);
    checked for blanks and for fitting in ``T`` frames."""
    V = len(vocab)
    ref = entry.get("ref")
    if not isinstance(ref, str):
        raise BundleError(
            describe(f"ref={ref!r}", "a string of words", "write the reference text", utt=uid),
            utt=uid,
        )
    if "ref_tokens" in entry:
        ref_tokens = _int_list(entry["ref_tokens"], "ref_tokens", uid, V)
    else:
        ref_tokens = vocab.encode(ref, utt=uid)
    if np.any(ref_tokens == vocab.blank):
        raise BundleError(
            describe("the blank id in ref_tokens", "no blanks", "drop the blanks", utt=uid),
            utt=uid,
        )
    need, repeats = required_frames(ref_tokens)
    if need > T:
        raise BundleError(
            f"utt {uid!r}: reference needs {need} frames ({ref_tokens.size} tokens + "
            f"{repeats} repeats) but log_probs has {T}; check the frame shift or the "
            "subsampling, or the reference",
            utt=uid,
        )
    return ref, ref_tokens


def _attention(
    arrays: dict[str, np.ndarray], uid: str, T: int, V: int, fallback: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The decoder cross-attention as float32 (L, H, U, T) and the token id of each row
    (``attention_tokens`` when stored, else ``fallback``); checked against ``T``."""
    attention = np.asarray(arrays["attention"])
    if not (
        np.issubdtype(attention.dtype, np.floating) or np.issubdtype(attention.dtype, np.integer)
    ):
        raise BundleError(
            describe(
                f"attention of dtype {attention.dtype}",
                "real-valued weights",
                "dump the attention weights as float16/float32",
                utt=uid,
            ),
            utt=uid,
        )
    if attention.ndim == 2:
        attention = attention[None, None]
    if attention.ndim != 4:
        raise BundleError(
            describe(
                f"attention of shape {attention.shape}",
                "(L, H, U, T) or (U, T)",
                "dump decoder cross-attention per layer and head",
                utt=uid,
            ),
            utt=uid,
        )
    if attention.shape[-1] != T:
        raise BundleError(
            describe(
                f"attention over {attention.shape[-1]} encoder frames",
                f"{T} (the frames of log_probs)",
                "dump attention over the same encoder output",
                utt=uid,
            ),
            utt=uid,
        )
    if not np.all(np.isfinite(attention)):
        raise BundleError(
            describe("NaN/inf in attention", "finite weights", "check the dump", utt=uid),
            utt=uid,
        )
    if "attention_tokens" in arrays:
        raw_tokens = np.asarray(arrays["attention_tokens"]).reshape(-1).tolist()
        # never truncate 7.5 to 7 silently: only whole numbers pass as ids
        raw_tokens = [_exact_int(x) for x in raw_tokens]
        att_tokens = _int_list(raw_tokens, "attention_tokens", uid, V)
    else:
        att_tokens = fallback
    if attention.shape[2] != att_tokens.size:
        raise BundleError(
            describe(
                f"attention with {attention.shape[2]} rows",
                f"{att_tokens.size} (one per attention token)",
                "store 'attention_tokens' with the rows' token ids",
                utt=uid,
            ),
            utt=uid,
        )
    attention = attention.astype(np.float32, copy=False)
    return attention, att_tokens


def _audio_path(entry: dict[str, Any], uid: str, base: Path | None) -> Path | None:
    """The utterance's audio file: its manifest path under the bundle folder."""
    audio_path = None
    audio = entry.get("audio")
    if audio is not None and (not isinstance(audio, str) or not audio.strip() or "\0" in audio):
        raise BundleError(
            describe(
                f"audio={audio!r}",
                "a path string (relative to the bundle folder), e.g. audio/<id>.wav",
                "fix or drop the 'audio' field",
                utt=uid,
            ),
            utt=uid,
        )
    if audio is not None and base is not None:
        audio_path = base / audio
    return audio_path


def _encoder_out(arrays: dict[str, np.ndarray], uid: str, T: int) -> np.ndarray | None:
    """The optional ``encoder_out`` array as float32 (T, D), checked against the frames."""
    if "encoder_out" not in arrays:
        return None
    enc = np.asarray(arrays["encoder_out"])
    if not np.issubdtype(enc.dtype, np.floating) or enc.ndim != 2 or enc.shape[0] != T:
        raise BundleError(
            describe(
                f"encoder_out of shape {enc.shape} {enc.dtype}",
                f"float (T, D) with T={T} (the frames of log_probs)",
                "dump the encoder output of this utterance without batch axis or padding",
                utt=uid,
            ),
            utt=uid,
        )
    if not np.all(np.isfinite(enc)):
        raise BundleError(
            describe("NaN/inf in encoder_out", "finite values", "check the dump", utt=uid),
            utt=uid,
        )
    return enc.astype(np.float32, copy=False)


def _has_legacy(entry: dict[str, Any]) -> bool:
    return entry.get("hyp") is not None or "hyp_tokens" in entry


def _hyp_text(value, what: str, uid: str) -> str:
    if not isinstance(value, str):
        raise BundleError(
            describe(f"{what}={_show(value)}", "a string", "write the hypothesis text", utt=uid),
            utt=uid,
        )
    return value


def _branch_dict(entry: dict[str, Any], key: str, uid: str) -> dict:
    value = entry.get(key)
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise BundleError(
            describe(
                f"{key}={_show(value)}",
                f'an object by branch, e.g. {{"ctc": ..., "decoder": ...}} (branches {BRANCHES})',
                f"write {key} as a JSON object keyed by branch",
                utt=uid,
            ),
            utt=uid,
        )
    bad = [k for k in value if k not in BRANCHES]
    if bad:
        raise BundleError(
            describe(
                f"branch {bad[0]!r} in {key}",
                f"one of {', '.join(BRANCHES)}",
                "rename it (the CTC branch alone, the attention decoder, or their joint decoding)",
                utt=uid,
            ),
            utt=uid,
        )
    return value


def _branch_hyps(
    entry: dict[str, Any], vocab: Vocabulary, V: int, hyp_branch: str | None
) -> tuple[dict[str, str], dict[str, np.ndarray]]:
    """Hypothesis text and tokens per branch from one manifest line.

    ``hyps``/``hyps_tokens`` first; the legacy ``hyp``/``hyp_tokens`` fill the branch
    ``hyp_branch`` (bundle.json) or ``"hyp"``; the legacy ``hyp_attention`` (the
    attention decoder's text in early demo bundles) fills ``"decoder"``. A branch given
    twice must agree (DEVELOPERS.md, "Hypotheses per branch").
    """
    uid = entry["id"]
    texts: dict[str, str] = {}
    tokens: dict[str, np.ndarray] = {}
    for b, v in _branch_dict(entry, "hyps", uid).items():
        texts[b] = _hyp_text(v, f"hyps[{b!r}]", uid)
    for b, v in _branch_dict(entry, "hyps_tokens", uid).items():
        tokens[b] = _int_list(v, f"hyps_tokens[{b!r}]", uid, V)
    legacy = hyp_branch or LEGACY_BRANCH
    sources = []
    if _has_legacy(entry):
        text = entry.get("hyp")
        toks = None
        if text is not None:
            text = _hyp_text(text, "hyp", uid)
        if "hyp_tokens" in entry:
            toks = _int_list(entry["hyp_tokens"], "hyp_tokens", uid, V)
        sources.append((legacy, "hyp", text, toks))
    if isinstance(entry.get("hyp_attention"), str):
        sources.append(("decoder", "hyp_attention", entry["hyp_attention"], None))
    for b, field_name, text, toks in sources:
        if b in texts and text is not None and texts[b] != text:
            raise BundleError(
                describe(
                    f"{field_name}={_show(text)} and hyps[{b!r}]={_show(texts[b])}",
                    "one hypothesis per branch",
                    f"drop '{field_name}' (hyps wins) or make them equal",
                    utt=uid,
                ),
                utt=uid,
            )
        if toks is not None and b not in tokens:
            tokens[b] = toks
        if b not in texts:
            texts[b] = text if text is not None else vocab.decode(toks)
    for b, toks in tokens.items():
        if b not in texts:
            texts[b] = vocab.decode(toks)
    return texts, tokens


def _attention_triggers(
    arrays: dict[str, np.ndarray], uid: str, T: int, attention: np.ndarray | None
) -> np.ndarray | None:
    """The optional ``attention_triggers`` (U,): one frame per attention row, in
    ``[0, T)``, non-decreasing."""
    if "attention_triggers" not in arrays:
        return None
    trig = np.asarray(arrays["attention_triggers"]).reshape(-1)
    rows = 0 if attention is None else attention.shape[2]
    ok = np.issubdtype(trig.dtype, np.integer) and trig.size == rows
    ok = ok and (trig.size == 0 or (trig.min() >= 0 and trig.max() < T))
    ok = ok and bool(np.all(np.diff(trig) >= 0))
    if not ok:
        raise BundleError(
            describe(
                f"attention_triggers of shape {trig.shape} {trig.dtype}",
                f"{rows} non-decreasing integer frames in [0, {T}), one per attention row",
                "store the trigger frame each attention row was decoded at, or drop it",
                utt=uid,
            ),
            utt=uid,
        )
    return trig.astype(np.int32)


def _parse_words(value, uid: str) -> list[tuple[str, float, float]]:
    out = []
    if not isinstance(value, list):
        value = [value]
    for i, w in enumerate(value):
        ok = (
            isinstance(w, (list, tuple))
            and len(w) == 3
            and isinstance(w[0], str)
            and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in w[1:])
        )
        if not ok or not (np.isfinite(w[1]) and np.isfinite(w[2])) or w[2] < w[1] or w[1] < 0:
            raise BundleError(
                describe(
                    f"words[{i}]={_show(w)}",
                    '["word", start_s, end_s] with 0 <= start <= end',
                    "fix the word times",
                    utt=uid,
                ),
                utt=uid,
            )
        out.append((w[0], float(w[1]), float(w[2])))
    return out


class Bundle:
    """A bundle opened lazily: metadata and manifest now, arrays on access.

    ``bundle[utt_id]`` loads one :class:`Utterance`; iteration yields them in manifest
    order. Use :func:`open_bundle` to get one.
    """

    def __init__(self, path: str | os.PathLike) -> None:
        self.path = Path(path)
        self.meta = _fmt.read_meta(self.path)
        vocab_file = self.meta["vocab"]
        tokens = _fmt.read_vocab(self.path / str(vocab_file))
        wb = self.meta["word_boundary"]
        spm = None
        if self.meta.get("tokenizer"):
            spm = _load_spm(self.path / str(self.meta["tokenizer"]))
        try:
            self.vocab = Vocabulary(
                tokens,
                blank=self.meta["blank"],
                boundary=WordBoundary(wb["kind"], wb["symbol"]),
                spm=spm,
            )
        except ParameterError as exc:
            raise BundleError(f"bundle.json / vocab.txt: {exc}") from None
        self.clock = _clock_from_meta(self.meta)
        self.sample_rate = self.meta.get("sample_rate")
        enc = self.meta.get("encoder") or {}
        self.encoder_lookahead = (
            (int(enc.get("layers", 0)), int(enc.get("lookahead_per_layer", 0))) if enc else None
        )
        self.encoder_chunk = int(enc["chunk_size"]) if "chunk_size" in enc else None
        dec = self.meta.get("decoder") or {}
        self.decoder_lookahead = int(dec["lookahead"]) if "lookahead" in dec else None
        self.hyp_branch = _hyp_branch(self.meta)
        # lines kept as their place in the file, read and parsed when an utterance is
        # asked for: every worker of a scan opens the bundle, and kept lines would grow
        # each with the set's size
        self.entries, self.manifest_problems = _fmt.read_manifest(self.path, compact=True)
        self._bad_lines: dict[str, str] = {}
        for u, m in self.manifest_problems:
            self._bad_lines.setdefault(u, m)

    @property
    def ids(self) -> list[str]:
        """Utterance ids in manifest order (good manifest lines only)."""
        return list(self.entries.ids)

    def utterance_meta(self) -> dict[str, dict[str, Any]]:
        """Each utterance's manifest ``meta`` object, by id, without loading arrays.

        A line whose ``meta`` is malformed maps to ``{}`` here; loading that
        utterance raises the error.
        """
        out: dict[str, dict[str, Any]] = {}
        for e in self.entries:
            try:
                out[e["id"]] = parse_meta(e.get("meta"), e["id"])
            except BundleError:
                out[e["id"]] = {}
        return out

    def __len__(self) -> int:
        return len(self.entries)

    def __contains__(self, utt_id: str) -> bool:
        return utt_id in self.entries.index

    def __getitem__(self, utt_id: str) -> Utterance:
        entry = self.entries.get(utt_id)
        if entry is None and utt_id in self._bad_lines:
            # its manifest line is there but unusable: say why, not "not in the bundle"
            raise BundleError(self._bad_lines[utt_id], utt=utt_id)
        if entry is None:
            near = ", ".join(self.ids[:5])
            raise KeyError(
                f"utt {utt_id!r}: not in the bundle {str(self.path)!r}; expected one of its "
                f"{len(self)} ids (e.g. {near})"
            )
        arrays = _fmt.read_arrays(self.path, entry["arrays"], utt=utt_id)
        return _build_utterance(
            entry,
            arrays,
            vocab=self.vocab,
            clock=self.clock,
            base=self.path,
            sample_rate=self.sample_rate,
            encoder=self.encoder_lookahead,
            decoder=self.decoder_lookahead,
            hyp_branch=self.hyp_branch,
            chunk=self.encoder_chunk,
        )

    def __iter__(self) -> Iterator[Utterance]:
        for uid in self.ids:
            yield self[uid]

    def __repr__(self) -> str:
        return f"Bundle({str(self.path)!r}, {len(self)} utterances, {self.vocab!r})"

    def notes(self) -> list[str]:
        """Streaming facts ``bundle.json`` leaves out, each with what is assumed instead.

        Not problems: every analysis runs. But the right context (how far past the trigger a
        decoder step hears: look-ahead + what the encoder and the front end see ahead)
        is then shorter than the model's, so reach margins come out smaller and ``cut-off`` diagnoses more
        often than they should.

        Returns
        -------
        list of str
            One line per missing fact: what is assumed and the field that gives it.

        Examples
        --------
        >>> from peekalign.data import demo_path
        >>> open_bundle(demo_path("full")).notes()
        []
        """
        out = []
        if self.decoder_lookahead is None:
            out.append(
                'no "decoder" look-ahead: analyses use 0 frames unless given one '
                '(--lookahead, lookahead=); add "decoder": {"lookahead": E}'
            )
        if self.encoder_lookahead is None:
            out.append(
                'no "encoder" look-ahead: the encoder is taken to see no future frames, '
                "so right contexts are short and margins strict; add "
                '"encoder": {"layers": L, "lookahead_per_layer": R}'
            )
        fe = self.meta.get("front_end") or {}
        if "right_context_s" not in fe and "subsampling" not in fe:
            out.append(
                'no "front_end": an encoder frame is taken to see no audio past its '
                "centre, so right contexts are short and margins strict; add "
                '"front_end": {"subsampling": N, "hop_s": H, "win_s": W} '
                '(or "right_context_s")'
            )
        return out

    def check(self) -> list[Problem]:
        """Every problem of the bundle, one per utterance at most, in manifest order."""
        problems = [Problem(u, m) for u, m in self.manifest_problems]
        for uid in self.ids:
            try:
                utt = self[uid]
                _check_audio(utt)
            except PeekalignError as exc:
                problems.append(Problem(uid, str(exc)))
        return problems


def _hyp_branch(meta: dict[str, Any]) -> str | None:
    """bundle.json ``hyp_branch``: the branch of the manifest's legacy ``hyp``."""
    b = meta.get("hyp_branch")
    if b is None or b in BRANCHES:
        return b
    raise BundleError(
        describe(
            f"hyp_branch={_show(b)}",
            f"one of {', '.join(BRANCHES)} (the branch the manifest's 'hyp' comes from)",
            "fix or drop 'hyp_branch' (without it the 'hyp' is branch \"hyp\")",
            where="bundle.json",
        )
    )


def _load_spm(path: Path):
    if not path.is_file():
        raise BundleError(
            describe(
                f"no tokenizer file {str(path)!r}",
                "the SentencePiece model named in bundle.json",
                "copy it into the bundle or drop 'tokenizer'",
                where="bundle.json",
            )
        )
    try:
        import sentencepiece
    except ImportError:
        raise BundleError(
            describe(
                f"tokenizer {path.name!r} but no sentencepiece package",
                "sentencepiece installed",
                "pip install sentencepiece",
                where="bundle.json",
            )
        ) from None
    try:
        return sentencepiece.SentencePieceProcessor(model_file=str(path))
    except Exception as exc:  # sentencepiece raises plain RuntimeError/OSError
        raise BundleError(
            describe(
                f"unreadable tokenizer {path.name!r} ({exc})",
                "a SentencePiece .model",
                "point 'tokenizer' at the model file",
                where="bundle.json",
            )
        ) from None


def _clock_from_meta(meta: dict[str, Any]) -> FrameClock:
    fe = meta.get("front_end") or {}
    offset = meta.get("frame_offset_s")
    right = fe.get("right_context_s")
    if offset is None or right is None:
        if "subsampling" in fe:
            try:
                ref = FrameClock.from_front_end(
                    hop_s=float(fe.get("hop_s", 0.01)),
                    win_s=float(fe.get("win_s", 0.025)),
                    subsampling=int(fe["subsampling"]),
                )
            except ParameterError as exc:
                raise BundleError(
                    f"bundle.json front_end: {exc} In a bundle, give 'frame_offset_s' and "
                    "front_end 'right_context_s' in bundle.json instead."
                ) from None
            offset = ref.frame_offset_s if offset is None else offset
            right = ref.right_context_s if right is None else right
    try:
        return FrameClock(
            frame_shift_s=float(meta["frame_shift_s"]),
            frame_offset_s=float(offset or 0.0),
            right_context_s=float(right or 0.0),
        )
    except (ParameterError, TypeError, ValueError) as exc:
        raise BundleError(f"bundle.json frame clock: {exc}") from None


def _check_audio(utt: Utterance) -> None:
    """Audio exists, is readable and lasts about as long as the frames."""
    if utt.audio_path is None:
        return
    import soundfile as sf

    if not utt.audio_path.is_file():
        raise BundleError(
            describe(
                f"no audio file {str(utt.audio_path)!r}"
                + (" (a folder)" if utt.audio_path.exists() else ""),
                "the file named in utts.jsonl",
                "copy it into the bundle or fix the 'audio' path (relative to the bundle)",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    try:
        info = sf.info(str(utt.audio_path))
    except Exception as exc:  # soundfile raises its own error types
        raise BundleError(
            describe(
                f"unreadable audio {utt.audio_path.name!r} ({type(exc).__name__}: {exc})",
                "a readable wav/flac file",
                "re-export the audio (e.g. sox in.x -b 16 out.wav); check it is not truncated",
                utt=utt.id,
            ),
            utt=utt.id,
        ) from None
    if info.frames == 0:
        raise BundleError(
            describe(
                f"zero-length audio {utt.audio_path.name!r}",
                "samples",
                "re-export the audio",
                utt=utt.id,
            ),
            utt=utt.id,
        )
    dur = info.frames / info.samplerate
    c = utt.clock
    # frames cover [offset - shift/2, offset + (T-1) shift + right context]; allow the
    # front end's edge frames and a little padding either way
    slack = c.frame_offset_s + c.right_context_s + 3 * c.frame_shift_s
    frames_dur = utt.num_frames * c.frame_shift_s
    if abs(dur - frames_dur) > slack:
        raise BundleError(
            describe(
                f"audio of {dur:.2f} s but {utt.num_frames} frames x "
                f"{c.frame_shift_s * 1000:g} ms = {frames_dur:.2f} s",
                f"agreement within {slack:.2f} s",
                "check frame_shift_s (hop x subsampling) or that the audio matches the arrays",
                utt=utt.id,
            ),
            utt=utt.id,
        )


def open_bundle(path: str | os.PathLike) -> Bundle:
    """Open a bundle folder lazily (no arrays are read until asked for).

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> from peekalign.io.bundle import BundleWriter
    >>> d = tempfile.mkdtemp() + "/b"
    >>> with BundleWriter(d, vocab=["<b>", "|", "a"], frame_shift_s=0.04,
    ...                   word_boundary={"kind": "separator", "symbol": "|"}) as w:
    ...     w.add("u1", np.log(np.full((4, 3), 1 / 3)), ref="a a")
    >>> b = open_bundle(d)
    >>> b.ids, b["u1"].ref_tokens.tolist()
    (['u1'], [2, 1, 2])
    """
    return Bundle(path)


def check_bundle(path: str | os.PathLike) -> list[Problem]:
    """All problems of the bundle at ``path`` (an empty list when it is clean)."""
    try:
        bundle = open_bundle(path)
    except PeekalignError as exc:
        return [Problem("<bundle>", str(exc))]
    return bundle.check()


def read_kaldi_utterances(
    spec: str | os.PathLike,
    *,
    refs: dict[str, str],
    vocab: Vocabulary,
    clock: FrameClock | None = None,
    words: dict[str, list[tuple[str, float, float]]] | None = None,
    allow_pipes: bool = False,
) -> Iterator[Utterance]:
    """Utterances from Kaldi posteriors (an ark or scp table, read with kaldiio).

    Parameters
    ----------
    spec : str or path-like
        ``scp:PATH``, ``ark:PATH`` or a bare ``.scp``/``.ark`` path of (T, V) matrices
        (log-probs, probabilities or logits: detected like a bundle's).
    refs : dict
        Reference text per utterance key; a key without a reference is an error.
    vocab : Vocabulary
    clock : FrameClock, optional
    words : dict, optional
        Reference word times per key (e.g. from :func:`peekalign.io.ctm.read_ctm`).
    allow_pipes : bool
        Allow scp entries that are shell commands (``cmd |``); they run a command, so
        only for trusted files.

    Examples
    --------
    >>> import tempfile, numpy as np
    >>> from peekalign.io.kaldi import write_kaldi_matrices
    >>> d = tempfile.mkdtemp()
    >>> write_kaldi_matrices(d + "/p.ark", [("u1", np.log(np.full((4, 3), 1 / 3)))])
    >>> v = Vocabulary(["-", "|", "a"], boundary=WordBoundary("separator", "|"))
    >>> [u.ref_tokens.tolist() for u in read_kaldi_utterances(d + "/p.ark", refs={"u1": "a a"},
    ...                                                          vocab=v)]
    [[2, 1, 2]]
    """
    from .io.kaldi import read_kaldi_matrices

    for key, matrix in read_kaldi_matrices(spec, allow_pipes=allow_pipes):
        if key not in refs:
            raise BundleError(
                describe(
                    "no reference for this key",
                    "a reference text for every utterance of the table",
                    "add it to refs (e.g. from a Kaldi 'text' file)",
                    utt=key,
                ),
                utt=key,
            )
        yield Utterance.from_arrays(
            matrix,
            id=key,
            ref=refs[key],
            vocab=vocab,
            clock=clock,
            words=(words or {}).get(key),
        )
