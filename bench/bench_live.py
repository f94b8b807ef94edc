"""Live path: CPU microseconds per reading for the default detector set, beside River's PageHinkley.

Run: ``python -m bench.bench_live [--quick]``.

Three figures from one run, on the same seeded stream (an invented checkweigher,
N(500 g, 1 g) with a 1.5 g step two thirds of the way):

* ``Monitor.feed``: one characteristic, baseline from the first 100 readings, then the
  default detector set calibrated to the default budget (watcher/calibration.py) on
  every reading, findings included (the step makes a finding about every 15 readings
  after it, each with its p-value: the figure is mostly their cost); the same again on
  the stream without the step (the cost of a characteristic in control);
* ``Route.take``: the same readings as CSV lines through the whole live route
  (``LineParser`` -> ``Monitor.feed``), in batches of 500 lines as the daemon takes them;
* River ``drift.PageHinkley().update`` on the same values (the comparison the target
  is stated in: at most 30x its cost, and under 20 us per reading).

CPU time of this process (``time.process_time``) is used, not wall time, so a busy
machine inflates the figures less; the ratio is the robust one.
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np

TARGET_US = 20.0
TARGET_RATIO = 30.0


def _stream(n: int, seed: int = 1, step: bool = True) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = 500 + rng.normal(0, 1, n)
    if step:
        x[2 * n // 3:] += 1.5
    return x


def _cc():
    from watcher.config import BaselineConfig, CharacteristicConfig

    return CharacteristicConfig(name="mass", source="cw", column="mass_g", unit="g",
                                baseline=BaselineConfig(readings=100))


def bench_feed(x: np.ndarray) -> dict:
    from watcher.calibration import Calibrator
    from watcher.monitor import Monitor

    m = Monitor(_cc(), "cw", calibrator=Calibrator())  # calibrated as the daemon runs it (on the baseline, untimed)
    vals = x.tolist()
    for v in vals[:100]:
        m.feed(v)
    rest = vals[100:]
    found = 0
    t0 = time.process_time()
    for v in rest:
        found += len(m.feed(v))
    dt = time.process_time() - t0
    return {"us_per_reading": 1e6 * dt / len(rest), "findings": found, "readings": len(rest),
            "detectors": list(m.spec)}


def bench_route(x: np.ndarray) -> dict:
    from dataclasses import replace

    from watcher.config import SourceConfig, default_config
    from watcher.replay import RawLine
    from watcher.route import Route

    src = SourceConfig(name="cw", path="cw.csv", time_column="time")
    cfg = replace(default_config(), sources=[src], characteristics=[_cc()])
    route = Route(cfg)
    lines = [RawLine("cw.csv", 1, 0, b"time,mass_g")]
    off = 12
    for i, v in enumerate(x.tolist()):
        data = b"%d,%.3f" % (1767337200 + 2 * i, v)
        lines.append(RawLine("cw.csv", i + 2, off, data))
        off += len(data) + 1
    route.take(src, lines[:101])  # header and baseline
    rest = lines[101:]
    found = 0
    t0 = time.process_time()
    for a in range(0, len(rest), 500):
        found += len(route.take(src, rest[a:a + 500]).findings)
    dt = time.process_time() - t0
    return {"us_per_reading": 1e6 * dt / len(rest), "findings": found}


def bench_pagehinkley(x: np.ndarray) -> dict:
    from river import __version__, drift

    ph = drift.PageHinkley()
    vals = x.tolist()
    t0 = time.process_time()
    for v in vals:
        ph.update(v)
    dt = time.process_time() - t0
    return {"us_per_reading": 1e6 * dt / len(vals), "river": __version__}


def run(quick: bool = False) -> dict:
    n = 30_000 if quick else 200_000
    x = _stream(n)
    ph1 = bench_pagehinkley(x)
    feed = bench_feed(x)
    quiet = bench_feed(_stream(n, step=False))
    route = bench_route(x)
    ph2 = bench_pagehinkley(x)
    ph = min(ph1["us_per_reading"], ph2["us_per_reading"])
    return {
        "readings": n,
        "feed_us": feed["us_per_reading"], "feed_in_control_us": quiet["us_per_reading"],
        "in_control_findings": quiet["findings"], "route_us": route["us_per_reading"], "pagehinkley_us": ph,
        "feed_ratio_to_pagehinkley": feed["us_per_reading"] / ph,
        "route_ratio_to_pagehinkley": route["us_per_reading"] / ph,
        "findings": feed["findings"], "detectors": feed["detectors"], "river": ph1["river"],
        "target_us": TARGET_US, "target_ratio": TARGET_RATIO,
        "meets_us": feed["us_per_reading"] < TARGET_US,
        "meets_ratio": feed["us_per_reading"] / ph <= TARGET_RATIO,
    }


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    r = run(args.quick)
    if args.json:
        print(json.dumps(r))
        return r
    print(f"live path, {r['readings']} readings, default set {', '.join(r['detectors'])}")
    print(f"  Monitor.feed        {r['feed_us']:8.2f} us/reading  ({r['feed_ratio_to_pagehinkley']:.1f}x PageHinkley, "
          f"{r['findings']} findings)")
    print(f"  same, in control    {r['feed_in_control_us']:8.2f} us/reading  (no step; {r['in_control_findings']} findings)")
    print(f"  Route.take (parse)  {r['route_us']:8.2f} us/reading  ({r['route_ratio_to_pagehinkley']:.1f}x PageHinkley)")
    print(f"  river PageHinkley   {r['pagehinkley_us']:8.2f} us/reading  (river {r['river']})")
    print(f"  targets: < {TARGET_US:g} us and <= {TARGET_RATIO:g}x PageHinkley (CPU time)")
    return r


if __name__ == "__main__":
    main()
