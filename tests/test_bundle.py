"""Bundle v1: writing, lazy opening, normalisation, tokenisation and clear errors."""

from __future__ import annotations

import json
import os
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
from conftest import random_log_probs

from peekalign import (
    BundleError,
    BundleWriter,
    FrameClock,
    ParameterError,
    PeekalignWarning,
    check_bundle,
    open_bundle,
)
from peekalign.clock import encoder_frames, kaldi_frames
from peekalign.vocab import Vocabulary, WordBoundary

VOCAB = ["<b>", "|", "a", "b", "c", "o", "r", "t", "m"]
SEP = {"kind": "separator", "symbol": "|"}


def make_bundle(path: Path, rng, n=3, **kw) -> Path:
    with BundleWriter(path, vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP, **kw) as w:
        for i in range(n):
            w.add(f"u{i}", random_log_probs(rng, 20, len(VOCAB)), ref="tram car")
    return path


def test_round_trip(tmp_path, rng):
    b = open_bundle(make_bundle(tmp_path / "b", rng))
    assert b.ids == ["u0", "u1", "u2"]
    u = b["u1"]
    # hand-worked: "tram car" -> t r a m | c a r
    assert [u.vocab.token(t) for t in u.ref_tokens] == list("tram|car")
    assert u.log_probs.shape == (20, len(VOCAB))
    assert np.allclose(np.exp(u.log_probs).sum(axis=1), 1, atol=1e-5)
    assert [x.id for x in b] == b.ids


def test_open_is_lazy(tmp_path):
    # 3,000 manifest lines whose arrays do not exist: opening must not touch them
    d = tmp_path / "lazy"
    d.mkdir()
    (d / "bundle.json").write_text(
        json.dumps(
            {
                "format": "peekalign-bundle",
                "version": 1,
                "vocab": "vocab.txt",
                "blank": 0,
                "frame_shift_s": 0.04,
                "word_boundary": SEP,
            }
        )
    )
    (d / "vocab.txt").write_text("\n".join(VOCAB) + "\n")
    lines = [
        json.dumps({"id": f"x{i}", "arrays": f"arrays/x{i}.npz", "ref": "a"}) for i in range(3000)
    ]
    (d / "utts.jsonl").write_text("\n".join(lines) + "\n")
    t0 = time.perf_counter()
    b = open_bundle(d)
    assert len(b) == 3000 and time.perf_counter() - t0 < 5
    with pytest.raises(BundleError, match=r"utt 'x7'.*no arrays file"):
        b["x7"]


