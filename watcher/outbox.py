"""Guaranteed delivery of alerts: an outbox in SQLite and a sender beside the reading path.

The reading path calls :func:`enqueue` inside its own batch transaction, so an
alert is stored if and only if the finding that caused it is stored.  It
writes one ``alert_outbox`` row and one ``alert_delivery`` row per target
whose static filters (characteristic, source, minimum severity) let it
through; no network, no chart, no waiting.

:class:`OutboxSender` delivers in the background: one thread per target,
each with its own SQLite connection, so a dead target (connection refused,
or one that accepts and never answers) delays only its own queue, never the
reading path or the other targets.  For each delivery it

* applies quiet hours (hold until they end, or leave for the digest) and the
  rate limit (merge into one summary at the end of the hour window);
* renders the chart (in the sender thread) and hands the message to apprise
  with connect/read timeouts and an overall call timeout;
* records the attempt (time, redacted target, success or error text);
* on failure retries with exponential backoff ``min(cap, base * 2**(n-1))``
  after the n-th failed attempt;
* marks deliveries that still fail after ``max_age_s`` (default 24 h) as
  ``expired`` (listed by :func:`expired_alerts` for the digest).

Delivery is *at least once*: a delivery is marked sent only after the
target accepted it, so a crash between the two sends it again on restart;
undelivered rows are picked up when a new sender starts.  One sender per
state file.

Delivery statuses: ``pending`` (waiting, possibly held by ``not_before`` or
a retry time), ``sent``, ``digest`` (kept for the digest by quiet hours),
``merged`` (over the rate limit, waiting for the summary), ``summarised``
(covered by a sent summary), ``expired``.
"""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
import time as _time
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Callable, Iterable, TextIO
from zoneinfo import ZoneInfo

from watcher.charts import render_payload
from watcher.episodes import AlertIntent, SEVERITIES, severity_rank
from watcher.notify import Deliverer, Target, quiet_decision
from watcher.redact import scrub_text

log = logging.getLogger("linewatch.outbox")

SCHEMA = """
CREATE TABLE IF NOT EXISTS alert_outbox (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    episode_id TEXT NOT NULL,
    kind TEXT NOT NULL,
    severity TEXT NOT NULL,
    characteristic TEXT NOT NULL DEFAULT '',
    source TEXT NOT NULL DEFAULT '',
    pattern TEXT NOT NULL DEFAULT '',
    title TEXT NOT NULL,
    body TEXT NOT NULL,
    chart TEXT,
    created_at TEXT NOT NULL,
    created_epoch REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS alert_delivery (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    alert_id INTEGER NOT NULL REFERENCES alert_outbox (id),
    target TEXT NOT NULL,
    status TEXT NOT NULL DEFAULT 'pending'
        CHECK (status IN ('pending', 'sent', 'digest', 'merged', 'summarised', 'expired')),
    not_before REAL NOT NULL DEFAULT 0,
    next_try REAL NOT NULL DEFAULT 0,
    attempts INTEGER NOT NULL DEFAULT 0,
    last_error TEXT,
    created REAL NOT NULL,
    sent_at REAL,
    summary_alert_id INTEGER,
    UNIQUE (alert_id, target)
);
CREATE INDEX IF NOT EXISTS alert_delivery_due ON alert_delivery (target, status, next_try);
CREATE TABLE IF NOT EXISTS alert_attempt (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    delivery_id INTEGER NOT NULL REFERENCES alert_delivery (id),
    at REAL NOT NULL,
    at_iso TEXT NOT NULL,
    target TEXT NOT NULL,
    ok INTEGER NOT NULL,
    error TEXT
);
CREATE TABLE IF NOT EXISTS alert_rate_window (
    target TEXT PRIMARY KEY,
    window_start REAL,
    sent INTEGER NOT NULL DEFAULT 0
);
"""


def ensure_schema(conn: sqlite3.Connection) -> None:
    """Create the outbox tables if missing (statement by statement: no commit)."""
    for stmt in SCHEMA.split(";"):
        if stmt.strip():
            conn.execute(stmt)


