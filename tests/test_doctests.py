"""The examples in the library's docstrings run and print what they say (doctest)."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import vidodo

MODULES = sorted(m.name for m in pkgutil.walk_packages(vidodo.__path__, "vidodo."))


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    """Every ``>>>`` example of the module gives the output written below it."""
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE, verbose=False)
    assert result.failed == 0, f"{name}: {result.failed} of {result.attempted} examples failed"


def test_the_examples_are_found():
    """The runner sees the examples at all (there are some in se2, outputs, metrics)."""
    finder = doctest.DocTestFinder()
    found = sum(len(t.examples) for name in ("vidodo.se2", "vidodo.outputs", "vidodo.metrics")
                for t in finder.find(importlib.import_module(name)))
    assert found >= 4
