"""Speed of the run-pattern detectors (rules/runs_stream.py), and the accuracy of the
normal approximation that justifies the exact-table limits in rules/runs_null.py.

Run:  python -m bench.bench_runs [--quick]

Prints
1. microseconds per reading for each streaming detector at w = 25, 50, 100, 200
   (target: under 5 us, flat in w);
2. microseconds per window for each batch ``scan`` (target: under 0.5 us), beside
   statsmodels ``runstest_1samp`` called once per window, measured in the same run;
3. relative error of the normal approximation of one-sided tails near 0.001.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from rules import runs_null as rn
from rules.runs_stream import (
    LongestMedianRunDetector,
    LongestMonotoneRunDetector,
    MedianRunsDetector,
    UpDownRunsDetector,
)

DETECTORS = [MedianRunsDetector, UpDownRunsDetector, LongestMedianRunDetector, LongestMonotoneRunDetector]
WINDOWS = (25, 50, 100, 200)


def best_of(fn, repeat: int = 3) -> float:
    """Best of ``repeat`` runs, in CPU seconds of this process (the machine is shared, so
    wall-clock time would mostly measure the neighbours)."""
    best = float("inf")
    for _ in range(repeat):
        t = time.process_time()
        fn()
        best = min(best, time.process_time() - t)
    return best


def stream_us(cls, w: int, xs: list[float]) -> float:
    warm = cls(window=w)
    for v in xs[:2000]:  # fill the window and the shared critical-value caches
        warm.update(v)

    def run():
        det = cls(window=w)
        upd = det.update
        for v in xs:
            upd(v)

    return best_of(run) / len(xs) * 1e6


def scan_us(cls, w: int, x: np.ndarray) -> float:
    cls.scan(x[:5000], window=w)  # warm caches
    return best_of(lambda: cls.scan(x, window=w)) / (x.size - w + 1) * 1e6


def statsmodels_us(w: int, x: np.ndarray, n_windows: int) -> float | None:
    try:
        from statsmodels.sandbox.stats.runs import runstest_1samp
    except ImportError:
        return None

    def run():
        for j in range(n_windows):
            runstest_1samp(x[j : j + w], cutoff="median", correction=False)

    return best_of(run, 2) / n_windows * 1e6


def approximation_errors() -> list[str]:
    out = []
    for n in (25, 50, 100, 200):
        _, cdf, _ = rn.median_runs_table(n, n)
        r = int(np.nonzero(cdf <= 0.001)[0][-1])
        lo, _, _ = rn.median_runs_tails(n, n, r, "asymptotic")
        out.append(f"  runs about the median n1=n2={n:<4d} P(R<={r}) exact {cdf[r]:.3e} normal {lo:.3e} "
                   f"rel.err {lo / cdf[r] - 1:+.1%}")  # fmt: skip
    for n in (25, 50, 100, 200, 300):
        _, _, sf = rn.updown_table(n)
        r = int(np.nonzero(sf <= 0.001)[0][0])
        _, hi, _ = rn.updown_tails(n, r, "asymptotic")
        out.append(f"  runs up and down n={n:<4d}        P(R>={r}) exact {sf[r]:.3e} normal {hi:.3e} "
                   f"rel.err {hi / sf[r] - 1:+.1%}")  # fmt: skip
    t = time.perf_counter()
    rn.median_runs_table.cache_clear()
    rn.median_runs_table(200, 200)
    t1 = time.perf_counter()
    rn.updown_counts.cache_clear()
    rn.updown_table.cache_clear()
    rn.updown_table(300)
    t2 = time.perf_counter()
    out.append(f"  table build: median (200, 200) {1e3 * (t1 - t):.1f} ms; up/down n=300 {1e3 * (t2 - t1):.1f} ms")
    return out


def main(argv: list[str]) -> None:
    quick = "--quick" in argv
    rng = np.random.default_rng(20261202)
    n_stream = 5_000 if quick else 30_000
    n_batch = 20_000 if quick else 200_000
    xs = [float(v) for v in rng.normal(size=n_stream)]
    xb = rng.normal(size=n_batch)
    print("linewatch run-pattern detectors: iid N(0,1) input, alpha = 0.001, best of 3, CPU time")
    print()
    print("streaming, microseconds per reading (target < 5, flat in w)")
    print(f"  {'detector':<22}" + "".join(f"{'w=' + str(w):>10}" for w in WINDOWS))
    for cls in DETECTORS:
        print(f"  {cls.key:<22}" + "".join(f"{stream_us(cls, w, xs):>10.2f}" for w in WINDOWS))
    print()
    print("batch scan, microseconds per window (target < 0.5)")
    print(f"  {'detector':<22}" + "".join(f"{'w=' + str(w):>10}" for w in WINDOWS))
    for cls in DETECTORS:
        print(f"  {cls.key:<22}" + "".join(f"{scan_us(cls, w, xb):>10.3f}" for w in WINDOWS))
    sm = [statsmodels_us(w, xb, 500 if quick else 2000) for w in WINDOWS]
    if sm[0] is None:
        print("  statsmodels not installed: no reference timing")
    else:
        import statsmodels

        label = f"statsmodels {statsmodels.__version__} runstest_1samp (per call)"
        print(f"  {label}")
        print(f"  {'':<22}" + "".join(f"{v:>10.1f}" for v in sm))
    print()
    print("normal approximation vs exact, one-sided tails near 0.001 (continuity-corrected)")
    for line in approximation_errors():
        print(line)


if __name__ == "__main__":
    main(sys.argv[1:])
