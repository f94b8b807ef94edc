"""The daily digest: when it is due, sending it, and never twice for one period.

Each local day D has one send instant, ``digest.at`` on D in the site's zone
(``timezone`` in the config, via zoneinfo):

* on the spring-forward day a clock time inside the gap does not exist; the
  digest is sent at the first valid instant after it, the end of the gap
  (Europe/Berlin, 29 March 2026, ``at: "02:30"`` -> 03:00 CEST = 01:00 UTC);
* on the fall-back day a clock time inside the repeated hour exists twice;
  the digest is sent once, at the first occurrence (fold = 0).

The period of day D runs from the send instant of D-1 to that of D, so
consecutive digests tile time (a period is 23 or 25 hours around a change).

A period is due when its end has passed and it is not in the ``digest_sent``
table.  The first time a state database meets the schedule it is "armed"
(``meta`` key ``digest_armed_at``); periods that ended before that are never
due, so a new installation does not send a digest of a day it did not watch.
After downtime the periods missed are due once each on start-up, the most
recent ``MAX_CATCH_UP`` at most.  A period is claimed in ``digest_sent``
before it is sent (at most once: a crash mid-send does not send it again;
the row says ``sending`` and the files stay in the digest folder).
"""

from __future__ import annotations

import logging
import sqlite3
from dataclasses import dataclass
from datetime import date, datetime, time as dtime, timedelta, timezone
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from watcher.digest import Period
from watcher.store import register_schema

log = logging.getLogger("watcher.schedule")

MAX_CATCH_UP = 7
ARMED_KEY = "digest_armed_at"

SCHEMA = [
    """CREATE TABLE IF NOT EXISTS digest_sent (
        period TEXT PRIMARY KEY, start_utc TEXT NOT NULL, end_utc TEXT NOT NULL, status TEXT NOT NULL,
        claimed_at TEXT NOT NULL, finished_at TEXT, html_path TEXT, delivered TEXT)""",
]


@register_schema
def ensure_schema(conn: sqlite3.Connection) -> None:
    for ddl in SCHEMA:
        conn.execute(ddl)
    conn.execute("CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)")


