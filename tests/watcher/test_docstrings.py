"""The runnable examples in the docstrings of watcher/ run and give what they show."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import watcher

MODULES = sorted(m.name for m in pkgutil.walk_packages(watcher.__path__, "watcher.") if m.name != "watcher.__main__")


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    mod = importlib.import_module(name)
    result = doctest.testmod(mod, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE, verbose=False)
    assert result.failed == 0, f"{result.failed} docstring example(s) of {name} failed"
