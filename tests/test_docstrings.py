"""Every example in the package's docstrings runs and prints what it shows.

The examples are the documentation's promises (numpydoc ``Examples`` sections); this
runs them with the standard library's doctest, module by module. Examples on the main
entry points open bundles by the names a user would type ("bundle", "full",
"streaming"): each runs in a temporary folder holding copies of the demo bundles under
those names, so none has to be skipped and none touches the shipped data.
"""

from __future__ import annotations

import doctest
import importlib
import pkgutil
import shutil

import pytest

import peekalign
from peekalign.data import demo_path

MODULES = sorted(
    m.name
    for m in pkgutil.walk_packages(peekalign.__path__, "peekalign.")
    if not m.name.endswith("__main__")
)


# the main entry points (peek, views, report, scan/compare); peekalign.demo_model's
# examples need torch and the demo weights (an optional extra) and may skip
ENTRY_POINTS = [m for m in MODULES if not m.startswith("peekalign.demo_model")]
BUNDLE_NAMES = {"bundle": "full", "full": "full", "streaming": "streaming"}


def _uses_demo_bundles(tests) -> bool:
    text = "".join(ex.source for t in tests for ex in t.examples)
    return any(f'"{n}"' in text for n in BUNDLE_NAMES)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # examples that write files write them here
    module = importlib.import_module(name)
    finder = doctest.DocTestFinder()
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    tests = finder.find(module, name)
    if _uses_demo_bundles(tests):
        for target, source in BUNDLE_NAMES.items():
            shutil.copytree(demo_path(source), tmp_path / target)
    for test in tests:
        runner.run(test)
    failed, attempted = runner.summarize(verbose=False)
    assert failed == 0, f"{failed} of {attempted} examples in {name} failed (output above)"


def test_no_example_is_skipped():
    # every example runs (on copies of the demo bundles where it needs a bundle): a
    # skipped example is a promise nobody checks. On main the entry points' examples
    # (peek, views, report, compare) were marked +SKIP.
    skipped = []
    for name in ENTRY_POINTS:
        for test in doctest.DocTestFinder().find(importlib.import_module(name), name):
            for ex in test.examples:
                if ex.options.get(doctest.SKIP):
                    skipped.append(f"{test.name}: {ex.source.strip()}")
    assert skipped == []
