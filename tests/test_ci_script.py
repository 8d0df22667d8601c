"""``.ci/run``: the test step runs with ``CI`` set whatever the calling environment."""

from __future__ import annotations

import os
import subprocess
from pathlib import Path

SCRIPT = Path(__file__).resolve().parents[1] / ".ci" / "run"


def test_ci_script_sets_ci_for_pytest(tmp_path):
    # reference: bash itself - the script's pytest step is run with its own commands
    # before it, the test command swapped for one that prints the environment it gets;
    # under CI a missing reference fails (tests/conftest.py require), so the script must
    # not depend on the machine setting CI. On main it did.
    text = SCRIPT.read_text()
    step = text[text.index('echo "== pytest"') :]
    assert ".venv/bin/python -m pytest" in step
    probe = step.replace(".venv/bin/python -m pytest -q", 'echo "CI=${CI:-unset}"')
    env = {k: v for k, v in os.environ.items() if k != "CI"}
    out = subprocess.run(
        ["bash", "-c", "set -euo pipefail\n" + probe],
        cwd=tmp_path,
        env=env,
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    assert out.splitlines()[-1] == "CI=true"