@dataclass
class OutboxSettings:
    backoff_base_s: float = 30.0
    backoff_cap_s: float = 3600.0
    max_age_s: float = 24 * 3600.0
    poll_s: float = 1.0
    connect_timeout_s: float = 5.0
    read_timeout_s: float = 10.0
    call_timeout_s: float = 30.0
    rate_window_s: float = 3600.0
    tz: str = "UTC"
    batch: int = 50
    # draw charts in a child process instead of the sender thread.  Off by
    # default: measured on 2 cores (bench_dead_target.py --chart) a child costs
    # the reading path as much CPU as the thread does, plus its memory.
    chart_process: bool = False
    chart_timeout_s: float = 60.0

    def __post_init__(self) -> None:
        for name in ("backoff_base_s", "backoff_cap_s", "max_age_s", "poll_s", "connect_timeout_s",
                     "read_timeout_s", "call_timeout_s", "rate_window_s"):
            v = float(getattr(self, name))
            if not v > 0:
                raise ValueError(f"{name} must be > 0 seconds, got {v!r}")
        if self.backoff_cap_s < self.backoff_base_s:
            raise ValueError("backoff_cap_s must be >= backoff_base_s")
        ZoneInfo(self.tz)  # raises for an unknown zone


def backoff_delay(attempts: int, base: float, cap: float) -> float:
    """Seconds to wait after the ``attempts``-th failure: ``min(cap, base * 2**(attempts-1))``.

    >>> [backoff_delay(n, 30, 3600) for n in (1, 2, 3, 8, 20)]
    [30, 60, 120, 3600, 3600]
    """
    if attempts < 1:
        return 0
    return min(cap, base * 2 ** min(attempts - 1, 60))


def enqueue(
    conn: sqlite3.Connection,
    intent: AlertIntent,
    targets: Iterable[Target],
    now: float | None = None,
) -> int:
    """Store ``intent`` and its deliveries in the caller's transaction; return the alert id.

    No commit, no network.  The alert row is written even when no target
    takes it (it still appears in status and digest).
    """
    t = _time.time() if now is None else now
    cur = conn.execute(
        "INSERT INTO alert_outbox (episode_id, kind, severity, characteristic, source, pattern, "
        "title, body, chart, created_at, created_epoch) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
        (
            intent.episode_id, intent.kind, intent.severity, intent.characteristic or "",
            intent.source or "", intent.pattern or "", intent.title, intent.body,
            json.dumps(intent.chart, separators=(",", ":")) if intent.chart is not None else None,
            intent.created_at, t,
        ),
    )
    alert_id = int(cur.lastrowid)
    rows = [
        (alert_id, tg.key, t)
        for tg in targets
        if tg.wants(intent.characteristic or "", intent.source or "", intent.route_severity or intent.severity)
    ]
    if rows:
        conn.executemany(
            "INSERT OR IGNORE INTO alert_delivery (alert_id, target, created) VALUES (?,?,?)", rows
        )
    return alert_id


def _connect(db_path: str) -> sqlite3.Connection:
    conn = sqlite3.connect(db_path, timeout=30.0, isolation_level=None, check_same_thread=True)
    conn.execute("PRAGMA busy_timeout = 30000")
    # as the store does: in WAL mode NORMAL syncs at checkpoints, not at every
    # commit, so the sender holds the write lock for microseconds, not for an
    # fsync the reading path would wait behind.  A 'sent' mark lost to a power
    # cut means one more delivery (at least once), never none.
    conn.execute("PRAGMA synchronous = NORMAL")
    return conn


class _Tx:
    """BEGIN IMMEDIATE ... COMMIT on an autocommit connection (short writes only)."""

    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn

    def __enter__(self) -> sqlite3.Connection:
        self.conn.execute("BEGIN IMMEDIATE")
        return self.conn

    def __exit__(self, exc_type, exc, tb) -> None:
        self.conn.execute("ROLLBACK" if exc_type else "COMMIT")


