"""Start-up: wall time of ``linewatch --help`` and ``linewatch check config.example.yaml``.

Run: ``python -m bench.bench_startup [--quick]``.

Each command runs as its own process, as a user starts it (the median of several
runs is reported).  ``--help`` measures the import cost of the command-line entry
point (heavy modules are imported lazily, per command); ``check`` loads and
validates the example configuration and prints its calibration.  The first
``check`` run fills the calibration cache in a temporary state folder; the
figures are of the runs after it, which is what a user sees on every start but
the first (the first is reported separately).
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
TARGET_HELP_S = 0.3


def _wall(cmd: list[str], cwd: Path | None = None) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, cwd=cwd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def _example_copy(folder: Path) -> Path:
    """config.example.yaml with its state folder moved into ``folder`` (the bench leaves no state behind)."""
    text = (ROOT / "config.example.yaml").read_text(encoding="utf-8")
    text = text.replace("state: ./linewatch-state", f"state: {folder / 'state'}")
    p = folder / "config.example.yaml"
    p.write_text(text, encoding="utf-8")
    return p


def run(quick: bool = False) -> dict:
    repeat = 3 if quick else 7
    entry = [sys.executable, "-m", "watcher.cli"]
    helps = [_wall(entry + ["--help"], ROOT) for _ in range(repeat)]
    folder = Path(tempfile.mkdtemp(prefix="lw-startup-"))
    try:
        cfg = _example_copy(folder)
        first = _wall(entry + ["check", str(cfg)], ROOT)
        checks = [_wall(entry + ["check", str(cfg)], ROOT) for _ in range(repeat)]
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    help_s = statistics.median(helps)
    return {
        "help_s": help_s,
        "help_target_s": TARGET_HELP_S,
        "help_met": help_s < TARGET_HELP_S,
        "check_s": statistics.median(checks),
        "check_first_s": first,
        "runs": repeat,
    }


def main(argv: list[str] | None = None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    r = run(a.quick)
    if a.json:
        print(json.dumps(r, indent=2))
    else:
        print(f"linewatch --help: {r['help_s']:.3f} s (target < {TARGET_HELP_S} s)")
        print(f"linewatch check config.example.yaml: {r['check_s']:.3f} s "
              f"(first run, calibrating: {r['check_first_s']:.2f} s)")
    return r


if __name__ == "__main__":
    main()
