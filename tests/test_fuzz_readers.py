"""Property-based fuzzing of the readers (bundle, CTM, TextGrid, Kaldi ark/scp).

Each reader gets real, valid files written by peekalign's own writers (or by the
reference library), mutated byte-wise (flip, overwrite, insert, delete, truncate,
duplicate; biased towards headers) and structurally (a JSON field replaced by any
JSON value, an array replaced by one of another dtype / shape, a text field replaced
by an awkward token, lines dropped or repeated). The property: the reader either
returns a result that satisfies the format's own rules, or raises one of the
documented errors (``BundleError`` / ``ParameterError``); nothing else escapes.

Examples are derandomised (the same 2,000 per reader on every run) so a failure is
reproducible; no example database is written.
"""

from __future__ import annotations

import json
import math
import re
import warnings
from pathlib import Path

import numpy as np
import pytest
from conftest import random_log_probs, require
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from test_bundle import SEP, VOCAB

from peekalign import (
    AlignmentError,
    BundleError,
    BundleWriter,
    ParameterError,
    PeekalignWarning,
    align_tokens,
    check_bundle,
    open_bundle,
)
from peekalign.io.ctm import read_ctm, write_ctm
from peekalign.io.kaldi import read_kaldi_matrices, write_kaldi_matrices
from peekalign.io.textgrid import read_textgrid_tiers, read_textgrid_words, write_textgrid

DOCUMENTED = (BundleError, ParameterError)
FUZZ = settings(
    max_examples=2000,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# -- mutations ------------------------------------------------------------------------

# Values that often break parsers: signs, special floats, huge and tiny numbers,
# separators, quotes and brackets, BOMs, a shell pipe, a non-UTF-8 byte, U+2028.
AWKWARD = [
    b"", b"0", b"-1", b"-0", b"1.5", b"nan", b"NaN", b"inf", b"-inf", b"Infinity",
    b"1e309", b"-1e309", b"1e-320", b"9" * 25, b"9" * 5000, b"2147483648", b"-2147483649",
    b"\x00", b"\xff", b"\xc3", b"\xef\xbb\xbf", b"\xff\xfe", b"\xe2\x80\xa8", b"\r", b"\n",
    b"\r\n", b"\t", b" ", b'"', b"'", b"\\", b"{", b"}", b"[", b"]", b":", b",", b"|",
    b"ls |", b";;", b"true", b"null", b"<b>", b"\xe2\x96\x81",
]  # fmt: skip


# Fixed alphabets: hypothesis' full Unicode tables cost ~15 s to build per process.
ALPHABET = "aZ0 _-|.,é▁çß☃\u2028\x85\x00\t\r\n\"'\\{}[]"
TEXT = st.text(alphabet=ALPHABET, max_size=8)
AWKWARD_ST = st.sampled_from(AWKWARD)
INSERTS = st.one_of(AWKWARD_ST, st.binary(max_size=12))
FIELDS = st.one_of(AWKWARD_ST, TEXT.map(str.encode))
BYTE_OPS = st.sampled_from(["flip", "set", "insert", "delete", "truncate", "dup"])
LINE_OPS = st.sampled_from(["field", "field", "drop", "repeat", "swap"])


@st.composite
def byte_mutation(draw, base: bytes, *, head: int = 96) -> bytes:
    """1-4 byte-level edits of ``base``; positions favour the first ``head`` bytes,
    where headers and magic numbers live."""
    data = bytearray(base)
    for _ in range(draw(st.integers(1, 4))):
        n = len(data)
        pos = draw(st.integers(0, min(head, n) if draw(st.booleans()) else n))
        op = draw(BYTE_OPS)
        if op == "flip" and pos < n:
            data[pos] ^= 1 << draw(st.integers(0, 7))
        elif op == "set" and pos < n:
            data[pos] = draw(st.integers(0, 255))
        elif op == "insert":
            data[pos:pos] = draw(INSERTS)
        elif op == "delete":
            del data[pos : pos + draw(st.integers(1, 64))]
        elif op == "truncate":
            del data[pos:]
        elif op == "dup" and pos < n:
            data[pos:pos] = data[pos : pos + draw(st.integers(1, 256))]
    return bytes(data)


@st.composite
def token_mutation(draw, base: bytes) -> bytes:
    """Replace white-space separated fields or drop / repeat / swap whole lines."""
    lines = base.split(b"\n")
    for _ in range(draw(st.integers(1, 3))):
        i = draw(st.integers(0, len(lines) - 1))
        op = draw(LINE_OPS)
        if op == "field":
            parts = re.split(rb"(\s+)", lines[i])
            fields = [k for k, p in enumerate(parts) if p and not p.isspace()]
            if fields:
                k = draw(st.sampled_from(fields))
                parts[k] = draw(FIELDS)
                lines[i] = b"".join(parts)
        elif op == "drop" and len(lines) > 1:
            del lines[i]
        elif op == "repeat":
            lines.insert(i, lines[i])
        elif op == "swap":
            j = draw(st.integers(0, len(lines) - 1))
            lines[i], lines[j] = lines[j], lines[i]
    return b"\n".join(lines)


class Blob(bytes):
    """Bytes with a short repr: hypothesis renders strategy arguments in reports."""

    def __repr__(self) -> str:
        return f"<{len(self)} bytes>"


def mutation(base: bytes, **kw):
    base = Blob(base)
    return st.one_of(byte_mutation(base, **kw), token_mutation(base))


JSON_VALUES = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-(10**30), max_value=10**30)
    | st.floats()  # NaN and infinities too: Python's json writes and reads them
    | TEXT,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(TEXT, inner, max_size=3),
    max_leaves=6,
)