def _iso(epoch: float) -> str:
    return datetime.fromtimestamp(epoch, timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


class OutboxSender:
    """Background delivery of the outbox in ``db_path`` to ``targets``.

    ``now`` (epoch seconds) is the clock used for every decision (quiet
    hours, backoff, rate window, expiry); waiting between passes uses real
    time (``settings.poll_s``).  ``run_once()`` does one pass over all targets
    in the calling thread (tests, the ``replay`` command); ``start()`` runs
    passes in one thread per target until ``stop()``.
    """

    def __init__(
        self,
        db_path: str,
        targets: Iterable[Target],
        settings: OutboxSettings | None = None,
        now: Callable[[], float] = _time.time,
        stream: TextIO | None = None,
    ):
        self.db_path = str(db_path)
        self.targets = list(targets)
        keys = [t.key for t in self.targets]
        if len(set(keys)) != len(keys):
            raise ValueError(f"two targets share a name: {sorted(k for k in keys if keys.count(k) > 1)}")
        self.settings = settings or OutboxSettings()
        self.now = now
        self.stream = stream
        self.tz = ZoneInfo(self.settings.tz)
        self._stop = threading.Event()
        self._wake: dict[str, threading.Event] = {t.key: threading.Event() for t in self.targets}
        self._threads: list[threading.Thread] = []
        self._chart_cache: dict[int, bytes | None] = {}
        self._chart_lock = threading.Lock()
        self._pool: Any = None
        conn = _connect(self.db_path)
        try:
            ensure_schema(conn)
        finally:
            conn.close()

    # -- lifecycle -----------------------------------------------------------------
    def start(self) -> None:
        if self._threads:
            return
        self._stop.clear()
        if self.targets:
            log.info("alert sender started for %d target(s): %s", len(self.targets),
                     ", ".join(t.key for t in self.targets))
        for t in self.targets:
            th = threading.Thread(target=self._loop, args=(t,), name=f"outbox:{t.key}", daemon=True)
            th.start()
            self._threads.append(th)

    def stop(self, timeout: float = 5.0) -> None:
        """Ask the threads to finish; waits up to ``timeout`` s in total.

        A thread inside a network call finishes when that call times out; it
        is a daemon thread, so it never keeps the process alive.
        """
        self._stop.set()
        for ev in self._wake.values():
            ev.set()
        deadline = _time.monotonic() + timeout
        for th in self._threads:
            th.join(max(0.0, deadline - _time.monotonic()))
        self._threads = [th for th in self._threads if th.is_alive()]
        self._close_pool()

    def _close_pool(self) -> None:
        with self._chart_lock:
            pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=False, cancel_futures=True)

    def kick(self) -> None:
        """Wake the threads now (call after a batch that enqueued alerts)."""
        for ev in self._wake.values():
            ev.set()

    def alive(self) -> bool:
        return any(th.is_alive() for th in self._threads)

    def _loop(self, target: Target) -> None:
        conn = _connect(self.db_path)
        deliverer = self._deliverer()
        wake = self._wake[target.key]
        try:
            while not self._stop.is_set():
                try:
                    self._pass(conn, target, deliverer)
                except sqlite3.Error as exc:  # a locked or busy file: try again next pass
                    log.warning("outbox pass for %s failed: %s", target.key, exc)
                wake.wait(self.settings.poll_s)
                wake.clear()
        finally:
            conn.close()

    def _deliverer(self) -> Deliverer:
        s = self.settings
        return Deliverer(s.connect_timeout_s, s.read_timeout_s, s.call_timeout_s, stream=self.stream)

    def run_once(self) -> int:
        """One pass over every target in this thread; returns deliveries handled."""
        conn = _connect(self.db_path)
        deliverer = self._deliverer()
        try:
            return sum(self._pass(conn, t, deliverer) for t in self.targets)
        finally:
            conn.close()
            if not self._threads:
                self._close_pool()

    # -- one pass for one target ----------------------------------------------------------
    def _pass(self, conn: sqlite3.Connection, target: Target, deliverer: Deliverer) -> int:
        s = self.settings
        now = self.now()
        handled = 0
        with _Tx(conn):
            n = conn.execute(
                "UPDATE alert_delivery SET status = 'expired' WHERE target = ? AND status = 'pending' "
                "AND attempts > 0 AND ? - created >= ?",
                (target.key, now, s.max_age_s),
            ).rowcount
        if n:
            log.warning("%d alert(s) for %s expired after %.0f h of failed delivery",
                        n, target.key, s.max_age_s / 3600)
        if target.rate_limit:
            self._roll_window(conn, target, now)
        rows = conn.execute(
            "SELECT d.id, d.alert_id, d.attempts, d.created, a.severity, a.title, a.body, a.chart, a.episode_id "
            "FROM alert_delivery d JOIN alert_outbox a ON a.id = d.alert_id "
            "WHERE d.target = ? AND d.status = 'pending' AND d.not_before <= ? AND d.next_try <= ? "
            "ORDER BY d.id LIMIT ?",
            (target.key, now, now, s.batch),
        ).fetchall()
        for did, alert_id, attempts, created, severity, title, body, chart, episode_id in rows:
            if self._stop.is_set():
                break
            handled += 1
            decision, until = quiet_decision(target, severity, datetime.fromtimestamp(now, self.tz))
            if decision == "hold":
                with _Tx(conn):
                    conn.execute("UPDATE alert_delivery SET not_before = ? WHERE id = ?",
                                 (until.timestamp(), did))
                log.info("alert %d held for %s until quiet hours end (%s)", alert_id, target.key, until.isoformat())
                continue
            if decision == "digest":
                with _Tx(conn):
                    conn.execute("UPDATE alert_delivery SET status = 'digest' WHERE id = ?", (did,))
                continue
            if target.rate_limit and not self._rate_allows(conn, target, severity, now):
                with _Tx(conn):
                    conn.execute("UPDATE alert_delivery SET status = 'merged' WHERE id = ?", (did,))
                continue
            png = self._chart(alert_id, chart) if (target.chart and chart and not target.is_console) else None
            t0 = self.now()
            ok, err = deliverer.send(target, title, body, png)
            t1 = self.now()
            with _Tx(conn):
                conn.execute(
                    "INSERT INTO alert_attempt (delivery_id, at, at_iso, target, ok, error) VALUES (?,?,?,?,?,?)",
                    (did, t1, _iso(t1), target.key, 1 if ok else 0, err or None),
                )
                if ok:
                    conn.execute(
                        "UPDATE alert_delivery SET status = 'sent', sent_at = ?, attempts = attempts + 1, "
                        "last_error = NULL WHERE id = ?",
                        (t1, did),
                    )
                    if target.rate_limit:
                        self._count_sent(conn, target, t1)
                else:
                    n_att = attempts + 1
                    conn.execute(
                        "UPDATE alert_delivery SET attempts = ?, last_error = ?, next_try = ? WHERE id = ?",
                        (n_att, err, t1 + backoff_delay(n_att, s.backoff_base_s, s.backoff_cap_s), did),
                    )
            if ok:
                log.info("alert %d (episode %s) sent to %s in %.2f s", alert_id, episode_id, target.key, t1 - t0)
            else:
                log.warning("alert %d (episode %s) not delivered to %s (attempt %d): %s",
                            alert_id, episode_id, target.key, attempts + 1, scrub_text(err))
                break  # keep the order: later alerts wait for this one's retry
        return handled

    def _chart(self, alert_id: int, chart_json: str) -> bytes | None:
        with self._chart_lock:
            if alert_id in self._chart_cache:
                return self._chart_cache[alert_id]
        try:
            payload = json.loads(chart_json)
            if self.settings.chart_process:
                png = self._render_in_child(payload)
            else:
                png = render_payload(payload)
        except Exception as exc:  # a chart is a courtesy; the message goes anyway
            log.warning("chart for alert %d could not be drawn: %s", alert_id, exc)
            png = None
        with self._chart_lock:
            if len(self._chart_cache) > 32:
                self._chart_cache.pop(next(iter(self._chart_cache)))
            self._chart_cache[alert_id] = png
        return png

    def _render_in_child(self, payload: dict[str, Any]) -> bytes:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        with self._chart_lock:
            if self._pool is None:
                # spawn, not fork: forking a process that runs threads is unsafe
                self._pool = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"))
            pool = self._pool
        try:
            return pool.submit(render_payload, payload).result(timeout=self.settings.chart_timeout_s)
        except Exception:
            # a broken or stuck child: drop it, a new one is made next time
            with self._chart_lock:
                if self._pool is pool:
                    self._pool = None
            pool.shutdown(wait=False, cancel_futures=True)
            raise

    # -- rate limit ---------------------------------------------------------------------
    def _window(self, conn: sqlite3.Connection, target: Target) -> tuple[float | None, int]:
        row = conn.execute(
            "SELECT window_start, sent FROM alert_rate_window WHERE target = ?", (target.key,)
        ).fetchone()
        return (row[0], row[1]) if row else (None, 0)

    def _rate_allows(self, conn: sqlite3.Connection, target: Target, severity: str, now: float) -> bool:
        if severity == SEVERITIES[-1] and not target.rate_limit_urgent:
            return True
        start, sent = self._window(conn, target)
        if start is None or now >= start + self.settings.rate_window_s:
            return True
        return sent < int(target.rate_limit)

    def _count_sent(self, conn: sqlite3.Connection, target: Target, when: float) -> None:
        start, sent = self._window(conn, target)
        if start is None or when >= start + self.settings.rate_window_s:
            start, sent = when, 0
        conn.execute(
            "INSERT INTO alert_rate_window (target, window_start, sent) VALUES (?, ?, ?) "
            "ON CONFLICT(target) DO UPDATE SET window_start = excluded.window_start, sent = excluded.sent",
            (target.key, start, sent + 1),
        )

    def _roll_window(self, conn: sqlite3.Connection, target: Target, now: float) -> None:
        """At the end of a window, merge what was held back into one summary alert."""
        start, _sent = self._window(conn, target)
        if start is None or now < start + self.settings.rate_window_s:
            return
        with _Tx(conn):
            merged = conn.execute(
                "SELECT d.id, a.title, a.episode_id, a.severity, a.created_at FROM alert_delivery d "
                "JOIN alert_outbox a ON a.id = d.alert_id WHERE d.target = ? AND d.status = 'merged' "
                "ORDER BY d.id",
                (target.key,),
            ).fetchall()
            conn.execute("DELETE FROM alert_rate_window WHERE target = ?", (target.key,))
            if not merged:
                return
            sev = max((m[3] for m in merged), key=severity_rank)
            lines = [
                f"{len(merged)} further alert(s) arrived for this target while its limit of "
                f"{target.rate_limit} messages per hour was reached:",
            ]
            for _did, title, eid, _sev, created in merged[:50]:
                lines.append(f"- {created} {title} (episode {eid})")
            if len(merged) > 50:
                lines.append(f"... and {len(merged) - 50} more; see 'status' for all.")
            lines.append("Caution: statistical signals, not diagnoses. Check before adjusting; "
                         "follow the site's procedures.")
            created_at = _iso(now)
            cur = conn.execute(
                "INSERT INTO alert_outbox (episode_id, kind, severity, title, body, chart, created_at, "
                "created_epoch) VALUES (?,?,?,?,?,?,?,?)",
                (",".join(sorted({m[2] for m in merged})), "summary", sev,
                 f"linewatch: {len(merged)} held-back alert(s) [{sev}]", "\n".join(lines), None,
                 created_at, now),
            )
            sid = int(cur.lastrowid)
            conn.execute("INSERT INTO alert_delivery (alert_id, target, created) VALUES (?,?,?)",
                         (sid, target.key, now))
            conn.executemany(
                "UPDATE alert_delivery SET status = 'summarised', summary_alert_id = ? WHERE id = ?",
                [(sid, m[0]) for m in merged],
            )
            # the summary opens the next window and counts in it
            conn.execute(
                "INSERT INTO alert_rate_window (target, window_start, sent) VALUES (?, ?, 0)",
                (target.key, now),
            )


