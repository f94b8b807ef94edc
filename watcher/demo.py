"""``linewatch demo``: the whole watch on an invented line, in about 20 seconds.

What runs is the real thing: :mod:`watcher.line_sim` appends gauge files in
a temporary folder in accelerated time, :class:`watcher.daemon.Daemon`
follows them with a generated configuration (real files, the real watcher,
real SQLite state, the console alert target; the default detector set,
calibrated by the watcher for 1 false finding per 10,000 readings), and at the end the digest is written from that state.  The summary then says which of the injected
causes were caught, after how many readings and with what p-value, and
lists any finding in the stretch where the line was in control.

Seeded: the same seed gives the same line, the same findings and the same
summary at any ``--speed`` (the detectors see the same readings in the same
order; only the batches differ).
"""

from __future__ import annotations

import shutil
import sys
import tempfile
import threading
import time as _time
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

DEFAULT_SEED = 20261202
BASE_WALL_SECONDS = 20.0  # a full shift at --speed 1
DRAIN_TIMEOUT = 30.0  # after the last line is written, wait at most this long for the watcher to read it

CONFIG = """\
# linewatch demo configuration (generated).  Paths are relative to this file's folder.
state: ./state
timezone: UTC
false_alarms: 1 per 10000 readings

sources:
  - name: checkweigher
    path: data/checkweigher-*.csv
    format: csv
    time_column: time
    poll: auto
    poll_interval: 0.1
  - name: lathe
    path: data/lathe-pins.jsonl
    format: jsonl
    time_column: t
    poll: auto
    poll_interval: 0.1

characteristics:
  - name: pack_mass
    source: checkweigher
    column: mass_g
    unit: g
    target: 502.0
    lsl: 495.0
    usl: 510.0
    window: 50
    baseline: {readings: 150}
    readings_per_hour: 360
  - name: pin_diameter
    source: lathe
    column: diameter_mm
    unit: mm
    target: 8.000
    lsl: 7.985
    usl: 8.015
    window: 30
    baseline: {readings: 100}
    readings_per_hour: 120

alerts:
  - url: console://
    name: terminal

digest:
  at: "06:30"
  folder: ./digests
"""


