"""The speed and memory suite in one command: ``python -m bench [--quick] [--only NAME ...]``.

Runs each benchmark of the suite in turn, prints one table of measured figures
beside their targets and writes every figure to ``bench/results.json`` (or
``--out``).  ``--quick`` uses smaller inputs (minutes instead of tens of
minutes); the targets are stated for the full sizes.  Each benchmark can also
be run alone (``python -m bench.bench_live`` and so on).

The statistics benchmarks (``bench.detection`` for detection delay and false
findings, ``bench.bench_runs``/``bench_shift``/``bench_trend`` for the single
detectors) are separate: they measure power, not speed.
"""

from __future__ import annotations

import argparse
import importlib
import json
import platform
import sys
import time
import traceback
from pathlib import Path
from typing import Any, Callable

SUITE = ("live", "replay", "memory", "plant", "startup")


def _rows_live(r: dict) -> list[tuple[str, str, str]]:
    return [
        ("live: default set, us per reading", f"{r['feed_us']:.1f}", f"< {r['target_us']:g}"),
        ("live: same, characteristic in control", f"{r['feed_in_control_us']:.1f}", f"< {r['target_us']:g}"),
        ("live: PageHinkley (River), us per update", f"{r['pagehinkley_us']:.2f}", ""),
        ("live: ratio to PageHinkley", f"{r['feed_ratio_to_pagehinkley']:.0f}x", f"<= {r['target_ratio']:g}x"),
        ("live: whole route (parse + feed), us per reading", f"{r['route_us']:.1f}", ""),
    ]


def _rows_replay(r: dict) -> list[tuple[str, str, str]]:
    return [
        (f"replay: {r['readings']:,} readings in {r['columns']} columns, readings/s",
         f"{r['replay_readings_per_s']:,.0f}", f">= {r['target_rate']:,.0f}"),
        ("replay: time against pandas.read_csv alone", f"{r['ratio_to_read_csv']:.1f}x", f"<= {r['target_ratio']:g}x"),
    ]


def _rows_memory(r: dict) -> list[tuple[str, str, str]]:
    return [
        (f"memory: peak RSS at {r['small_readings']:,} readings, MB", f"{r['small_mb']:.0f}", ""),
        (f"memory: peak RSS at {r['big_readings']:,} readings, MB", f"{r['big_mb']:.0f}", ""),
        ("memory: ratio", f"{r['ratio']:.2f}", f"<= {r['target_ratio']:g}"),
    ]


def _rows_plant(r: dict) -> list[tuple[str, str, str]]:
    return [
        (f"plant: {r['characteristics']:,} characteristics x {r['rate_per_characteristic']:g}/s, readings/s taken",
         f"{r['readings_per_s']:,.0f}", f"{r['characteristics'] * r['rate_per_characteristic']:,.0f}"),
        ("plant: CPU, % of one core", f"{r['cpu_percent_of_one_core']:.0f}", f"< {r['target_cpu_percent']:g}"),
        ("plant: reading-to-finding latency, median / p99 ms",
         f"{r['latency_median_ms']:.0f} / {r['latency_p99_ms']:.0f}", ""),
    ]


def _rows_startup(r: dict) -> list[tuple[str, str, str]]:
    return [
        ("start-up: linewatch --help, s", f"{r['help_s']:.2f}", f"< {r['help_target_s']:g}"),
        ("start-up: linewatch check config.example.yaml, s", f"{r['check_s']:.2f}", ""),
    ]


ROWS: dict[str, Callable[[dict], list[tuple[str, str, str]]]] = {
    "live": _rows_live, "replay": _rows_replay, "memory": _rows_memory, "plant": _rows_plant, "startup": _rows_startup,
}


def run_suite(names: list[str], quick: bool) -> dict[str, Any]:
    results: dict[str, Any] = {}
    for name in names:
        mod = importlib.import_module(f"bench.bench_{name}")
        print(f"running {name} ...", file=sys.stderr, flush=True)
        t0 = time.perf_counter()
        try:
            results[name] = {**mod.run(quick=quick), "bench_seconds": time.perf_counter() - t0}
        except Exception as e:  # one broken bench must not hide the others' figures
            traceback.print_exc()
            results[name] = {"error": f"{type(e).__name__}: {e}"}
    return results


def format_table(results: dict[str, Any]) -> str:
    rows = [("figure", "measured", "target")]
    for name, r in results.items():
        if "error" in r:
            rows.append((f"{name}: failed", r["error"][:60], ""))
        else:
            rows += ROWS[name](r)
    w0 = max(len(r[0]) for r in rows)
    w1 = max(len(r[1]) for r in rows)
    lines = [f"{a:<{w0}}  {b:>{w1}}  {c}" for a, b, c in rows]
    lines.insert(1, "-" * (w0 + w1 + 12))
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> dict[str, Any]:
    ap = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller inputs")
    ap.add_argument("--only", nargs="+", choices=SUITE, help="run only these")
    ap.add_argument("--out", default=str(Path(__file__).with_name("results.json")), help="where to write the JSON")
    a = ap.parse_args(argv)
    results = run_suite(list(a.only or SUITE), a.quick)
    doc = {"quick": a.quick, "when": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "python": platform.python_version(),
           "machine": platform.machine(), "results": results}
    Path(a.out).write_text(json.dumps(doc, indent=2, default=str) + "\n", encoding="utf-8")
    print(format_table(results))
    print(f"\nfigures written to {a.out}")
    return doc


if __name__ == "__main__":
    main()