# -- listings for status and digest ------------------------------------------------------------
def _listing(conn: sqlite3.Connection, status: str, since: float | None) -> list[dict[str, Any]]:
    rows = conn.execute(
        "SELECT d.id, d.alert_id, d.target, d.attempts, d.last_error, d.created, a.episode_id, a.kind, "
        "a.severity, a.title, a.created_at FROM alert_delivery d JOIN alert_outbox a ON a.id = d.alert_id "
        "WHERE d.status = ? AND d.created >= ? ORDER BY d.id",
        (status, since if since is not None else float("-inf")),
    ).fetchall()
    keys = ("delivery_id", "alert_id", "target", "attempts", "last_error", "created", "episode_id",
            "kind", "severity", "title", "created_at")
    return [dict(zip(keys, r)) for r in rows]


def expired_alerts(conn: sqlite3.Connection, since: float | None = None) -> list[dict[str, Any]]:
    """Deliveries given up after ``max_age_s`` of failures (target names are already redacted)."""
    return _listing(conn, "expired", since)


def digest_alerts(conn: sqlite3.Connection, since: float | None = None) -> list[dict[str, Any]]:
    """Deliveries kept for the digest by quiet hours (``quiet_policy='digest'``)."""
    return _listing(conn, "digest", since)


def delivery_counts(conn: sqlite3.Connection) -> dict[str, dict[str, int]]:
    """{target: {status: count}} -- for the status command."""
    out: dict[str, dict[str, int]] = {}
    for target, status, n in conn.execute(
        "SELECT target, status, COUNT(*) FROM alert_delivery GROUP BY target, status"
    ):
        out.setdefault(target, {})[status] = n
    return out


