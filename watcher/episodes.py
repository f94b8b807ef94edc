"""Episodes: findings of one pattern on one characteristic, told once.

A persistent pattern makes a detector fire again and again (each detector
restarts after a signal, so a shift that stays produces a finding every few
dozen readings).  The supervisor should hear about it once, then again only
when there is news.  An *episode* groups those findings:

* it **opens** on the first finding of a pattern for a characteristic;
* it **stays open** while findings of that pattern keep coming;
* it **closes** when the pattern has been absent for ``close_after``
  readings of that characteristic, or when the characteristic is
  re-baselined (the old reference no longer applies).

Alerts (:class:`AlertIntent`) are produced on opening, on escalation and,
when configured, on closing.  Escalation means news:

* a reading beyond a specification limit (an ``out_of_spec`` finding) while a
  pattern episode is open -- once per episode;
* a rise in severity (``notice`` -> ``urgent``, e.g. a drift now projected to
  reach a limit within the horizon) -- once per level;
* the p-value falling below the last alerted one by ``pvalue_factor``
  (default 100) -- each such step is a new state, so never twice the same.

Acknowledged episodes get no more escalation alerts.  Severities are ours:
``info`` (closing), ``notice`` (a significant pattern, within
specification), ``urgent`` (a reading out of specification, or a projection
to leave it within ``urgent_horizon_hours``).

Everything runs inside the caller's transaction: no method commits.  State
lives in SQLite (table ``episodes``), so a restarted daemon continues its
open episodes instead of announcing them again.

>>> import sqlite3
>>> from watcher.records import Finding
>>> conn = sqlite3.connect(":memory:")
>>> book = EpisodeBook(conn, EpisodeSettings(close_after=100))
>>> f = Finding("fill weight", "shift", "CUSUM", 1e-5, 50, None, 40, None, "up", 0.8, "")
>>> [i.kind for i in book.on_finding(f)]
['opened']
>>> f2 = Finding("fill weight", "shift", "CUSUM", 5e-6, 60, None, 41, None, "up", 0.8, "")
>>> book.on_finding(f2)
[]
>>> book.on_reading("fill weight", 159, None)
[]
>>> book.open_episodes()[0].state
'open'
>>> book.on_reading("fill weight", 160, None)  # 100 readings without the pattern
[]
>>> book.open_episodes()
[]
"""

from __future__ import annotations

import math
import secrets
import sqlite3
from dataclasses import asdict, dataclass, field, fields
from datetime import datetime, time as dtime, timedelta, timezone
from typing import Any, Callable
from zoneinfo import ZoneInfo

from watcher import alert_text
from watcher.alert_text import CharacteristicFacts, facts_from
from watcher.charts import chart_payload

SEVERITIES = ("info", "notice", "urgent")
STATES = ("open", "escalated", "acknowledged", "closed")
LIVE_STATES = ("open", "escalated", "acknowledged")

MIN_CLOSE_AFTER = 100


def severity_rank(severity: str) -> int:
    """Position of a severity in :data:`SEVERITIES` (ValueError if unknown).

    >>> severity_rank("urgent") > severity_rank("notice")
    True
    """
    try:
        return SEVERITIES.index(severity)
    except ValueError:
        raise ValueError(f"unknown severity {severity!r}; expected one of {SEVERITIES}") from None


def default_close_after(largest_window: int | None) -> int:
    """Readings without the pattern before an episode closes, by default.

    ``max(100, 2 * largest_window)``.  Why: a windowed detector restarts after
    it fires and needs up to a full window of new readings before it can fire
    again, so a pattern that is still present can go one window without a
    finding; twice the window allows one missed re-detection.  The floor of
    100 covers cumulative detectors (CUSUM, EWMA) that have no window: their
    out-of-control run length for a one-sigma shift is around ten readings
    (Montgomery 2009, table 9.3: ARL1 = 10.4 for k = 0.5, h = 5 -- from
    memory), so 100 readings without one is strong evidence the pattern has
    gone.  The factor 2 and the floor are common practice, no source.

    >>> default_close_after(None), default_close_after(30), default_close_after(80)
    (100, 100, 160)
    """
    if largest_window is None:
        return MIN_CLOSE_AFTER
    return max(MIN_CLOSE_AFTER, 2 * int(largest_window))


