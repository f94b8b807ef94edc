"""The compiled windows (rules/_windows.c), where the install built them, and a marker for
the tests that compare them with the pure-Python reference windows."""

import pytest

try:
    from rules import _windows as compiled
except ImportError:  # pragma: no cover - an install without a C compiler
    compiled = None

needs_compiled = pytest.mark.skipif(compiled is None, reason="compiled windows not built (no C compiler at install)")