def attempts_of(conn: sqlite3.Connection, alert_id: int) -> list[dict[str, Any]]:
    rows = conn.execute(
        "SELECT t.at_iso, t.target, t.ok, t.error FROM alert_attempt t JOIN alert_delivery d "
        "ON d.id = t.delivery_id WHERE d.alert_id = ? ORDER BY t.id",
        (alert_id,),
    ).fetchall()
    return [dict(zip(("at", "target", "ok", "error"), r)) for r in rows]


# -- plugging into the daemon --------------------------------------------------------------------------
def targets_from_config(cfg: Any) -> list[Target]:
    """:class:`Target` objects from ``cfg.alerts`` (``watcher.config.AlertTarget``; read by attribute)."""
    from datetime import time as dtime

    from watcher.notify import QuietHours

    out = []
    for a in getattr(cfg, "alerts", None) or []:
        q = getattr(a, "quiet_hours", None)
        quiet = QuietHours(dtime.fromisoformat(q[0]), dtime.fromisoformat(q[1])) if q else None
        out.append(Target(
            url=a.url,
            name=getattr(a, "name", "") or "",
            characteristics=tuple(getattr(a, "characteristics", None) or ()),
            sources=tuple(getattr(a, "sources", None) or ()),
            min_severity=getattr(a, "min_severity", "notice") or "notice",
            quiet_hours=quiet,
            quiet_policy=getattr(a, "quiet_policy", "hold") or "hold",
            rate_limit=getattr(a, "max_per_hour", None),
        ))
    return out


