"""Notification targets: who gets which alert, when, and how it is handed over.

A :class:`Target` is one apprise URL (or ``console://``) with its filters:

* ``characteristics`` / ``sources``: names or shell-style globs
  (``fnmatch``); empty means all.  Silence alerts have no characteristic, so
  for them only the ``sources`` filter applies;
* ``min_severity``: alerts below it are not routed to this target;
* ``quiet_hours`` (in the site's time zone): only the top severity
  (``urgent``) passes; the rest is held until the quiet hours end and then
  sent (``quiet_policy="hold"``), or left for the nightly digest
  (``quiet_policy="digest"``);
* ``rate_limit``: at most this many messages in one hour window (the window
  opens with the first message); further ones are merged into one summary
  sent when the window closes.  ``urgent`` alerts pass the limit unless
  ``rate_limit_urgent=True``.

The static filters are applied when an alert is written to the outbox; quiet
hours and rate limit when it is sent (they depend on the sending time).

>>> t = Target("json://127.0.0.1:9/x", characteristics=("fill*",), min_severity="notice")
>>> t.wants("fill weight", "line2", "notice"), t.wants("seal temp", "line2", "urgent")
(True, False)
"""

from __future__ import annotations

import fnmatch
import logging
import os
import sys
import tempfile
import threading
from dataclasses import dataclass, field
from datetime import datetime, time as dtime, timedelta
from typing import Any, TextIO
from zoneinfo import ZoneInfo

from watcher.episodes import SEVERITIES, severity_rank
from watcher.redact import redact_url, scrub_text, secrets_in

log = logging.getLogger("linewatch.notify")

CONSOLE_SCHEME = "console://"
QUIET_POLICIES = ("hold", "digest")


def _parse_clock(v: Any, what: str) -> dtime:
    if isinstance(v, dtime):
        return v
    try:
        return dtime.fromisoformat(str(v))
    except ValueError:
        raise ValueError(f"{what} must be a time of day like '22:00', got {v!r}") from None


@dataclass(frozen=True)
class QuietHours:
    """Quiet time of day from ``start`` to ``end`` (local time of the site).

    ``end <= start`` means the quiet time runs past midnight.  ``days``
    (0 = Monday) limits the days on which quiet time *starts*; None = every day.

    >>> q = QuietHours(dtime(22), dtime(6))
    >>> tz = ZoneInfo("Europe/Berlin")
    >>> q.contains(datetime(2026, 12, 2, 23, 30, tzinfo=tz)), q.contains(datetime(2026, 12, 2, 7, 0, tzinfo=tz))
    (True, False)
    >>> q.ends_after(datetime(2026, 12, 2, 23, 30, tzinfo=tz)).isoformat()
    '2026-12-03T06:00:00+01:00'
    """

    start: dtime
    end: dtime
    days: frozenset[int] | None = None

    def _windows(self, local: datetime):
        tz = local.tzinfo
        for back in (1, 0):
            d = local.date() - timedelta(days=back)
            if self.days is not None and d.weekday() not in self.days:
                continue
            s = datetime.combine(d, self.start, tzinfo=tz)
            e_day = d if self.end > self.start else d + timedelta(days=1)
            yield s, datetime.combine(e_day, self.end, tzinfo=tz)

    def contains(self, local: datetime) -> bool:
        return any(s <= local < e for s, e in self._windows(local))

    def ends_after(self, local: datetime) -> datetime | None:
        """End of the quiet window containing ``local`` (None when not quiet)."""
        ends = [e for s, e in self._windows(local) if s <= local < e]
        return max(ends) if ends else None


