"""Bad-input matrix: one small valid bundle per case, one thing corrupted.

Every case goes through the three doors a user has: ``check_bundle`` (one problem,
naming the utterance, what was found and the fix), ``open_bundle(path)[utt_id]`` (the
documented error type with ``.utt`` set; ``.load_audio()`` for audio cases) and
``peekalign check`` (exit 1, one line per problem, no traceback). The other utterance
of the bundle must stay readable: a bad utterance never hides the good ones.

tests/test_bundle.py already covers: missing / 50-byte npz, malformed JSON line,
duplicate ids, vocabulary size mismatch, NaN / +inf log-probs, rank-3 log-probs,
reference longer than the frames, untokenisable word, attention frame / row count,
missing bundle.json fields, BOM + CRLF manifest. None of those is repeated here.
"""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
import zipfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from conftest import random_log_probs
from test_bundle import SEP, VOCAB

from peekalign import (
    BundleError,
    BundleWriter,
    check_bundle,
    open_bundle,
)
from peekalign.cli import main
from peekalign.clock import encoder_frames, kaldi_frames

SR = 16000
T = 20  # encoder frames of 40 ms: 0.8 s
SHIFT = 0.04
REF = "tram car"
REF_IDS = [VOCAB.index(c) for c in REF.replace(" ", "|")]  # t r a m | c a r
U = len(REF_IDS)


def write_base(path: Path, rng, *, ids=("u0", "u1"), **meta) -> Path:
    """A clean bundle: every optional part present so each case corrupts one thing."""
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=SHIFT,
        word_boundary=SEP,
        sample_rate=SR,
        encoder={"layers": 2, "lookahead_per_layer": 1},
        decoder={"lookahead": 3},
        **meta,
    ) as w:
        for uid in ids:
            w.add(
                uid,
                random_log_probs(rng, T, len(VOCAB)),
                ref=REF,
                hyp=REF,
                hyp_tokens=REF_IDS,
                words=[("tram", 0.08, 0.32), ("car", 0.4, 0.72)],
                attention=rng.dirichlet(np.ones(T), size=(2, 2, U)).astype(np.float16),
                attention_tokens=REF_IDS,
                audio=0.01 * rng.standard_normal(int(T * SHIFT * SR)).astype(np.float32),
            )
    return path


# -- corruption helpers -------------------------------------------------------------


def set_meta(**fields) -> Callable[[Path, str], None]:
    def f(b: Path, uid: str) -> None:
        meta = json.loads((b / "bundle.json").read_text("utf-8"))
        meta.update(fields)
        (b / "bundle.json").write_text(json.dumps(meta), "utf-8")

    return f


def _on_line(edit: Callable[[str], str | bytes]) -> Callable[[Path, str], None]:
    """Apply ``edit`` to ``uid``'s manifest line (found by its id, as the writer spells
    it); other lines keep their bytes, even ones an earlier edit made invalid."""

    def f(b: Path, uid: str) -> None:
        key = f'{{"id": "{uid}",'.encode()
        lines = (b / "utts.jsonl").read_bytes().split(b"\n")
        for i, raw in enumerate(lines):
            if raw.startswith(key):
                new = edit(raw.decode("utf-8", "surrogateescape"))
                lines[i] = new if isinstance(new, bytes) else new.encode()
        (b / "utts.jsonl").write_bytes(b"\n".join(lines))

    return f


def set_line(**fields) -> Callable[[Path, str], None]:
    """Change fields of ``uid``'s manifest line (value ``...`` deletes the field)."""

    def edit(line: str) -> str:
        obj = json.loads(line)
        obj.update(fields)
        return json.dumps({k: v for k, v in obj.items() if v is not ...}, ensure_ascii=False)

    return _on_line(edit)


def replace_line(text: str) -> Callable[[Path, str], None]:
    """Put raw ``text`` in place of ``uid``'s manifest line."""

    return _on_line(lambda line: text)