def outbox_settings_from_config(cfg: Any) -> OutboxSettings:
    """:class:`OutboxSettings` from ``cfg.delivery`` and ``cfg.timezone``."""
    d = getattr(cfg, "delivery", None)
    if d is None:
        return OutboxSettings(tz=getattr(cfg, "timezone", "UTC") or "UTC")
    timeout = float(d.timeout)
    return OutboxSettings(
        backoff_base_s=float(d.retry_first),
        backoff_cap_s=max(float(d.retry_max), float(d.retry_first)),
        max_age_s=float(d.expire_after),
        connect_timeout_s=min(timeout, 5.0),
        read_timeout_s=timeout,
        call_timeout_s=2 * timeout + 5.0,
        tz=getattr(cfg, "timezone", "UTC") or "UTC",
    )


def episode_settings_from_config(cfg: Any, largest_windows: dict[str, int] | None = None):
    """:class:`watcher.episodes.EpisodeSettings` from ``cfg.episodes``.

    ``close_after`` None in the configuration means the default rule
    (:func:`watcher.episodes.default_close_after`) per characteristic, from
    ``largest_windows`` {characteristic: largest detector window}.
    """
    from watcher.episodes import EpisodeSettings, default_close_after

    e = getattr(cfg, "episodes", None)
    by_char = {k: default_close_after(w) for k, w in (largest_windows or {}).items()}
    if e is None:
        return EpisodeSettings(close_after_by_characteristic=by_char)
    fixed = getattr(e, "close_after", None)
    return EpisodeSettings(
        close_after=int(fixed) if fixed else default_close_after(None),
        close_after_by_characteristic={} if fixed else by_char,
        pvalue_factor=float(getattr(e, "escalate_factor", 100.0)),
        alert_on_close=bool(getattr(e, "alert_on_close", False)),
        urgent_horizon_hours=float(getattr(e, "projection_hours", 8.0)),
        max_p_escalations=int(getattr(e, "p_escalations", 2)),
    )


