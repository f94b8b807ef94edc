"""A whole plant on one core: the daemon watching 1,000 characteristics at 10 readings/s each.

Run: ``python -m bench.bench_plant [--quick] [--seconds 60]``.

A real configuration (generated into a temporary folder): 50 CSV sources, one file each,
20 value columns per file, 1,000 characteristics with the default detector set.  A
separate writer process appends one line to every file every 0.1 s (10 readings/s per
characteristic, 10,000 readings/s in all), one ``write()`` per line, the line's time
column holding the epoch time just before that ``write()``.

The daemon (``watcher.daemon.Daemon``, inotify events) runs in a thread of this process.
The thresholds are calibrated into the state folder's cache first (untimed, as
``linewatch check`` does once on a site).  After a warm-up (baselines learnt, the
daemon caught up), over ``--seconds`` of wall time:

* CPU share = CPU time of this process (every thread; the writer is another process)
  / wall time, in % of one core (target < 25 %);
* reading-to-detector latency: a hook (``Daemon.hooks``, ``on_batch``) sees each batch
  after the route has taken it, inside the commit; for the first column of every file
  it records hook time - the time written in the line.  Median and p99 (nearest rank).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime
from pathlib import Path

TARGET_CPU = 25.0

WRITER = r'''
import os, sys, time, random
folder, files, columns, rate, seconds = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4]), float(sys.argv[5])
rnd = random.Random(5)
fds = [os.open(os.path.join(folder, f"line{f:02d}.csv"), os.O_WRONLY | os.O_APPEND) for f in range(files)]
gap = 1.0 / rate
t_end = time.time() + seconds
nxt = time.monotonic()
n = 0
while time.time() < t_end:
    for fd in fds:
        vals = ",".join("%.3f" % (500 + rnd.gauss(0, 1)) for _ in range(columns))
        os.write(fd, ("%.6f,%s\n" % (time.time(), vals)).encode())
        n += 1
    nxt += gap
    d = nxt - time.monotonic()
    if d > 0:
        time.sleep(d)
print(n)
'''


def cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def nearest_rank(sorted_values: list[float], q: float) -> float:
    if not sorted_values:
        return float("nan")
    k = max(0, min(len(sorted_values) - 1, int(-(-q * len(sorted_values) // 1)) - 1))
    return sorted_values[k]


def write_config(folder: Path, files: int, columns: int, poll: str = "never", poll_interval: float = 0.5,
                 baseline: int = 100) -> Path:
    data = folder / "data"
    data.mkdir(parents=True, exist_ok=True)
    header = "time," + ",".join(f"c{j:02d}" for j in range(columns)) + "\n"
    lines = [f"state: {folder / 'state'}", "sources:"]
    for f in range(files):
        (data / f"line{f:02d}.csv").write_text(header)
        lines += [f"  - name: line{f:02d}", f"    path: {data / f'line{f:02d}.csv'}", "    time_column: time",
                  f"    poll: {poll}", f"    poll_interval: {poll_interval}"]
    lines.append("characteristics:")
    for f in range(files):
        for j in range(columns):
            lines += [f"  - name: line{f:02d}_c{j:02d}", f"    source: line{f:02d}", f"    column: c{j:02d}",
                      f"    baseline: {{readings: {baseline}}}"]
    p = folder / "plant.yaml"
    p.write_text("\n".join(lines) + "\n")
    return p


class LatencyHook:
    """Daemon hook: hook time - line time for the readings of the chosen characteristics."""

    def __init__(self, names: set[str] | None):
        self.names = names
        self.lat: list[float] = []
        self.recording = False
        self.readings = 0

    def on_batch(self, conn, batch) -> None:
        now = time.time()
        self.readings += batch.readings
        if not self.recording:
            return
        for name, vals in batch.values.items():
            if self.names is not None and name not in self.names:
                continue
            for _v, t in vals:
                if t is not None:
                    self.lat.append(now - datetime.fromisoformat(t).timestamp())


class RunningDaemon:
    def __init__(self, cfg_path: Path, hook: LatencyHook):
        import logging

        from watcher.config import load_config
        from watcher.daemon import Daemon

        logging.getLogger("linewatch").setLevel(logging.WARNING)
        self.daemon = Daemon(load_config(cfg_path))
        self.daemon.hooks.append(hook)
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self.daemon.run, args=(self.stop, False), daemon=True)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        self.thread.join(600)  # the final pass must commit before the temporary folder goes


def _calibrate_first(cfg_path: Path) -> None:
    """Calibrate the default set into the state folder's cache before the clock starts, as a
    site does once (``linewatch check``); otherwise the daemon's start-up calibration (tens of
    seconds, once per configuration) would be measured as if it were the steady state."""
    from watcher.calibration import Calibrator
    from watcher.config import load_config

    cfg = load_config(cfg_path)
    Calibrator.for_config(cfg).prepare(cfg.characteristics)


def run(quick: bool = False, seconds: float | None = None, files: int = 50, columns: int = 20,
        rate: float = 10.0) -> dict:
    seconds = seconds or (15.0 if quick else 60.0)
    # baselines (100 readings), then time for the few characteristics whose baseline is not
    # normal to get their own (distribution-free) set calibrated, and for the daemon to catch up
    warm = 100 / rate + 20
    with tempfile.TemporaryDirectory(prefix="linewatch-plant-") as d:
        folder = Path(d)
        cfgp = write_config(folder, files, columns)
        _calibrate_first(cfgp)
        hook = LatencyHook({f"line{f:02d}_c00" for f in range(files)})
        writer = subprocess.Popen([sys.executable, "-c", WRITER, str(folder / "data"), str(files), str(columns),
                                   str(rate), str(warm + seconds + 2)], stdout=subprocess.PIPE, text=True)
        with RunningDaemon(cfgp, hook):
            time.sleep(warm)
            r0, c0, w0 = hook.readings, cpu_seconds(), time.monotonic()
            hook.recording = True
            time.sleep(seconds)
            hook.recording = False
            r1, c1, w1 = hook.readings, cpu_seconds(), time.monotonic()
        writer.wait(30)
    lat = sorted(hook.lat)
    cpu = 100 * (c1 - c0) / (w1 - w0)
    return {"characteristics": files * columns, "files": files, "rate_per_characteristic": rate,
            "seconds": w1 - w0, "readings": r1 - r0, "readings_per_s": (r1 - r0) / (w1 - w0),
            "cpu_percent_of_one_core": cpu, "cpu_us_per_reading": 1e6 * (c1 - c0) / max(1, r1 - r0),
            "latency_median_ms": 1000 * nearest_rank(lat, 0.5), "latency_p99_ms": 1000 * nearest_rank(lat, 0.99),
            "latency_n": len(lat), "target_cpu_percent": TARGET_CPU, "meets": cpu < TARGET_CPU}


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--seconds", type=float)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    r = run(args.quick, args.seconds)
    if args.json:
        print(json.dumps(r))
        return r
    print(f"daemon with {r['characteristics']} characteristics in {r['files']} files, "
          f"{r['rate_per_characteristic']:g} readings/s each, over {r['seconds']:.0f} s")
    print(f"  took {r['readings_per_s']:,.0f} readings/s; CPU {r['cpu_percent_of_one_core']:.1f} % of one core "
          f"({r['cpu_us_per_reading']:.1f} us/reading); target < {TARGET_CPU:g} %")
    print(f"  write -> detectors latency: median {r['latency_median_ms']:.1f} ms, p99 {r['latency_p99_ms']:.1f} ms "
          f"(n={r['latency_n']})")
    return r


if __name__ == "__main__":
    main()
