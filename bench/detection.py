"""Detection benchmark: delay to detect five patterns and false findings per 100 000 readings.

One run, one table, the same seeded streams for every method.

Methods
  * linewatch's default set (rules.calibrate.default_detector_set), calibrated to
    ARL0 = 500 and to ARL0 = 10 000 (known in-control mean and sigma);
  * textbook tabular CUSUM, k = 0.5, h = 5 (ARL0 465);
  * textbook EWMA, lambda = 0.1, L = 2.814, asymptotic limits (ARL0 500, Lucas & Saccucci 1990);
  * River's PageHinkley and ADWIN drift detectors (benchmark only), first with their
    default parameters, then with the threshold (PageHinkley ``threshold``, ADWIN
    ``delta``) tuned by bisection on separate seeded in-control streams to 200 false
    findings per 100 000 readings (ARL0 500, the rate of the other rows at 500).

Streams (standardised readings, N(0,1) in control): ``ONSET`` in-control readings, then
the pattern for ``HORIZON`` readings.  Delay = readings from the onset to the first
signal at or after it (the onset reading counts as 1); streams with no signal by the
horizon are censored (count shown, mean is then a lower bound, marked ">").
  * step1, step2: the mean steps up by 1 or 2 sigma;
  * drift: the mean grows by 0.05 sigma per reading;
  * alternate: two levels 1.5 sigma apart, alternating reading by reading (mixture);
  * grouped: groups of 10 readings share a N(0, 1) offset (grouping).
False findings: every signal of every detector over ``IC_STREAMS`` in-control streams of
``IC_READINGS`` readings (detectors restart after their signals; River detectors reset
themselves after a detection).

Usage: /work/venv/bin/python bench/detection.py [streams_per_pattern]
"""

from __future__ import annotations

import math
import sys
import time
from typing import Callable

import numpy as np

import rules  # noqa: F401  (registers every detector)
from rules.calibrate import calibrate, default_detector_set
from rules.registry import DETECTORS

SEED = 8
ONSET = 200
HORIZON = 2000
IC_STREAMS = 20
IC_READINGS = 50_000
TUNE_READINGS = 400_000
TARGET_PER_100K = 200.0  # ARL0 = 500


