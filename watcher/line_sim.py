"""An invented line for the demo: a packaging line's checkweigher and a lathe turning pins.

Checkweigher (``pack_mass``, g): packs from two filling heads, A and B in
turn, weighed every 10 s; target 502 g, sd 1.2 g, limits 495..510 g.
Lathe (``pin_diameter``, mm): one pin gauged every 30 s; nominal 8.000 mm,
sd 0.002 mm, limits 7.985..8.015 mm.

One shift (8 simulated hours) runs in control first, long enough for the
baselines, then develops special causes the detectors should catch:

====================  ============  =========================================================
cause                 where, when   what changes
====================  ============  =========================================================
material change       pack, 2.0 h   new film batch: every pack 1.8 g (1.5 sd) heavier
                                    until the old batch returns at 3.5 h (a level shift)
filling heads apart   pack, 4.5 h   head A fills 1.5 g light, head B 1.5 g heavy, until 6.0 h:
                                    readings alternate (a mixture)
double drop           pack, 6.75 h  one pack gets an extra portion: +9.6 g (8 sd), a spike
tool wear             pin, 3.0 h    the insert wears: +0.004 mm per hour (2 sd per hour),
                                    until the tool is changed at 6.5 h (a drift)
====================  ============  =========================================================

Every value comes from ``numpy.random.default_rng(seed)``, so a seed gives
the same line every time.  Times are offsets in seconds from the start of
the shift; :class:`LineWriter` turns them into ISO 8601 times and appends
lines to real files at an accelerated pace.
"""

from __future__ import annotations

import json
import threading
import time as _time
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

SHIFT_HOURS = 8.0
PACK_EVERY_S = 10.0
PIN_EVERY_S = 30.0
PACK = dict(name="pack_mass", unit="g", target=502.0, sigma=1.2, lsl=495.0, usl=510.0)
PIN = dict(name="pin_diameter", unit="mm", target=8.000, sigma=0.002, lsl=7.985, usl=8.015)


@dataclass(frozen=True)
class Cause:
    """One injected special cause: readings ``first..last`` (0-based, of its characteristic) are affected."""

    key: str
    characteristic: str
    kind: str  # shift | mixture | spike | drift
    description: str
    first: int
    last: int
    start_s: float
    end_s: float
    expected: tuple[str, ...]  # finding patterns that count as catching it


@dataclass
class SimLine:
    seed: int
    hours: float
    pack_s: np.ndarray
    pack: np.ndarray
    heads: list[str]
    pin_s: np.ndarray
    pin: np.ndarray
    causes: list[Cause]
    bad_line_after: int  # a garbled checkweigher line is written after this pack reading
    extras: dict = field(default_factory=dict)

    def in_control_until(self, characteristic: str) -> int:
        """Index of the first reading touched by any cause on ``characteristic``."""
        return min(c.first for c in self.causes if c.characteristic == characteristic)

    @property
    def total_readings(self) -> int:
        return len(self.pack) + len(self.pin)


def simulate(seed: int = 20261202, hours: float = SHIFT_HOURS) -> SimLine:
    """The line's readings for one shift (see the module docstring)."""
    rng = np.random.default_rng(seed)
    scale = hours / SHIFT_HOURS  # a shorter shift keeps the same story, compressed

    def at(h: float) -> float:
        return h * scale * 3600.0

    pack_s = np.arange(0.0, hours * 3600.0, PACK_EVERY_S)
    n = pack_s.size
    heads = ["A" if i % 2 == 0 else "B" for i in range(n)]
    pack = PACK["target"] + rng.normal(0.0, PACK["sigma"], n)
    causes: list[Cause] = []

    def span(ts: np.ndarray, a: float, b: float) -> tuple[int, int]:
        idx = np.nonzero((ts >= a) & (ts < b))[0]
        return int(idx[0]), int(idx[-1])

    a, b = span(pack_s, at(2.0), at(3.5))
    pack[a:b + 1] += 1.5 * PACK["sigma"]
    causes.append(Cause("material_change", PACK["name"], "shift",
                        "material change: packs 1.8 g heavier (new film batch)", a, b, at(2.0), at(3.5),
                        ("shift", "grouping", "drift")))
    a, b = span(pack_s, at(4.5), at(6.0))
    for i in range(a, b + 1):
        pack[i] += (-1.25 if heads[i] == "A" else 1.25) * PACK["sigma"]
    causes.append(Cause("filling_heads", PACK["name"], "mixture",
                        "filling heads apart: head A 1.5 g light, head B 1.5 g heavy", a, b, at(4.5), at(6.0),
                        ("mixture", "sawtooth")))
    i = int(np.searchsorted(pack_s, at(6.75)))
    pack[i] += 8.0 * PACK["sigma"]
    causes.append(Cause("double_drop", PACK["name"], "spike", "double drop: one pack 9.6 g heavy", i, i,
                        float(pack_s[i]), float(pack_s[i]) + PACK_EVERY_S, ("spike", "out_of_spec", "shift")))

    pin_s = np.arange(0.0, hours * 3600.0, PIN_EVERY_S)
    pin = PIN["target"] + rng.normal(0.0, PIN["sigma"], pin_s.size)
    a, b = span(pin_s, at(3.0), at(6.5))
    slope = 2.0 * PIN["sigma"] / (3600.0 * scale)  # 2 sd per (scaled) hour
    pin[a:b + 1] += slope * (pin_s[a:b + 1] - pin_s[a])
    causes.append(Cause("tool_wear", PIN["name"], "drift", "tool wear: +0.004 mm per hour until the tool change",
                        a, b, at(3.0), at(6.5), ("drift", "shift", "grouping", "out_of_spec")))
    bad_after = int(np.searchsorted(pack_s, at(5.25)))
    return SimLine(seed, hours, pack_s, pack, heads, pin_s, pin, causes, bad_after)


