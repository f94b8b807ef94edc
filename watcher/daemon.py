"""``linewatch run``: follow every source, feed the route, commit each batch, until told to stop.

One loop, one thread for the reading path.  Each pass reads what the sources
have, takes it through the route, and commits in ONE transaction: the file
positions, the state of every characteristic the batch touched, the findings,
the quarantined lines and the alerts they queue.  A crash at any instant
therefore resumes at the last commit, with every reading counted once.

Waiting costs nothing: each source sets an event when it has something, and
the loop sleeps on one shared event (with a timeout for housekeeping).
"""

from __future__ import annotations

import fcntl
import logging
import os
import signal
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from watcher.config import Config, SourceConfig
from watcher.log import LOGGER, event
from watcher.parse import reason_kind
from watcher.records import Finding
from watcher.route import Batch, Route
from watcher.store import Store, utc_now

MAX_BYTES_PER_FILE = 1 << 20  # read at most this much of one file per pass, so one file cannot starve others
HOUSEKEEPING = 1.0  # seconds between housekeeping passes when nothing happens
# After a wake-up, wait before the pass, so that appends arriving across many files (one
# file-system event per line) are taken in one pass and one commit instead of one pass and
# one commit per line.  The wait is four times what the last pass took, within
# [GATHER_MIN, GATHER_MAX] seconds: a small site gets its readings within 50 ms, while on
# a large one the costs paid per characteristic and commit (saved state, digest
# aggregates) are spread over more readings: the passes take about a fifth of one core
# while a pass lasts under GATHER_MAX / GATHER_FACTOR, and a busier site waits longer
# instead of working harder (bench/bench_plant.py: 1,000 characteristics at 10 readings/s
# each, about 0.7 s from a line's write to its detectors).  Costs at most GATHER_MAX of
# latency.
GATHER_MIN, GATHER_MAX, GATHER_FACTOR = 0.05, 1.0, 4.0
LOCK_NAME = "linewatch.lock"


class AlreadyRunning(RuntimeError):
    pass


class StateLock:
    """An exclusive lock on a state folder, naming the process that holds it."""

    def __init__(self, state_dir: Path):
        self.path = state_dir / LOCK_NAME
        self.fh: Any = None

    def acquire(self) -> None:
        fh = open(self.path, "a+")
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            holder = fh.read().strip() or "unknown"
            fh.close()
            raise AlreadyRunning(
                f"another linewatch (pid {holder}) is already using the state folder {self.path.parent}"
            ) from None
        fh.seek(0)
        fh.truncate()
        fh.write(str(os.getpid()))
        fh.flush()
        self.fh = fh

    def release(self) -> None:
        if self.fh is not None:
            fcntl.flock(self.fh, fcntl.LOCK_UN)
            self.fh.close()
            self.fh = None


class _ChainedEvent(threading.Event):
    """A source's own event that also wakes the shared one."""

    def __init__(self, shared: threading.Event):
        super().__init__()
        self.shared = shared

    def set(self) -> None:
        super().set()
        self.shared.set()


@dataclass
class _Line:
    path: str
    line_no: int
    offset: int | None
    data: bytes


@dataclass
class _Feed:
    """One configured source and the object that reads it."""

    cfg: SourceConfig
    reader: Any
    kind: str
    bad_seen: set[tuple[str, str]] = field(default_factory=set)
    bad_counts: Counter = field(default_factory=Counter)

    #: True when the last read of a file stopped at the per-pass limit (a backlog is left)
    capped: bool = False

    def read(self) -> tuple[list[Any], list[Any]]:
        """(raw lines, follow events) available now."""
        if self.kind == "file":
            lines, events = [], []
            self.capped = False
            for _f, ls, evs in self.reader.read_available(MAX_BYTES_PER_FILE):
                if ls and ls[-1].end_offset - ls[0].offset >= MAX_BYTES_PER_FILE // 2:
                    self.capped = True
                lines.extend(ls)
                events.extend(evs)
            return lines, events
        if self.kind == "stdin":
            # An unterminated piece is a line longer than the reader's limit, or the end of the stream:
            # it goes to the parser like any line and is quarantined if it makes no sense.
            return self.reader.drain(), []
        msgs = self.reader.drain()
        return [_Line(m.path, m.seq, None, m.payload) for m in msgs], []