def pattern_means(name: str, rng: np.random.Generator, n: int) -> np.ndarray:
    tau = np.arange(1, n + 1, dtype=float)
    if name == "step1":
        return np.ones(n)
    if name == "step2":
        return 2.0 * np.ones(n)
    if name == "drift":
        return 0.05 * tau
    if name == "alternate":
        return np.where(np.arange(n) % 2 == 0, 0.75, -0.75)
    if name == "grouped":
        g = rng.standard_normal(n // 10 + 1)
        return np.repeat(g, 10)[:n]
    raise ValueError(name)


PATTERNS = ("step1", "step2", "drift", "alternate", "grouped")


def make_streams(n_streams: int, seed: int) -> dict[str, np.ndarray]:
    out = {}
    for j, name in enumerate(PATTERNS):
        ss = np.random.SeedSequence([seed, j]).spawn(n_streams)
        X = np.empty((n_streams, ONSET + HORIZON))
        for i, s in enumerate(ss):
            a, b = s.spawn(2)
            X[i] = np.random.default_rng(a).standard_normal(ONSET + HORIZON)
            X[i, ONSET:] += pattern_means(name, np.random.default_rng(b), HORIZON)
        out[name] = X
    return out


def ic_streams(n: int, length: int, seed: int) -> np.ndarray:
    return np.stack([np.random.default_rng(s).standard_normal(length) for s in np.random.SeedSequence([seed, 99]).spawn(n)])


# ----------------------------------------------------------------- methods: signal indices


def set_signals(detector_set) -> Callable[[np.ndarray], list[int]]:
    def run(x: np.ndarray) -> list[int]:
        idx: list[int] = []
        for key, params in detector_set:
            idx.extend(s.index for s in DETECTORS[key].scan(x, **params))
        return sorted(idx)

    return run


def river_signals(make) -> Callable[[np.ndarray], list[int]]:
    def run(x: np.ndarray) -> list[int]:
        d = make()
        out = []
        for i, v in enumerate(x.tolist()):
            d.update(v)
            if d.drift_detected:
                out.append(i)
        return out

    return run


def ic_rate(run, X: np.ndarray) -> tuple[float, float]:
    counts = np.array([len(run(x)) for x in X], float)
    per = counts / X.shape[1] * 1e5
    return float(per.mean()), float(per.std(ddof=1) / math.sqrt(len(per)))


def tune(make_with: Callable[[float], object], lo: float, hi: float, log: bool, increasing: bool) -> float:
    """Bisection on one parameter so the in-control rate is TARGET_PER_100K on tuning streams.

    ``increasing``: the rate grows with the parameter."""
    X = ic_streams(8, TUNE_READINGS // 8, SEED + 1000)
    for _ in range(18):
        mid = math.sqrt(lo * hi) if log else 0.5 * (lo + hi)
        r, _ = ic_rate(river_signals(lambda: make_with(mid)), X)
        if (r > TARGET_PER_100K) == increasing:
            hi = mid
        else:
            lo = mid
    return math.sqrt(lo * hi) if log else 0.5 * (lo + hi)


def delays(run, X: np.ndarray) -> tuple[float, float, int]:
    d = []
    cens = 0
    for x in X:
        after = [i for i in run(x) if i >= ONSET]
        if after:
            d.append(after[0] - ONSET + 1)
        else:
            cens += 1
            d.append(HORIZON + 1)
    d = np.array(d, float)
    return float(d.mean()), float(np.median(d)), cens


def main() -> None:
    from river import __version__ as river_version
    from river import drift

    n_streams = int(sys.argv[1]) if len(sys.argv) > 1 else 300
    t0 = time.time()
    cal500 = calibrate(default_detector_set(), 500.0, seed=SEED)
    cal10k = calibrate(default_detector_set(), 10_000.0, seed=SEED)
    t_cal = time.time() - t0

    t1 = time.time()
    ph_thr = tune(lambda v: drift.PageHinkley(threshold=v), 1.0, 200.0, log=True, increasing=False)
    ad_delta = tune(lambda v: drift.ADWIN(delta=v), 1e-6, 0.999, log=True, increasing=True)
    t_tune = time.time() - t1

    methods = [
        ("linewatch default set, ARL0 500", set_signals(cal500["detector_set"])),
        ("linewatch default set, ARL0 10000", set_signals(cal10k["detector_set"])),
        ("CUSUM k=0.5 h=5 (textbook)", set_signals([("cusum", {"k": 0.5, "h": 5.0})])),
        ("EWMA lam=0.1 L=2.814", set_signals([("ewma", {"lam": 0.1, "L": 2.814, "limits": "asymptotic"})])),
        ("River PageHinkley, defaults", river_signals(drift.PageHinkley)),
        (f"River PageHinkley, threshold={ph_thr:.2f} (ARL0 500)", river_signals(lambda: drift.PageHinkley(threshold=ph_thr))),
        ("River ADWIN, defaults", river_signals(drift.ADWIN)),
        (f"River ADWIN, delta={ad_delta:.3g} (ARL0 500)", river_signals(lambda: drift.ADWIN(delta=ad_delta))),
    ]
    streams = make_streams(n_streams, SEED)
    IC = ic_streams(IC_STREAMS, IC_READINGS, SEED)
    rows = []
    t2 = time.time()
    for name, run in methods:
        cells = []
        for p in PATTERNS:
            mean, med, cens = delays(run, streams[p])
            cells.append((mean, med, cens))
        rate, se = ic_rate(run, IC)
        rows.append((name, cells, rate, se))
    t_run = time.time() - t2

    print(f"# Detection benchmark (seed {SEED}; {n_streams} streams per pattern; onset after {ONSET} readings; "
          f"horizon {HORIZON}; in control {IC_STREAMS} x {IC_READINGS} readings; river {river_version})")
    print()
    head = "| method | " + " | ".join(f"{p} mean / median" for p in PATTERNS) + " | false per 100k (SE) |"
    print(head)
    print("|" + "---|" * (len(PATTERNS) + 2))
    for name, cells, rate, se in rows:
        parts = []
        for mean, med, cens in cells:
            s = f"{'>' if cens else ''}{mean:.1f} / {med:.0f}"
            if cens:
                s += f" ({cens} cens.)"
            parts.append(s)
        print(f"| {name} | " + " | ".join(parts) + f" | {rate:.1f} ({se:.1f}) |")
    print()
    print("Delay: readings from the onset to the first signal at or after it (onset reading = 1). "
          "'cens.' = streams with no signal within the horizon (counted as horizon + 1).")
    print(f"Calibrated thresholds, ARL0 500: {cal500['params']}")
    print(f"Calibrated thresholds, ARL0 10000: {cal10k['params']}")
    lw = rows[0]
    cus = rows[2]
    ph_t, ad_t = rows[5], rows[7]
    print()
    print("Goal checks (at ARL0 about 500):")
    print(f"  step1: default set {lw[1][0][0]:.2f} vs textbook CUSUM {cus[1][0][0]:.2f} -> "
          f"{'met' if lw[1][0][0] <= cus[1][0][0] else 'NOT met'}")
    for k, p in enumerate(PATTERNS):
        ok = lw[1][k][0] < ph_t[1][k][0] and lw[1][k][0] < ad_t[1][k][0]
        print(f"  {p}: default set {lw[1][k][0]:.1f} vs tuned PageHinkley {ph_t[1][k][0]:.1f}, tuned ADWIN {ad_t[1][k][0]:.1f} -> "
              f"{'faster' if ok else 'NOT faster'}")
    print(f"\ntimes: calibration {t_cal:.1f} s, River tuning {t_tune:.1f} s, runs {t_run:.1f} s")


if __name__ == "__main__":
    main()
