"""No retired name is left where a user reads (DEVELOPERS.md, "Names").

The names peekalign gave up for words of its own must not come back: not in the
package source, the README, the contributor guide, the notebooks, any command's
``--help``, the CSV columns and JSON keys the commands write, or the HTML pages
``peekalign view`` and ``peekalign scan`` build. "tier" stays only where the TextGrid
format is meant (Praat's own word for the format's rows).
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import re
from pathlib import Path

import pytest

import peekalign
from peekalign.cli import COMMANDS, main
from peekalign.data import demo_path

ROOT = Path(__file__).resolve().parents[1]

# reference: the retired names listed in DEVELOPERS.md, "Names" (our own decision, no
# outside source); each pattern with the words it must catch
RETIRED = {
    "forced_align": r"\bforced_align\b",
    "TokenSegment": r"TokenSegment",
    "WordSpan / word_spans": r"WordSpan|word_spans",
    "explore / explorer": r"\bexplor",
    "beam threshold": r"beam[-_ ]?threshold",
    "top-k": r"\btop[-_ ]?k\b|\btop-\d+\b",
    "insertion bonus": r"insertion[-_ ]bonus",
    # a score part is a "token bonus"; "bonus" on its own is the retired name
    "bonus alone": r"(?<!token )(?<!token-)\bbonus",
    "coverage": r"coverage",
    "horizon": r"\bhorizons?\b",
    "soft alignment": r"soft[-_ ]alignment",
    "decoding floor": r"decoding[-_ ]floor",
}
TIER = re.compile(r"\btiers?\b", re.IGNORECASE)
TEXTGRID = re.compile(r"textgrid", re.IGNORECASE)
# lines either side of a "tier" within which "TextGrid" must appear
TEXTGRID_REACH = 12


def _hits(text: str, where: str, *, textgrid_file: bool = False) -> list[str]:
    out = []
    lines = text.splitlines()
    for i, line in enumerate(lines):
        for name, pat in RETIRED.items():
            if re.search(pat, line, re.IGNORECASE):
                out.append(f"{where}:{i + 1}: {name}: {line.strip()[:120]}")
        if TIER.search(line) and not textgrid_file:
            near = "\n".join(lines[max(0, i - TEXTGRID_REACH) : i + TEXTGRID_REACH + 1])
            if not TEXTGRID.search(near):
                out.append(f"{where}:{i + 1}: tier outside TextGrid: {line.strip()[:120]}")
    return out


def test_the_patterns_catch_the_retired_names():
    # reference: hand-worked - each retired spelling is caught, the current ones are not
    caught = "forced_align explorer Explore beam_threshold --beam-threshold top-k top_k top-5"
    caught += " insertion bonus, a bonus part, coverage, acoustic horizon, soft alignment"
    caught += ", decoding floor, the tiers panel"
    found = {h.split(": ")[1] for h in _hits(caught.replace(", ", "\n"), "x")}
    assert found == set(RETIRED) - {"TokenSegment", "WordSpan / word_spans"} | {
        "tier outside TextGrid"
    }
    fine = "align_tokens TokenRun word_runs --prune-gap --candidates token_bonus token bonus"
    fine += " --token-bonus reach lanes right context spike threshold StateOccupancy"
    assert _hits(fine, "x") == []
    assert _hits("write the TextGrid\nwith two tiers", "x") == []


def test_package_readme_guide_and_notebooks_use_no_retired_name():
    files = sorted((ROOT / "peekalign").rglob("*.py"))
    files += [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "pyproject.toml"]
    files += sorted((ROOT / "notebooks").glob("*.ipynb"))
    files += sorted((ROOT / "fixtures" / "make").glob("*.py"))
    hits = []
    for f in files:
        text = f.read_text(encoding="utf-8")
        if f.suffix == ".ipynb":  # the cells' text, not the JSON around it
            nb = json.loads(text)
            text = "\n".join("".join(c["source"]) for c in nb["cells"])
        hits += _hits(text, str(f.relative_to(ROOT)), textgrid_file=f.name == "textgrid.py")
    assert hits == [], "\n".join(hits)


def _help(argv: list[str]) -> str:
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf), pytest.raises(SystemExit) as e:
        main(argv)
    assert e.value.code == 0
    return buf.getvalue()


def test_every_command_help_uses_no_retired_name():
    texts = {"peekalign --help": _help(["--help"])}
    for name in COMMANDS:
        texts[f"peekalign {name} --help"] = _help([name, "--help"])
    assert len(texts) == len(COMMANDS) + 1 >= 9
    hits = [h for where, t in texts.items() for h in _hits(t, where)]
    assert hits == [], "\n".join(hits)


def _json_keys(obj, out: set) -> set:
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.add(str(k))
            _json_keys(v, out)
    elif isinstance(obj, list):
        for v in obj:
            _json_keys(v, out)
    return out


def _page_text(html: str) -> str:
    """What the page says: markup, our document's JSON (with its callbacks' code), but
    not the inlined BokehJS library (whose own words are not ours)."""
    keep = []
    pos = 0
    for m in re.finditer(r"<script([^>]*)>(.*?)</script>", html, re.DOTALL | re.IGNORECASE):
        keep.append(html[pos : m.start()])
        if "application/json" in m.group(1):
            keep.append(m.group(2))
        pos = m.end()
    keep.append(html[pos:])
    return "\n".join(keep).replace("\\n", "\n")


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """The demo bundle through scan (report, two utterance pages, CSVs), view, search
    and align."""
    tmp = tmp_path_factory.mktemp("names")
    bundle = demo_path("full")
    uid = peekalign.open_bundle(bundle).ids[3]
    out = tmp / "report"
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        assert main(
            ["scan", str(bundle), "--out", str(out), "--workers", "0", "--pages", "2"]
        ) in (
            0,
            1,
        )
        assert main(["view", str(bundle), uid, "--html", str(tmp / "view.html")]) == 0
        assert main(["search", str(bundle), uid, "--json", str(tmp / "search.json")]) == 0
        assert main(["align", str(bundle), "--json", str(tmp / "align.jsonl")]) == 0
    return {"tmp": tmp, "report": out}


def test_built_pages_use_no_retired_name(built):
    pages = [built["tmp"] / "view.html", built["report"] / "index.html"]
    pages += sorted((built["report"] / "utts").glob("*.html"))
    assert len(pages) >= 4  # view, report index and two utterance pages
    hits = []
    for p in pages:
        text = _page_text(p.read_text(encoding="utf-8"))
        assert "lanes" in text or p.name == "index.html"  # the document is really read
        hits += _hits(text, p.name)
    assert hits == [], "\n".join(hits)


def test_csv_columns_and_json_keys_use_no_retired_name(built):
    keys: dict[str, set] = {}
    for f in sorted(built["report"].glob("*.csv")):
        with open(f, newline="", encoding="utf-8") as fh:
            keys[f.name] = set(next(csv.reader(fh), []))
    keys["search.json"] = _json_keys(json.loads((built["tmp"] / "search.json").read_text()), set())
    for f in [built["tmp"] / "align.jsonl"]:
        lines = f.read_text(encoding="utf-8").splitlines()
        keys[f.name] = set().union(*(_json_keys(json.loads(x), set()) for x in lines if x))
    assert {"utterances.csv", "words.csv", "search.json"} <= set(keys)
    assert all(keys.values()), keys
    hits = [h for where, ks in keys.items() for h in _hits("\n".join(sorted(ks)), where)]
    assert hits == [], "\n".join(hits)
    # times in ms where a column is a duration past an event; never an "_s" and an "_ms"
    # spelling of the same quantity side by side (DEVELOPERS.md, "Names")
    for where, ks in keys.items():
        stems = {k[:-3] for k in ks if k.endswith("_ms")}
        both = sorted(k for k in ks if k.endswith("_s") and k[:-2] in stems)
        assert both == [], (where, both)
