"""linewatch's benchmarks (``python -m bench``; see DEVELOPERS.md).

The watcher's command line runs with one BLAS thread (watcher/cli.py: the chains are
small matrices, where a second thread only adds synchronisation); the benches run the
same code in-process, so they set the same before numpy is first imported.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