SHAPES = hnp.array_shapes(min_dims=0, max_dims=4, min_side=0, max_side=24)
ARRAYS = st.one_of(
    hnp.arrays(
        dtype=st.one_of(
            hnp.floating_dtypes(),
            hnp.integer_dtypes(),
            hnp.boolean_dtypes(),
            hnp.complex_number_dtypes(),
        ),
        shape=SHAPES,
    ),
    SHAPES.map(lambda shape: np.full(shape, "x")),  # strings
)


class Setup(tuple):
    """A fixture's (strategy, paths, ...) with a short repr: hypothesis prints the
    arguments of a failing example, and the base files are tens of kB."""

    def __repr__(self) -> str:
        return "<fuzz setup>"


class Files(dict):
    """File name -> bytes of one fuzzed bundle; its repr (printed for a failing
    example) shows the changed files, each small enough to read."""

    changed: list[str] = []

    def __repr__(self) -> str:
        return repr({k: self[k] if len(self[k]) < 2000 else "..." for k in self.changed})


def put(path: Path, data: bytes) -> None:
    """Overwrite ``path`` in place. Opening with truncation makes ext4 flush the file on
    close (its auto_da_alloc safeguard), ~4 ms a time: most of a fuzz run."""
    try:
        with open(path, "r+b") as f:
            f.write(data)
            f.truncate()
    except FileNotFoundError:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)


def _finite_or_neg_inf(x: np.ndarray) -> bool:
    return bool(np.all(np.isfinite(x) | np.isneginf(x)))


# -- bundle ---------------------------------------------------------------------------

BUNDLE_FILES = ("bundle.json", "vocab.txt", "utts.jsonl", "arrays/u0.npz", "audio/u0.wav")


@pytest.fixture(scope="module")
def bundle_base(tmp_path_factory):
    """A small valid bundle with every optional part, as bytes per file."""
    rng = np.random.default_rng(20261202)
    src = tmp_path_factory.mktemp("fuzz-src") / "b"
    ref_ids = [VOCAB.index(c) for c in "tram|car"]
    with BundleWriter(
        src,
        vocab=VOCAB,
        frame_shift_s=0.04,
        word_boundary=SEP,
        sample_rate=8000,
        encoder={"layers": 2, "lookahead_per_layer": 1},
        decoder={"lookahead": 2},
        extra={"front_end": {"subsampling": 4, "hop_s": 0.01, "win_s": 0.025}},
    ) as w:
        for uid in ("u0",):
            w.add(
                uid,
                random_log_probs(rng, 12, len(VOCAB)),
                ref="tram car",
                hyp="tram car",
                hyp_tokens=ref_ids,
                words=[("tram", 0.04, 0.2), ("car", 0.24, 0.44)],
                attention=rng.dirichlet(np.ones(12), size=(1, 2, 8)).astype(np.float16),
                attention_tokens=ref_ids,
                audio=np.zeros(int(12 * 0.04 * 8000), np.float32),
            )
    base = {name: (src / name).read_bytes() for name in BUNDLE_FILES}
    work = tmp_path_factory.mktemp("fuzz-bundle") / "b"
    base = {name: Blob(data) for name, data in base.items()}
    strategy = bundle_mutation(base, {name: mutation(base[name]) for name in BUNDLE_FILES})
    return Setup((strategy, work, {}))


def _npz_bytes(arrays: dict) -> bytes:
    import io

    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


