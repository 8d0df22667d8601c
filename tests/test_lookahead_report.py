"""The measured WER in the report and the scan command: one plot with the proxy curves,
the recommendation read back from ``redecode --csv``, escaping of the section."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from redecode_helpers import LateEcho
from test_corpus import make_bundle
from test_report import make_xss_bundle

from peekalign import ParameterError
from peekalign.cli import main
from peekalign.recommend import choose, from_redecode_table
from peekalign.redecoding import read_redecode_csv, redecode
from peekalign.report import write_report
from peekalign.significance import paired_bootstrap

EPS = list(range(0, 5))


@pytest.fixture(scope="module")
def bundle_path(tmp_path_factory):
    return make_bundle(tmp_path_factory.mktemp("lr") / "b", n=12, seed=7)


@pytest.fixture(scope="module")
def result(bundle_path):
    return redecode(bundle_path, LateEcho(), lookaheads=EPS, workers=0, progress=False)


def test_the_csv_recommends_what_the_run_recommends(result, tmp_path):
    path = result.write_csv(tmp_path / "r.csv")
    table = read_redecode_csv(path)
    assert table["lookahead_frames"].tolist() == [*map(float, EPS), math.inf]
    for tol in (0.0, 0.01, 0.05, 0.2, 1.0):
        highs = [
            paired_bootstrap(result.errors[-1], result.errors[j], result.words).hi
            for j in range(len(EPS))
        ]
        # reference: DEVELOPERS.md, Look-ahead recommendation; brute force over the rows
        want = next((e for e, h in zip(EPS, highs, strict=True) if h <= tol + 1e-12), None)
        assert result.recommend(tolerance=tol).lookahead == want
        assert from_redecode_table(table, tolerance=tol).lookahead == want
        assert from_redecode_table(result.table, tolerance=tol).lookahead == want


def test_bad_redecode_csv_is_refused_with_the_fix(tmp_path):
    cases = {
        "cols.csv": "lookahead_frames,wer\n0,0.1\ninf,0.1\n",
        "text.csv": "lookahead_frames,latency_ms,wer,wer_delta_high\n0,x,0.1,0\ninf,inf,0.1,0\n",
        "nofull.csv": "lookahead_frames,latency_ms,wer,wer_delta_high\n0,200,0.1,0\n",
    }
    for name, text in cases.items():
        (tmp_path / name).write_text(text)
        with pytest.raises(ParameterError, match="redecode --csv"):
            read_redecode_csv(tmp_path / name)
    with pytest.raises(ParameterError, match="no file"):
        read_redecode_csv(tmp_path / "missing.csv")


def _green_path(svg: str) -> list[tuple[float, float]]:
    """Points of the measured-WER curve (the solid green path) of the sweep SVG."""
    d = re.findall(r'<path d="([^"]+)" fill="none" stroke="#2f9a7f" stroke-width="2"/>', svg)
    assert len(d) == 1
    return [tuple(map(float, p[1:].split(","))) for p in d[0].split()]


def test_report_draws_the_measured_curve_with_the_proxies_and_recommends_from_it(
    bundle_path, result, tmp_path
):
    out = tmp_path / "rep"
    s = write_report(bundle_path, out, workers=0, progress=False, pages=False, measured=result)
    index = (out / "index.html").read_text(encoding="utf-8")
    fig = index[index.index("Look-ahead sweep and measured WER") :]
    svg = fig[fig.index("<svg") : fig.index("</svg>")]
    # the proxies and the measured curve are on the one plot
    assert "word reach" in svg and "kept attention" in svg and "measured WER" in svg
    pts = _green_path(svg)
    assert len(pts) == len(EPS)
    wer = result.table["wer"][:-1]
    # reference: hand-worked (one linear axis: y = a - b * WER, b > 0, as SVG y grows
    # downwards; x = the look-ahead, evenly spaced)
    y = np.array([p[1] for p in pts])
    slope, icpt = np.polyfit(wer, y, 1)
    assert slope < 0 and np.allclose(icpt + slope * wer, y, atol=0.06)
    assert np.allclose(np.diff([p[0] for p in pts]), pts[1][0] - pts[0][0], atol=0.11)
    rec = result.recommend()
    best, every = choose(s.sweep, result)
    assert best.lookahead == rec.lookahead and set(every) == {
        "reach",
        "attention",
        "measured WER",
    }
    assert re.search(rf">{rec.lookahead} frames = \d+ ms \(measured WER\)<", svg)
    assert "criterion: measured WER" in index
    assert (out / "redecode.csv").read_text() == result.table.csv_text()


def test_scan_command_takes_the_redecode_csv(bundle_path, result, tmp_path, capsys):
    csv_path = result.write_csv(tmp_path / "r.csv")
    out = tmp_path / "rep"
    code = main(["scan", str(bundle_path), "--out", str(out), "--no-pages", "--workers", "0",
                 "--redecoded", str(csv_path), "--tolerance", "1"])  # fmt: skip
    printed = capsys.readouterr().out
    assert code == 0
    want = result.recommend(tolerance=0.01).lookahead
    for name in ("reach", "attention", "measured WER"):
        assert f"look-ahead by {name}:" in printed
    assert f"recommended look-ahead: {want} frames" in printed
    assert "criterion: measured WER" in printed
    assert "measured WER" in (out / "index.html").read_text(encoding="utf-8")
    # without the CSV the dumps decide, and say which criterion
    code = main(["scan", str(bundle_path), "--out", str(tmp_path / "r2"), "--no-pages",
                 "--workers", "0"])  # fmt: skip
    printed = capsys.readouterr().out
    assert code == 0 and "look-ahead by measured WER" not in printed
    assert re.search(r"^criterion: (reach|attention) - ", printed, re.M)
    assert main(["scan", str(bundle_path), "--out", str(tmp_path / "r3"), "--redecoded",
                 str(tmp_path / "none.csv")]) == 2  # fmt: skip


def test_measured_section_escapes_markup(tmp_path):
    b = make_xss_bundle(tmp_path / "b")
    r = redecode(b, LateEcho(eos=len("abcdefghijklmnopqrstuvwxyz<>/()1234=\"'._ ") + 2),
                 lookaheads=[0, 2], workers=0, progress=False)  # fmt: skip
    assert not r.problems
    out = tmp_path / "out"
    write_report(b, out, workers=0, progress=False, pages=False, measured=r)
    index = (out / "index.html").read_text(encoding="utf-8")
    assert "Look-ahead sweep and measured WER" in index
    body = re.sub(r'<script type="application/json"[^>]*>.*?</script>', "", index, flags=re.S)
    # reference: hand-worked (the ids, reference and hypothesis are HTML; shown as text)
    assert "<script>window.__pwned" not in body
    assert '<img src=x onerror="window' not in body
    assert "&lt;script&gt;window.__pwned=1&lt;/script&gt;" in index