def _iso(t: datetime) -> str:
    return t.astimezone(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


class LineWriter(threading.Thread):
    """Appends the simulated line's readings to real files, ``wall_seconds`` for the whole shift.

    ``folder/checkweigher-<date>.csv`` (``time,head,mass_g``) and
    ``folder/lathe-pins.jsonl`` (``{"t": ..., "diameter_mm": ...}``); one
    garbled checkweigher line (``ERR``) shows what happens to bad input.
    Reading times run from ``sim_start`` at ``3600 * hours / wall_seconds``
    times real speed.
    """

    def __init__(self, sim: SimLine, folder: Path, sim_start: datetime, wall_seconds: float, tick: float = 0.05):
        super().__init__(name="line-writer", daemon=True)
        self.sim = sim
        self.folder = Path(folder)
        self.sim_start = sim_start
        self.wall_seconds = float(wall_seconds)
        self.tick = tick
        self.done = threading.Event()
        self.stop_event = threading.Event()
        self.written = 0
        self.error: BaseException | None = None
        self.pack_path = self.folder / f"checkweigher-{sim_start:%Y%m%d}.csv"
        self.pin_path = self.folder / "lathe-pins.jsonl"

    def _pack_line(self, i: int) -> str:
        t = self.sim_start + timedelta(seconds=float(self.sim.pack_s[i]))
        return f"{_iso(t)},{self.sim.heads[i]},{self.sim.pack[i]:.2f}\n"

    def _pin_line(self, j: int) -> str:
        t = self.sim_start + timedelta(seconds=float(self.sim.pin_s[j]))
        return json.dumps({"t": _iso(t), "diameter_mm": round(float(self.sim.pin[j]), 5)}) + "\n"

    def run(self) -> None:
        try:
            self._run()
        except BaseException as e:  # pragma: no cover - reported by the demo
            self.error = e
        finally:
            self.done.set()

    def _run(self) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        sim = self.sim
        factor = sim.hours * 3600.0 / self.wall_seconds
        i = j = 0
        with open(self.pack_path, "a", encoding="utf-8") as pf, open(self.pin_path, "a", encoding="utf-8") as nf:
            pf.write("time,head,mass_g\n")
            pf.flush()
            t0 = _time.monotonic()
            while not self.stop_event.is_set():
                now_sim = (_time.monotonic() - t0) * factor
                chunk_p, chunk_n = [], []
                while i < len(sim.pack) and sim.pack_s[i] <= now_sim:
                    chunk_p.append(self._pack_line(i))
                    if i == sim.bad_line_after:
                        t = self.sim_start + timedelta(seconds=float(sim.pack_s[i]) + 1)
                        chunk_p.append(f"{_iso(t)},A,ERR\n")
                    i += 1
                while j < len(sim.pin) and sim.pin_s[j] <= now_sim:
                    chunk_n.append(self._pin_line(j))
                    j += 1
                if chunk_p:
                    pf.write("".join(chunk_p))
                    pf.flush()
                if chunk_n:
                    nf.write("".join(chunk_n))
                    nf.flush()
                self.written += len(chunk_p) + len(chunk_n)
                if i >= len(sim.pack) and j >= len(sim.pin):
                    return
                _time.sleep(self.tick)
