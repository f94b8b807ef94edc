"""Generate rules/window_rates.py: in-control false-signal counts of the windowed tests
against alpha, from seeded simulation (the table calibration interpolates in).

Each windowed detector (runs about the median, runs up and down, longest run about
the median, longest monotone run, Mann-Kendall) is run, through the exact window
p-values of :func:`rules.runlength.window_pvalues` plus the restart rule, on
``STREAMS`` independent N(0,1) streams totalling ``READINGS`` readings (seed
``SEED``).  For every attainable alpha up to ``ALPHA_MAX`` (thinned to at most
``MAX_POINTS`` per test, log-spaced) the number of signals is stored.

Usage:  /work/venv/bin/python bench/make_window_rates.py [readings] [windows...]
Prints the time taken; writes rules/window_rates.py.
"""

from __future__ import annotations

import pathlib
import sys
import time

import numpy as np

import rules.runs_stream  # noqa: F401  (registers the detectors)
import rules.trend  # noqa: F401
from rules.runlength import WINDOW_KEYS, WindowNull

SEED = 20261202
STREAMS = 40
ALPHA_MAX = 0.02
MAX_POINTS = 80


def table_for(key: str, window: int, readings: int) -> dict:
    null = WindowNull(key, {"window": window}, readings, STREAMS, SEED)
    cand = null.candidates(ALPHA_MAX)
    if cand.size > MAX_POINTS:
        grid = np.geomspace(cand[0], cand[-1], MAX_POINTS)
        cand = np.unique(cand[np.clip(np.searchsorted(cand, grid), 0, cand.size - 1)])
    counts = [null.count(float(a)) for a in cand]
    return {"readings": null.n_readings, "alpha": [float(a) for a in cand], "signals": counts}


def main() -> None:
    readings = int(sys.argv[1]) if len(sys.argv) > 1 else 16_000_000
    windows = [int(v) for v in sys.argv[2:]] or [30, 50, 100]
    out = {}
    t0 = time.time()
    for w in windows:
        for key in WINDOW_KEYS:
            t = time.time()
            out[f"{key}/{w}"] = table_for(key, w, readings)
            print(f"{key:22s} window {w:4d}: {len(out[f'{key}/{w}']['alpha'])} alphas, {time.time() - t:.1f} s", flush=True)
    path = pathlib.Path(__file__).resolve().parents[1] / "rules" / "window_rates.py"
    lines = [
        '"""In-control false-signal counts of the windowed tests against alpha (generated; do not edit).',
        "",
        "Made by bench/make_window_rates.py: seeded simulation of N(0,1) streams, "
        f"seed {SEED}, {STREAMS} streams per test, default ``side``/``direction`` (both tails).",
        "``TABLE[f'{key}/{window}']`` holds ``readings`` (total simulated), ``alpha`` (attainable levels,",
        "ascending) and ``signals`` (false signals at each level, restarts included).  Rate = signals / readings;",
        "its Poisson standard error is sqrt(signals) / readings.  Computed, not a published table.",
        '"""',
        "",
        f"SEED = {SEED}",
        f"STREAMS = {STREAMS}",
        "TABLE = {",
    ]
    for k, v in out.items():
        lines.append(f"    {k!r}: {{")
        lines.append(f"        'readings': {v['readings']},")
        lines.append(f"        'alpha': {v['alpha']!r},")
        lines.append(f"        'signals': {v['signals']!r},")
        lines.append("    },")
    lines.append("}  # fmt: skip")
    path.write_text("\n".join(lines) + "\n")
    print(f"wrote {path} in {time.time() - t0:.0f} s")


if __name__ == "__main__":
    main()