def test_probabilities_and_logits_are_normalised_with_warning(tmp_path, rng):
    lp = random_log_probs(rng, 20, len(VOCAB))
    with BundleWriter(tmp_path / "b", vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        w.add("probs", np.exp(lp), ref="tram")
        w.add("logits", lp * 1.0 + 3.0, ref="tram")
    b = open_bundle(tmp_path / "b")
    for uid, kind in [("probs", "probabilities"), ("logits", "logits")]:
        with pytest.warns(PeekalignWarning, match=kind):
            u = b[uid]
        # reference: log-softmax of logits / log of probabilities (definitions)
        assert np.allclose(u.log_probs, lp, atol=1e-5)


def test_log_probs_pass_without_warning(tmp_path, rng):
    b = open_bundle(make_bundle(tmp_path / "b", rng))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        b["u0"]


def test_manifest_tokens_win_over_text(tmp_path, rng):
    with BundleWriter(tmp_path / "b", vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        w.add("u", random_log_probs(rng, 10, len(VOCAB)), ref="tram", ref_tokens=[4, 2, 6])
    assert open_bundle(tmp_path / "b")["u"].ref_tokens.tolist() == [4, 2, 6]


def test_prefix_tokenisation_greedy_longest_match():
    v = Vocabulary(
        ["<b>", "\u2581tr", "am", "\u2581c", "ar", "a", "m", "\u2581"],
        boundary=WordBoundary("prefix", "\u2581"),
    )
    ids = v.encode("Tram car")
    # hand-worked greedy longest match: ▁tr am | ▁c ar
    assert [v.token(i) for i in ids] == ["\u2581tr", "am", "\u2581c", "ar"]
    assert v.decode(ids) == "tram car"


def test_untokenisable_word_names_word_and_characters():
    v = Vocabulary(VOCAB, boundary=WordBoundary("separator", "|"))
    with pytest.raises(BundleError, match=r"utt 'q'.*word 'tr\u00e4m'.*'\u00e4'"):
        v.encode("tr\u00e4m", utt="q")


def test_writer_refuses_non_empty_folder(tmp_path, rng):
    make_bundle(tmp_path / "b", rng)
    with pytest.raises(ParameterError, match="non-empty folder"):
        BundleWriter(tmp_path / "b", vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP)


def _write(path: Path, name: str, text: str) -> None:
    (path / name).write_text(text, encoding="utf-8")


@pytest.fixture
def bad(tmp_path, rng):
    """A bundle with one good utterance to corrupt in each test."""
    return make_bundle(tmp_path / "bad", rng, n=1)


def _only_problem(path) -> str:
    problems = check_bundle(path)
    assert len(problems) == 1, problems
    return problems[0].message


def test_missing_arrays_file(bad):
    (bad / "arrays" / "u0.npz").unlink()
    msg = _only_problem(bad)
    assert "utt 'u0'" in msg and "no arrays file" in msg and "copy it" in msg


def test_truncated_arrays_file(bad):
    p = bad / "arrays" / "u0.npz"
    p.write_bytes(p.read_bytes()[:50])
    msg = _only_problem(bad)
    assert "utt 'u0'" in msg and "unreadable arrays file" in msg and "dump the arrays again" in msg


def test_malformed_json_line_names_line_number(bad):
    with open(bad / "utts.jsonl", "a") as f:
        f.write('{"id": "u9", "arrays": \n')
    msg = _only_problem(bad)
    assert "utts.jsonl line 2" in msg and "invalid JSON" in msg and "fix that line" in msg


def test_duplicate_ids(bad):
    line = (bad / "utts.jsonl").read_text()
    (bad / "utts.jsonl").write_text(line + line)
    msg = _only_problem(bad)
    assert "utt 'u0'" in msg and "again (first on line 1)" in msg


def test_vocab_size_mismatch(bad):
    _write(bad, "vocab.txt", "\n".join(VOCAB[:-1]) + "\n")
    msg = _only_problem(bad)
    assert "V=9" in msg and "V=8" in msg and "vocabulary the model was trained with" in msg


@pytest.mark.parametrize("value,found", [(np.nan, "NaN"), (np.inf, "+inf")])
def test_nan_inf_log_probs(bad, rng, value, found):
    lp = random_log_probs(rng, 20, len(VOCAB))
    lp[3, 2] = value
    np.savez(bad / "arrays" / "u0.npz", log_probs=lp)
    msg = _only_problem(bad)
    assert "utt 'u0'" in msg and "NaN/+inf" in msg and "frame 3" in msg


def test_wrong_rank(bad, rng):
    np.savez(bad / "arrays" / "u0.npz", log_probs=random_log_probs(rng, 20, 9)[None])
    msg = _only_problem(bad)
    assert "rank 3" in msg and "drop the batch axis" in msg


def test_reference_too_long(bad, rng):
    np.savez(bad / "arrays" / "u0.npz", log_probs=random_log_probs(rng, 5, 9))
    msg = _only_problem(bad)
    assert "needs 8 frames (8 tokens + 0 repeats)" in msg and "has 5" in msg
    assert "frame shift" in msg


def test_untokenisable_reference_in_bundle(bad):
    lines = (bad / "utts.jsonl").read_text().replace("tram car", "tram bus")
    (bad / "utts.jsonl").write_text(lines)
    msg = _only_problem(bad)
    assert "word 'bus'" in msg and "'su'" in msg and "ref_tokens" in msg


@pytest.mark.parametrize(
    "shape,found",
    [((2, 4, 3, 19), "over 19 encoder frames"), ((2, 4, 5, 20), "with 5 rows")],
)
def test_attention_shape_mismatch(bad, rng, shape, found):
    np.savez(
        bad / "arrays" / "u0.npz",
        log_probs=random_log_probs(rng, 20, 9),
        attention=np.full(shape, 0.1, np.float16),
        attention_tokens=np.array([7, 6, 2]),
    )
    msg = _only_problem(bad)
    assert found in msg and "utt 'u0'" in msg


def test_bundle_json_missing_fields(bad):
    _write(bad, "bundle.json", json.dumps({"format": "peekalign-bundle", "version": 1}))
    msg = _only_problem(bad)
    for field in ("vocab", "blank", "frame_shift_s", "word_boundary"):
        assert repr(field) in msg
    assert "add them" in msg


def test_check_lists_all_problems_at_once(tmp_path, rng):
    path = make_bundle(tmp_path / "many", rng, n=4)
    (path / "arrays" / "u1.npz").unlink()
    np.savez(path / "arrays" / "u3.npz", log_probs=random_log_probs(rng, 3, 9))
    assert [p.utt for p in check_bundle(path)] == ["u1", "u3"]


def test_empty_reference_is_fine(tmp_path, rng):
    with BundleWriter(tmp_path / "b", vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        w.add("silence", random_log_probs(rng, 5, 9), ref="")
    assert check_bundle(tmp_path / "b") == []
    assert open_bundle(tmp_path / "b")["silence"].ref_tokens.size == 0


def test_bom_and_crlf_manifest(bad):
    raw = (bad / "utts.jsonl").read_text()
    (bad / "utts.jsonl").write_bytes(b"\xef\xbb\xbf" + raw.replace("\n", "\r\n").encode())
    assert check_bundle(bad) == []


def test_clock_front_end_formulas():
    # reference: DEVELOPERS.md, "Front-end frame arithmetic" (our table of conv front
    # ends without padding); each layer's (T - kernel) // stride + 1 is common practice,
    # no source, and the composed formulas are worked by hand
    for T in (50, 101, 997):
        assert encoder_frames(T, subsampling=4) == ((T - 1) // 2 - 1) // 2
        assert encoder_frames(T, subsampling=6) == ((T - 1) // 2 - 2) // 3
        assert encoder_frames(T, subsampling=8) == (((T - 1) // 2 - 1) // 2 - 1) // 2
    # reference: Kaldi snip_edges=true frame count 1 + (N - win) // hop (from memory)
    assert kaldi_frames(16000, win=400, hop=160) == 98
    c = FrameClock.from_front_end(subsampling=4)
    # right context of (3,2)x2 is 6 feature frames: 6 * 10 ms + 25 ms window = 85 ms span
    assert c.frame_offset_s + c.right_context_s == pytest.approx(0.085)
    assert c.frame(c.time(37)) == 37


def test_attention_triggers_round_trip_and_bundles_without_them(tmp_path):
    # reference: DEVELOPERS.md, Bundle format v1 (attention_triggers (U,), optional,
    # int32 on disk; without it the rows' windows come from a forced alignment) and
    # hand-worked frames: tokens a b spike at frames 2 and 5, rows decoded at 1 and 4
    p = np.full((8, len(VOCAB)), 0.01)
    p[:, 0] = 0.9
    p[2, 2] = p[5, 3] = 0.9
    lp = np.log(p / p.sum(1, keepdims=True))
    att = np.full((1, 1, 2, 8), 1 / 8, dtype=np.float32)
    with BundleWriter(tmp_path / "b", vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        w.add("with", lp, ref="a b", attention=att, attention_tokens=[2, 3],
              attention_triggers=np.array([1, 4], dtype=np.int64))  # fmt: skip
        w.add("without", lp, ref="a b", attention=att, attention_tokens=[2, 3])
    b = open_bundle(tmp_path / "b")
    with np.load(tmp_path / "b" / "arrays" / "with.npz") as z:
        assert z["attention_triggers"].dtype == np.int32
    with np.load(tmp_path / "b" / "arrays" / "without.npz") as z:
        assert "attention_triggers" not in z.files  # an old bundle: no such array
    got = b["with"].attention_triggers
    assert got.dtype == np.int32 and got.tolist() == [1, 4]
    assert b["without"].attention_triggers is None
    from peekalign import attention_windows, token_windows

    w = token_windows([0, 0], num_frames=8, clock=FrameClock(), lookahead=1)
    assert attention_windows(b["with"], w)[0].end.tolist() == [2, 5]
    assert attention_windows(b["without"], w)[0].end.tolist() == [3, 6]
    # a float array is refused with the utterance named
    np.savez(tmp_path / "b" / "arrays" / "with.npz", log_probs=lp.astype(np.float32),
             attention=att, attention_tokens=np.array([2, 3], np.int32),
             attention_triggers=np.array([1.0, 4.0]))  # fmt: skip
    with pytest.raises(BundleError, match="utt 'with'.*attention_triggers"):
        open_bundle(tmp_path / "b")["with"]


@pytest.fixture(params=["libdeflate", "zipfile"])
def inflater(request, monkeypatch):
    """Read .npz members with libdeflate (when the system has it) or with zipfile."""
    from peekalign.io import _inflate

    if request.param == "libdeflate":
        if _inflate._library() is None:
            # .ci/run installs libdeflate0: under CI both readers are tested
            if os.environ.get("CI"):
                pytest.fail("libdeflate (Debian libdeflate0) is missing under CI")
            pytest.skip("no libdeflate on this system")  # intended: CI fails instead
    else:
        monkeypatch.setitem(_inflate._STATE, "lib", None)
    return request.param


def test_arrays_read_as_numpy_loads_them(tmp_path, inflater):
    from peekalign.io.bundle import read_arrays

    rng = np.random.default_rng(8)
    arrays = {
        "log_probs": random_log_probs(rng, 30, 9).astype(np.float16),
        "attention": np.asfortranarray(rng.random((2, 3, 4, 30), dtype=np.float32)),
        "encoder_out": rng.random((30, 5)).astype(">f8"),
        "attention_tokens": np.arange(4, dtype=np.int64),
        "empty": np.zeros((0, 3), np.float32),
    }
    for name, save in (("deflated.npz", np.savez_compressed), ("stored.npz", np.savez)):
        save(tmp_path / name, **arrays)
        got = read_arrays(tmp_path, name)
        # reference: numpy.load of the same file
        with np.load(tmp_path / name, allow_pickle=False) as z:
            assert sorted(got) == sorted(z.files)
            for k in z.files:
                assert got[k].dtype == z[k].dtype and got[k].shape == z[k].shape
                assert np.array_equal(got[k], z[k])
                assert got[k].flags.writeable


def test_damaged_compressed_member_is_a_clear_error(bad, inflater):
    import zipfile

    p = bad / "arrays" / "u0.npz"
    lp = random_log_probs(np.random.default_rng(2), 400, 9)
    np.savez_compressed(p, log_probs=lp)
    with zipfile.ZipFile(p) as zf:
        info = zf.infolist()[0]
    raw = bytearray(p.read_bytes())
    start = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra)
    raw[start + info.compress_size // 2] ^= 0xFF  # one byte inside the deflated stream
    p.write_bytes(bytes(raw))
    msg = _only_problem(bad)
    assert "utt 'u0'" in msg and "unreadable arrays file" in msg and "dump the arrays again" in msg


def test_manifest_lines_read_from_the_file_on_access(tmp_path, rng):
    # reference: json.loads of each line of the file as written (BOM and CR LF kept
    # in the file: offsets count them)
    path = make_bundle(tmp_path / "b", rng, n=4)
    text = (path / "utts.jsonl").read_text()
    (path / "utts.jsonl").write_bytes(b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode())
    want = [json.loads(x) for x in text.splitlines() if x.strip()]
    b = open_bundle(path)
    assert [dict(e) for e in b.entries] == want  # all at once
    assert [dict(b.entries[i]) for i in (0, 3, -1)] == [want[0], want[3], want[-1]]
    assert b.entries.get("u2")["id"] == "u2" and b.entries.get("nope") is None
    assert b["u3"].ref == "tram car" and b.entries[1].lineno == 2
    # the manifest keeps where the lines are, not their text
    kept = {k: type(v).__name__ for k, v in vars(b.entries).items()}
    assert kept == {"_path": "str", "_where": "array", "_linenos": "array", "_crcs": "array",
                    "ids": "list", "index": "dict"}  # fmt: skip
    # another line at the same place: an error naming the fix, never another line's data
    (path / "utts.jsonl").write_bytes(
        (b"\xef\xbb\xbf" + text.replace("\n", "\r\n").encode()).replace(b'"u2"', b'"u9"')
    )
    with pytest.raises(BundleError, match="changed since the bundle was opened.*open the bundle"):
        b["u2"]
    assert b["u1"].ref == "tram car"  # lines that did not change still read
    (path / "utts.jsonl").unlink()
    with pytest.raises(BundleError, match="utts.jsonl"):
        b["u1"]