@st.composite
def bundle_mutation(draw, base: dict[str, bytes], mutations: dict) -> dict[str, bytes]:
    files = Files(base)
    kind = draw(st.sampled_from(["bytes", "bytes", "meta", "line", "array"]))
    if kind == "bytes":
        name = draw(st.sampled_from(BUNDLE_FILES))
        files[name] = draw(mutations[name])
    elif kind == "meta":
        meta = json.loads(base["bundle.json"])
        key = draw(st.sampled_from(sorted(meta) + ["tokenizer", "extra"]))
        if draw(st.booleans()) and key in meta:
            del meta[key]
        elif draw(st.booleans()) and isinstance(meta.get(key), dict) and meta[key]:
            sub = draw(st.sampled_from(sorted(meta[key])))
            meta[key][sub] = draw(JSON_VALUES)
        else:
            meta[key] = draw(JSON_VALUES)
        files["bundle.json"] = json.dumps(meta).encode()
    elif kind == "line":
        lines = base["utts.jsonl"].decode().splitlines()
        obj = json.loads(lines[0])
        key = draw(st.sampled_from(sorted(obj) + ["extra"]))
        if draw(st.booleans()) and key in obj:
            del obj[key]
        else:
            obj[key] = draw(JSON_VALUES)
        lines[0] = json.dumps(obj, ensure_ascii=draw(st.booleans()))
        files["utts.jsonl"] = ("\n".join(lines) + "\n").encode()
    else:
        name = draw(st.sampled_from(["log_probs", "attention", "attention_tokens"]))
        with np.load(__import__("io").BytesIO(base["arrays/u0.npz"])) as z:
            arrays = {k: z[k] for k in z.files}
        if draw(st.booleans()):
            arrays[name] = draw(ARRAYS)
        else:
            arrays.pop(name)
        files["arrays/u0.npz"] = _npz_bytes(arrays)
    files.changed = sorted(k for k in files if files[k] != base[k])
    return files


def _write_bundle(work: Path, files: dict[str, bytes], on_disk: dict[str, bytes]) -> None:
    """Make ``work`` hold exactly ``files``, rewriting only what changed."""
    for name, data in files.items():
        if on_disk.get(name) != data:
            put(work / name, data)
            on_disk[name] = data


def _assert_sane(u) -> None:
    """A loaded utterance keeps the promises of the Utterance docstring."""
    T, V = u.log_probs.shape
    assert T > 0 and V == len(u.vocab) and u.log_probs.dtype == np.float32
    assert _finite_or_neg_inf(u.log_probs)
    lse = np.logaddexp.reduce(u.log_probs.astype(np.float64), axis=1)
    assert np.allclose(lse, 0, atol=1e-3)  # rows are normalised log-probs
    assert u.ref_tokens.dtype == np.int32
    assert np.all((u.ref_tokens >= 0) & (u.ref_tokens < V) & (u.ref_tokens != u.blank))
    if u.attention is not None:
        assert u.attention.ndim == 4 and u.attention.shape[-1] == T
        assert u.attention.shape[2] == u.attention_tokens.size
        assert np.all(np.isfinite(u.attention))
    for w, s, e in u.words or []:
        assert isinstance(w, str) and 0 <= s <= e and math.isfinite(e)


@FUZZ
@given(data=st.data())
def test_fuzz_bundle_reader(bundle_base, data):
    strategy, work, on_disk = bundle_base
    _write_bundle(work, data.draw(strategy), on_disk)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PeekalignWarning)  # probs / logits detected
        warnings.simplefilter("ignore", UserWarning)  # audio resampled
        try:
            b = open_bundle(work)
        except DOCUMENTED as exc:
            assert check_bundle(work) == [("<bundle>", str(exc))]
            event("bundle refused")
            return
        problems = b.check()  # what check_bundle returns, without opening twice
        for p in problems:
            assert isinstance(p.message, str) and "\n" not in p.message
        # utterances check_bundle found bad when loading them (a duplicate id is a
        # manifest problem, yet its first line still loads)
        bad = {p.utt for p in problems[len(b.manifest_problems) :]}
        for uid in b.ids:
            try:
                u = b[uid]
                if u.audio_path is not None:
                    y, sr = u.load_audio()
                    assert y.ndim == 1 and y.size > 0 and sr > 0
            except DOCUMENTED:
                assert uid in bad  # check and access agree
                event("utterance refused")
                continue
            assert uid not in bad
            event("utterance loaded")
            _assert_sane(u)
            try:  # a validated utterance must be safe to analyse
                align_tokens(u.log_probs, u.ref_tokens, u.blank, utt=uid)
            except AlignmentError:
                pass


# -- CTM ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def ctm_base(tmp_path_factory):
    d = tmp_path_factory.mktemp("fuzz-ctm")
    rows = [
        (f"depot-{i}", w, 0.04 * (3 * k + i), 0.04 * (3 * k + i) + 0.08, c)
        for i in range(3)
        for k, (w, c) in enumerate([("tram", 0.9), ("to", None), ("bay", 0.25), ("four", 1.0)])
    ]
    write_ctm(d / "ref.ctm", rows)
    # comments and the optional NIST type / speaker fields too
    text = ";; tram depot dispatch\n" + (d / "ref.ctm").read_text()
    text += "depot-9 A 1.00 0.30 tram 0.5 lex spk1\n"
    return Setup((mutation(text.encode()), d / "fuzz.ctm"))


