"""Tests of the ARPA back-off n-gram reader."""

from __future__ import annotations

import math

import pytest

from peekalign.exceptions import BundleError, ParameterError
from peekalign.lm import ArpaLM

LN10 = math.log(10.0)

# A hand-written trigram model (tram-depot dispatch words).
ARPA = """some header text before the data section is allowed

\\data\\
ngram 1=5
ngram 2=4
ngram 3=1

\\1-grams:
-1.0\t</s>
-99\t<s>\t-0.5
-0.7\ttram\t-0.3
-0.9\tdepot\t-0.2
-1.2\t<unk>

\\2-grams:
-0.3 <s> tram -0.1
-0.4 tram depot
-0.2 depot </s>
-0.6 tram tram

\\3-grams:
-0.1 <s> tram depot

\\end\\
"""


@pytest.fixture
def lm(tmp_path):
    path = tmp_path / "depot.arpa"
    path.write_text(ARPA, encoding="utf-8")
    return ArpaLM.from_file(path)


# reference: the ARPA back-off rule (as documented for SRILM's ngram-format; written
# from memory): P(w|h) = P*(h w) if listed, else bow(h) * P(w | h minus its oldest
# word), with bow(h) = 1 when h is not listed. Values below are worked by hand in log10.
@pytest.mark.parametrize(
    ("history", "word", "log10"),
    [
        ((), "tram", -0.3),  # listed bigram <s> tram
        (("tram",), "depot", -0.1),  # listed trigram <s> tram depot
        (("tram",), "tram", -0.1 + -0.6),  # bow(<s> tram) + P(tram | tram)
        (("tram", "depot"), "</s>", -0.2),  # no trigram, bow(tram depot) absent: P(</s>|depot)
        (("depot",), "depot", 0.0 + -0.2 + -0.9),  # bow(<s> depot) absent, bow(depot), P(depot)
        (("depot", "depot"), "tram", -0.2 + -0.7),  # bow(depot depot) absent, bow(depot)
        (("tram",), "shunting", -0.1 + -0.3 + -1.2),  # OOV -> <unk>: bow(<s> tram), bow(tram)
        (("shunting",), "tram", -0.7),  # <s> <unk> / <unk> not listed: unigram
        (("tram", "tram", "tram"), "depot", -0.4),  # only the last two words matter
    ],
)
def test_back_off_hand_worked(lm, history, word, log10):
    assert lm.log10_prob(history, word) == pytest.approx(log10, abs=1e-12)
    assert lm.log_prob(history, word) == pytest.approx(log10 * LN10, abs=1e-12)
    assert lm(history, word) == pytest.approx(log10 * LN10, abs=1e-12)


def test_without_sentence_start(lm):
    # reference: hand-worked; no <s> context, so the unigram P(tram) and bigram P(depot|tram)
    assert lm.log10_prob((), "tram", bos=False) == pytest.approx(-0.7)
    assert lm.log10_prob(("tram",), "depot", bos=False) == pytest.approx(-0.4)


def test_sentence_log_prob(lm):
    # reference: hand-worked sum: P(tram|<s>) P(depot|<s> tram) P(</s>|tram depot)
    expected = (-0.3 + -0.1 + -0.2) * LN10
    assert lm.sentence_log_prob(["tram", "depot"]) == pytest.approx(expected)


def test_model_facts(lm):
    assert lm.order == 3
    assert "tram" in lm and "shunting" not in lm
    assert "order=3" in repr(lm) and "[5, 4, 1]" in repr(lm)


def test_missing_unk_uses_fixed_floor():
    text = "\\data\\\nngram 1=2\n\n\\1-grams:\n-0.5 a\n-0.5 </s>\n\n\\end\\\n"
    lm = ArpaLM.from_string(text)
    # reference: -100 (log10) for a missing <unk>, the convention KenLM uses (from memory)
    assert lm.log10_prob((), "zzz") == pytest.approx(-100.0)


def test_predicting_sentence_start_is_an_error(lm):
    with pytest.raises(ParameterError, match="'<s>'"):
        lm.log_prob((), "<s>")


@pytest.mark.parametrize(
    ("text", "line", "pattern"),
    [
        ("no data here\n", 1, r"no '\\data\\' line"),
        ("\\data\\\nngram one=2\n", 2, "'ngram N=COUNT'"),
        ("\\data\\\nngram 1=2\n\n\\1-grams:\n-0.5 a\n-0.5 b\n", 6, r"no '\\end\\' line"),
        ("\\data\\\nngram 1=2\n\n\\1-grams:\n-0.5 a\n\\end\\\n", 6, r"1 1-grams.*expected 2"),
        ("\\data\\\nngram 1=1\n\n\\1-grams:\nhigh a\n\\end\\\n", 5, "numbers for the log10"),
        ("\\data\\\nngram 1=1\n\n\\1-grams:\n-0.5 a b c\n\\end\\\n", 5, "4 fields"),
        ("\\data\\\nngram 1=1\n\n\\2-grams:\n-0.5 a b\n\\end\\\n", 4, r"section '\\2-grams:'"),
        ("\\data\\\nngram 1=2\n\n\\1-grams:\n-0.5 a\n-0.4 a\n\\end\\\n", 6, "a second time"),
        ("\\data\\\nngram 1=1\n\n\\1-grams:\n0.5 a\n\\end\\\n", 5, "log10 probability <= 0"),
    ],
)
def test_malformed_files_name_the_line(tmp_path, text, line, pattern):
    path = tmp_path / "bad.arpa"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(BundleError, match=pattern) as info:
        ArpaLM.from_file(path)
    msg = str(info.value)
    assert f"bad.arpa:{line}:" in msg
    assert "expected" in msg and ";" in msg  # found / expected / fix


def test_unreadable_file(tmp_path):
    with pytest.raises(BundleError, match="check the path"):
        ArpaLM.from_file(tmp_path / "missing.arpa")
    gz = tmp_path / "lm.arpa.gz"
    gz.write_bytes(b"\x1f\x8b\x08\x00\xff\xfe")
    with pytest.raises(BundleError, match="decompress"):
        ArpaLM.from_file(gz)


def test_byte_order_mark_is_dropped(tmp_path, lm):
    # the same model saved by an editor that writes a UTF-8 byte-order mark
    path = tmp_path / "bom.arpa"
    path.write_text(ARPA, encoding="utf-8-sig")
    assert path.read_bytes().startswith(b"\xef\xbb\xbf")
    bom = ArpaLM.from_file(path)
    assert repr(bom).split(",", 1)[1] == repr(lm).split(",", 1)[1]  # order and counts
    # reference: the hand-worked sum of test_sentence_log_prob
    assert bom.sentence_log_prob(["tram", "depot"]) == pytest.approx((-0.3 - 0.1 - 0.2) * LN10)