def write_config(folder: Path) -> Path:
    """Write the demo's configuration into ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "data").mkdir(exist_ok=True)
    p = folder / "linewatch-demo.yaml"
    p.write_text(CONFIG, encoding="utf-8")
    return p


# -- the summary ---------------------------------------------------------------------------------


@dataclass
class CauseResult:
    key: str
    characteristic: str
    description: str
    onset_index: int
    caught: bool
    first_index: int | None = None
    readings_to_catch: int | None = None
    pattern: str | None = None
    detector: str | None = None
    p_value: float | None = None  # smallest p among the findings attributed to the cause
    findings: int = 0


@dataclass
class DemoSummary:
    causes: list[CauseResult]
    false_in_control: list[dict[str, Any]]  # findings before the first cause of their characteristic
    unattributed: list[dict[str, Any]]  # later findings outside every cause's window
    readings: dict[str, int] = field(default_factory=dict)
    in_control: dict[str, int] = field(default_factory=dict)

    @property
    def all_caught(self) -> bool:
        return all(c.caught for c in self.causes)


def summarise(findings: list[dict[str, Any]], sim: Any, grace: dict[str, int]) -> DemoSummary:
    """Attribute findings (``characteristic``, ``pattern``, ``index``, ``p_value``) to the injected causes.

    A finding belongs to a cause when it is on the cause's characteristic,
    its pattern is one the cause is expected to raise, and its reading lies in
    ``[first, last + grace]`` (``grace`` readings after the cause ends: a
    windowed test still holds the cause's readings for a window, and an
    episode takes a while to settle).  The readings before a characteristic's
    first cause are its in-control stretch; any finding there is false.
    """
    results = []
    attributed: set[int] = set()
    for c in sim.causes:
        g = grace.get(c.characteristic, 100)
        mine = [(k, f) for k, f in enumerate(findings)
                if f["characteristic"] == c.characteristic and f["pattern"] in c.expected
                and c.first <= f["index"] <= c.last + g]
        attributed |= {k for k, _ in mine}
        r = CauseResult(c.key, c.characteristic, c.description, c.first, bool(mine), findings=len(mine))
        if mine:
            # the earliest finding; at the same reading, one with a p-value before a limit rule
            first = min((f for _, f in mine), key=lambda f: (f["index"], f.get("p_value") is None))
            r.first_index = first["index"]
            r.readings_to_catch = first["index"] - c.first + 1
            r.pattern = first["pattern"]
            r.detector = first.get("detector")
            ps = [f["p_value"] for _, f in mine if f.get("p_value") is not None]
            r.p_value = min(ps) if ps else None
        results.append(r)
    false_ic, other = [], []
    limits = {name: sim.in_control_until(name) for name in {c.characteristic for c in sim.causes}}
    for k, f in enumerate(findings):
        if k in attributed:
            continue
        start = limits.get(f["characteristic"])
        if start is not None and f["index"] < start:
            false_ic.append(f)
        else:
            # inside some cause's window but of another pattern, or outside every window
            inside = any(c.characteristic == f["characteristic"] and c.first <= f["index"] <=
                         c.last + grace.get(c.characteristic, 100) for c in sim.causes)
            if not inside:
                other.append(f)
    return DemoSummary(results, false_ic, other, {"pack_mass": len(sim.pack), "pin_diameter": len(sim.pin)}, limits)


def _p(p: float | None) -> str:
    if p is None:
        return "no p-value (a limit rule)"
    return f"p = {p:.1e}" if p < 0.001 else f"p = {p:.3f}"


def format_summary(s: DemoSummary, digest_path: Path | None, wall: float, folder_note: str = "") -> str:
    out = ["", "== linewatch demo: what happened", ""]
    for c in s.causes:
        if c.caught:
            out.append(f"  caught   {c.description}")
            out.append(f"           {c.characteristic}: {c.pattern} after {c.readings_to_catch} reading(s) "
                       f"(reading {c.first_index}, the cause began at {c.onset_index}); smallest {_p(c.p_value)}; "
                       f"{c.findings} finding(s)")
        else:
            out.append(f"  MISSED   {c.description} ({c.characteristic}, from reading {c.onset_index})")
    out.append("")
    stretch = ", ".join(f"{k} readings 0-{v - 1}" for k, v in sorted(s.in_control.items()))
    if s.false_in_control:
        out.append(f"  false findings while in control ({stretch}): {len(s.false_in_control)}")
        for f in s.false_in_control[:5]:
            out.append(f"           {f['characteristic']} reading {f['index']}: {f['pattern']} ({_p(f.get('p_value'))})")
    else:
        out.append(f"  no false findings while the line was in control ({stretch})")
    if s.unattributed:
        out.append(f"  {len(s.unattributed)} later finding(s) outside every cause's window (a real line has those too)")
    out.append("")
    out.append(f"  {sum(s.readings.values())} readings in {wall:.1f} s")
    if digest_path is not None:
        out.append(f"  digest: {digest_path}")
    if folder_note:
        out.append(f"  {folder_note}")
    out.append("")
    out.append("  linewatch is advisory: a signal says a pattern is there, not why. Look before you adjust.")
    return "\n".join(out)


# -- running it ----------------------------------------------------------------------------------


def run(folder: Path, *, speed: float = 1.0, seed: int = DEFAULT_SEED, out: Any = None,
        drain_timeout: float = DRAIN_TIMEOUT) -> tuple[DemoSummary, Path | None, float]:
    """Run the demo in ``folder``; return (summary, digest html path, wall seconds)."""
    from watcher.config import load_config
    from watcher.daemon import Daemon
    from watcher.calibration import Calibrator
    from watcher.digest import Period
    from watcher.line_sim import LineWriter, simulate
    from watcher.outbox import AlertHook
    from watcher.schedule import make_digest
    from watcher.store import Store

    out = out or sys.stdout
    t_start = _time.monotonic()
    out.write("linewatch demo: setting the detectors for 1 false finding per 10,000 readings ...")
    out.flush()
    cfg = load_config(write_config(folder))
    Calibrator.for_config(cfg).prepare(cfg.characteristics)  # what the daemon would do first, timed here
    out.write(f" {_time.monotonic() - t_start:.1f} s\n")
    sim = simulate(seed)
    wall = BASE_WALL_SECONDS / speed
    now = datetime.now(timezone.utc).replace(microsecond=0)
    sim_start = now + timedelta(seconds=wall) - timedelta(hours=sim.hours)
    out.write(f"linewatch demo: one shift of an invented packaging and turning line in about {wall:.0f} s\n"
              f"  files: {folder}\n"
              f"  {len(sim.pack)} pack weighings, {len(sim.pin)} pin diameters; causes are injected from "
              f"{min(c.start_s for c in sim.causes) / 3600:.1f} h into the shift\n\n")
    out.flush()
    # Episodes and alerts as in production; the console target writes to ``out``.
    daemon = Daemon(cfg, alerts=AlertHook(cfg, stream=out))
    writer = LineWriter(sim, folder / "data", sim_start, wall)
    stop = threading.Event()

    def supervise() -> None:
        writer.done.wait()
        deadline = _time.monotonic() + drain_timeout
        while daemon.readings < sim.total_readings and _time.monotonic() < deadline:
            _time.sleep(0.05)
        stop.set()

    writer.start()
    sup = threading.Thread(target=supervise, name="demo-supervisor", daemon=True)
    sup.start()
    daemon.run(stop, install_signals=threading.current_thread() is threading.main_thread())
    writer.stop_event.set()
    if writer.error is not None:
        raise writer.error
    store = Store(cfg.state_dir)
    try:
        rows = store.findings()
        digest_end = datetime.now(timezone.utc).replace(second=0, microsecond=0) + timedelta(minutes=1)
        period = Period(sim_start.replace(second=0), max(digest_end, sim_start + timedelta(hours=sim.hours, minutes=1)),
                        cfg.timezone, "demo")
        _d, paths = make_digest(store.conn, cfg, period)
    finally:
        store.close()
    summary = summarise(rows, sim, grace={"pack_mass": 2 * 50, "pin_diameter": 2 * 30})
    return summary, paths["html"], _time.monotonic() - t_start


def add_demo_arguments(p: Any) -> None:
    p.add_argument("--keep", metavar="DIR", help="run in DIR and keep its files (config, gauge files, state, digest)")
    p.add_argument("--speed", type=float, default=1.0,
                   help="pace: 1 runs a shift in about 20 s, 2 in about 10 s (default 1)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of the simulated line (default: fixed)")


def run_demo(args: Any) -> int:
    from watcher.log import setup_logging

    if not (args.speed > 0) or args.speed > 100:
        print("--speed: expected a number above 0 and at most 100", file=sys.stderr)
        return 2
    setup_logging(level=30)  # warnings only: the demo prints its own story
    if args.keep:
        folder = Path(args.keep).resolve()
        if folder.exists() and any(folder.iterdir()):
            print(f"--keep: {folder} is not empty; give a new or empty folder", file=sys.stderr)
            return 2
        temp = False
    else:
        folder = Path(tempfile.mkdtemp(prefix="linewatch-demo-"))
        temp = True
    summary, html_path, wall = run(folder, speed=args.speed, seed=args.seed)
    note = ""
    if temp:
        # keep the digest, drop the rest
        for name in ("data", "state", "linewatch-demo.yaml"):
            p = folder / name
            if p.is_dir():
                shutil.rmtree(p, ignore_errors=True)
            elif p.exists():
                p.unlink()
        note = "gauge files and state removed; run with --keep DIR to keep them"
    print(format_summary(summary, html_path, wall, note))
    return 0