@dataclass
class EpisodeSettings:
    """How episodes open, escalate and close.

    ``clock`` gives the wall-clock time (aware datetime) used for
    ``opened_at``/``closed_at`` and the alerts' ``created_at``; tests inject it.
    """

    close_after: int = MIN_CLOSE_AFTER
    close_after_by_characteristic: dict[str, int] = field(default_factory=dict)
    pvalue_factor: float = 100.0
    # Stronger evidence alone is news this many times per episode; after that only a reading
    # beyond specification or a rise in severity is (a lasting shift would otherwise keep talking).
    max_p_escalations: int = 2
    alert_on_close: bool = False
    urgent_horizon_hours: float = 8.0
    clock: Callable[[], datetime] = field(default=lambda: datetime.now(timezone.utc))

    def __post_init__(self) -> None:
        if int(self.close_after) < 1:
            raise ValueError(f"close_after must be >= 1 reading, got {self.close_after!r}")
        for k, v in self.close_after_by_characteristic.items():
            if int(v) < 1:
                raise ValueError(f"close_after for {k!r} must be >= 1 reading, got {v!r}")
        if not float(self.pvalue_factor) > 1:
            raise ValueError(f"pvalue_factor must be > 1, got {self.pvalue_factor!r}")
        if not float(self.urgent_horizon_hours) >= 0:
            raise ValueError(
                f"urgent_horizon_hours must be >= 0, got {self.urgent_horizon_hours!r}"
            )

    def close_after_for(self, characteristic: str) -> int:
        return int(self.close_after_by_characteristic.get(characteristic, self.close_after))


@dataclass(frozen=True)
class AlertIntent:
    """One message to be sent about one episode (before routing to targets).

    ``kind``: opened, escalated, closed, silence, resumed.  ``chart`` is plain
    data for :func:`watcher.charts.render_payload` (or None).
    """

    episode_id: str
    kind: str
    severity: str
    characteristic: str
    source: str
    pattern: str
    title: str
    body: str
    created_at: str
    chart: dict[str, Any] | None = None
    finding_index: int | None = None
    # severity used by the targets' static filters when it differs from
    # ``severity``: a closing message (``info``) goes to whoever got the episode
    route_severity: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class Episode:
    """One row of the ``episodes`` table."""

    id: str
    characteristic: str
    source: str
    pattern: str
    state: str
    severity: str
    first_index: int | None
    first_time: str | None
    last_index: int | None
    last_time: str | None
    onset_index: int | None
    onset_time: str | None
    min_p: float | None
    min_p_detector: str | None
    max_abs_size: float | None
    direction: str | None
    hours_to_limit: float | None
    findings: int
    last_alert_p: float | None
    last_alert_severity: str | None
    alerts: int
    out_of_spec: int
    opened_at: str
    closed_at: str | None
    close_reason: str | None
    notes: str


_COLS = [f.name for f in fields(Episode)]

SCHEMA = """
CREATE TABLE IF NOT EXISTS episodes (
    id TEXT PRIMARY KEY,
    characteristic TEXT NOT NULL,
    source TEXT NOT NULL DEFAULT '',
    pattern TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('open', 'escalated', 'acknowledged', 'closed')),
    severity TEXT NOT NULL,
    first_index INTEGER,
    first_time TEXT,
    last_index INTEGER,
    last_time TEXT,
    onset_index INTEGER,
    onset_time TEXT,
    min_p REAL,
    min_p_detector TEXT,
    max_abs_size REAL,
    direction TEXT,
    hours_to_limit REAL,
    findings INTEGER NOT NULL DEFAULT 0,
    last_alert_p REAL,
    last_alert_severity TEXT,
    alerts INTEGER NOT NULL DEFAULT 0,
    out_of_spec INTEGER NOT NULL DEFAULT 0,
    opened_at TEXT NOT NULL,
    closed_at TEXT,
    close_reason TEXT,
    notes TEXT NOT NULL DEFAULT ''
);
CREATE INDEX IF NOT EXISTS episodes_live ON episodes (characteristic, state);
CREATE INDEX IF NOT EXISTS episodes_source ON episodes (source, pattern, state);
CREATE TABLE IF NOT EXISTS source_seen (
    source TEXT PRIMARY KEY,
    last_seen TEXT NOT NULL,
    ever_seen INTEGER NOT NULL DEFAULT 1
);
"""