def _iso(dt: datetime) -> str:
    return dt.astimezone(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


def _parse(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


def local_instant(day: date, at: dtime, tz: ZoneInfo) -> datetime:
    """The UTC instant of clock time ``at`` on ``day`` in ``tz``.

    A time in a spring-forward gap gives the end of the gap; a time in a
    fall-back overlap gives its first occurrence.

    >>> b = ZoneInfo("Europe/Berlin")
    >>> local_instant(date(2026, 3, 29), dtime(2, 30), b).isoformat()
    '2026-03-29T01:00:00+00:00'
    >>> local_instant(date(2026, 10, 25), dtime(2, 30), b).isoformat()
    '2026-10-25T00:30:00+00:00'
    >>> local_instant(date(2026, 12, 2), dtime(6, 30), b).isoformat()
    '2026-12-02T05:30:00+00:00'
    """
    naive = datetime.combine(day, at)
    first = naive.replace(tzinfo=tz, fold=0)
    u = first.astimezone(timezone.utc)
    if u.astimezone(tz).replace(tzinfo=None) == naive:
        return u  # exists (fold=0 is the first occurrence where it exists twice)
    # In a gap: fold=0 reads it with the offset before the change, fold=1 with the one after.
    # The change itself lies between the two readings; find it to the second.
    a = naive.replace(tzinfo=tz, fold=1).astimezone(timezone.utc)
    b = u
    if a > b:
        a, b = b, a
    off_a = a.astimezone(tz).utcoffset()
    while (b - a) > timedelta(seconds=1):
        mid = a + (b - a) / 2
        if mid.astimezone(tz).utcoffset() == off_a:
            a = mid
        else:
            b = mid
    return b.replace(microsecond=0)


@dataclass(frozen=True)
class DigestPeriod(Period):
    """A scheduled digest period: ``day`` is the local date of its end (the key in ``digest_sent``)."""

    day: date | None = None

    @property
    def key(self) -> str:
        return self.day.isoformat() if self.day else self.name


class DigestSchedule:
    """When the digest of ``cfg`` is due.  ``due(now_utc, conn)`` and ``mark_sent(conn, period)``."""

    def __init__(self, cfg: Any):
        from watcher.config import DigestConfig

        self.cfg = cfg
        self.dc = cfg.digest or DigestConfig()
        self.tz = ZoneInfo(cfg.timezone)
        h, m = self.dc.at.split(":")
        self.at = dtime(int(h), int(m))

    def send_instant(self, day: date) -> datetime:
        return local_instant(day, self.at, self.tz)

    def period_of(self, day: date) -> DigestPeriod:
        """The period whose digest is sent on local date ``day``."""
        end = self.send_instant(day)
        start = self.send_instant(day - timedelta(days=1))
        return DigestPeriod(start, end, self.cfg.timezone, day.strftime("%Y-%m-%d"), day)

    def latest_day(self, now_utc: datetime) -> date:
        """The local date of the most recent send instant at or before ``now_utc``."""
        d = now_utc.astimezone(self.tz).date() + timedelta(days=1)
        while self.send_instant(d) > now_utc:
            d -= timedelta(days=1)
        return d

    def next_instant(self, now_utc: datetime) -> datetime:
        return self.send_instant(self.latest_day(now_utc) + timedelta(days=1))

    def armed_at(self, conn: sqlite3.Connection, now_utc: datetime) -> datetime:
        ensure_schema(conn)
        row = conn.execute("SELECT value FROM meta WHERE key = ?", (ARMED_KEY,)).fetchone()
        if row:
            return _parse(row[0])
        conn.execute("INSERT OR IGNORE INTO meta (key, value) VALUES (?, ?)", (ARMED_KEY, _iso(now_utc)))
        return now_utc

    def due(self, now_utc: datetime, conn: sqlite3.Connection) -> list[DigestPeriod]:
        """Periods whose digest is due at ``now_utc`` (oldest first), each only until marked."""
        if now_utc.tzinfo is None:
            raise ValueError("now_utc must be an aware datetime")
        armed = self.armed_at(conn, now_utc)
        out = []
        d = self.latest_day(now_utc)
        for _ in range(MAX_CATCH_UP):
            p = self.period_of(d)
            if p.end < armed:
                break
            if not self.is_sent(conn, p):
                out.append(p)
            d -= timedelta(days=1)
        return out[::-1]

    @staticmethod
    def is_sent(conn: sqlite3.Connection, period: DigestPeriod) -> bool:
        ensure_schema(conn)
        return conn.execute("SELECT 1 FROM digest_sent WHERE period = ?", (period.key,)).fetchone() is not None

    @staticmethod
    def mark_sent(conn: sqlite3.Connection, period: DigestPeriod, *, status: str = "sent",
                  html_path: str | None = None, delivered: str | None = None) -> bool:
        """Record the period as claimed/sent; False if it was recorded already (then do not send)."""
        ensure_schema(conn)
        now = _iso(datetime.now(timezone.utc))
        cur = conn.execute(
            "INSERT OR IGNORE INTO digest_sent (period, start_utc, end_utc, status, claimed_at, finished_at,"
            " html_path, delivered) VALUES (?,?,?,?,?,?,?,?)",
            (period.key, _iso(period.start), _iso(period.end), status, now,
             now if status != "sending" else None, html_path, delivered),
        )
        return cur.rowcount == 1

    @staticmethod
    def finish(conn: sqlite3.Connection, period: DigestPeriod, status: str, html_path: str | None,
               delivered: str | None) -> None:
        conn.execute("UPDATE digest_sent SET status = ?, finished_at = ?, html_path = ?, delivered = ? WHERE period = ?",
                     (status, _iso(datetime.now(timezone.utc)), html_path, delivered, period.key))


# -- building, saving and sending --------------------------------------------------------------


@dataclass
class SendResult:
    period: Period
    paths: dict[str, Path]
    delivered: dict[str, bool]
    errors: dict[str, str]

    @property
    def ok(self) -> bool:
        return all(self.delivered.values())


def digest_folder(cfg: Any) -> Path:
    from watcher.config import DigestConfig

    return cfg.resolve((cfg.digest or DigestConfig()).folder)


def deliver(urls: list[str], title: str, text: str, html_text: str, html_path: Path | None,
            timeout: float = 30.0) -> tuple[dict[str, bool], dict[str, str]]:
    """Send the digest to each apprise URL: HTML body, the HTML file attached where the
    target takes attachments.  ``console://`` prints the text version."""
    import sys

    from watcher.redact import redact_url

    delivered: dict[str, bool] = {}
    errors: dict[str, str] = {}
    for url in urls:
        key = redact_url(url)
        if url.startswith("console://"):
            sys.stdout.write(f"== {title}\n{text}\n")
            sys.stdout.flush()
            delivered[key] = True
            continue
        try:
            import apprise

            a = apprise.Apprise()
            if not a.add(url):
                raise ValueError("apprise does not accept this URL")
            attach = str(html_path) if html_path is not None else None
            ok = bool(a.notify(title=title, body=html_text, body_format=apprise.NotifyFormat.HTML, attach=attach))
            if not ok and attach is not None:
                # Some targets refuse attachments: the HTML body alone is the digest too.
                ok = bool(a.notify(title=title, body=html_text, body_format=apprise.NotifyFormat.HTML))
            delivered[key] = ok
            if not ok:
                errors[key] = "the target did not accept the digest"
        except Exception as exc:  # one broken target must not stop the others or the daemon
            from watcher.redact import scrub_text, secrets_in

            delivered[key] = False
            errors[key] = scrub_text(f"{type(exc).__name__}: {exc}", secrets_in(url))[:500]
    return delivered, errors


def make_digest(conn: sqlite3.Connection, cfg: Any, period: Period, out_dir: Path | None = None,
                *, charts: bool = True) -> tuple[dict, dict[str, Path]]:
    """Build the digest of ``period`` and write its three files; return (data, paths)."""
    from watcher.digest import build_digest
    from watcher.digest_render import write_digest

    d = build_digest(conn, cfg, period)
    paths = write_digest(d, out_dir or digest_folder(cfg), charts=charts)
    return d, paths


def send_digest(conn: sqlite3.Connection, cfg: Any, period: Period, *, urls: list[str] | None = None,
                out_dir: Path | None = None) -> SendResult:
    """Build, save and send one digest (no bookkeeping; see :meth:`DigestHook.run_due`)."""
    from watcher.config import DigestConfig

    d, paths = make_digest(conn, cfg, period, out_dir)
    html_text = paths["html"].read_text(encoding="utf-8")
    text = paths["text"].read_text(encoding="utf-8")
    loud = sum(1 for c in d["characteristics"] if c["episodes"])
    title = f"linewatch digest {d['period']['label']}: {loud} characteristic{'s' if loud != 1 else ''} with episodes"
    targets = urls if urls is not None else list((cfg.digest or DigestConfig()).to)
    delivered, errors = deliver(targets, title, text, html_text, paths["html"])
    return SendResult(period, paths, delivered, errors)


class DigestHook:
    """Daemon hook: sends the due digests and keeps the aggregates pruned.

    Add to ``Daemon.hooks``.  ``tick`` is cheap between send instants (one
    comparison).  At an instant, or on start-up with missed periods, it
    claims the due periods and prunes the aggregates in the reading thread
    (two short transactions), then builds, saves and sends the digests in a
    background thread with its own SQLite connection, so a slow target never
    holds up the reading path.  ``close`` waits up to ``join_timeout`` s for it.
    """

    def __init__(self, cfg: Any, clock: Any = None, join_timeout: float = 30.0):
        self.cfg = cfg
        self.schedule = DigestSchedule(cfg)
        self.clock = clock or (lambda: datetime.now(timezone.utc))
        self.join_timeout = join_timeout
        self._next: datetime | None = None
        self._thread: Any = None
        self.sent: list[SendResult] = []

    def start(self, daemon: Any) -> None:
        self._next = None  # check at the first tick (missed digests)

    def tick(self, daemon: Any) -> None:
        import threading

        now = self.clock()
        if self._next is not None and now < self._next:
            return
        if self._thread is not None and self._thread.is_alive():
            return  # the last run is still sending; look again next tick
        self._next = self.schedule.next_instant(now)
        try:
            claimed = self.claim(daemon.store, now)
        except Exception:  # the digest must never stop the reading path
            log.exception("digest schedule check failed")
            return
        if claimed:
            self._thread = threading.Thread(target=self._send_all, args=(daemon.store.path, claimed),
                                            name="digest", daemon=True)
            self._thread.start()

    def close(self) -> None:
        if self._thread is not None:
            self._thread.join(self.join_timeout)

    def claim(self, store: Any, now: datetime) -> list[DigestPeriod]:
        """Claim the due periods (at most once each) and prune the aggregates; no sending."""
        from watcher import aggregates as agg

        with store.transaction() as c:
            periods = self.schedule.due(now, c)
            claimed = [p for p in periods if self.schedule.mark_sent(c, p, status="sending")]
        retention = self.cfg.digest.retention_days if self.cfg.digest else agg.DEFAULT_RETENTION_DAYS
        with store.transaction() as c:
            agg.prune_for(c, retention, now)
        return claimed

    def run_due(self, store: Any, now: datetime) -> list[SendResult]:
        """Claim and send in the calling thread (tests, a one-off run); returns what was sent."""
        return self._send_all(store.path, self.claim(store, now))

    def _send_all(self, db_path: Any, periods: list[DigestPeriod]) -> list[SendResult]:
        out = []
        conn = sqlite3.connect(str(db_path), timeout=30, isolation_level=None)
        try:
            for p in periods:
                try:
                    r = send_digest(conn, self.cfg, p)
                except Exception as exc:
                    log.exception("digest for %s could not be made", p.key)
                    _write(conn, lambda c: self.schedule.finish(c, p, "failed", None, f"{type(exc).__name__}: {exc}"[:500]))
                    continue
                status = "sent" if r.ok else "undelivered"
                delivered = ", ".join(f"{k}: {'ok' if v else r.errors.get(k, 'failed')}" for k, v in r.delivered.items())
                _write(conn, lambda c: self.schedule.finish(c, p, status, str(r.paths["html"]), delivered or "no targets"))
                log.info("digest %s saved to %s; %s", p.key, r.paths["html"], delivered or "no targets")
                out.append(r)
                self.sent.append(r)
        finally:
            conn.close()
        return out


def _write(conn: sqlite3.Connection, fn: Any) -> None:
    conn.execute("BEGIN IMMEDIATE")
    try:
        fn(conn)
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


class AggregatesHook:
    """Daemon hook: adds each batch's readings to the aggregates inside the batch transaction."""

    def __init__(self, cfg: Any, clock: Any = None):
        from watcher import aggregates as agg

        self.limits = agg.limits_from_config(cfg)
        self.tz = ZoneInfo(cfg.timezone)
        self.clock = clock or (lambda: datetime.now(timezone.utc))

    def on_batch(self, conn: sqlite3.Connection, batch: Any) -> None:
        from watcher import aggregates as agg

        values = getattr(batch, "values", None)
        if values:
            agg.record_values(conn, values, _iso(self.clock()), limits=self.limits, tz=self.tz)
