"""The runnable examples in the docstrings of rules/ run and give what they show."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import rules

MODULES = sorted(m.name for m in pkgutil.iter_modules(rules.__path__, "rules."))


def test_there_are_modules():
    assert "rules.detector" in MODULES and len(MODULES) > 5


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    mod = importlib.import_module(name)
    result = doctest.testmod(mod, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE, verbose=False)
    assert result.failed == 0, f"{result.failed} docstring example(s) of {name} failed"
