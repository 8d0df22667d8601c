"""NIST CTM reader and writer."""

from __future__ import annotations

import subprocess

import pytest
from conftest import require_program

from peekalign.exceptions import BundleError, ParameterError
from peekalign.io.ctm import read_ctm, write_ctm

SCTK = "/usr/lib/sctk/bin"


def plain_ctm_parse(text: str) -> list[dict]:
    """Independent reading of the NIST CTM field order.

    reference: NIST SCTK sclite documentation, CTM format:
    ``<F> <C> <BT> <DUR> word [<CONF>]`` (file, channel, begin time, duration, word,
    optional confidence); ``;;`` starts a comment line.
    """
    out = []
    for line in text.splitlines():
        if line.startswith(";;") or not line.strip():
            continue
        f = line.split()
        out.append(
            {
                "file": f[0],
                "channel": f[1],
                "begin": float(f[2]),
                "dur": float(f[3]),
                "word": f[4],
                "conf": float(f[5]) if len(f) > 5 else None,
            }
        )
    return out


def frame_rows(rng):
    """Word rows on a 40 ms frame grid with a 20 ms offset, as an aligner gives them
    (float arithmetic leaves noise such as 0.12000000000000001 in the times)."""
    words = ["tram", "seven", "to", "depot", "over", "copy", "north", "gate"]
    rows = []
    for u, utt in enumerate(["depot-01", "depot-02"]):
        frame = int(rng.integers(0, 5))
        for w in words[u * 3 : u * 3 + 5]:
            n = int(rng.integers(2, 9))
            start, end = 0.02 + frame * 0.04, 0.02 + (frame + n) * 0.04
            conf = None if rng.random() < 0.3 else float(rng.random())
            rows.append((utt, w, start, end, conf))
            frame += n + int(rng.integers(0, 3))
    return rows


def test_written_ctm_matches_plain_nist_reading(tmp_path, rng):
    rows = frame_rows(rng)
    p = tmp_path / "align.ctm"
    write_ctm(p, rows)
    parsed = plain_ctm_parse(p.read_text(encoding="utf-8"))
    assert len(parsed) == len(rows)
    # Rows were given grouped and in time order, so the file keeps their order.
    for (utt, word, start, end, conf), got in zip(rows, parsed, strict=True):
        # reference: NIST CTM field order (file, channel, begin, duration, word, conf)
        assert got["file"] == utt and got["channel"] == "1" and got["word"] == word
        assert got["begin"] == pytest.approx(start, abs=1e-9)  # grid times survive 3 decimals
        assert got["begin"] + got["dur"] == pytest.approx(end, abs=1e-9)
        if conf is None:
            assert got["conf"] is None
        else:
            assert got["conf"] == pytest.approx(conf, abs=5e-5)


def test_read_ctm_inverts_write_ctm(tmp_path, rng):
    rows = frame_rows(rng)
    p = tmp_path / "align.ctm"
    write_ctm(p, rows)
    got = read_ctm(p)
    # reference: the plain NIST reading above, regrouped by file id by hand
    expected: dict[str, list] = {}
    for r in plain_ctm_parse(p.read_text(encoding="utf-8")):
        expected.setdefault(r["file"], []).append((r["word"], r["begin"], r["begin"] + r["dur"]))
    assert list(got) == list(expected)
    for utt in got:
        assert [w for w, _, _ in got[utt]] == [w for w, _, _ in expected[utt]]
        for (_, s, e), (_, s2, e2) in zip(got[utt], expected[utt], strict=True):
            assert s == s2 and e == pytest.approx(e2, abs=1e-12)
    # reference: hand-worked decimal sums, no float noise added by the reader
    assert all(round(e, 3) == e for ws in got.values() for _, _, e in ws)


def test_ctm_bytes_do_not_depend_on_row_order(tmp_path, rng):
    rows = frame_rows(rng)
    write_ctm(tmp_path / "a.ctm", rows)
    shuffled = [rows[i] for i in rng.permutation(len(rows))]
    write_ctm(tmp_path / "b.ctm", shuffled)
    # reference: common practice (sclite wants each file's words in time order)
    assert (tmp_path / "a.ctm").read_bytes() == (tmp_path / "b.ctm").read_bytes()


def test_hand_worked_ctm_line(tmp_path):
    p = tmp_path / "x.ctm"
    write_ctm(p, [("d-01", "tram", 0.12 + 0.04 * 3, 0.12 + 0.04 * 9, 0.875)])
    # reference: hand-worked; 0.24 s begin, 0.24 s duration, 3 and 4 decimals
    assert p.read_text() == "d-01 1 0.240 0.240 tram 0.8750\n"


def test_nist_validator_accepts_written_ctm(tmp_path, rng):
    validator = require_program(f"{SCTK}/ctmValidator.pl")
    p = tmp_path / "align.ctm"
    write_ctm(p, frame_rows(rng))
    # reference: NIST SCTK ctmValidator.pl (checks every field's syntax)
    res = subprocess.run([validator, "-i", str(p)], capture_output=True, text=True, check=False)
    assert res.returncode == 0, res.stdout
    assert "Validated" in res.stdout


