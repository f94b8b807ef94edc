"""Speed of the rolling Mann-Kendall drift detector (target: < 5 us per reading in ``update``).

Run: ``python -m bench.bench_trend``.  Prints, for windows 25, 50, 100 and 200, the time per
reading of ``MannKendallDetector.update`` fed one value at a time, and of the vectorised
``scan`` over the same stream (also per window position), plus a sanity check that both
give the same signals.  The stream is in control (N(0,1)) with a small alpha so that the
window is rarely cleared: the steady state is what is timed.
"""

from __future__ import annotations

import time

import numpy as np

from rules.changepoint import PettittDetector
from rules.trend import MannKendallDetector

N = 200_000
WINDOWS = (25, 50, 100, 200)
TARGET_US = 5.0


def _best_of(fn, repeats: int = 3) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    x = np.random.default_rng(2026).normal(size=N)
    values = x.tolist()
    print(f"Mann-Kendall drift detector, {N} in-control readings, best of 3")
    print(f"{'window':>7} {'update us/reading':>18} {'scan us/reading':>16} {'scan us/window':>15} {'signals':>8}  target")
    for w in WINDOWS:
        sigs_stream: list = []

        def stream() -> None:
            det = MannKendallDetector(window=w, alpha=1e-4)
            upd = det.update
            sigs_stream.clear()
            for v in values:
                s = upd(v)
                if s is not None:
                    sigs_stream.append(s)

        t_upd = _best_of(stream)
        sigs_scan: list = []

        def batch() -> None:
            sigs_scan[:] = MannKendallDetector.scan(x, window=w, alpha=1e-4)

        t_scan = _best_of(batch)
        same = sigs_scan == sigs_stream
        us_upd = t_upd / N * 1e6
        us_scan = t_scan / N * 1e6
        us_win = t_scan / (N - w + 1) * 1e6
        ok = "met" if us_upd < TARGET_US else "MISSED"
        print(f"{w:>7} {us_upd:>18.2f} {us_scan:>16.2f} {us_win:>15.2f} {len(sigs_stream):>8}  {ok}{'' if same else '  (scan != stream!)'}")

    # The Pettitt shift detector (no target set; O(w) numpy per reading).
    n_p = 20_000
    xp = x[:n_p]
    print(f"\nPettitt shift detector, {n_p} readings, best of 3")
    print(f"{'window':>7} {'update us/reading':>18} {'scan us/reading':>16}")
    for w in (50, 100, 200):  # a 25-reading window cannot reach p = 1e-4 with Pettitt's approximation

        def p_stream() -> None:
            det = PettittDetector(window=w, alpha=1e-4)
            for v in xp.tolist():
                det.update(v)

        t_upd = _best_of(p_stream)
        t_scan = _best_of(lambda: PettittDetector.scan(xp, window=w, alpha=1e-4))
        print(f"{w:>7} {t_upd / n_p * 1e6:>18.2f} {t_scan / n_p * 1e6:>16.2f}")


if __name__ == "__main__":
    main()
