"""The compiled windows (rules/_windows.c), where the install built them, and a marker for
the tests that compare them with the pure-Python reference windows."""

from contextlib import contextmanager

import pytest

try:
    from rules import _windows as compiled
except ImportError:  # pragma: no cover - an install without a C compiler
    compiled = None

needs_compiled = pytest.mark.skipif(compiled is None, reason="compiled windows not built (no C compiler at install)")


@contextmanager
def python_only(module, name: str, on: bool = True):
    """Within the block, ``module`` sees no compiled window under ``name`` (when ``on``):
    its detectors and scans take the pure-Python / numpy path."""
    saved = getattr(module, name)
    if on:
        setattr(module, name, None)
    try:
        yield
    finally:
        setattr(module, name, saved)
