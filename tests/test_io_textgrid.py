"""TextGrid reader and writer, checked against praatio (the reference library)."""

from __future__ import annotations

import pytest
from conftest import require

from peekalign.exceptions import BundleError, ParameterError
from peekalign.io.textgrid import read_textgrid_tiers, read_textgrid_words, write_textgrid


def grid_tiers(rng):
    """Word and token tiers on a 40 ms grid with float noise, gaps between words."""
    words, tokens = [], []
    frame = int(rng.integers(0, 4))
    for w in ["tram", "seven", "to", "depot", 'say "over"', "Ölstraße"]:
        n = int(rng.integers(3, 10))
        words.append((frame * 0.04, (frame + n) * 0.04, w))
        cut = frame + int(rng.integers(1, n))
        tokens.append((frame * 0.04, cut * 0.04, "▁" + w[:1]))
        tokens.append((cut * 0.04, (frame + n) * 0.04, w[1:] or "x"))
        frame += n + int(rng.integers(0, 3))
    return {"words": words, "tokens": tokens}, frame * 0.04 + 0.3


def test_praatio_reads_back_written_textgrid(tmp_path, rng):
    textgrid = require("praatio.textgrid")
    tiers, xmax = grid_tiers(rng)
    p = tmp_path / "d-01.TextGrid"
    write_textgrid(p, tiers, xmax=xmax)
    # reference: praatio's own reader (textgrid.openTextgrid)
    tg = textgrid.openTextgrid(str(p), includeEmptyIntervals=False)
    assert tg.tierNames == ("words", "tokens")
    assert tg.minTimestamp == 0.0 and tg.maxTimestamp == round(xmax, 6)
    for name, intervals in tiers.items():
        got = [(e.start, e.end, e.label) for e in tg.getTier(name).entries]
        # times are written rounded to 1 us (documented); labels verbatim
        assert got == [(round(s, 6), round(e, 6), lab) for s, e, lab in intervals]
        flat_got = [t for s, e, _ in got for t in (s, e)]
        assert flat_got == pytest.approx([t for s, e, _ in intervals for t in (s, e)], abs=1e-6)
    # reference: Praat's TextGrid convention (praatio with empty intervals kept): every
    # interval tier covers [xmin, xmax] without gaps
    full = textgrid.openTextgrid(str(p), includeEmptyIntervals=True)
    for name in tiers:
        entries = full.getTier(name).entries
        assert entries[0].start == 0.0 and entries[-1].end == round(xmax, 6)
        assert all(a.end == b.start for a, b in zip(entries, entries[1:], strict=False))


def test_our_readers_agree_with_praatio(tmp_path, rng):
    textgrid = require("praatio.textgrid")
    tiers, xmax = grid_tiers(rng)
    p = tmp_path / "d-01.TextGrid"
    write_textgrid(p, tiers, xmax=xmax)
    tg = textgrid.openTextgrid(str(p), includeEmptyIntervals=False)
    # reference: praatio.textgrid.openTextgrid
    assert read_textgrid_tiers(p) == {
        n: [(e.start, e.end, e.label) for e in tg.getTier(n).entries] for n in tg.tierNames
    }
    assert read_textgrid_words(p) == [
        (e.label, e.start, e.end) for e in tg.getTier("words").entries
    ]


def test_reads_textgrids_written_by_praatio(tmp_path):
    textgrid = require("praatio.textgrid")
    tg = textgrid.Textgrid(0.0, 2.0)
    tg.addTier(textgrid.IntervalTier("phones", [(0.1, 0.3, "t"), (0.3, 0.9, "ram")], 0, 2.0))
    tg.addTier(textgrid.IntervalTier("Words", [(0.1, 0.9, "tram"), (1.0, 1.5, "depot")], 0, 2.0))
    tg.addTier(textgrid.PointTier("events", [(0.5, "click")], 0, 2.0))
    expected = [("tram", 0.1, 0.9), ("depot", 1.0, 1.5)]  # reference: the intervals above
    for fmt in ("long_textgrid", "short_textgrid"):
        p = tmp_path / f"{fmt}.TextGrid"
        # reference: praatio's writer, both Praat text formats
        tg.save(str(p), format=fmt, includeBlankSpaces=True)
        assert read_textgrid_words(p) == expected  # "Words" matched case-insensitively
        assert read_textgrid_words(p, tier="phones") == [("t", 0.1, 0.3), ("ram", 0.3, 0.9)]
        assert list(read_textgrid_tiers(p)) == ["phones", "Words"]  # point tier left out


def test_utf16_textgrid(tmp_path):
    # reference: Praat's manual, "TextGrid file formats": Praat writes UTF-16 when the
    # text is not ASCII (from memory)
    p8, p16 = tmp_path / "a.TextGrid", tmp_path / "b.TextGrid"
    write_textgrid(p8, {"words": [(0.0, 0.5, "Ölstraße"), (0.5, 0.7, "süd")]}, xmax=1.0)
    p16.write_bytes(p8.read_text(encoding="utf-8").encode("utf-16"))
    assert read_textgrid_words(p16) == [("Ölstraße", 0.0, 0.5), ("süd", 0.5, 0.7)]