def _largest_window(monitor: Any) -> int | None:
    wins = [int(getattr(getattr(monitor, "cc", None), "window", 0) or 0)]
    for params in (getattr(monitor, "spec", None) or {}).values():
        try:
            wins.append(int(params.get("window", 0) or 0))
        except (AttributeError, TypeError, ValueError):
            pass
    w = max(wins)
    return w or None


class AlertHook:
    """Daemon hook (``Daemon.hooks``): episodes, outbox, sender and silence watch.

    * ``start(daemon)``: creates the tables, the episode book and the silence
      watch, and starts the sender threads (own connections to the state file);
    * ``on_batch(conn, batch)``: inside the batch transaction, turns the
      batch's findings into episodes and enqueues the alerts; runs the
      closing check per characteristic; notes the sources that sent;
    * ``tick(daemon)``: after the commit, wakes the sender when alerts were
      queued; every ``silence_every_s`` checks for silent sources (its own
      short transaction);
    * ``close()``: stops the sender.
    """

    def __init__(self, cfg: Any, *, wall_clock: Callable[[], float] = _time.time,
                 stream: TextIO | None = None, silence_every_s: float = 30.0, chart_points: int = 200,
                 outbox_overrides: dict[str, Any] | None = None):
        from dataclasses import replace

        self.cfg = cfg
        self.targets = targets_from_config(cfg)
        self.outbox_settings = replace(outbox_settings_from_config(cfg), **(outbox_overrides or {}))
        self.wall_clock = wall_clock
        self.stream = stream
        self.silence_every_s = silence_every_s
        self.chart_points = chart_points
        self.daemon: Any = None
        self.book: Any = None
        self.silence: Any = None
        self.sender: OutboxSender | None = None
        self._queued = False
        self._next_silence = 0.0

    def start(self, daemon: Any) -> None:
        from watcher.episodes import EpisodeBook, SilenceRule, SilenceWatch, WorkingHours
        from watcher.episodes import ensure_schema as episodes_schema

        self.daemon = daemon
        store = daemon.store
        with store.transaction() as c:
            episodes_schema(c)
            ensure_schema(c)
        windows = {name: _largest_window(m) for name, m in (daemon.route.monitors if daemon.route else {}).items()}
        self.book = EpisodeBook(store.conn, episode_settings_from_config(self.cfg, windows))
        rules = {}
        for src in getattr(self.cfg, "sources", None) or []:
            gap = getattr(src, "gap", None)
            if not gap:
                continue
            wh = getattr(src, "working_hours", None)
            rules[src.name] = SilenceRule(
                float(gap),
                WorkingHours(dtime_of(wh[0]), dtime_of(wh[1]), frozenset(range(7))) if wh else None,
            )
        self.silence = SilenceWatch(self.book, rules, tz=self.outbox_settings.tz)
        if self.targets:
            self.sender = OutboxSender(store.path, self.targets, self.outbox_settings, stream=self.stream)
            self.sender.start()

    def _notices(self, conn: sqlite3.Connection, batch: Any) -> None:
        """News about a baseline (no spread; not normal) as an alert of its own."""
        from watcher.episodes import AlertIntent

        for name, text in getattr(batch, "notices", ()):
            m = self.daemon.route.monitors.get(name)
            it = AlertIntent(
                episode_id=f"baseline-{name}", kind="baseline", severity="notice", characteristic=name,
                source=m.source if m else "", pattern="baseline", title=f"{name}: baseline needs a look",
                body=text + "\nlinewatch is advisory; follow the site's procedures.", created_at=_iso(self.wall_clock()),
            )
            enqueue(conn, it, self.targets, now=self.wall_clock())
            self._queued = True

    def on_rebaseline(self, conn: sqlite3.Connection, characteristic: str, note: str) -> None:
        """Inside the caller's transaction: close the characteristic's episodes and queue what that tells."""
        from watcher.episodes import close_for_rebaseline

        for it in close_for_rebaseline(conn, characteristic, note, self.book.settings):
            enqueue(conn, it, self.targets, now=self.wall_clock())
            self._queued = True

    def _facts(self, m: Any):
        from watcher.alert_text import CharacteristicFacts

        cc = m.cc
        return CharacteristicFacts(unit=cc.unit or "", target=cc.target, lsl=cc.lsl, usl=cc.usl,
                                   centre=m.raw_centre, sigma=m.raw_sigma, source=m.source)

    def _recent(self, m: Any, f: Any = None, batch: Any = None):
        """Chart data ending at finding ``f``'s reading: from the batch's readings when the
        finding lies further back than the monitor keeps (a large batch, catching up after a stop)."""
        kept = (list(m.recent_values), list(m.recent_times))
        got = getattr(batch, "values", {}).get(m.cc.name) if batch is not None else None
        if got and len(got) > len(kept[0]):
            kept = ([v for v, _ in got], [t for _, t in got])
        values, times = kept
        start = m.count - len(values)  # reading index of values[0]
        end = len(values) if f is None else max(0, min(len(values), f.index + 1 - start))
        lo = max(0, end - self.chart_points)
        vals, times = values[lo:end], times[lo:end]
        if not vals:
            return None
        return (vals, times if any(t is not None for t in times) else None, start + lo)

    def on_batch(self, conn: sqlite3.Connection, batch: Any) -> None:
        book = self.book
        book.conn = conn
        monitors = self.daemon.route.monitors
        intents = []
        for f in batch.findings:
            m = monitors.get(f.characteristic)
            # close what ended before this reading, so a pattern that stopped and came back
            # inside one batch makes two episodes, as it would reading by reading
            intents += book.on_reading(f.characteristic, f.index - 1, None)
            intents += book.on_finding(f, self._facts(m) if m else None, self._recent(m, f, batch) if m else None)
        sources = set()
        for name in batch.touched:
            m = monitors.get(name)
            if m is None:
                continue
            sources.add(m.source)
            intents += book.on_reading(name, m.count - 1, m.last_time)
        now = datetime.fromtimestamp(self.wall_clock(), timezone.utc)
        for s in sources:
            intents += self.silence.seen(s, now)
        for it in intents:
            enqueue(conn, it, self.targets, now=self.wall_clock())
        self._queued = self._queued or bool(intents)
        self._notices(conn, batch)

    def tick(self, daemon: Any) -> None:
        if self._queued and self.sender is not None:
            self.sender.kick()
        self._queued = False
        t = self.wall_clock()
        if self.silence is None or not self.silence.rules or t < self._next_silence:
            return
        self._next_silence = t + self.silence_every_s
        with daemon.store.transaction() as c:
            self.book.conn = c
            intents = self.silence.check(datetime.fromtimestamp(t, timezone.utc))
            for it in intents:
                enqueue(c, it, self.targets, now=t)
        if intents and self.sender is not None:
            self.sender.kick()

    def close(self) -> None:
        if self.sender is not None:
            self.sender.stop()


