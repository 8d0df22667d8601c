"""Kaldi ark/scp reading and writing, checked against kaldiio (the reference library)."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import random_log_probs, require

from peekalign.exceptions import BundleError, ParameterError
from peekalign.io.kaldi import read_kaldi_matrices, write_kaldi_matrices


@pytest.fixture
def mats(rng):
    return {
        "depot-01": random_log_probs(rng, 23, 7),
        "depot-02": random_log_probs(rng, 5, 7).astype(np.float64),
        "depot-03": rng.normal(size=11).astype(np.float32),  # a vector
    }


def write_with_kaldiio(tmp_path, mats):
    kaldiio = require("kaldiio")
    ark, scp = tmp_path / "ref.ark", tmp_path / "ref.scp"
    # reference: kaldiio.WriteHelper, Kaldi's binary ark + scp layout
    with kaldiio.WriteHelper(f"ark,scp:{ark},{scp}") as w:
        for k, m in mats.items():
            w(k, m)
    return ark, scp


def assert_same(got, mats):
    assert [k for k, _ in got] == list(mats)
    for (_, m), ref in zip(got, mats.values(), strict=True):
        assert m.dtype == ref.dtype and m.shape == ref.shape
        np.testing.assert_array_equal(m, ref)


def test_reads_tables_written_by_kaldiio(tmp_path, mats):
    ark, scp = write_with_kaldiio(tmp_path, mats)
    for spec in (f"scp:{scp}", f"ark:{ark}", str(scp), ark, f"ark,t:{ark}"):
        # reference: the arrays kaldiio wrote, bit for bit
        assert_same(list(read_kaldi_matrices(spec)), mats)


def test_reads_text_ark_written_by_kaldiio(tmp_path, mats):
    kaldiio = require("kaldiio")
    ark = tmp_path / "t.ark"
    two_d = {k: v for k, v in mats.items() if v.ndim == 2}
    kaldiio.save_ark(str(ark), two_d, text=True)  # reference: kaldiio's text ark writer
    got = list(read_kaldi_matrices(f"ark:{ark}"))
    assert [k for k, _ in got] == list(two_d)
    for (_, m), ref in zip(got, two_d.values(), strict=True):
        np.testing.assert_allclose(m, ref, rtol=1e-6)


def test_kaldiio_reads_tables_we_write(tmp_path, mats):
    kaldiio = require("kaldiio")
    ark, scp = tmp_path / "ours.ark", tmp_path / "ours.scp"
    write_kaldi_matrices(ark, mats, scp=scp)
    # reference: kaldiio's own readers (scp offsets must point at each matrix)
    by_scp = kaldiio.load_scp(str(scp))
    assert_same([(k, by_scp[k]) for k in by_scp], mats)
    assert_same(list(kaldiio.load_ark(str(ark))), mats)
    # reference: kaldiio.WriteHelper gives the same bytes for the same matrices
    ref_ark, _ = write_with_kaldiio(tmp_path, mats)
    assert ark.read_bytes() == ref_ark.read_bytes()


def test_scp_pipe_refused_then_allowed(tmp_path, mats):
    kaldiio = require("kaldiio")
    single = tmp_path / "one.mat"
    kaldiio.save_mat(str(single), mats["depot-01"])  # reference: kaldiio single-matrix file
    marker = tmp_path / "ran"
    scp = tmp_path / "piped.scp"
    scp.write_text(
        f"depot-00 {single}\ndepot-01 touch {marker}; cat {single} |\n", encoding="utf-8"
    )
    with pytest.raises(BundleError) as info:
        read_kaldi_matrices(f"scp:{scp}")
    msg = str(info.value)
    assert "utt 'depot-01'" in msg and f"{scp}, line 2" in msg and "allow_pipes=True" in msg
    assert not marker.exists()  # refused before any command ran
    got = list(read_kaldi_matrices(f"scp:{scp}", allow_pipes=True))
    assert marker.exists()
    assert [k for k, _ in got] == ["depot-00", "depot-01"]
    for _, m in got:  # reference: the matrix kaldiio saved
        np.testing.assert_array_equal(m, mats["depot-01"])


def test_ark_pipe_refused_then_allowed(tmp_path, mats):
    ark, _ = write_with_kaldiio(tmp_path, mats)
    spec = f"ark:cat {ark} |"
    with pytest.raises(BundleError, match="allow_pipes=True"):
        read_kaldi_matrices(spec)
    assert_same(list(read_kaldi_matrices(spec, allow_pipes=True)), mats)
    with pytest.raises(BundleError, match="status"):
        list(read_kaldi_matrices(f"ark:cat {tmp_path / 'none.ark'} |", allow_pipes=True))
    with pytest.raises(BundleError, match="allow_pipes"):
        read_kaldi_matrices(f"scp:cat {tmp_path / 'ref.scp'} |")


def test_malformed_scp_line(tmp_path, mats):
    ark, scp = write_with_kaldiio(tmp_path, mats)
    lines = scp.read_text().splitlines()
    bad = tmp_path / "bad.scp"
    bad.write_text(lines[0] + "\njust-a-key\n", encoding="utf-8")
    # reference: hand-worked; the second line lacks its rxspecifier
    with pytest.raises(BundleError, match=rf"{bad}, line 2: found 'just-a-key'"):
        read_kaldi_matrices(bad)


def test_missing_and_corrupt_arks(tmp_path, mats):
    ark, scp = write_with_kaldiio(tmp_path, mats)
    moved = tmp_path / "moved.scp"
    moved.write_text(scp.read_text().replace(str(ark), str(tmp_path / "gone.ark")))
    with pytest.raises(BundleError, match=r"utt 'depot-01'.*line 1.*gone\.ark"):
        list(read_kaldi_matrices(moved))
    with pytest.raises(BundleError, match="no file"):
        read_kaldi_matrices(tmp_path / "none.ark")
    with pytest.raises(BundleError, match="no file"):
        read_kaldi_matrices(tmp_path / "none.scp")
    cut = tmp_path / "cut.ark"
    cut.write_bytes(ark.read_bytes()[:200])  # first matrix is 23*7*4 bytes: truncated
    with pytest.raises(BundleError, match=r"utt 'depot-01'.*entry 1"):
        list(read_kaldi_matrices(cut))
    bad_offset = tmp_path / "off.scp"
    bad_offset.write_text(f"depot-01 {ark}:3\n")
    with pytest.raises(BundleError, match="utt 'depot-01'.*line 1"):
        list(read_kaldi_matrices(bad_offset))


def test_bad_specs(tmp_path):
    for spec in ("feats.txt", "rspec:feats.txt", "ark:", "ark,x:a.ark", "ark,scp:a.ark,a.scp"):
        with pytest.raises(ParameterError, match="spec"):
            read_kaldi_matrices(spec)
    with pytest.raises(BundleError, match="standard input"):
        read_kaldi_matrices("ark:-")


def test_write_refuses_bad_items_and_overwrite(tmp_path, mats):
    ark, scp = tmp_path / "o.ark", tmp_path / "o.scp"
    for items in (
        {"two words": np.zeros((2, 2))},
        [("a", np.zeros((2, 2))), ("a", np.zeros((2, 2)))],
        {"a": np.zeros((2, 2, 2))},
        {"a": np.array(["x"])},
        [("a",)],
    ):
        with pytest.raises(ParameterError):
            write_kaldi_matrices(ark, items, scp=scp)
        assert not ark.exists() and not scp.exists()
    write_kaldi_matrices(ark, mats, scp=scp)
    scp.unlink()
    with pytest.raises(ParameterError, match="overwrite"):
        write_kaldi_matrices(ark, mats, scp=scp)
    assert not scp.exists()  # nothing written when one target is taken
    write_kaldi_matrices(ark, {"x": np.arange(4)}, scp=scp, overwrite=True)
    ((key, m),) = read_kaldi_matrices(f"scp:{scp}")
    assert key == "x" and m.dtype == np.float32
    np.testing.assert_array_equal(m, [0, 1, 2, 3])  # reference: hand-worked int -> float


def test_kaldi_posteriors_become_utterances(tmp_path, rng):
    # end to end: posteriors written by kaldiio (reference writer) -> Utterance ->
    # forced alignment; a pipe in the scp is refused unless allowed
    from peekalign import align_tokens
    from peekalign.model import read_kaldi_utterances
    from peekalign.vocab import Vocabulary, WordBoundary

    vocab = Vocabulary(["<b>", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    mats = {"k1": random_log_probs(rng, 12, 4), "k2": random_log_probs(rng, 9, 4)}
    ark, scp = write_with_kaldiio(tmp_path, mats)
    refs = {"k1": "ab a", "k2": "b"}
    utts = list(read_kaldi_utterances(f"scp:{scp}", refs=refs, vocab=vocab))
    assert [u.id for u in utts] == ["k1", "k2"]
    assert utts[0].ref_tokens.tolist() == [2, 3, 1, 2]  # hand-worked: a b | a
    np.testing.assert_allclose(utts[1].log_probs, mats["k2"], atol=1e-6)
    assert align_tokens(utts[0].log_probs, utts[0].ref_tokens).tokens.size == 4
    with pytest.raises(BundleError, match="utt 'k2'.*no reference"):
        list(read_kaldi_utterances(f"scp:{scp}", refs={"k1": "a"}, vocab=vocab))
    kaldiio = require("kaldiio")
    single = tmp_path / "k1.mat"
    kaldiio.save_mat(str(single), mats["k1"])  # reference: kaldiio single-matrix file
    piped = tmp_path / "piped.scp"
    piped.write_text(f"k1 cat {single} |\n")
    with pytest.raises(BundleError, match="allow_pipes"):
        list(read_kaldi_utterances(f"scp:{piped}", refs=refs, vocab=vocab))
    got = list(read_kaldi_utterances(f"scp:{piped}", refs=refs, vocab=vocab, allow_pipes=True))
    np.testing.assert_allclose(got[0].log_probs, mats["k1"], atol=1e-6)