def arrays(**replace) -> Callable[[Path, str], None]:
    """Rewrite ``uid``'s npz with some arrays replaced (value ``...`` drops one)."""

    def f(b: Path, uid: str) -> None:
        p = b / "arrays" / f"{uid}.npz"
        with np.load(p) as z:
            data = {k: z[k] for k in z.files}
        data.update(replace)
        np.savez(p, **{k: v for k, v in data.items() if v is not ...})

    return f


def raw_file(rel: str, content: bytes | Callable[[bytes], bytes]) -> Callable[[Path, str], None]:
    def f(b: Path, uid: str) -> None:
        p = b / rel.format(uid=uid)
        new = content(p.read_bytes()) if callable(content) else content
        p.write_bytes(new)

    return f


def line_bytes(old: bytes, new: bytes) -> Callable[[Path, str], None]:
    """Replace bytes inside ``uid``'s manifest line only."""
    return _on_line(lambda line: line.encode("utf-8", "surrogateescape").replace(old, new))


def npz_with_short_member(b: Path, uid: str) -> None:
    """An intact zip whose log_probs member holds only part of the array its header
    announces (a dump cut off mid-write, then zipped)."""
    buf = io.BytesIO()
    np.lib.format.write_array(buf, random_log_probs(np.random.default_rng(1), T, len(VOCAB)))
    with zipfile.ZipFile(b / "arrays" / f"{uid}.npz", "w") as zf:
        zf.writestr("log_probs.npy", buf.getvalue()[:400])


def wav(seconds: float, *, header_sr: int = SR, sample_sr: int = SR):
    """``uid``'s audio replaced by ``seconds`` of noise sampled at ``sample_sr`` but
    labelled ``header_sr`` in the WAV header."""

    def f(b: Path, uid: str) -> None:
        y = 0.01 * np.random.default_rng(2).standard_normal(int(seconds * sample_sr))
        sf.write(b / "audio" / f"{uid}.wav", y, header_sr, subtype="PCM_16")

    return f


def remove(rel: str) -> Callable[[Path, str], None]:
    def f(b: Path, uid: str) -> None:
        (b / rel.format(uid=uid)).unlink()

    return f


def to_folder(rel: str) -> Callable[[Path, str], None]:
    def f(b: Path, uid: str) -> None:
        p = b / rel.format(uid=uid)
        p.unlink()
        p.mkdir()

    return f


def lp(fill) -> np.ndarray:
    out = random_log_probs(np.random.default_rng(3), T, len(VOCAB))
    return fill(out)


def att(fill) -> np.ndarray:
    a = np.full((2, 2, U, T), 1.0 / T, np.float32)
    return fill(a)


def _set(a, index, value):
    a[index] = value
    return a