def test_sclite_scores_written_ctm(tmp_path):
    sclite = require_program(f"{SCTK}/sclite")
    ref = [
        ("d-01", "tram", 0.12, 0.48, None),
        ("d-01", "depot", 0.48, 0.80, None),
        ("d-01", "four", 0.90, 1.20, None),
        ("d-02", "over", 0.00, 0.30, None),
    ]
    write_ctm(tmp_path / "ref.ctm", ref)
    write_ctm(tmp_path / "hyp.ctm", [r[:4] + (0.9,) for r in ref if r[1] != "depot"])
    res = subprocess.run(
        [sclite, "-r", "ref.ctm", "ctm", "-h", "hyp.ctm", "ctm", "-o", "sum", "stdout"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        check=False,
    )
    line = next(x for x in res.stdout.splitlines() if "Sum/Avg" in x)
    cells = line.replace("|", " ").split()
    # reference: sclite (NIST) time-mediated scoring; hand-worked: 4 reference words,
    # one deleted -> Corr 75 %, Del 25 %
    assert cells[1:4] == ["2", "4", "75.0"]
    assert float(cells[5]) == pytest.approx(25.0)


def test_read_ctm_skips_comments_sorts_and_ignores_extra_fields(tmp_path):
    p = tmp_path / "x.ctm"
    p.write_text(
        ";; made by hand\n"
        "d-02 A 0.50 0.25 copy 0.7 lex spk1\n"
        "\n"
        "d-01 1 1.00 0.5 gate\n"
        "d-01 1 0.25 0.5 north 1\n",
        encoding="utf-8",
    )
    # reference: hand-worked from the lines above (NIST field order, 8-field form)
    assert read_ctm(p) == {
        "d-02": [("copy", 0.5, 0.75)],
        "d-01": [("north", 0.25, 0.75), ("gate", 1.0, 1.5)],
    }


def test_read_ctm_strips_a_byte_order_mark(tmp_path):
    # regression: the mark stuck to the first utterance id ("\ufeffd-01"), which then
    # matched no utterance; reference: hand-worked from the two lines written
    p = tmp_path / "bom.ctm"
    p.write_text("d-01 1 0.25 0.5 north\nd-02 1 0.5 0.25 copy\n", encoding="utf-8-sig")
    assert p.read_bytes().startswith(b"\xef\xbb\xbf")
    assert read_ctm(p) == {"d-01": [("north", 0.25, 0.75)], "d-02": [("copy", 0.5, 0.75)]}


@pytest.mark.parametrize(
    ("line", "needle"),
    [
        ("d-01 1 0.5 tram\n", "4 fields"),
        ("d-01 1 0.5 0.2 tram to depot 0.9 extra\n", "9 fields"),
        ("d-01 1 0,5 0.2 tram\n", "begin time '0,5'"),
        ("d-01 1 0.5 nan tram\n", "duration 'nan'"),
        ("d-01 1 0.5 -0.2 tram\n", "negative duration"),
        ("d-01 1 -0.5 0.2 tram\n", "negative begin"),
        ("d-01 1 0.5 0.2 tram depot\n", "not a number"),
    ],
)
def test_malformed_ctm_names_file_and_line(tmp_path, line, needle):
    p = tmp_path / "bad.ctm"
    p.write_text(";; header\nd-01 1 0.1 0.2 ok\n" + line, encoding="utf-8")
    with pytest.raises(BundleError) as info:
        read_ctm(p)
    msg = str(info.value)
    # reference: hand-worked; the bad line is line 3 of the file
    assert f"{p}, line 3" in msg and needle in msg and "expected" in msg


def test_ctm_two_channels_one_file_is_an_error(tmp_path):
    p = tmp_path / "x.ctm"
    p.write_text("d-01 A 0.1 0.2 tram\nd-01 B 0.3 0.2 depot\n", encoding="utf-8")
    with pytest.raises(BundleError, match="line 2.*channel 'B'"):
        read_ctm(p)


def test_ctm_missing_and_binary_files(tmp_path):
    with pytest.raises(BundleError, match="no file"):
        read_ctm(tmp_path / "nope.ctm")
    p = tmp_path / "bin.ctm"
    p.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(BundleError, match="UTF-8"):
        read_ctm(p)


def test_write_ctm_refuses_bad_rows_and_overwrite(tmp_path):
    p = tmp_path / "x.ctm"
    bad_rows = [
        [("d 01", "tram", 0.1, 0.2, None)],
        [("d-01", "two words", 0.1, 0.2, None)],
        [("d-01", "tram", 0.3, 0.2, None)],
        [("d-01", "tram", -0.1, 0.2, None)],
        [("d-01", "tram", 0.1, float("inf"), None)],
        [("d-01", "tram", 0.1, 0.2, 1.5)],
        [("d-01", "tram", 0.1)],
    ]
    for rows in bad_rows:
        with pytest.raises(ParameterError):
            write_ctm(p, rows)
        assert not p.exists()
    write_ctm(p, [("d-01", "tram", 0.1, 0.2, None)])
    before = p.read_bytes()
    with pytest.raises(ParameterError, match="overwrite"):
        write_ctm(p, [("d-01", "depot", 0.1, 0.2, None)])
    assert p.read_bytes() == before
    write_ctm(p, [("d-01", "depot", 0.1, 0.2, None)], overwrite=True)
    assert plain_ctm_parse(p.read_text())[0]["word"] == "depot"