def dtime_of(text: str):
    from datetime import time as dtime

    return dtime.fromisoformat(text)


def target_health(conn: sqlite3.Connection, now: float | None = None) -> list[dict[str, Any]]:
    """Per target: waiting deliveries, age of the oldest, last success, last error (redacted).

    For the status command; target names are the stored (redacted) keys.
    """
    t = _time.time() if now is None else now
    out = []
    for (target,) in conn.execute("SELECT DISTINCT target FROM alert_delivery ORDER BY target").fetchall():
        waiting, oldest = conn.execute(
            "SELECT COUNT(*), MIN(created) FROM alert_delivery WHERE target = ? AND status = 'pending'", (target,)
        ).fetchone()
        ok = conn.execute(
            "SELECT MAX(at) FROM alert_attempt WHERE target = ? AND ok = 1", (target,)
        ).fetchone()[0]
        err = conn.execute(
            "SELECT at, error FROM alert_attempt WHERE target = ? AND ok = 0 ORDER BY id DESC LIMIT 1", (target,)
        ).fetchone()
        out.append({
            "target": target,
            "waiting": waiting,
            "oldest_waiting_s": (t - oldest) if oldest is not None else None,
            "last_sent": _iso(ok) if ok is not None else None,
            "last_error": scrub_text(err[1]) if err and err[1] else None,
            "last_error_at": _iso(err[0]) if err else None,
        })
    return out