def ensure_schema(conn: sqlite3.Connection) -> None:
    """Create the episode tables if missing (idempotent, no commit: statements
    run one by one, since ``executescript`` would commit the caller's batch)."""
    for stmt in SCHEMA.split(";"):
        if stmt.strip():
            conn.execute(stmt)


def _iso(dt: datetime) -> str:
    return dt.astimezone(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


def _fetch(conn: sqlite3.Connection, where: str, args: tuple) -> list[Episode]:
    cur = conn.execute(f"SELECT {', '.join(_COLS)} FROM episodes WHERE {where}", args)
    return [Episode(*row) for row in cur.fetchall()]


def get_episode(conn: sqlite3.Connection, episode_id: str) -> Episode | None:
    rows = _fetch(conn, "id = ?", (episode_id,))
    return rows[0] if rows else None


def list_episodes(conn: sqlite3.Connection, live_only: bool = False) -> list[Episode]:
    """All episodes (or the live ones), newest first -- for status and digest."""
    where = "state != 'closed'" if live_only else "1"
    return _fetch(conn, where + " ORDER BY opened_at DESC, rowid DESC", ())


def _save(conn: sqlite3.Connection, ep: Episode) -> None:
    d = asdict(ep)
    conn.execute(
        f"INSERT OR REPLACE INTO episodes ({', '.join(_COLS)}) VALUES ({', '.join('?' * len(_COLS))})",
        [d[c] for c in _COLS],
    )


def _new_id(conn: sqlite3.Connection) -> str:
    # 8 hex digits: short enough to read out on the phone; collisions are
    # checked against the table, not left to chance.
    while True:
        eid = secrets.token_hex(4)
        if conn.execute("SELECT 1 FROM episodes WHERE id = ?", (eid,)).fetchone() is None:
            return eid


def _add_note(ep: Episode, when: str, text: str) -> None:
    line = f"{when} {text}".strip()
    ep.notes = (ep.notes + "\n" + line) if ep.notes else line


def _finite(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


class EpisodeBook:
    """Turns findings into episodes and alert intents, inside the caller's transaction.

    ``on_finding(finding, spec, recent)``: call for every finding, in order.
    ``spec`` is anything :func:`watcher.alert_text.facts_from` reads (unit,
    target, lsl, usl, baseline centre and sigma); ``recent`` is optional chart
    data ``(values, times_or_None, first_index)`` for the last readings.
    ``on_reading(characteristic, index, time)``: call for every reading (after
    its findings); it closes episodes whose pattern has been absent long enough.
    """

    def __init__(self, conn: sqlite3.Connection, settings: EpisodeSettings | None = None):
        self.conn = conn
        self.settings = settings or EpisodeSettings()
        ensure_schema(conn)

    # -- queries ---------------------------------------------------------------
    def open_episodes(self, characteristic: str | None = None) -> list[Episode]:
        if characteristic is None:
            return _fetch(self.conn, "state != 'closed' ORDER BY rowid", ())
        return _fetch(
            self.conn, "characteristic = ? AND state != 'closed' ORDER BY rowid", (characteristic,)
        )

    # -- severity ----------------------------------------------------------------
    def severity_of(self, finding: Any, facts: CharacteristicFacts) -> str:
        """``urgent`` when out of specification or projected to leave it soon, else ``notice``."""
        if finding.pattern == "out_of_spec":
            return "urgent"
        v = _finite(getattr(finding, "value", None))
        if v is not None and (
            (facts.lsl is not None and v < facts.lsl) or (facts.usl is not None and v > facts.usl)
        ):
            return "urgent"
        h = _finite((getattr(finding, "detail", None) or {}).get("hours_to_limit"))
        if h is not None and 0 <= h <= self.settings.urgent_horizon_hours:
            return "urgent"
        return "notice"

    # -- the main entry ------------------------------------------------------------
    def on_finding(self, finding: Any, spec: Any = None, recent: Any = None) -> list[AlertIntent]:
        """Add one finding; return the alerts it causes (none, one, or one per escalated episode).

        An ``out_of_spec`` finding joins the live pattern episodes of its
        characteristic (escalating each once, and keeping them open) or, when
        there is none, opens an ``out_of_spec`` episode of its own.  A ``spike``
        joins a live ``shift`` episode of the same direction.
        """
        facts = facts_from(spec)
        live = self.open_episodes(finding.characteristic)
        if finding.pattern == "out_of_spec":
            carriers = [e for e in live if e.pattern not in ("out_of_spec", "silence")]
            if carriers:
                out = []
                for ep in carriers:
                    intent = self._absorb(ep, finding, facts, recent)
                    if intent:
                        out.append(intent)
                return out
        same = [e for e in live if e.pattern == finding.pattern]
        if not same and finding.pattern == "spike":
            # Readings beyond 3 sigma while the level has shifted the same way belong to that shift:
            # one episode, not two.
            same = [e for e in live if e.pattern == "shift" and e.direction == finding.direction]
        if same:
            intent = self._absorb(same[0], finding, facts, recent)
            return [intent] if intent else []
        oos = [e for e in live if e.pattern == "out_of_spec"] if finding.pattern != "out_of_spec" else []
        return [self._open(finding, facts, recent, oos[0] if oos else None)]

    def _open(self, f: Any, facts: CharacteristicFacts, recent: Any, oos: Episode | None = None) -> AlertIntent:
        now = _iso(self.settings.clock())
        sev = self.severity_of(f, facts)
        size = _finite(f.size)
        onset_i = f.onset_index if f.onset_index is not None else f.index
        onset_t = f.onset_time if f.onset_index is not None else (f.onset_time or f.time)
        ep = Episode(
            id=_new_id(self.conn),
            characteristic=f.characteristic,
            source=getattr(f, "source", "") or facts.source or "",
            pattern=f.pattern,
            state="open",
            severity=sev,
            first_index=f.index,
            first_time=f.time,
            last_index=f.index,
            last_time=f.time,
            onset_index=onset_i,
            onset_time=onset_t,
            min_p=_finite(f.p_value),
            min_p_detector=f.detector,
            max_abs_size=abs(size) if size is not None else None,
            direction=f.direction,
            hours_to_limit=_finite((getattr(f, "detail", None) or {}).get("hours_to_limit")),
            findings=1,
            last_alert_p=_finite(f.p_value),
            last_alert_severity=sev,
            alerts=1,
            out_of_spec=1 if f.pattern == "out_of_spec" else 0,
            opened_at=now,
            closed_at=None,
            close_reason=None,
            notes="",
        )
        lead = None
        if oos is not None:
            # the supervisor already knows the readings are beyond the limit: the
            # pattern episode will not escalate for that again
            ep.out_of_spec = 1
            lead = f"A reading beyond the specification was reported recently (episode {oos.id})."
        _save(self.conn, ep)
        return self._intent(ep, f, facts, recent, "opened", sev, lead=lead)

    def _absorb(self, ep: Episode, f: Any, facts: CharacteristicFacts, recent: Any) -> AlertIntent | None:
        """Add a finding to a live episode; return an escalation intent if there is news."""
        ep.findings += 1
        if f.index is not None and (ep.last_index is None or f.index >= ep.last_index):
            ep.last_index, ep.last_time = f.index, f.time
        p = _finite(f.p_value)
        size = _finite(f.size)
        is_oos = f.pattern == "out_of_spec" and ep.pattern != "out_of_spec"
        if not is_oos:
            if p is not None and (ep.min_p is None or p < ep.min_p):
                ep.min_p, ep.min_p_detector = p, f.detector
            # detectors restart after firing, so later findings date the onset from
            # their restart; the earliest estimate is the one that dates the pattern
            if f.onset_index is not None and (ep.onset_index is None or f.onset_index < ep.onset_index):
                ep.onset_index, ep.onset_time = f.onset_index, f.onset_time
            if size is not None and (ep.max_abs_size is None or abs(size) > ep.max_abs_size):
                ep.max_abs_size = abs(size)
                ep.direction = f.direction or ep.direction
            h = _finite((getattr(f, "detail", None) or {}).get("hours_to_limit"))
            if h is not None:
                ep.hours_to_limit = h
        sev = self.severity_of(f, facts)
        news: list[str] = []
        if ep.state != "acknowledged":
            if is_oos and ep.out_of_spec == 0:
                lim = _finite((getattr(f, "detail", None) or {}).get("limit"))
                where = f" limit {alert_text.num(lim, facts.unit)}" if lim is not None else ""
                news.append(
                    f"Escalated: reading {f.index} ({alert_text.num(_finite(f.value), facts.unit)}) "
                    f"is beyond the specification{where}."
                )
            elif severity_rank(sev) > severity_rank(ep.last_alert_severity or "info"):
                news.append(f"Escalated: severity rises to {sev}.")
            if (
                p is not None
                and ep.last_alert_p is not None
                and p * self.settings.pvalue_factor <= ep.last_alert_p
                and (news or ep.alerts <= self.settings.max_p_escalations)
            ):
                news.append(
                    f"Stronger evidence: p fell from {alert_text.pval(ep.last_alert_p)} "
                    f"to {alert_text.pval(p)}."
                )
        if is_oos:
            ep.out_of_spec += 1
        if not news:
            _save(self.conn, ep)
            return None
        if severity_rank(sev) > severity_rank(ep.severity):
            ep.severity = sev
        ep.state = "escalated"
        ep.alerts += 1
        ep.last_alert_severity = max(
            (ep.last_alert_severity or "info", sev), key=severity_rank
        )
        if p is not None and not is_oos:
            ep.last_alert_p = min(p, ep.last_alert_p) if ep.last_alert_p is not None else p
        _save(self.conn, ep)
        return self._intent(ep, f, facts, recent, "escalated", ep.severity, lead=" ".join(news))

    def _intent(
        self, ep: Episode, f: Any, facts: CharacteristicFacts, recent: Any, kind: str, sev: str, lead: str | None
    ) -> AlertIntent:
        p_shown = ep.min_p if ep.min_p is not None else _finite(f.p_value)
        body = alert_text.opening_body(
            episode_id=ep.id,
            characteristic=ep.characteristic,
            pattern=ep.pattern,
            facts=facts,
            onset_index=ep.onset_index,
            onset_time=ep.onset_time,
            size=(ep.max_abs_size if ep.max_abs_size is not None else None),
            direction=ep.direction,
            p_value=p_shown,
            detector=(ep.min_p_detector or f.detector),
            index=f.index,
            value=_finite(getattr(f, "value", None)),
            time=f.time,
            detail={"hours_to_limit": ep.hours_to_limit, **(getattr(f, "detail", None) or {})}
            if ep.hours_to_limit is not None
            else None,
            lead=lead,
        )
        chart = None
        if recent is not None:
            values, times, first_index = _unpack_recent(recent)
            chart = chart_payload(
                values,
                times,
                first_index,
                centre=facts.centre,
                sigma=facts.sigma,
                lsl=facts.lsl,
                usl=facts.usl,
                onset_index=ep.onset_index,
                title=f"{ep.characteristic}: {ep.pattern} (episode {ep.id})",
                unit=facts.unit,
            )
        return AlertIntent(
            episode_id=ep.id,
            kind=kind,
            severity=sev,
            characteristic=ep.characteristic,
            source=ep.source,
            pattern=ep.pattern,
            title=alert_text.alert_title(ep.characteristic, ep.pattern, sev),
            body=body,
            created_at=_iso(self.settings.clock()),
            chart=chart,
            finding_index=f.index,
        )

    # -- closing -------------------------------------------------------------------
    def on_reading(self, characteristic: str, index: int, time: str | None = None) -> list[AlertIntent]:
        """Close the episodes of ``characteristic`` whose pattern has been absent
        for ``close_after`` readings (``index - last_index >= close_after``)."""
        limit = self.settings.close_after_for(characteristic)
        rows = self.conn.execute(
            "SELECT id FROM episodes WHERE characteristic = ? AND state != 'closed' "
            "AND pattern != 'silence' AND last_index IS NOT NULL AND ? - last_index >= ?",
            (characteristic, index, limit),
        ).fetchall()
        out = []
        for (eid,) in rows:
            ep = get_episode(self.conn, eid)
            reason = f"no {ep.pattern.replace('_', ' ')} finding in the last {index - ep.last_index} readings"
            intent = self._close(ep, reason, index, time)
            if intent:
                out.append(intent)
        return out

    def _close(self, ep: Episode, reason: str, index: int | None, time: str | None) -> AlertIntent | None:
        now = _iso(self.settings.clock())
        ep.state = "closed"
        ep.closed_at = now
        ep.close_reason = reason
        _add_note(ep, now, f"closed: {reason}")
        _save(self.conn, ep)
        if not self.settings.alert_on_close:
            return None
        body = alert_text.closing_body(
            episode_id=ep.id,
            characteristic=ep.characteristic or f"source {ep.source}",
            pattern=ep.pattern,
            reason=reason,
            first_index=ep.first_index,
            last_index=ep.last_index,
            first_time=ep.first_time,
            last_time=ep.last_time,
            min_p=ep.min_p,
        )
        return AlertIntent(
            episode_id=ep.id,
            kind="closed" if ep.pattern != "silence" else "resumed",
            severity="info",
            characteristic=ep.characteristic,
            source=ep.source,
            pattern=ep.pattern,
            title=alert_text.alert_title(ep.characteristic or f"source {ep.source}", ep.pattern, "closed"),
            body=body,
            created_at=now,
            chart=None,
            finding_index=index,
            route_severity=ep.last_alert_severity or ep.severity,
        )

    def close_for_rebaseline(self, characteristic: str, note: str = "") -> list[AlertIntent]:
        """Close every live episode of ``characteristic`` (its baseline is being replaced)."""
        out = []
        for ep in self.open_episodes(characteristic):
            if ep.pattern == "silence":
                continue
            reason = "re-baselined" + (f": {note}" if note else "")
            intent = self._close(ep, reason, None, None)
            if intent:
                out.append(intent)
        return out

    def acknowledge(self, episode_id: str, note: str = "") -> Episode:
        """Mark a live episode acknowledged: it gets no more escalation alerts."""
        ep = get_episode(self.conn, episode_id)
        if ep is None:
            raise KeyError(f"no episode with id {episode_id!r}")
        if ep.state == "closed":
            raise ValueError(f"episode {episode_id} is already closed ({ep.close_reason})")
        now = _iso(self.settings.clock())
        ep.state = "acknowledged"
        _add_note(ep, now, "acknowledged" + (f": {note}" if note else ""))
        _save(self.conn, ep)
        return ep

    def add_note(self, episode_id: str, note: str) -> Episode:
        ep = get_episode(self.conn, episode_id)
        if ep is None:
            raise KeyError(f"no episode with id {episode_id!r}")
        _add_note(ep, _iso(self.settings.clock()), note)
        _save(self.conn, ep)
        return ep

    # -- silence -----------------------------------------------------------------------
    def live_silence(self, source: str) -> Episode | None:
        rows = _fetch(self.conn, "source = ? AND pattern = 'silence' AND state != 'closed'", (source,))
        return rows[0] if rows else None

    def open_silence(self, source: str, last_seen: str | None, silent_for_s: float, gap_s: float) -> AlertIntent | None:
        if self.live_silence(source) is not None:
            return None
        now = _iso(self.settings.clock())
        ep = Episode(
            id=_new_id(self.conn), characteristic="", source=source, pattern="silence", state="open",
            severity="notice", first_index=None, first_time=last_seen, last_index=None, last_time=now,
            onset_index=None, onset_time=last_seen, min_p=None, min_p_detector="silence gap",
            max_abs_size=None, direction=None, hours_to_limit=None, findings=1, last_alert_p=None,
            last_alert_severity="notice", alerts=1, out_of_spec=0, opened_at=now, closed_at=None,
            close_reason=None, notes="",
        )
        _save(self.conn, ep)
        return AlertIntent(
            episode_id=ep.id, kind="silence", severity="notice", characteristic="", source=source,
            pattern="silence", title=alert_text.alert_title(f"source {source}", "silence", "notice"),
            body=alert_text.silence_body(
                episode_id=ep.id, source=source, last_seen=last_seen, silent_for_s=silent_for_s, gap_s=gap_s
            ),
            created_at=now,
        )

    def close_silence(self, source: str, when: str) -> AlertIntent | None:
        ep = self.live_silence(source)
        if ep is None:
            return None
        return self._close(ep, f"readings resumed at {when}", None, when)


# -- module-level conveniences (same semantics, for the CLI) ------------------------------
def acknowledge(conn: sqlite3.Connection, episode_id: str, note: str = "") -> Episode:
    """Acknowledge an episode (caller commits)."""
    return EpisodeBook(conn).acknowledge(episode_id, note)


def close_for_rebaseline(
    conn: sqlite3.Connection, characteristic: str, note: str = "", settings: EpisodeSettings | None = None
) -> list[AlertIntent]:
    """Close the live episodes of a re-baselined characteristic (caller commits)."""
    return EpisodeBook(conn, settings).close_for_rebaseline(characteristic, note)


def _unpack_recent(recent: Any) -> tuple[list[float], list[str] | None, int]:
    if isinstance(recent, dict):
        return list(recent["values"]), recent.get("times"), int(recent.get("first_index", 0))
    values, times, first_index = recent
    return list(values), (list(times) if times is not None else None), int(first_index)


# -- silence ---------------------------------------------------------------------------
@dataclass(frozen=True)
class WorkingHours:
    """Working time in the site's zone: ``days`` (0 = Monday) from ``start`` to ``end``.

    ``end <= start`` means the window runs past midnight (a night shift).
    """

    start: dtime = dtime(6, 0)
    end: dtime = dtime(22, 0)
    days: frozenset[int] = frozenset(range(5))

    def seconds_between(self, a: datetime, b: datetime, tz: ZoneInfo) -> float:
        """Working seconds in ``[a, b)`` (aware datetimes).

        >>> tz = ZoneInfo("UTC")
        >>> wh = WorkingHours(dtime(8), dtime(16), frozenset({0, 1, 2, 3, 4}))
        >>> a = datetime(2026, 12, 4, 15, 0, tzinfo=tz)   # a Friday
        >>> b = datetime(2026, 12, 7, 9, 0, tzinfo=tz)    # the Monday after
        >>> wh.seconds_between(a, b, tz) / 3600
        2.0
        """
        if b <= a:
            return 0.0
        la, lb = a.astimezone(tz), b.astimezone(tz)
        total = 0.0
        d = la.date() - timedelta(days=1)
        while d <= lb.date():
            if d.weekday() in self.days:
                s = datetime.combine(d, self.start, tzinfo=tz)
                e_day = d if self.end > self.start else d + timedelta(days=1)
                e = datetime.combine(e_day, self.end, tzinfo=tz)
                lo, hi = max(s, la), min(e, lb)
                if hi > lo:
                    total += (hi - lo).total_seconds()
            d += timedelta(days=1)
        return total


@dataclass(frozen=True)
class SilenceRule:
    """A source is silent when nothing arrived for more than ``gap_seconds``
    (counted only inside ``working_hours`` when given)."""

    gap_seconds: float
    working_hours: WorkingHours | None = None

    def __post_init__(self) -> None:
        if not float(self.gap_seconds) > 0:
            raise ValueError(f"gap_seconds must be > 0, got {self.gap_seconds!r}")


class SilenceWatch:
    """Opens a ``silence`` episode for a source that stopped sending, closes it on resumption.

    ``seen(source, now)``: call when readings from ``source`` were stored (once
    per batch is enough).  ``check(now)``: call periodically (e.g. every
    minute).  Both return alert intents for the outbox and run inside the
    caller's transaction.  Last-seen times persist (table ``source_seen``), so
    a restart does not forget a source that went quiet.
    """

    def __init__(self, book: EpisodeBook, rules: dict[str, SilenceRule], tz: str = "UTC"):
        self.book = book
        self.rules = dict(rules)
        self.tz = ZoneInfo(tz)

    def _last(self, source: str) -> tuple[datetime, bool] | None:
        row = self.book.conn.execute(
            "SELECT last_seen, ever_seen FROM source_seen WHERE source = ?", (source,)
        ).fetchone()
        if row is None:
            return None
        return datetime.fromisoformat(row[0].replace("Z", "+00:00")), bool(row[1])

    def seen(self, source: str, now: datetime) -> list[AlertIntent]:
        self.book.conn.execute(
            "INSERT INTO source_seen (source, last_seen, ever_seen) VALUES (?, ?, 1) "
            "ON CONFLICT(source) DO UPDATE SET last_seen = excluded.last_seen, ever_seen = 1",
            (source, _iso(now)),
        )
        intent = self.book.close_silence(source, _iso(now))
        return [intent] if intent else []

    def check(self, now: datetime) -> list[AlertIntent]:
        out = []
        for source, rule in self.rules.items():
            last = self._last(source)
            if last is None:
                # never heard of: the watch starts counting now
                self.book.conn.execute(
                    "INSERT INTO source_seen (source, last_seen, ever_seen) VALUES (?, ?, 0)",
                    (source, _iso(now)),
                )
                continue
            last_dt, ever = last
            if rule.working_hours is not None:
                silent = rule.working_hours.seconds_between(last_dt, now, self.tz)
            else:
                silent = (now - last_dt).total_seconds()
            if silent > rule.gap_seconds:
                intent = self.book.open_silence(
                    source, _iso(last_dt) if ever else None, silent, rule.gap_seconds
                )
                if intent:
                    out.append(intent)
        return out
