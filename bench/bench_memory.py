"""Peak memory of ``linewatch replay`` (fast engine): 1 million against 10 million readings.

Run: ``python -m bench.bench_memory [--quick]``.

Each replay runs in its own subprocess (``python -m bench.bench_memory --child FILE``),
which prints its peak resident set after the replay: ``VmHWM`` from ``/proc/self/status``
(kB), which belongs to the process's own memory image.  Not ``ru_maxrss``: on Linux that
survives ``exec`` and so starts at the parent's size when the parent is large (as in
``python -m bench``, after the replay bench).  The
files are those of bench_replay (20 columns, generated into /tmp/linewatch-bench/).
Also printed: the peak of a subprocess that only imports what replay imports (the floor).
Target: peak at 10M within 10 % of the peak at 1M (flat memory).  ``--quick`` compares
100,000 with 1,000,000 readings.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

TARGET_RATIO = 1.10


def _child(path: str) -> None:
    w0 = time.perf_counter()
    if path == "-":
        import pandas  # noqa: F401  (what a replay imports, nothing read)

        from watcher import replay_fast  # noqa: F401
        from watcher.replay import config_for_file  # noqa: F401
        readings = 0
    else:
        from watcher.replay import config_for_file, replay_file

        p = Path(path)
        cfg, src = config_for_file(p, None)
        # findings handed over as they become final, as `linewatch replay --json` does
        readings = replay_file(p, cfg, src, warn=None, on_finding=lambda f: None).batch.readings
    rss = _peak_kb()
    print(json.dumps({"maxrss_kb": rss, "readings": readings, "wall_s": time.perf_counter() - w0}))


def _peak_kb() -> int:
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # not Linux: the best there is


def measure(path: str) -> dict:
    out = subprocess.run([sys.executable, "-m", "bench.bench_memory", "--child", path], capture_output=True,
                         text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def run(quick: bool = False, columns: int = 20) -> dict:
    from bench.bench_replay import make_csv

    small, big = (100_000, 1_000_000) if quick else (1_000_000, 10_000_000)
    floor = measure("-")
    a = measure(str(make_csv(small, columns)))
    b = measure(str(make_csv(big, columns)))
    ratio = b["maxrss_kb"] / a["maxrss_kb"]
    return {"floor_mb": floor["maxrss_kb"] / 1024, "small_readings": a["readings"], "small_mb": a["maxrss_kb"] / 1024,
            "big_readings": b["readings"], "big_mb": b["maxrss_kb"] / 1024, "ratio": ratio,
            "target_ratio": TARGET_RATIO, "meets": ratio <= TARGET_RATIO}


def main(argv: list[str] | None = None) -> dict | None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    if args.child:
        _child(args.child)
        return None
    r = run(args.quick)
    if args.json:
        print(json.dumps(r))
        return r
    print("peak RSS of a replay (fast engine), each in its own process")
    print(f"  imports only          {r['floor_mb']:7.1f} MB")
    print(f"  {r['small_readings']:>10,} readings  {r['small_mb']:7.1f} MB")
    print(f"  {r['big_readings']:>10,} readings  {r['big_mb']:7.1f} MB   ratio {r['ratio']:.3f} "
          f"(target <= {TARGET_RATIO:.2f})")
    return r


if __name__ == "__main__":
    main()
