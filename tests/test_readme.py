"""The README's Python examples run as written, on a copy of the demo bundle.

The examples name a user's dump ``my_dump/`` and an utterance ``dispatch-0007``; the
test copies the shipped demo bundle to ``my_dump/`` in a temporary folder, renames
one utterance to that id in the manifest and runs every ``python`` block of the README
in order, in one namespace, from that folder.
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
from conftest import require

import peekalign
from peekalign.data import demo_path

README = Path(__file__).resolve().parents[1] / "README.md"


def python_blocks(text: str) -> list[str]:
    return re.findall(r"^```python\n(.*?)^```", text, flags=re.S | re.M)


def demo_as_my_dump(folder: Path, uid: str = "dispatch-0007") -> str:
    """Copy the demo bundle to ``folder/my_dump`` with its first utterance renamed."""
    dst = folder / "my_dump"
    shutil.copytree(demo_path("full"), dst)
    lines = (dst / "utts.jsonl").read_text(encoding="utf-8").splitlines()
    first = json.loads(lines[0])
    old = first["id"]
    first["id"] = uid
    arrays = dst / first["arrays"]
    first["arrays"] = first["arrays"].replace(old, uid)
    arrays.rename(dst / first["arrays"])
    if "audio" in first:
        audio = dst / first["audio"]
        first["audio"] = first["audio"].replace(old, uid)
        audio.rename(dst / first["audio"])
    lines[0] = json.dumps(first)
    (dst / "utts.jsonl").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return old


def test_readme_python_examples_run(tmp_path, monkeypatch, capsys):
    blocks = python_blocks(README.read_text(encoding="utf-8"))
    assert len(blocks) >= 4, "the README lost its examples"
    old = demo_as_my_dump(tmp_path)
    monkeypatch.chdir(tmp_path)
    ns: dict = {}
    for block in blocks:
        if "# needs: torch" in block.splitlines()[0]:
            require("torch")  # the decoder example wraps a torch module
        # two workers are plenty for 24 utterances on a test machine; the cluster
        # example runs on an in-process Dask cluster instead of the scheduler it names
        block = block.replace("workers=4", "workers=2")
        block = block.replace('Client("tcp://scheduler:8786")', "Client(processes=False)")
        exec(compile(block, "README.md", "exec"), ns)
    # what the examples claim, checked against the demo bundle under its own id
    # (reference: the package's own reading of the untouched demo bundle)
    utt = peekalign.open_bundle(demo_path("full"))[old]
    printed = capsys.readouterr().out.splitlines()
    assert len(printed) == len(utt.ref_tokens)
    assert np.array_equal(ns["utt"].log_probs, utt.log_probs)
    assert isinstance(ns["scan"].totals()["wer"], float)
    assert (tmp_path / "words.csv").is_file() and (tmp_path / "dispatch-0007.html").is_file()
    assert "dispatch-0007" in (tmp_path / "dispatch-0007.html").read_text(encoding="utf-8")


def test_dask_is_an_install_extra():
    # reference: the packaging metadata (PEP 621 optional-dependencies, read with
    # tomllib): the README's cluster recipe installs "peekalign[dask]", and the tests
    # scan with the same Dask the extra pins. On main Dask was a test dependency only.
    import tomllib

    meta = tomllib.loads((README.parent / "pyproject.toml").read_text(encoding="utf-8"))
    extras = meta["project"]["optional-dependencies"]
    dask = [r for r in extras["dask"] if r.startswith("dask")]
    assert dask and set(dask) <= set(extras["test"])
    assert 'pip install "peekalign[dask]"' in README.read_text(encoding="utf-8")
