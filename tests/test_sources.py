"""The project stands on its own: no citation of a document outside it."""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
# phrases that point at an unpublished document outside the repository
OUTSIDE = re.compile(r"design[ -]notes?|design\.md|\.\./shared|\bshared/|seed doc", re.I)
SECTIONS = re.compile(r'DEVELOPERS\.md, "([^"]+)"')


def _text_files() -> list[Path]:
    out = subprocess.run(
        ["git", "ls-files"], cwd=REPO, capture_output=True, text=True, check=True
    ).stdout.split()
    suffixes = {".py", ".md", ".ipynb", ".toml", ".txt", ".json", ".jsonl", ""}
    return [REPO / f for f in out if Path(f).suffix in suffixes and (REPO / f).is_file()]


def test_no_citation_of_an_outside_document():
    # reference: the repository's own files (git ls-files); on main tests cited "design
    # notes", a document that is not part of the project and not published
    hits = []
    for path in _text_files():
        if path == Path(__file__).resolve():
            continue
        for n, line in enumerate(path.read_text(encoding="utf-8", errors="replace").splitlines()):
            if OUTSIDE.search(line):
                hits.append(f"{path.relative_to(REPO)}:{n + 1}: {line.strip()}")
    assert hits == []


def test_cited_sections_exist():
    # reference: the headings of DEVELOPERS.md; every "DEVELOPERS.md, <section>"
    # citation in code, tests and docs names one of them
    headings = {
        m.group(1).strip()
        for m in re.finditer(r"^#+ (.+)$", (REPO / "DEVELOPERS.md").read_text(), re.M)
    }
    cited = {}
    for path in _text_files():
        text = path.read_text(encoding="utf-8", errors="replace")
        text = re.sub(r"\s*\n\s*(#:?\s*)?", " ", text)  # citations wrapped over comment lines
        for m in SECTIONS.finditer(text):
            cited.setdefault(m.group(1), str(path.relative_to(REPO)))
    assert cited, "nothing cites DEVELOPERS.md"
    missing = {k: v for k, v in cited.items() if k not in headings}
    assert missing == {}