class Daemon:
    """The live watcher over one configuration."""

    def __init__(self, cfg: Config, *, stdin: str | None = None, stdin_stream: Any = None,
                 on_findings: Callable[[list[Finding]], None] | None = None, alerts: Any = True):
        self.cfg = cfg
        self.log = logging.getLogger(LOGGER)
        self.stdin_name = stdin
        self.stdin_stream = stdin_stream
        self.on_findings = on_findings
        self.stop_event = threading.Event()
        self.wake = threading.Event()
        self._last_pass = 0.0  # seconds the last pass took
        self.store: Store | None = None
        self.route: Route | None = None
        self.feeds: list[_Feed] = []
        self.readings = 0
        self._next_commands = 0.0
        # Objects with optional start(daemon), on_batch(conn, batch) (inside the batch's transaction),
        # tick(daemon) (after each pass) and close().  Episodes and alert delivery are one of them.
        self.hooks: list[Any] = []
        from watcher.schedule import AggregatesHook, DigestHook

        self.hooks.append(AggregatesHook(cfg))  # what the digest needs, kept bounded
        if alerts is True:
            from watcher.outbox import AlertHook

            self.hooks.append(AlertHook(cfg))
        elif alerts:
            self.hooks.append(alerts)
        if cfg.digest is not None:
            self.hooks.append(DigestHook(cfg))

    # -- life cycle ---------------------------------------------------------------------------
    def request_stop(self, *_: object) -> None:
        self.stop_event.set()
        self.wake.set()

    def run(self, stop_event: threading.Event | None = None, install_signals: bool = True) -> int:
        if stop_event is not None:
            self.stop_event = stop_event
            threading.Thread(target=self._forward_stop, daemon=True, name="stop-forward").start()
        if install_signals and threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self.request_stop)
            signal.signal(signal.SIGINT, self.request_stop)
        state_dir = self.cfg.state_dir
        self.store = Store(state_dir)
        lock = StateLock(state_dir)
        lock.acquire()
        try:
            self._start()
            while not self.stop_event.is_set():
                if self.wake.wait(HOUSEKEEPING):
                    self.stop_event.wait(self._gather())
                self.wake.clear()
                began = time.monotonic()
                self._pass()
                self._last_pass = time.monotonic() - began
            self._pass()  # the batch in hand, then stop
            self._log_bad_counts()
            event(self.log, "stop", f"stopped after {self.readings} readings this run")
            return 0
        finally:
            self._close()
            lock.release()

    def _gather(self) -> float:
        """Seconds to wait after a wake-up before the pass (see GATHER_MIN)."""
        return min(GATHER_MAX, max(GATHER_MIN, GATHER_FACTOR * self._last_pass))

    def _forward_stop(self) -> None:
        self.stop_event.wait()
        self.wake.set()

    def _start(self) -> None:
        assert self.store is not None
        states = self.store.load_characteristics()
        known = {c.name for c in self.cfg.characteristics}
        self.route = Route(self.cfg, {k: v for k, v in states.items() if k in known})
        event(self.log, "start", f"linewatch started: {len(self.cfg.sources)} source(s), "
              f"{len(self.cfg.characteristics)} characteristic(s), state in {self.cfg.state_dir}")
        for src in self.cfg.sources:
            feed = self._attach(src)
            if feed is not None:
                self.feeds.append(feed)
        for hook in self.hooks:
            if hasattr(hook, "start"):
                hook.start(self)

    def _attach(self, src: SourceConfig) -> _Feed | None:
        from watcher.sources import GlobSource, StdinSource

        if src.kind == "stdin" or src.name == self.stdin_name:
            if src.name != self.stdin_name:
                event(self.log, "source", f"source {src.name}: reads standard input only with --stdin {src.name}; skipped",
                      logging.WARNING, source=src.name)
                return None
            reader = StdinSource(self.stdin_stream, name=src.name)
            reader.changed_event = _ChainedEvent(self.wake)
            reader.start()
            event(self.log, "source", f"source {src.name}: attached to standard input", source=src.name)
            return _Feed(src, reader, "stdin")
        if src.kind == "mqtt":
            from urllib.parse import urlparse

            from watcher.sources import MqttSource

            u = urlparse(src.broker if "://" in src.broker else f"mqtt://{src.broker}")
            reader = MqttSource(src.name, src.topic, host=u.hostname or "127.0.0.1", port=u.port or 1883,
                                username=u.username, password=u.password)
            reader.changed_event = _ChainedEvent(self.wake)
            reader.start()
            event(self.log, "source", f"source {src.name}: subscribing to {src.topic} on {u.hostname}:{u.port or 1883}",
                  source=src.name)
            return _Feed(src, reader, "mqtt")
        path = str(self.cfg.resolve(src.path))
        reader = GlobSource(src.name, path, poll=src.poll, poll_interval=src.poll_interval)
        reader.changed_event = _ChainedEvent(self.wake)
        saved = self.store.get_meta(f"source:{src.name}")
        if saved:
            import json

            for ev in reader.restore(json.loads(saved)):
                self._log_follow_event(src.name, ev)
        self._load_headers(src)
        reader.start()
        event(self.log, "source", f"source {src.name}: following {path} ({reader.mode})", source=src.name,
              path=path, mode=reader.mode)
        return _Feed(src, reader, "file")

    def _load_headers(self, src: SourceConfig) -> None:
        import json

        saved = self.store.get_meta(f"headers:{src.name}")
        if saved and self.route is not None:
            for path, header in json.loads(saved).items():
                self.route.parser(src, path, header)

    def _close(self) -> None:
        for hook in self.hooks:
            if hasattr(hook, "close"):
                try:
                    hook.close()
                except Exception:  # closing must not hide the reason we stopped
                    self.log.exception("while closing %r", hook)
        for f in self.feeds:
            stop = getattr(f.reader, "stop", None)
            if stop is not None:
                stop()
        self.feeds = []
        if self.store is not None:
            self.store.close()
            self.store = None

    # -- one pass -------------------------------------------------------------------------------
    def _pass(self) -> None:
        """Read what is available now, in bounded batches, one transaction per round.

        Goes round the sources again only while a file is left with a backlog (a read
        stopped at MAX_BYTES_PER_FILE): lines that arrive during the pass wait for the next
        one, after the gathering wait, or a steady stream of appends would keep the pass
        going for ever and the gathering (see GATHER_MIN) would never happen."""
        assert self.store is not None
        while True:
            more = False
            taken: list[tuple[_Feed, Batch]] = []
            # One transaction for the whole round: a commit per source would cost more than
            # the readings themselves on a site with many files.  Lines are read inside it, so
            # a crash anywhere in the round leaves every offset where its state was saved.
            with self.store.transaction() as c:
                for feed in self.feeds:
                    lines, events = feed.read()
                    for ev in events:
                        self._log_follow_event(feed.cfg.name, ev)
                    if not lines and not events:
                        continue
                    taken.append((feed, self._take(c, feed, lines)))
                    more = more or feed.capped
            if taken:
                self.store.sync_jsonl()
            for feed, batch in taken:
                self._log_batch(feed, batch)
                if self.on_findings is not None and batch.findings:
                    self.on_findings(batch.findings)
            self._apply_commands()
            for hook in self.hooks:
                if hasattr(hook, "tick"):
                    hook.tick(self)
            if not more or self.stop_event.is_set():
                return

    def _take(self, c: Any, feed: _Feed, lines: list[Any]) -> Batch:
        """Route one source's lines and write what they changed, inside the round's transaction."""
        import json

        assert self.route is not None and self.store is not None
        batch = self.route.take(feed.cfg, lines)
        self.readings += batch.readings
        store = self.store
        store.add_findings(c, batch.findings)
        store.add_quarantined(c, batch.quarantined)
        for name in batch.touched:
            m = self.route.monitors[name]
            store.save_characteristic(c, name, m.source, m.export_state_text(), m.count, m.last_time, m.last_value)
        if feed.kind == "file":
            ck = feed.reader.checkpoints()
            store.set_meta(c, f"source:{feed.cfg.name}", json.dumps(ck))
            files = ck.get("files", {})
            for path, (n, q) in batch.per_file.items():
                store.save_file(c, feed.cfg.name, path, files.get(path, {"path": path}), n, q)
            headers = {p: parser.header for (s, p), parser in self.route.parsers.items()
                       if s == feed.cfg.name and parser.header is not None}
            store.set_meta(c, f"headers:{feed.cfg.name}", json.dumps(headers))
        else:
            for path, (n, q) in batch.per_file.items():
                store.save_file(c, feed.cfg.name, path, {"path": path}, n, q)
        for hook in self.hooks:
            if hasattr(hook, "on_batch"):
                hook.on_batch(c, batch)
        batch.values = {}  # only the hooks need the readings; the round keeps the rest for its log
        return batch

    def _apply_commands(self) -> None:
        """Requests left by other commands (``linewatch rebaseline``), at most every half second."""
        now = time.monotonic()
        if now < self._next_commands:
            return
        self._next_commands = now + 0.5
        assert self.store is not None and self.route is not None
        rows = self.store.conn.execute("SELECT id, kind, subject, note FROM commands WHERE done_at IS NULL ORDER BY id").fetchall()
        for r in rows:
            store = self.store
            with store.transaction() as c:
                m = self.route.monitors.get(r["subject"])
                if r["kind"] == "rebaseline" and m is not None:
                    m.rebaseline()
                    store.save_characteristic(c, m.cc.name, m.source, m.export_state_text(), m.count, m.last_time, m.last_value)
                    for hook in self.hooks:
                        if hasattr(hook, "on_rebaseline"):
                            hook.on_rebaseline(c, m.cc.name, r["note"] or "")
                    store.add_event(c, "rebaselined", m.cc.name, r["note"])
                    event(self.log, "rebaseline", f"{m.cc.name}: learning a new baseline from the next "
                          f"{m._baseline_size()} readings" + (f" ({r['note']})" if r["note"] else ""),
                          characteristic=m.cc.name)
                c.execute("UPDATE commands SET done_at = ? WHERE id = ?", (utc_now(), r["id"]))

    # -- logging ----------------------------------------------------------------------------------
    def _log_follow_event(self, source: str, ev: Any) -> None:
        level = logging.WARNING if type(ev).__name__ in ("Truncated", "RemainderLost") else logging.INFO
        event(self.log, "file_" + type(ev).__name__.lower(), f"source {source}: {ev.message()}", level,
              source=source, path=ev.path)

    def _log_batch(self, feed: _Feed, batch: Batch) -> None:
        for q in batch.quarantined:
            key = (q.file or "", reason_kind(q.reason))
            feed.bad_counts[key] += 1
            if key not in feed.bad_seen:
                feed.bad_seen.add(key)
                event(self.log, "bad_line", f"{q.file}:{q.line_no}: skipped: {q.reason} "
                      "(further lines of this file with this reason are counted, not logged)", logging.WARNING,
                      source=q.source, file=q.file, line=q.line_no, reason=q.reason)
        for name, text in batch.notices:
            event(self.log, "baseline", text, logging.WARNING, characteristic=name)
        for f in batch.findings:
            event(self.log, "finding", f.message, logging.INFO, characteristic=f.characteristic,
                  pattern=f.pattern, p_value=f.p_value, index=f.index)
        self._check_time_order(feed, batch)

    def _log_bad_counts(self) -> None:
        """At stop: how many lines each file skipped for each reason (each reason was logged once, when first seen)."""
        for feed in self.feeds:
            for (file, reason), n in sorted(feed.bad_counts.items()):
                event(self.log, "bad_lines", f"{file}: {n} line(s) skipped this run: {reason}", logging.WARNING,
                      source=feed.cfg.name, file=file, reason=reason, count=n)

    def _check_time_order(self, feed: _Feed, batch: Batch) -> None:
        """Readings are taken in arrival order; a time that goes backwards is accepted and logged once."""
        for name, t, prev in batch.backwards:
            key = (name, "time went backwards")
            if key in feed.bad_seen:
                continue
            feed.bad_seen.add(key)
            event(self.log, "time_backwards", f"{name}: reading time {t} is earlier than the one before ({prev}); "
                  "readings are taken in arrival order (further cases are not logged)", logging.WARNING,
                  characteristic=name)