@dataclass(frozen=True)
class Target:
    """One place alerts go to."""

    url: str
    name: str = ""
    characteristics: tuple[str, ...] = ()
    sources: tuple[str, ...] = ()
    min_severity: str = "notice"
    quiet_hours: QuietHours | None = None
    quiet_policy: str = "hold"
    rate_limit: int | None = None
    rate_limit_urgent: bool = False
    chart: bool = True
    console: bool = False

    def __post_init__(self) -> None:
        severity_rank(self.min_severity)
        if self.quiet_policy not in QUIET_POLICIES:
            raise ValueError(f"quiet_policy must be one of {QUIET_POLICIES}, got {self.quiet_policy!r}")
        if self.rate_limit is not None and int(self.rate_limit) < 1:
            raise ValueError(f"rate_limit must be >= 1 per hour, got {self.rate_limit!r}")
        if not self.is_console and "://" not in self.url:
            raise ValueError(f"target url {redact_url(self.url)!r} is not a URL (scheme://...)")

    @property
    def key(self) -> str:
        """The name stored in tables and logs: ``name``, else the redacted URL."""
        return self.name or redact_url(self.url)

    @property
    def is_console(self) -> bool:
        return self.console or self.url == "console" or self.url.startswith(CONSOLE_SCHEME)

    def wants(self, characteristic: str, source: str, severity: str) -> bool:
        """Static filter: severity, characteristic and source globs."""
        if severity_rank(severity) < severity_rank(self.min_severity):
            return False
        if self.characteristics and characteristic:
            if not any(fnmatch.fnmatchcase(characteristic, g) for g in self.characteristics):
                return False
        # (no characteristic: a silence alert; only the sources filter applies)
        if self.sources and not any(fnmatch.fnmatchcase(source or "", g) for g in self.sources):
            return False
        return True


def target_from_dict(d: dict[str, Any]) -> Target:
    """A :class:`Target` from plain configuration data.

    Keys: url (required), name, characteristics, sources, min_severity,
    quiet_hours {start, end, days}, quiet_policy, rate_limit,
    rate_limit_urgent, chart, console.

    >>> target_from_dict({"url": "console://", "quiet_hours": {"start": "22:00", "end": "06:00"}}).quiet_hours.end
    datetime.time(6, 0)
    """
    if "url" not in d:
        raise ValueError("a target needs a url")
    q = d.get("quiet_hours")
    quiet = None
    if q:
        days = q.get("days")
        quiet = QuietHours(
            _parse_clock(q.get("start"), "quiet_hours.start"),
            _parse_clock(q.get("end"), "quiet_hours.end"),
            frozenset(int(x) for x in days) if days is not None else None,
        )

    def globs(v: Any) -> tuple[str, ...]:
        if v is None:
            return ()
        return (v,) if isinstance(v, str) else tuple(str(x) for x in v)

    return Target(
        url=str(d["url"]),
        name=str(d.get("name") or ""),
        characteristics=globs(d.get("characteristics")),
        sources=globs(d.get("sources")),
        min_severity=str(d.get("min_severity", "notice")),
        quiet_hours=quiet,
        quiet_policy=str(d.get("quiet_policy", "hold")),
        rate_limit=int(d["rate_limit"]) if d.get("rate_limit") is not None else None,
        rate_limit_urgent=bool(d.get("rate_limit_urgent", False)),
        chart=bool(d.get("chart", True)),
        console=bool(d.get("console", False)),
    )


def quiet_decision(target: Target, severity: str, now: datetime) -> tuple[str, datetime | None]:
    """('send', None), ('hold', until) or ('digest', None) for an alert at ``now`` (aware, site zone).

    >>> t = Target("console://", quiet_hours=QuietHours(dtime(22), dtime(6)))
    >>> tz = ZoneInfo("UTC")
    >>> quiet_decision(t, "urgent", datetime(2026, 12, 2, 23, tzinfo=tz))
    ('send', None)
    >>> quiet_decision(t, "notice", datetime(2026, 12, 2, 23, tzinfo=tz))[0]
    'hold'
    """
    q = target.quiet_hours
    if q is None or severity == SEVERITIES[-1]:
        return "send", None
    end = q.ends_after(now)
    if end is None:
        return "send", None
    if target.quiet_policy == "digest":
        return "digest", None
    return "hold", end


