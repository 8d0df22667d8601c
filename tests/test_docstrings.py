"""Every example in the package's docstrings runs and prints what it shows.

The examples are the documentation's promises (numpydoc ``Examples`` sections); this
runs them with the standard library's doctest, module by module.
"""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import peekalign

MODULES = sorted(
    m.name
    for m in pkgutil.walk_packages(peekalign.__path__, "peekalign.")
    if not m.name.endswith("__main__")
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # examples that write files write them here
    module = importlib.import_module(name)
    finder = doctest.DocTestFinder()
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    for test in finder.find(module, name):
        runner.run(test)
    failed, attempted = runner.summarize(verbose=False)
    assert failed == 0, f"{failed} of {attempted} examples in {name} failed (output above)"
