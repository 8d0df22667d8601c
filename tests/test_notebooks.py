"""The notebooks run top to bottom on the demo bundles (nbclient, a kernel of this
interpreter installed under pytest's tmp dir), and are stored without outputs.

What they print is checked against outside references: ``jiwer`` for the word error
rate and the deleted words.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import require

REPO = Path(__file__).resolve().parents[1]
NOTEBOOKS = REPO / "notebooks"
KERNEL = "peekalign-test"

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def kernel_env(tmp_path_factory):
    """Environment for a kernel of this interpreter, every folder under tmp."""
    require("ipykernel")
    tmp = tmp_path_factory.mktemp("nbkernel")
    env = {}
    for key, sub in [
        ("HOME", "home"),
        ("TMPDIR", "tmp"),
        ("JUPYTER_CONFIG_DIR", "config"),
        ("JUPYTER_DATA_DIR", "data"),
        ("JUPYTER_RUNTIME_DIR", "runtime"),
        ("IPYTHONDIR", "ipython"),
        ("MPLCONFIGDIR", "mpl"),
    ]:
        (tmp / sub).mkdir()
        env[key] = str(tmp / sub)
    env["JUPYTER_PLATFORM_DIRS"] = "1"
    env["NUMBA_NUM_THREADS"] = "1"
    env["PYTHONPATH"] = os.pathsep.join(p for p in [str(REPO), os.environ.get("PYTHONPATH")] if p)
    prefix = tmp / "kernel"
    subprocess.run(
        [sys.executable, "-m", "ipykernel", "install", "--prefix", str(prefix), "--name", KERNEL],
        env={**os.environ, **env},
        check=True,
        capture_output=True,
    )
    env["JUPYTER_PATH"] = str(prefix / "share" / "jupyter")
    return env, tmp


def run_notebook(name: str, env: dict, cwd: Path, monkeypatch):
    nbformat = require("nbformat")
    nbclient = require("nbclient")
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    client = nbclient.NotebookClient(
        nb,
        kernel_name=KERNEL,
        timeout=900,
        resources={"metadata": {"path": str(cwd)}},
    )
    client.execute()
    return nb


def outputs(nb, kind: str = "stream") -> str:
    text = []
    for cell in nb.cells:
        for o in cell.get("outputs", []):
            if o.get("output_type") == kind:
                text.append(o.get("text", ""))
    return "".join(text)


def mime_types(nb) -> set:
    return {m for c in nb.cells for o in c.get("outputs", []) for m in o.get("data", {})}


@pytest.mark.parametrize("name", ["tour.ipynb", "error-analysis.ipynb", "own-model.ipynb"])
def test_notebooks_are_stored_without_outputs(name):
    raw = json.loads((NOTEBOOKS / name).read_text(encoding="utf-8"))
    for cell in raw["cells"]:
        if cell["cell_type"] == "code":
            assert cell["outputs"] == [] and cell["execution_count"] is None


def test_error_analysis_template_has_a_parameter_cell():
    raw = json.loads((NOTEBOOKS / "error-analysis.ipynb").read_text(encoding="utf-8"))
    code = [c for c in raw["cells"] if c["cell_type"] == "code"]
    first = code[0]
    assert "parameters" in first["metadata"].get("tags", [])
    src = "".join(first["source"])
    for name in ("BUNDLE", "LOOKAHEAD", "OUT", "PEEKALIGN_BUNDLE"):
        assert name in src


def test_error_analysis_writes_nothing_into_the_checkout(monkeypatch, tmp_path):
    # reference: the parameter cell run as plain Python from notebooks/ (where Jupyter
    # starts a notebook's kernel), no PEEKALIGN_* set: its output folder must lie outside
    # the checkout, so a run leaves no untracked files in notebooks/. On main it was
    # notebooks/peekalign-error-analysis.
    raw = json.loads((NOTEBOOKS / "error-analysis.ipynb").read_text(encoding="utf-8"))
    src = "".join(next(c for c in raw["cells"] if c["cell_type"] == "code")["source"])
    for key in list(os.environ):
        if key.startswith("PEEKALIGN_"):
            monkeypatch.delenv(key)
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    monkeypatch.chdir(NOTEBOOKS)
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", None)  # re-read TMPDIR
    scope: dict = {}
    exec(compile(src, "parameters", "exec"), scope)
    out = Path(scope["OUT"]).resolve()
    assert not out.is_relative_to(REPO)
    assert out.is_relative_to(tmp_path.resolve())


def test_error_analysis_runs_on_the_demo(kernel_env, tmp_path, monkeypatch):
    jiwer = require("jiwer")
    from peekalign import open_bundle
    from peekalign.data import demo_path

    env, _ = kernel_env
    out = tmp_path / "out"
    env = {**env, "PEEKALIGN_BUNDLE": str(demo_path("full")), "PEEKALIGN_OUT": str(out)}
    nb = run_notebook("error-analysis.ipynb", env, tmp_path, monkeypatch)
    summary = json.loads((out / "summary.json").read_text())
    # the last line printed is the same summary
    assert json.loads(outputs(nb).strip().splitlines()[-1]) == summary
    assert (out / "report" / "index.html").is_file()
    assert (out / "report" / "words.csv").is_file()
    assert "application/vnd.jupyter.widget-view+json" in mime_types(nb)

    # reference: jiwer over the manifest's reference and hypothesis texts
    b = open_bundle(demo_path("full"))
    refs = [e["ref"].lower() for e in b.entries if e.get("hyp") is not None]
    hyps = [b[e["id"]].hyp.lower() for e in b.entries if e.get("hyp") is not None]
    if len(refs) < len(b.entries):  # hypotheses given as token ids only
        refs = [b[u].ref.lower() for u in b.ids]
        hyps = [b[u].hyp.lower() for u in b.ids]
    scored = jiwer.process_words(refs, hyps)
    assert summary["utterances"] == len(b)
    assert summary["wer"] == pytest.approx(scored.wer, abs=1e-12)
    # S/D/I splits may differ between equal-cost Levenshtein alignments (tie-breaking);
    # the error total may not
    errors = scored.substitutions + scored.deletions + scored.insertions
    assert round(summary["wer"] * summary["words"]) == errors
    assert sum(summary["deletions_by_code"].values()) == summary["deletions"]


def test_tour_runs_on_the_demo(kernel_env, tmp_path, monkeypatch):
    jiwer = require("jiwer")
    from peekalign import open_bundle
    from peekalign.data import demo_path

    env, _ = kernel_env
    nb = run_notebook("tour.ipynb", env, tmp_path, monkeypatch)
    text = outputs(nb)
    types = mime_types(nb)
    assert "application/vnd.jupyter.widget-view+json" in types  # the peek widget
    assert "application/vnd.bokehjs_exec.v0+json" in types  # the standalone views
    html = "".join(
        o.get("data", {}).get("text/html", "") for c in nb.cells for o in c.get("outputs", [])
    )
    assert html.count("<audio") == 2 or "this bundle has no audio" in text  # word, heard
    # the word the tour investigates was deleted: reference jiwer's alignment
    m = re.search(r"deleted: '([^']+)' \(reference word (\d+)\) -> ([a-z-]+)", text)
    assert m, text[:2000]
    word, w = m.group(1), int(m.group(2))
    uid = re.search(r"UtteranceAnalysis\('([^']+)'", text).group(1)
    utt = open_bundle(demo_path("full"))[uid]
    ref, hyp = utt.ref.lower(), utt.hyp.lower()
    out = jiwer.process_words(ref, hyp)
    kind = {
        i: chunk.type
        for chunk in out.alignments[0]
        for i in range(chunk.ref_start_idx, chunk.ref_end_idx)
    }
    assert ref.split()[w] == word and out.deletions >= 1
    # equal-cost alignments may swap a deletion with a neighbouring substitution (or
    # with another copy of the same word), never with a plain hit of a unique word
    assert kind[w] == "delete" or kind[w] == "substitute" or ref.split().count(word) > 1


def test_own_model_captures_redecodes_and_finds_a_lost_word(kernel_env, tmp_path, monkeypatch):
    require("torch")
    jiwer = require("jiwer")

    env, _ = kernel_env
    nb = run_notebook("own-model.ipynb", env, tmp_path, monkeypatch)
    text = outputs(nb)
    assert "problems: none" in text
    assert "application/vnd.bokehjs_exec.v0+json" in mime_types(nb)  # the word's view
    m = re.search(r"REF: +(.*)\nHYP at +(\d+): +(.*)\nHYP at +(\d+): +(.*)\nword: (\S+)", text)
    assert m, text[-2000:]
    ref, small, large, word = m.group(1), m.group(3), m.group(5), m.group(6)

    # reference: jiwer's alignment - the word is a hit at the long look-ahead only
    def hit(hyp):
        out = jiwer.process_words(ref, hyp)
        return {
            i
            for c in out.alignments[0]
            if c.type == "equal"
            for i in range(c.ref_start_idx, c.ref_end_idx)
        }

    idx = [i for i, w in enumerate(ref.split()) if w == word]
    assert any(i in hit(large) and i not in hit(small) for i in idx)