# -- the matrix ---------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    """``scope``: "utt" (one utterance is bad, named in the message), "line" (a manifest
    line without a usable id, named by its line number) or "bundle" (the whole bundle is
    unreadable, the file named). ``found`` / ``fix`` are regexes for the message."""

    name: str
    corrupt: Callable[[Path, str], None]
    scope: str
    found: str
    fix: str
    audio: bool = False  # the error shows when the audio is touched


CASES = [
    # ---- files: arrays ----
    Case(
        "npz member shorter than its header",
        npz_with_short_member,
        "utt",
        r"header says shape \(20, 9\) float32 \(720 bytes\) in a 400-byte entry",
        "dump the arrays again",
    ),
    Case(
        "npz empty file",
        raw_file("arrays/{uid}.npz", b""),
        "utt",
        "unreadable arrays file",
        "dump the arrays again",
    ),
    Case(
        "npz is a bare .npy",
        lambda b, uid: np.save(open(b / "arrays" / f"{uid}.npz", "wb"), np.zeros((T, 9))),
        "utt",
        "not an .npz archive",
        r"numpy\.savez\(path, log_probs=\.\.\.\) instead of numpy\.save",
    ),
    Case(
        "npz holds an object array",
        lambda b, uid: np.savez(
            b / "arrays" / f"{uid}.npz",
            log_probs=np.array([None] * 3, dtype=object),
        ),
        "utt",
        r"holding Python objects \(object\)",
        "convert the array to a numeric dtype",
    ),
    Case(
        "npz without log_probs",
        arrays(log_probs=..., logits=lp(lambda x: x)),
        "utt",
        "found arrays attention, attention_tokens, logits",
        "save the CTC output as log_probs",
    ),
    Case(
        "arrays path escapes the bundle",
        set_line(arrays="../../elsewhere/u0.npz"),
        "utt",
        "outside the bundle",
        "use a relative path such as arrays/<id>.npz",
    ),
    Case(
        "arrays path is a number",
        set_line(arrays=5),
        "utt",
        "arrays=5, a int",
        "use a relative path such as arrays/<id>.npz",
    ),
    Case(
        "arrays path is a folder",
        to_folder("arrays/{uid}.npz"),
        "utt",
        "unreadable arrays file .*IsADirectoryError",
        "dump the arrays again",
    ),
    # ---- arrays: log_probs ----
    Case(
        "log_probs of integers",
        arrays(log_probs=np.zeros((T, 9), np.int64)),
        "utt",
        "dtype int64",
        "dump the model's float output",
    ),
    Case(
        "log_probs complex",
        arrays(log_probs=lp(lambda x: x.astype(np.complex64))),
        "utt",
        "dtype complex64",
        "dump the model's float output",
    ),
    Case(
        "log_probs with zero frames",
        arrays(log_probs=np.zeros((0, 9), np.float32)),
        "utt",
        r"shape \(0, 9\)",
        "dump one \\(frames, vocabulary\\) matrix",
    ),
    Case(
        "log_probs frame all -inf",
        arrays(log_probs=lp(lambda x: _set(x, 4, -np.inf))),
        "utt",
        "all -inf",
        "check the dump",
    ),
    # ---- arrays: attention ----
    Case(
        "attention holds NaN",
        arrays(attention=att(lambda a: _set(a, (1, 0, 2, 5), np.nan))),
        "utt",
        "NaN/inf in attention",
        "check the dump",
    ),
    Case(
        "attention of rank 3",
        arrays(attention=np.full((2, U, T), 0.05, np.float32)),
        "utt",
        r"attention of shape \(2, 8, 20\)",
        "dump decoder cross-attention per layer and head",
    ),
    Case(
        "attention of strings",
        arrays(attention=np.full((U, T), "x")),
        "utt",
        "attention of dtype <U1",
        "dump the attention weights as float16/float32",
    ),
    Case(
        "attention_tokens fractional",
        arrays(attention_tokens=np.array(REF_IDS, np.float32) + 0.5),
        "utt",
        r"attention_tokens=\[7\.5, 6\.5",
        r"write attention_tokens as \[id, id, \.\.\.\]",
    ),
    Case(
        "attention_tokens out of range",
        arrays(attention_tokens=np.array(REF_IDS[:-1] + [99])),
        "utt",
        r"token id 99 in attention_tokens, expected ids in \[0, 9\)",
        r"use the model's vocabulary \(vocab\.txt\)",
    ),
    # ---- vocabulary ----
    Case(
        "vocab ids out of order",
        raw_file("vocab.txt", "".join(f"{t} {i + 1}\n" for i, t in enumerate(VOCAB)).encode()),
        "bundle",
        "vocab.txt: found id 1 on line 1",
        "write one token a line in id order",
    ),
    Case(
        "vocab empty",
        raw_file("vocab.txt", b""),
        "bundle",
        "vocab.txt: found an empty file",
        "write the vocabulary",
    ),
    Case(
        "vocab not UTF-8",
        raw_file("vocab.txt", lambda x: x.replace(b"o\n", b"\xf6\n")),
        "bundle",
        r"vocab\.txt .* not UTF-8 \(byte \d+\)",
        "re-save the file as UTF-8",
    ),
    Case(
        "separator missing from vocab",
        set_meta(word_boundary={"kind": "separator", "symbol": "#"}),
        "bundle",
        "bundle.json / vocab.txt: The word separator '#' must be a token",
        r"add it to vocab.txt or state the model's own rule \(word_boundary",
    ),
    Case(
        "blank outside the vocabulary",
        set_meta(blank=99),
        "bundle",
        r"bundle.json / vocab.txt: .*range \[0, 9\)\. Got 99",
        r"the blank token's id \(its line in vocab.txt, counting from 0\)",
    ),
    Case(
        "unknown tokenizer file",
        set_meta(tokenizer="spm.model"),
        "bundle",
        "bundle.json: found no tokenizer file .*spm.model",
        "copy it into the bundle or drop 'tokenizer'",
    ),
    Case(
        "tokenizer not a SentencePiece model",
        lambda b, uid: (
            set_meta(tokenizer="spm.model")(b, uid),
            (b / "spm.model").write_bytes(b"not a model"),
        ),
        "bundle",
        # without the sentencepiece package the package itself is reported missing
        "unreadable tokenizer 'spm.model'|no sentencepiece package",
        "point 'tokenizer' at the model file|pip install sentencepiece",
    ),
    # ---- JSON: bundle.json ----
    Case(
        "bundle.json cut off",
        raw_file("bundle.json", lambda x: x[: len(x) // 2]),
        "bundle",
        r"bundle.json: found invalid JSON at line \d+ column \d+",
        "fix the syntax",
    ),
    Case(
        "bundle.json is a list",
        raw_file("bundle.json", b'["peekalign-bundle", 1]'),
        "bundle",
        "bundle.json: found a JSON list",
        r"wrap the fields in \{\}",
    ),
    Case(
        "bundle.json of another format",
        set_meta(format="other-tool"),
        "bundle",
        "format 'other-tool'",
        "point at a peekalign bundle",
    ),
    Case(
        "bundle.json from a future version",
        set_meta(version=2),
        "bundle",
        "version 2",
        "upgrade peekalign or rewrite the bundle",
    ),
    Case(
        "frame shift zero",
        set_meta(frame_shift_s=0),
        "bundle",
        "frame_shift_s=0",
        "set the encoder frame shift",
    ),
    Case(
        "word boundary of unknown kind",
        set_meta(word_boundary={"kind": "suffix", "symbol": "_"}),
        "bundle",
        "word_boundary=.*'suffix'",
        "state the word-boundary rule",
    ),
    Case(
        "encoder layers as text",
        set_meta(encoder={"layers": "twelve", "lookahead_per_layer": 1}),
        "bundle",
        "encoder.layers='twelve', expected an integer >= 0",
        "fix or drop that field",
    ),
    Case(
        "decoder not an object",
        set_meta(decoder=18),
        "bundle",
        "decoder=18, expected a JSON object",
        r'e\.g\. \{"lookahead": 18\}',
    ),
    Case(
        "front end not an object",
        set_meta(front_end="4x"),
        "bundle",
        "front_end='4x'",
        r'e\.g\. \{"subsampling": 4',
    ),
    Case(
        "front end of unknown subsampling",
        set_meta(front_end={"subsampling": 5}, frame_offset_s=None),
        "bundle",
        r"bundle.json front_end: .*Got 5",
        "give 'frame_offset_s' and front_end 'right_context_s' in bundle.json",
    ),
    Case(
        "sample rate as text",
        set_meta(sample_rate="16k"),
        "bundle",
        "sample_rate='16k', expected a positive integer",
        "'sample_rate': 16000",
    ),
    Case(
        "frame offset as text",
        set_meta(frame_offset_s="0.0s"),
        "bundle",
        "frame_offset_s='0.0s', expected a finite number of seconds",
        "fix or drop that field",
    ),
    # ---- JSON: utts.jsonl ----
    Case(
        "manifest missing",
        remove("utts.jsonl"),
        "bundle",
        "no utts.jsonl at",
        "check the bundle path",
    ),
    Case(
        "manifest line is a list",
        replace_line('["u0", "arrays/u0.npz"]'),
        "line",
        "utts.jsonl line 1: found a JSON list",
        "fix that line",
    ),
    Case(
        "manifest id is a number",
        set_line(id=7),
        "line",
        "utts.jsonl line 1: found id=7",
        'add "id": "<utterance id>"',
    ),
    Case(
        "manifest line without ref",
        set_line(ref=...),
        "utt",
        "no 'ref'",
        'add "arrays": "arrays/<id>.npz" and "ref": "<words>"',
    ),
    Case(
        "ref is a list",
        set_line(ref=["tram", "car"]),
        "utt",
        r"ref=\['tram', 'car'\]",
        "write the reference text",
    ),
    Case(
        "ref token id beyond int64",
        set_line(ref_tokens=[7, 10**20]),
        "utt",
        "token id 100000000000000000000 in ref_tokens",
        r"use the model's vocabulary \(vocab\.txt\)",
    ),
    Case(
        "ref tokens hold the blank",
        set_line(ref_tokens=[7, 0, 6]),
        "utt",
        "the blank id in ref_tokens",
        "drop the blanks",
    ),
    Case(
        "ref tokens as a string",
        set_line(ref_tokens="7 6 2"),
        "utt",
        "ref_tokens='7 6 2', expected a list of integer token ids",
        r"write ref_tokens as \[id, id, \.\.\.\]",
    ),
    Case(
        "hyp is a number",
        set_line(hyp=3),
        "utt",
        "hyp=3",
        "write the hypothesis text",
    ),
    Case(
        "hyp token out of range",
        set_line(hyp_tokens=[7, 9]),
        "utt",
        "token id 9 in hyp_tokens",
        r"use the model's vocabulary \(vocab\.txt\)",
    ),
    Case(
        "word ends before it starts",
        set_line(words=[["tram", 0.08, 0.32], ["car", 0.7, 0.4]]),
        "utt",
        r"words\[1\]=\['car', 0\.7, 0\.4\]",
        "fix the word times",
    ),
    Case(
        "word time NaN",
        # Python's json writes and reads the non-standard NaN token
        set_line(words=[["tram", float("nan"), 0.32]]),
        "utt",
        r"words\[0\]=\['tram', nan, 0\.32\]",
        "fix the word times",
    ),
    Case(
        "manifest line not UTF-8",
        line_bytes(b'"ref": "tram car"', b'"ref": "tr\xe4m car"'),
        "utt",
        r"utts.jsonl line 1: found bytes that are not UTF-8 \(line byte \d+: b'\\xe4m c'\)",
        "re-save utts.jsonl as UTF-8",
    ),
    # ---- audio ----
    Case(
        "audio file missing",
        remove("audio/{uid}.wav"),
        "utt",
        "no audio file .*u0.wav",
        "fix the 'audio' path",
        audio=True,
    ),
    Case(
        "audio path is a folder",
        to_folder("audio/{uid}.wav"),
        "utt",
        r"no audio file .*u0.wav' \(a folder\)",
        "fix the 'audio' path",
        audio=True,
    ),
    Case(
        "audio path is a number",
        set_line(audio=5),
        "utt",
        "audio=5",
        "fix or drop the 'audio' field",
    ),
    Case(
        "audio of zero length",
        wav(0.0),
        "utt",
        "zero-length audio 'u0.wav'",
        "re-export the audio",
        audio=True,
    ),
    Case(
        "audio that is not audio",
        raw_file("audio/{uid}.wav", b"tram depot dispatch log\n" * 40),
        "utt",
        "unreadable audio 'u0.wav' .*Format not recognised",
        "re-export the audio",
        audio=True,
    ),
    Case(
        "audio header cut off",
        raw_file("audio/{uid}.wav", lambda x: x[:30]),
        "utt",
        "unreadable audio 'u0.wav'",
        "check it is not truncated",
        audio=True,
    ),
    Case(
        # 16 kHz samples labelled 8 kHz: the clip seems to last twice as long
        "audio with the wrong sample rate in its header",
        wav(0.8, header_sr=8000, sample_sr=16000),
        "utt",
        r"audio of 1\.60 s but 20 frames x 40 ms = 0\.80 s",
        r"check frame_shift_s \(hop x subsampling\)",
        audio=True,
    ),
    Case(
        "audio much shorter than the frames",
        wav(0.5),
        "utt",
        r"audio of 0\.50 s but 20 frames x 40 ms = 0\.80 s, expected agreement within 0\.12 s",
        "or that the audio matches the arrays",
        audio=True,
    ),
]


def test_matrix_is_big_and_distinct():
    assert len(CASES) >= 30
    assert len({c.name for c in CASES}) == len(CASES)


@pytest.fixture
def bundle_dir(tmp_path, rng):
    return write_base(tmp_path / "b", rng)


def _assert_message(case: Case, msg: str, uid: str = "u0") -> None:
    assert "\n" not in msg, msg  # one line per problem
    assert re.search(case.found, msg), (case.found, msg)
    assert re.search(case.fix, msg), (case.fix, msg)
    # house style: what was found and what was expected (describe() or the
    # parameter-message form "must be ... Got ... instead")
    assert ("found " in msg and "expected" in msg) or ("must be" in msg and "Got " in msg), msg
    if case.scope == "utt":
        assert f"utt {uid!r}" in msg, msg
    elif case.scope == "line":
        assert "utts.jsonl line 1" in msg, msg
    else:
        assert re.search(r"bundle\.json|vocab\.txt|utts\.jsonl", msg), msg


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_bad_input(case, bundle_dir, capsys):
    assert check_bundle(bundle_dir) == []  # the base is clean
    case.corrupt(bundle_dir, "u0")

    # door 1: check_bundle lists exactly this problem
    problems = check_bundle(bundle_dir)
    assert len(problems) == 1, problems
    (problem,) = problems
    expected_key = {"utt": "u0", "line": "line 1", "bundle": "<bundle>"}[case.scope]
    assert problem.utt == expected_key
    _assert_message(case, problem.message)

    # door 2: the Python API raises the documented type, naming the utterance
    if case.scope == "bundle":
        with pytest.raises(BundleError) as info:
            open_bundle(bundle_dir)
    else:
        b = open_bundle(bundle_dir)
        # the other utterance is untouched and still loads, audio included
        y, sr = b["u1"].load_audio()
        assert sr == SR and y.size == T * SHIFT * SR
        if case.scope == "line":
            assert "u0" not in b and b.ids == ["u1"]
            info = None
        else:
            with pytest.raises(BundleError) as info:
                utt = b["u0"]
                if case.audio:
                    utt.load_audio()
            assert info.value.utt == "u0"
    if info is not None:
        assert type(info.value) is BundleError
        assert str(info.value) == problem.message

    # door 3: the command line, one line per problem, exit 1
    capsys.readouterr()
    assert main(["check", str(bundle_dir)]) == 1
    out, err = capsys.readouterr()
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"{expected_key}: "), err
    assert "Traceback" not in err + out
    assert "1 problem(s)" in out


def test_cli_lists_every_bad_utterance_without_traceback(tmp_path, rng):
    """All utterance-level cases at once, each in its own utterance, through a real
    ``python -m peekalign check`` process."""
    utt_cases = [c for c in CASES if c.scope == "utt"]
    ids = [f"bad{i:02d}" for i in range(len(utt_cases))] + ["good"]
    path = write_base(tmp_path / "many", rng, ids=ids)
    for uid, case in zip(ids, utt_cases, strict=False):
        case.corrupt(path, uid)
    proc = subprocess.run(
        [sys.executable, "-m", "peekalign", "check", str(path)],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert proc.returncode == 1, proc.stderr
    assert "Traceback" not in proc.stderr + proc.stdout
    lines = proc.stderr.splitlines()
    lines = [x for x in lines if not x.startswith("warning:")]
    # one line per bad utterance (manifest-line problems come first); the good one is
    # not listed
    by_id = dict(x.split(": ", 1) for x in lines)
    assert len(by_id) == len(lines) and sorted(by_id) == ids[:-1], proc.stderr
    for uid, case in zip(ids, utt_cases, strict=False):
        assert re.search(case.fix, by_id[uid]), (case.name, by_id[uid])
    assert f"{len(utt_cases)} problem(s)" in proc.stdout


# -- inputs that look odd but are valid ---------------------------------------------


def _bom(rel):
    return raw_file(rel, lambda x: b"\xef\xbb\xbf" + x)


def _crlf(rel):
    return raw_file(rel, lambda x: x.replace(b"\n", b"\r\n"))


@pytest.mark.parametrize(
    "name,corrupt",
    [
        ("bundle.json with BOM", _bom("bundle.json")),
        ("bundle.json with CRLF", _crlf("bundle.json")),
        ("vocab.txt with BOM", _bom("vocab.txt")),
        ("vocab.txt with CRLF", _crlf("vocab.txt")),
        ("attention_tokens as whole floats", arrays(attention_tokens=np.array(REF_IDS, float))),
        ("audio absent from a line", set_line(audio=...)),
    ],
)
def test_tolerated_variants(name, corrupt, bundle_dir):
    corrupt(bundle_dir, "u0")
    assert check_bundle(bundle_dir) == [], name
    b = open_bundle(bundle_dir)
    assert b.vocab.tokens == tuple(VOCAB)  # no BOM or CR left on a token
    u = b["u0"]
    assert u.ref_tokens.tolist() == REF_IDS
    assert u.attention_tokens.tolist() == REF_IDS


@pytest.mark.parametrize("sep", ["\u2028", "\u2029", "\x85"])
def test_manifest_text_with_unicode_line_separators(tmp_path, rng, sep):
    # JSON strings may hold U+2028/2029/0085 unescaped (RFC 8259 escapes only
    # U+0000-001F), and json.dumps(ensure_ascii=False) writes them raw; they must not
    # cut the line. str.split() treats them as white space (Python docs), so the
    # reference still has two words.
    path = tmp_path / "b"
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=SHIFT, word_boundary=SEP) as w:
        w.add("u0", random_log_probs(rng, T, len(VOCAB)), ref=f"tram{sep}car", hyp=f"a{sep}b")
    assert sep.encode() in (path / "utts.jsonl").read_bytes()
    assert check_bundle(path) == []
    u = open_bundle(path)["u0"]
    assert u.ref == f"tram{sep}car" and u.hyp == f"a{sep}b"
    assert u.ref_tokens.tolist() == REF_IDS


# -- audio length against the front end's arithmetic --------------------------------


@pytest.mark.parametrize("subsampling", [4, 6, 8])
@pytest.mark.parametrize("seconds", [0.5, 1.0, 3.33, 7.0])
def test_audio_length_from_a_real_front_end_is_accepted(tmp_path, rng, subsampling, seconds):
    # reference: Kaldi snip_edges=true frame count 1 + (N - 400) // 160 (from memory)
    # and the conv front-end formulas (DEVELOPERS.md, "Front-end frame arithmetic"); the
    # encoder frames such a model emits for N samples must pass the audio check.
    n = int(seconds * SR)
    frames = encoder_frames(kaldi_frames(n, win=400, hop=160), subsampling=subsampling)
    path = tmp_path / "fe"
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=0.01 * subsampling,
        word_boundary=SEP,
        sample_rate=SR,
        extra={"front_end": {"subsampling": subsampling, "hop_s": 0.01, "win_s": 0.025}},
    ) as w:
        w.add("ok", random_log_probs(rng, frames, 9), ref="a", audio=np.zeros(n, np.float32))
        # same clip, header rate halved: it now seems twice as long
        w.add("slow", random_log_probs(rng, frames, 9), ref="a", audio=np.zeros(n, np.float32))
    sf.write(path / "audio" / "slow.wav", np.zeros(n), SR // 2, subtype="PCM_16")
    problems = check_bundle(path)
    assert [p.utt for p in problems] == ["slow"], problems
    assert "check frame_shift_s" in problems[0].message
    b = open_bundle(path)
    assert b["ok"].load_audio()[0].size == n
    with pytest.raises(BundleError, match="utt 'slow'.*audio of"):
        b["slow"].load_audio()