def test_default_tier_choice(tmp_path):
    p = tmp_path / "x.TextGrid"
    write_textgrid(p, {"phones": [(0.1, 0.2, "t")], "spk": [(0.0, 1.0, "driver")]}, xmax=1.0)
    # reference: hand-worked rule: no tier named words -> the first interval tier
    assert read_textgrid_words(p) == [("t", 0.1, 0.2)]
    q = tmp_path / "y.TextGrid"
    write_textgrid(q, {"WORDS": [(0.0, 0.4, "a")], "words": [(0.5, 0.9, "b")]}, xmax=1.0)
    # reference: hand-worked rule: the exact name wins over another case
    assert read_textgrid_words(q) == [("b", 0.5, 0.9)]


def test_missing_tier_lists_tiers_found(tmp_path):
    textgrid = require("praatio.textgrid")
    p = tmp_path / "x.TextGrid"
    tg = textgrid.Textgrid(0.0, 1.0)
    tg.addTier(textgrid.IntervalTier("phones", [(0.1, 0.2, "t")], 0, 1.0))
    tg.addTier(textgrid.PointTier("events", [(0.5, "click")], 0, 1.0))
    tg.save(str(p), format="long_textgrid", includeBlankSpaces=True)
    with pytest.raises(BundleError) as info:
        read_textgrid_words(p, tier="words")
    assert "'phones' (interval)" in str(info.value) and "'events' (point)" in str(info.value)
    with pytest.raises(BundleError, match="no interval tier 'events'"):
        read_textgrid_words(p, tier="events")
    only_points = tmp_path / "points.TextGrid"
    tg.removeTier("phones")
    tg.save(str(only_points), format="long_textgrid", includeBlankSpaces=True)
    with pytest.raises(BundleError, match="at least one interval tier"):
        read_textgrid_words(only_points)


LONG = """File type = "ooTextFile"
Object class = "TextGrid"

xmin = 0
xmax = 2
tiers? <exists>
size = 1
item []:
    item [1]:
        class = "IntervalTier"
        name = "words"
        xmin = 0
        xmax = 2
        intervals: size = 2
        intervals [1]:
            xmin = 0
            xmax = {a}
            text = "tram"
        intervals [2]:
            xmin = {b}
            xmax = {c}
            text = "depot"
"""


@pytest.mark.parametrize(
    ("a", "b", "c", "marker", "needle"),
    [
        ("1.0", "0.8", "2", "intervals [2]:", "interval 2 of tier 'words' starting at 0.8"),
        ("1.0", "1.5", "1.2", "intervals [2]:", "interval 2 of tier 'words' from 1.5 to 1.2"),
        ("1.0", "one", "2", "xmin = one", "xmin = 'one'"),
    ],
)
def test_malformed_textgrid_names_file_and_line(tmp_path, a, b, c, marker, needle):
    text = LONG.format(a=a, b=b, c=c)
    p = tmp_path / "bad.TextGrid"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(BundleError) as info:
        read_textgrid_words(p)
    msg = str(info.value)
    # reference: hand count of the text above: the line holding the marker
    line = [x.strip() for x in text.splitlines()].index(marker) + 1
    assert f"{p}, line {line}:" in msg and needle in msg and "expected" in msg


def test_not_a_textgrid(tmp_path):
    with pytest.raises(BundleError, match="no file"):
        read_textgrid_words(tmp_path / "none.TextGrid")
    p = tmp_path / "x.TextGrid"
    p.write_text("d-01 1 0.1 0.2 tram\n", encoding="utf-8")
    with pytest.raises(BundleError, match="ooTextFile"):
        read_textgrid_words(p)
    q = tmp_path / "cut.TextGrid"
    q.write_text(LONG.format(a="1", b="1", c="2")[:-60], encoding="utf-8")  # truncated
    with pytest.raises(BundleError, match=str(q)):
        read_textgrid_words(q)


def test_write_textgrid_refuses_bad_input(tmp_path):
    p = tmp_path / "x.TextGrid"
    bad = [
        ({"words": [(0.0, 0.5, "a"), (0.4, 0.9, "b")]}, 1.0, "overlap"),
        ({"words": [(0.5, 0.5, "a")]}, 1.0, "end after it starts"),
        ({"words": [(0.5, 1.5, "a")]}, 1.0, r"\[xmin, xmax\]"),
        ({"words": [(0.5, "x", "a")]}, 1.0, "tuple"),
        ({"": [(0.1, 0.2, "a")]}, 1.0, "non-empty"),
        ({"words": []}, 0.0, "xmax"),
        ([("words", [])], 1.0, "'tiers' parameter"),
        ({"words": "tram"}, 1.0, "must be a list"),
    ]
    for tiers, xmax, needle in bad:
        with pytest.raises(ParameterError, match=needle):
            write_textgrid(p, tiers, xmax=xmax)
        assert not p.exists()
    write_textgrid(p, {"words": [(0.1, 0.2, "a")]}, xmax=1.0)
    with pytest.raises(ParameterError, match="overwrite"):
        write_textgrid(p, {"words": [(0.1, 0.2, "b")]}, xmax=1.0)
    assert read_textgrid_words(p) == [("a", 0.1, 0.2)]
    write_textgrid(p, {"words": [(0.1, 0.2, "b")]}, xmax=1.0, overwrite=True)
    assert read_textgrid_words(p) == [("b", 0.1, 0.2)]
    assert [f.name for f in tmp_path.iterdir()] == ["x.TextGrid"]  # no temp files left