# -- handing a message over ----------------------------------------------------------
class SecretScrubber(logging.Filter):
    """Logging filter that removes known secrets (and URL credentials) from records.

    Installed on the ``apprise`` logger by :class:`Deliverer`, because a
    library's own log lines may quote parts of a URL.
    """

    def __init__(self) -> None:
        super().__init__()
        self.secrets: set[str] = set()
        self._lock = threading.Lock()

    def add(self, secrets: set[str]) -> None:
        with self._lock:
            self.secrets |= secrets

    def filter(self, record: logging.LogRecord) -> bool:
        try:
            msg = record.getMessage()
        except Exception:  # a broken record is not ours to fix
            return True
        with self._lock:
            secrets = set(self.secrets)
        clean = scrub_text(msg, secrets)
        if clean != msg:
            record.msg, record.args = clean, None
        return True


_SCRUBBER = SecretScrubber()


# Loggers that may quote a request URL (a filter applies only to records
# created on its own logger, not on children, so each is named).
_SCRUBBED_LOGGERS = ("apprise", "urllib3.connectionpool", "urllib3.connection", "urllib3.util.retry",
                     "requests")


def _install_scrubber() -> None:
    for name in _SCRUBBED_LOGGERS:
        lg = logging.getLogger(name)
        if _SCRUBBER not in lg.filters:
            lg.addFilter(_SCRUBBER)


def with_timeouts(url: str, connect_s: float, read_s: float) -> str:
    """Add apprise's ``cto`` / ``rto`` socket timeouts unless the URL sets them.

    >>> with_timeouts("json://h/p?x=1", 2, 5)
    'json://h/p?x=1&cto=2&rto=5'
    """
    q = url.split("?", 1)[1] if "?" in url else ""
    names = {p.split("=", 1)[0] for p in q.split("&") if p}
    extra = []
    if "cto" not in names:
        extra.append(f"cto={connect_s:g}")
    if "rto" not in names:
        extra.append(f"rto={read_s:g}")
    if not extra:
        return url
    return url + ("&" if "?" in url else "?") + "&".join(extra)


class Deliverer:
    """Hands one message to one target; returns (ok, error text with secrets removed).

    One instance per sender thread (apprise objects are kept per target and
    not shared across threads).
    """

    def __init__(
        self,
        connect_timeout: float = 5.0,
        read_timeout: float = 10.0,
        call_timeout: float = 30.0,
        stream: TextIO | None = None,
    ):
        self.connect_timeout = connect_timeout
        self.read_timeout = read_timeout
        self.call_timeout = call_timeout
        self.stream = stream
        self._apprise: dict[str, Any] = {}
        _install_scrubber()

    def _apprise_for(self, target: Target):
        obj = self._apprise.get(target.url)
        if obj is None:
            import apprise  # lazily: the reading path never needs it

            _SCRUBBER.add(secrets_in(target.url))
            obj = apprise.Apprise()
            if not obj.add(with_timeouts(target.url, self.connect_timeout, self.read_timeout)):
                raise ValueError(f"apprise does not accept the target URL {target.key}")
            self._apprise[target.url] = obj
        return obj

    def send(self, target: Target, title: str, body: str, png: bytes | None = None) -> tuple[bool, str]:
        if target.is_console:
            out = self.stream or sys.stdout
            out.write(f"== {title}\n{body}\n\n")
            out.flush()
            return True, ""
        secrets = secrets_in(target.url)
        path = None
        try:
            obj = self._apprise_for(target)
            if png is not None and target.chart:
                fd, path = tempfile.mkstemp(prefix="linewatch-chart-", suffix=".png")
                with os.fdopen(fd, "wb") as fh:
                    fh.write(png)
            result = obj.notify(
                title=title,
                body=body,
                attach=path,
                timeout=self.call_timeout,
            )
            if bool(result):
                return True, ""
            errs = []
            try:
                for entry in result.logs():
                    if entry.level in ("WARNING", "ERROR", "CRITICAL"):
                        errs.append(entry.message)
            except Exception:  # older result objects: no logs
                pass
            status = getattr(getattr(result, "status", None), "name", "FAILURE")
            text = f"{status}: " + (" | ".join(errs) if errs else "delivery failed")
            return False, scrub_text(text, secrets)[:1000]
        except Exception as exc:  # a misbehaving plugin must not kill the sender
            return False, scrub_text(f"{type(exc).__name__}: {exc}", secrets)[:1000]
        finally:
            if path:
                try:
                    os.unlink(path)
                except OSError:
                    pass