@FUZZ
@given(data=st.data())
def test_fuzz_ctm_reader(ctm_base, data):
    strategy, path = ctm_base
    put(path, data.draw(strategy))
    try:
        words = read_ctm(path)
    except DOCUMENTED:
        event("refused")
        return
    event("parsed")
    # reference: NIST CTM rules (begin >= 0, duration >= 0, one word field)
    for utt, rows in words.items():
        assert utt and not any(c.isspace() for c in utt)
        starts = [s for _, s, _ in rows]
        assert starts == sorted(starts)
        for w, s, e in rows:
            assert w and not any(c.isspace() for c in w)
            assert math.isfinite(s) and math.isfinite(e) and 0 <= s <= e


# -- TextGrid -------------------------------------------------------------------------


@pytest.fixture(scope="module")
def textgrid_bases(tmp_path_factory):
    tg = require("praatio.textgrid")

    d = tmp_path_factory.mktemp("fuzz-tg")
    tiers = {
        "words": [(0.1, 0.4, "tram"), (0.5, 0.9, "depot"), (1.0, 1.2, "four")],
        "tokens": [(0.1 * k, 0.1 * k + 0.08, f"t{k}") for k in range(1, 12)],
    }
    write_textgrid(d / "long.TextGrid", tiers, xmax=1.5)
    grid = tg.openTextgrid(str(d / "long.TextGrid"), includeEmptyIntervals=True)
    # reference: praatio's own short format, and a point tier
    grid.addTier(tg.PointTier("clicks", [(0.3, "a"), (0.7, "b")], 0, 1.5))
    grid.save(str(d / "short.TextGrid"), format="short_textgrid", includeBlankSpaces=True)
    bases = [(d / n).read_bytes() for n in ("long.TextGrid", "short.TextGrid")]
    bases.append(bases[0].decode().encode("utf-16"))  # Praat's UTF-16 save
    return Setup((st.one_of([mutation(b, head=400) for b in bases]), d / "fuzz.TextGrid"))


@FUZZ
@given(data=st.data())
def test_fuzz_textgrid_reader(textgrid_bases, data):
    strategy, path = textgrid_bases
    put(path, data.draw(strategy))
    try:
        tiers = read_textgrid_tiers(path)
        words = read_textgrid_words(path)
    except DOCUMENTED:
        event("refused")
        return
    event("parsed")
    # reference: Praat interval tiers are ordered, non-overlapping, end > start
    for name, intervals in tiers.items():
        prev = -math.inf
        for s, e, label in intervals:
            assert isinstance(label, str) and label
            assert math.isfinite(s) and math.isfinite(e) and e > s >= prev, (name, s, e)
            prev = e
    assert all(isinstance(w, str) for w, _, _ in words)


# -- Kaldi ----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def kaldi_bases(tmp_path_factory):
    kaldiio = require("kaldiio")
    rng = np.random.default_rng(5)
    d = tmp_path_factory.mktemp("fuzz-kaldi")
    mats = {
        "depot-1": random_log_probs(rng, 6, 5),
        "depot-2": random_log_probs(rng, 3, 5).astype(np.float64),
        "depot-3": rng.normal(size=4).astype(np.float32),
    }
    write_kaldi_matrices(d / "bin.ark", mats, scp=d / "bin.scp")
    # reference: kaldiio's text archive
    kaldiio.save_ark(
        str(d / "text.ark"), {k: v for k, v in mats.items() if v.ndim == 2}, text=True
    )
    bases = {name: (d / name).read_bytes() for name in ("bin.ark", "text.ark", "bin.scp")}
    kinds = [st.tuples(st.just(name), mutation(data, head=64)) for name, data in bases.items()]
    return Setup((st.one_of(kinds), d))


@FUZZ
@given(data=st.data())
def test_fuzz_kaldi_reader(kaldi_bases, data):
    strategy, d = kaldi_bases
    name, content = data.draw(strategy)
    kind = name.rsplit(".", 1)[1]
    target = d / f"fuzz.{kind}"  # an scp keeps pointing into the intact bin.ark
    put(target, content)
    spec = f"{kind}:{target}"
    try:
        got = list(read_kaldi_matrices(spec))
    except DOCUMENTED:
        event(f"{kind} refused")
        return
    event(f"{kind} parsed")
    for key, m in got:
        assert isinstance(key, str) and key
        assert isinstance(m, np.ndarray) and m.ndim in (1, 2)
