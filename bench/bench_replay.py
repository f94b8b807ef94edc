"""Replay speed: readings per second of ``linewatch replay`` (the fast engine) on a large CSV,
beside the time ``pandas.read_csv`` alone takes to read the same file.

Run: ``python -m bench.bench_replay [--quick] [--readings 10000000] [--columns 20]``.

The file is generated once into ``/tmp/linewatch-bench/`` (never into the repository):
an invented filling line with ``--columns`` fill-head weights per line and an epoch time,
``--readings`` readings in all (``readings / columns`` lines), N(500 g, 1 g) to 0.001 g,
with a 1 g step in a quarter of the heads after 60 % of the lines.  Figures:

* ``replay``: wall and CPU seconds of ``replay_file`` (engine "fast": bulk parse,
  baseline, every default detector's vectorised scan, findings with p-values);
* ``read_csv``: ``pandas.read_csv`` of the same file (C engine, default settings);
* readings per second of the replay, and the ratio replay / read_csv.

Optionally (``--live N``) the live engine on the first N lines, for the speed-up.
Targets: at least 1,000,000 readings/s; at most 5x ``read_csv`` alone.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from pathlib import Path

import numpy as np

BENCH_DIR = Path("/tmp/linewatch-bench")
TARGET_RATE = 1_000_000
TARGET_RATIO = 5.0


def make_csv(readings: int, columns: int, seed: int = 9) -> Path:
    """The generated file (reused when it exists)."""
    BENCH_DIR.mkdir(parents=True, exist_ok=True)
    rows = readings // columns
    p = BENCH_DIR / f"fill-{rows}x{columns}.csv"
    if p.exists():
        return p
    rng = np.random.default_rng(seed)
    tmp = p.with_suffix(".part")
    with open(tmp, "w") as fh:
        fh.write(",".join(["time"] + [f"head{j:02d}" for j in range(columns)]) + "\n")
        step = 50_000
        for a in range(0, rows, step):
            m = min(step, rows - a)
            x = 500 + rng.normal(0, 1, (m, columns))
            late = (np.arange(a, a + m) >= 0.6 * rows)[:, None]
            x[:, : max(1, columns // 4)] += np.where(late, 1.0, 0.0)
            t = 1767337200 + np.arange(a, a + m)
            body = np.column_stack([t.astype(str), np.char.mod("%.3f", x)])
            fh.write("\n".join(",".join(r) for r in body.tolist()) + "\n")
    os.replace(tmp, p)
    return p


def _config(p: Path):
    from watcher.replay import config_for_file

    return config_for_file(p, None)


def time_replay(p: Path, engine: str = "fast", max_lines: int | None = None) -> dict:
    from watcher.replay import replay_file

    src_path = p
    if max_lines is not None:
        src_path = BENCH_DIR / f"head-{max_lines}-{p.name}"
        if not src_path.exists():
            with open(p, "rb") as fi, open(src_path, "wb") as fo:
                for i, line in enumerate(fi):
                    if i > max_lines:
                        break
                    fo.write(line)
    cfg, src = _config(src_path)
    w0, c0 = time.perf_counter(), time.process_time()
    r = replay_file(src_path, cfg, src, warn=None, engine=engine)
    w1, c1 = time.perf_counter(), time.process_time()
    return {"wall_s": w1 - w0, "cpu_s": c1 - c0, "readings": r.batch.readings, "findings": len(r.findings),
            "lines": r.lines, "readings_per_s": r.batch.readings / (w1 - w0)}


def time_read_csv(p: Path) -> dict:
    import pandas as pd

    w0, c0 = time.perf_counter(), time.process_time()
    df = pd.read_csv(p)
    w1, c1 = time.perf_counter(), time.process_time()
    return {"wall_s": w1 - w0, "cpu_s": c1 - c0, "shape": list(df.shape), "pandas": pd.__version__}


def run(quick: bool = False, readings: int | None = None, columns: int = 20, live: int | None = None) -> dict:
    readings = readings or (1_000_000 if quick else 10_000_000)
    p = make_csv(readings, columns)
    rc = [time_read_csv(p) for _ in range(1 if quick else 3)]
    rc_wall = float(np.median([r["wall_s"] for r in rc]))
    fast = time_replay(p)
    out = {
        "file": str(p), "bytes": p.stat().st_size, "readings": fast["readings"], "columns": columns,
        "replay_wall_s": fast["wall_s"], "replay_cpu_s": fast["cpu_s"], "findings": fast["findings"],
        "replay_readings_per_s": fast["readings_per_s"],
        "read_csv_wall_s": rc_wall, "ratio_to_read_csv": fast["wall_s"] / rc_wall,
        "target_rate": TARGET_RATE, "target_ratio": TARGET_RATIO,
        "meets_rate": fast["readings_per_s"] >= TARGET_RATE,
        "meets_ratio": fast["wall_s"] / rc_wall <= TARGET_RATIO,
    }
    if live:
        lv = time_replay(p, "live", max_lines=live)
        fs = time_replay(p, "fast", max_lines=live)
        out["live_readings_per_s"] = lv["readings_per_s"]
        out["fast_same_file_readings_per_s"] = fs["readings_per_s"]
    return out


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--readings", type=int)
    ap.add_argument("--columns", type=int, default=20)
    ap.add_argument("--live", type=int, help="also time the live engine on this many lines")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    r = run(args.quick, args.readings, args.columns, args.live)
    if args.json:
        print(json.dumps(r))
        return r
    print(f"replay of {r['file']} ({r['bytes'] / 1e6:.0f} MB, {r['readings']} readings in {r['columns']} columns)")
    print(f"  replay (fast)   {r['replay_wall_s']:7.2f} s wall, {r['replay_cpu_s']:7.2f} s CPU: "
          f"{r['replay_readings_per_s']:,.0f} readings/s, {r['findings']} findings")
    print(f"  pandas.read_csv {r['read_csv_wall_s']:7.2f} s wall;  replay / read_csv = {r['ratio_to_read_csv']:.1f}x")
    if "live_readings_per_s" in r:
        print(f"  live engine on the first {args.live} lines: {r['live_readings_per_s']:,.0f} readings/s "
              f"(fast on the same: {r['fast_same_file_readings_per_s']:,.0f})")
    print(f"  targets: >= {TARGET_RATE:,} readings/s, <= {TARGET_RATIO:g}x read_csv")
    return r


if __name__ == "__main__":
    main()
