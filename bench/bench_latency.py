"""Latency from a gauge's write() to the line coming out of a GlobSource, and idle CPU.

Run: ``python -m bench.bench_latency`` (about 30 s with the defaults).

* Latency: a writer thread appends ``--appends`` lines (one write() each,
  spaced ``--gap`` seconds apart with jitter) to a file in a temporary
  directory; the consumer runs the daemon's loop (``wait`` ->
  ``read_available``).  Latency = time the line was returned - time just
  before its write().  Median and p99 (nearest-rank) per mode: inotify events,
  and stat polling at ``--poll-interval``.
* Idle CPU: a started source with nothing to read, the consumer blocked in
  ``wait`` for ``--idle`` seconds; CPU time of this process (all threads)
  over wall time.  Targets (events): median < 20 ms, p99 < 100 ms; idle CPU
  near zero.
"""

from __future__ import annotations

import argparse
import os
import random
import resource
import tempfile
import threading
import time

from watcher.sources.glob_source import GlobSource


def _cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def nearest_rank(sorted_values: list[float], q: float) -> float:
    k = max(0, min(len(sorted_values) - 1, int(-(-q * len(sorted_values) // 1)) - 1))
    return sorted_values[k]


def measure_latency(poll: str, appends: int, gap: float, poll_interval: float) -> dict[str, float]:
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "weights.csv")
        open(path, "wb").close()
        sent: dict[int, float] = {}
        lat: list[float] = []
        src = GlobSource("bench", os.path.join(d, "*.csv"), poll=poll, poll_interval=poll_interval)
        src.start()
        src.read_available()  # initial scan

        def writer() -> None:
            rnd = random.Random(1)
            with open(path, "ab", buffering=0) as fh:
                for i in range(appends):
                    line = b"%d,%.3f\n" % (i, 12.0 + rnd.gauss(0, 0.05))
                    sent[i] = time.perf_counter()
                    fh.write(line)
                    time.sleep(gap * (0.5 + rnd.random()))

        t = threading.Thread(target=writer, daemon=True)
        t0 = time.perf_counter()
        t.start()
        deadline = time.monotonic() + appends * gap * 2 + 30
        while len(lat) < appends and time.monotonic() < deadline:
            src.wait(1.0)
            for _f, lines, _ev in src.read_available():
                now = time.perf_counter()
                for ln in lines:
                    i = int(ln.data.split(b",", 1)[0])
                    lat.append(now - sent[i])
        t.join()
        src.stop()
    lat.sort()
    return {"n": len(lat), "median_ms": 1000 * nearest_rank(lat, 0.5),
            "p99_ms": 1000 * nearest_rank(lat, 0.99), "max_ms": 1000 * lat[-1],
            "seconds": time.perf_counter() - t0}


def measure_idle(poll: str, seconds: float, poll_interval: float) -> dict[str, float]:
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "weights.csv")
        with open(path, "wb") as fh:
            fh.write(b"1,12.0\n")
        src = GlobSource("idle", os.path.join(d, "*.csv"), poll=poll, poll_interval=poll_interval)
        src.start()
        src.read_available()
        wakeups = 0
        c0, w0 = _cpu_seconds(), time.monotonic()
        while time.monotonic() - w0 < seconds:
            src.wait(seconds)
            src.read_available()
            wakeups += 1
        c1, w1 = _cpu_seconds(), time.monotonic()
        src.stop()
    return {"cpu_percent": 100 * (c1 - c0) / (w1 - w0), "cpu_ms": 1000 * (c1 - c0),
            "wall_s": w1 - w0, "wakeups": wakeups}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--appends", type=int, default=1000)
    ap.add_argument("--gap", type=float, default=0.005, help="mean seconds between appends")
    ap.add_argument("--poll-interval", type=float, default=0.1)
    ap.add_argument("--idle", type=float, default=10.0, help="seconds of idle waiting to measure")
    args = ap.parse_args(argv)
    print(f"linewatch source latency: {args.appends} appends, mean gap {args.gap * 1000:.1f} ms, "
          f"{os.cpu_count()} CPUs")
    for poll, label in (("never", "inotify events"), ("always", f"polling every {args.poll_interval:g} s")):
        r = measure_latency(poll, args.appends, args.gap, args.poll_interval)
        print(f"  {label:<24} n={r['n']:5d}  median {r['median_ms']:7.2f} ms  p99 {r['p99_ms']:7.2f} ms  "
              f"max {r['max_ms']:7.2f} ms")
    for poll, label in (("never", "inotify events"), ("always", f"polling every {args.poll_interval:g} s")):
        r = measure_idle(poll, args.idle, args.poll_interval)
        print(f"  idle {label:<19} {r['wall_s']:.1f} s: CPU {r['cpu_ms']:.1f} ms = {r['cpu_percent']:.3f} % "
              f"of one core, {r['wakeups']} consumer wake-ups")
    print("  targets (events): median < 20 ms, p99 < 100 ms; idle CPU near zero")


if __name__ == "__main__":
    main()
