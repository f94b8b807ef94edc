"""Test-wide settings."""

import os

# The statistics solve small linear systems (Markov chains of a few hundred states); on a loaded
# 2-core machine a multi-threaded BLAS makes them far slower, not faster.  Set before numpy loads.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
