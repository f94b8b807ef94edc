"""The route of a reading, from raw lines to findings, shared by the daemon and replay.

raw line -> LineParser -> Reading | Quarantined -> Monitor -> Finding

A ``Route`` holds one ``Monitor`` per characteristic and one ``LineParser``
per file; ``take`` turns a list of raw lines of one source into a ``Batch``.
It writes nothing: the caller commits the batch (offsets, monitor state,
findings, quarantine) in one transaction.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from functools import lru_cache
from typing import Any, Iterable, Protocol

from watcher.config import Config, SourceConfig
from watcher.monitor import Monitor
from watcher.parse import Column, LineParser
from watcher.records import Finding, Quarantined


class RawLineLike(Protocol):
    path: str
    line_no: int
    offset: int
    data: bytes


@dataclass
class Batch:
    readings: int = 0
    findings: list[Finding] = field(default_factory=list)
    quarantined: list[Quarantined] = field(default_factory=list)
    touched: set[str] = field(default_factory=set)  # characteristics that took readings
    per_file: dict[str, list[int]] = field(default_factory=dict)  # path -> [lines, quarantined]
    values: dict[str, list[tuple[float, str | None]]] = field(default_factory=dict)  # for the digest's aggregates
    backwards: list[tuple[str, str, str]] = field(default_factory=list)  # (characteristic, time, previous time)
    notices: list[tuple[str, str]] = field(default_factory=list)  # (characteristic, news of its baseline)

    def merge(self, other: "Batch") -> None:
        self.readings += other.readings
        self.findings += other.findings
        self.quarantined += other.quarantined
        self.touched |= other.touched
        for k, v in other.values.items():
            self.values.setdefault(k, []).extend(v)
        self.backwards += other.backwards
        self.notices += other.notices
        for k, (a, b) in other.per_file.items():
            cur = self.per_file.setdefault(k, [0, 0])
            cur[0] += a
            cur[1] += b


class Route:
    def __init__(self, cfg: Config, states: dict[str, dict[str, Any]] | None = None, calibrator: Any = None):
        from watcher.calibration import Calibrator

        self.cfg = cfg
        self.calibrator = calibrator or Calibrator.for_config(cfg)
        self.calibrator.prepare(cfg.characteristics)
        self.monitors: dict[str, Monitor] = {}
        states = states or {}
        for cc in cfg.characteristics:
            if cc.name in states:
                self.monitors[cc.name] = Monitor.from_state(cc, cc.source, states[cc.name], calibrator=self.calibrator)
            else:
                self.monitors[cc.name] = Monitor(cc, cc.source, calibrator=self.calibrator)
        self.parsers: dict[tuple[str, str], LineParser] = {}

    def parser(self, src: SourceConfig, path: str, header: list[str] | None = None) -> LineParser:
        key = (src.name, path)
        p = self.parsers.get(key)
        if p is None:
            cols = [Column(c.name, c.column) for c in self.cfg.characteristics_of(src.name)]
            p = LineParser(src.name, src.format, cols, time_column=src.time_column, delimiter=src.delimiter,
                           decimal=src.decimal, encoding=src.encoding, file=path)
            if header is not None:
                p.set_header(header)
            self.parsers[key] = p
        return p

    def take(self, src: SourceConfig, lines: Iterable[RawLineLike]) -> Batch:
        b = Batch()
        monitors, touched, values = self.monitors, b.touched, b.values
        for raw in lines:
            p = self.parser(src, raw.path)
            readings, bad = p.parse(raw.data, raw.line_no, raw.offset)
            counts = b.per_file.setdefault(raw.path, [0, 0])
            counts[0] += 1
            if bad is not None:
                b.quarantined.append(bad)
                counts[1] += 1
                continue
            b.readings += len(readings)
            for r in readings:
                name, time = r.characteristic, r.time
                m = monitors[name]
                if time is not None and m.last_time is not None and _earlier(time, m.last_time):
                    b.backwards.append((name, time, m.last_time))
                found = m.feed(r.value, time)
                if found:
                    b.findings.extend(found)
                touched.add(name)
                got = values.get(name)
                if got is None:
                    got = values[name] = []
                got.append((r.value, time))
                if m.notices:
                    b.notices += [(name, text) for text in m.notices]
                    m.notices = []
        return b


@lru_cache(maxsize=4096)
def _instant(text: str) -> datetime | None:
    """A time text as a datetime, parsed once: every characteristic of a line, and the
    next line's check, ask about the same few texts."""
    try:
        return datetime.fromisoformat(text)
    except (TypeError, ValueError):
        return None


def _earlier(a: str, b: str) -> bool:
    """Is time a before time b?  Readings are taken in arrival order either way; this only flags it."""
    if a == b:
        return False
    da, db = _instant(a), _instant(b)
    if da is None or db is None:
        return False
    try:
        return da < db
    except TypeError:  # naive against aware: cannot tell
        return False
