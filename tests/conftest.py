"""Test-wide settings."""

import os

# The statistics solve small linear systems (Markov chains of a few hundred states); on a loaded
# 2-core machine a multi-threaded BLAS makes them far slower, not faster.  Set before numpy loads.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")


import pytest  # noqa: E402


@pytest.fixture(autouse=True, scope="session")
def _one_blas_thread():
    """The same limit for a BLAS already loaded by the time the variables above are read."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency; speed only
        yield
        return
    with threadpool_limits(1):
        yield
