"""The digest of a period, built from the state database (plain, JSON-able data).

For each characteristic (from the aggregates, see :mod:`watcher.aggregates`):

* readings counted, mean with a 95 % t interval
  ``mean +/- t_{0.975, n-1} * s / sqrt(n)`` (Student 1908; assumes
  independent readings), sd ``s`` (ddof = 1), min, max;
* count and share of readings below lsl and above usl (limits in force when
  each reading arrived);
* Cp and Cpk with 95 % intervals where limits are given
  (:func:`rules.capability.capability_from_summary`: chi-square interval for
  Cp, Bissell 1990 normal approximation for Cpk), computed with the overall
  sd of the period -- some texts call these figures Pp and Ppk;
* Anderson-Darling normality check of the period
  (:func:`rules.normality.anderson_darling_test`, p from D'Agostino &
  Stephens 1986 Table 4.9) on every reading of the period or on a
  stratified sample of the hourly reservoirs; where normality is rejected
  (p < 0.05) or the period held a pattern episode, the capability figures
  carry a note that they are not to be trusted;
* every episode (``episodes`` table of :mod:`watcher.episodes`) that
  overlaps the period, with its acknowledgement notes;
* the chart series (bucket min / max / mean).

Then source health: silence episodes, quarantined lines by source and
reason, undelivered and expired alerts (outbox tables).

Characteristics with episodes come first (smallest p first); quiet ones after.
"""

from __future__ import annotations

import json
import math
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any
from zoneinfo import ZoneInfo

from watcher import aggregates as agg

DIGEST_VERSION = 1
NORMALITY_ALPHA = 0.05  # conventional level, common practice, no source
MIN_NORMALITY_N = 8  # D'Agostino & Stephens give the A* modification for n >= 8 (from memory)
MAX_CHART_BUCKETS = 1500  # beyond this, neighbouring buckets are merged (min of mins, max of maxes)
PATTERN_EPISODES = ("shift", "drift", "grouping", "mixture", "sawtooth", "spike")
CAUTION = ("linewatch is advisory, not a safety system. A signal is not proof of a cause; look before you act, "
           "and do not adjust the process on every signal.")


@dataclass(frozen=True)
class Period:
    """A digest period [start, end) in UTC, labelled in the site's zone."""

    start: datetime
    end: datetime
    tz: str = "UTC"
    label: str = ""

    def __post_init__(self) -> None:
        if self.start.tzinfo is None or self.end.tzinfo is None:
            raise ValueError("period bounds must be aware datetimes")
        if not self.end > self.start:
            raise ValueError(f"period end {self.end.isoformat()} is not after its start {self.start.isoformat()}")

    @property
    def start_t(self) -> float:
        return self.start.timestamp()

    @property
    def end_t(self) -> float:
        return self.end.timestamp()

    def local(self, dt: datetime) -> datetime:
        return dt.astimezone(ZoneInfo(self.tz))

    @property
    def name(self) -> str:
        """A file-name-safe label, e.g. ``2026-12-02_0630`` (local end time)."""
        return self.label or self.local(self.end).strftime("%Y-%m-%d_%H%M")

    def to_dict(self) -> dict[str, Any]:
        return {
            "start": _iso(self.start), "end": _iso(self.end), "timezone": self.tz,
            "start_local": self.local(self.start).isoformat(timespec="minutes"),
            "end_local": self.local(self.end).isoformat(timespec="minutes"),
            "label": self.name,
        }


def last_hours(hours: float, now: datetime | None = None, tz: str = "UTC") -> Period:
    end = (now or datetime.now(timezone.utc)).astimezone(timezone.utc).replace(microsecond=0)
    return Period(end - timedelta(hours=hours), end, tz)


def _iso(dt: datetime) -> str:
    return dt.astimezone(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


def _table_exists(conn: sqlite3.Connection, name: str) -> bool:
    return conn.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name=?", (name,)).fetchone() is not None


def _finite(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


# -- per characteristic ------------------------------------------------------------------


def mean_interval(mean: float, sd: float | None, n: int, confidence: float = 0.95) -> tuple[float, float] | None:
    """Student t interval for the mean: ``mean +/- t_{(1+c)/2, n-1} * sd / sqrt(n)``.

    >>> lo, hi = mean_interval(10.0, 2.0, 16)
    >>> round(lo, 4), round(hi, 4)
    (8.9343, 11.0657)
    """
    if sd is None or n < 2:
        return None
    from scipy import stats

    half = float(stats.t.ppf(0.5 + confidence / 2, n - 1)) * sd / math.sqrt(n)
    return (mean - half, mean + half)


def _capability(m: agg.Moments, lsl: float | None, usl: float | None) -> dict[str, Any] | None:
    if lsl is None and usl is None:
        return None
    sd = m.sd
    if m.n < 2 or not sd:
        return {"computed": False, "why": "fewer than 2 readings or no spread"}
    from rules.capability import capability_from_summary

    r = capability_from_summary(m.mean, sd, m.n, lsl=lsl, usl=usl)
    return {
        "computed": True, "n": r.n, "cp": r.cp, "cp_interval": list(r.cp_interval) if r.cp_interval else None,
        "cpu": r.cpu, "cpl": r.cpl, "cpk": r.cpk, "cpk_interval": list(r.cpk_interval),
        "confidence": r.confidence,
        "method": "Cp: chi-square interval on n-1 d.f.; Cpk: Bissell (1990) normal approximation "
                  "Cpk +/- z*sqrt(1/(9n) + Cpk^2/(2(n-1))); sigma = overall sd of the period (ddof=1), "
                  "so some texts call these Pp/Ppk; assumes independent normal readings",
    }


def _normality(conn: sqlite3.Connection, name: str, p: Period) -> dict[str, Any] | None:
    s = agg.period_sample(conn, name, p.start_t, p.end_t)
    if len(s.values) < MIN_NORMALITY_N:
        return {"computed": False, "why": f"fewer than {MIN_NORMALITY_N} readings", "n": len(s.values)}
    if max(s.values) == min(s.values):
        return {"computed": False, "why": "all readings equal", "n": len(s.values)}
    from rules.normality import anderson_darling_test

    r = anderson_darling_test(s.values)
    return {
        "computed": True, "statistic": r.statistic, "adjusted": r.adjusted, "pvalue": r.pvalue, "n": r.n,
        "all_readings": s.exact, "rejected": r.pvalue < NORMALITY_ALPHA, "alpha": NORMALITY_ALPHA,
        "method": "Anderson-Darling, mean and variance estimated; A* = A^2(1 + 0.75/n + 2.25/n^2); "
                  "p from D'Agostino & Stephens (1986) Table 4.9"
                  + ("" if s.exact else f"; on a stratified sample of {r.n} of {s.readings} readings"),
    }


def _episodes(conn: sqlite3.Connection, p: Period, tz: ZoneInfo) -> list[dict[str, Any]]:
    if not _table_exists(conn, "episodes"):
        return []
    # Closed long before the period: not in it.  The week of slack covers reading times that lag
    # the wall clock (a replayed or buffered source); the exact overlap is decided below.
    rows = conn.execute(
        "SELECT * FROM episodes WHERE state != 'closed' OR closed_at IS NULL"
        " OR julianday(closed_at) >= julianday(?) - 7 ORDER BY opened_at, rowid", (_iso(p.start),)).fetchall()
    cols = [d[0] for d in conn.execute("SELECT * FROM episodes LIMIT 0").description]
    out = []
    for r in rows:
        e = dict(zip(cols, r))
        # Reading times where the episode has them, else the wall-clock times it opened and closed.
        a = agg.to_utc(e.get("onset_time"), tz) or agg.to_utc(e.get("first_time"), tz) or agg.to_utc(e.get("opened_at"))
        b = agg.to_utc(e.get("last_time"), tz) or agg.to_utc(e.get("closed_at")) or p.end
        if a is None:
            continue
        if e.get("state") != "closed":
            b = max(b, p.end)
        if b < p.start or a >= p.end:
            continue
        out.append({
            "id": e.get("id"), "characteristic": e.get("characteristic") or "", "source": e.get("source") or "",
            "pattern": e.get("pattern"), "state": e.get("state"), "severity": e.get("severity"),
            "onset_time": e.get("onset_time"), "onset_index": e.get("onset_index"),
            "first_time": e.get("first_time"), "last_time": e.get("last_time"),
            "first_index": e.get("first_index"), "last_index": e.get("last_index"),
            "span_start": _iso(a), "span_end": _iso(b),
            "size": _finite(e.get("max_abs_size")), "direction": e.get("direction"),
            "min_p": _finite(e.get("min_p")), "detector": e.get("min_p_detector"),
            "findings": e.get("findings"), "alerts": e.get("alerts"), "out_of_spec": e.get("out_of_spec"),
            "opened_at": e.get("opened_at"), "closed_at": e.get("closed_at"), "close_reason": e.get("close_reason"),
            "notes": [ln for ln in (e.get("notes") or "").splitlines() if ln.strip()],
        })
    return out


def _baseline_of(conn: sqlite3.Connection, name: str) -> tuple[float | None, float | None]:
    if not _table_exists(conn, "characteristic_state"):
        return None, None
    row = conn.execute("SELECT state FROM characteristic_state WHERE characteristic = ?", (name,)).fetchone()
    if row is None:
        return None, None
    try:
        st = json.loads(row[0])
    except ValueError:
        return None, None
    return _finite(st.get("raw_centre")), _finite(st.get("raw_sigma"))


def chart_series(width: int, bs: list[tuple[int, agg.Moments]], max_buckets: int = MAX_CHART_BUCKETS) -> dict[str, Any]:
    """Bucket rows ``[t0, n, mean, min, max]`` for the chart, merged to at most ``max_buckets``.

    Merging takes neighbouring buckets of ``k`` times the width: count and
    mean pooled, min of the mins, max of the maxes, so the band never hides a
    reading (a faithful reduction, not a truncation).

    >>> ms = [agg.Moments() for _ in range(4)]
    >>> for i, m in enumerate(ms): m.add(float(i))
    >>> chart_series(60, [(i * 60, m) for i, m in enumerate(ms)], max_buckets=2)["buckets"]
    [[0, 2, 0.5, 0.0, 1.0], [120, 2, 2.5, 2.0, 3.0]]
    """
    k = max(1, math.ceil(len(bs) / max_buckets)) if bs else 1
    w = width * k
    merged: dict[int, agg.Moments] = {}
    for t0, m in bs:
        key = (t0 // w) * w
        cur = merged.setdefault(key, agg.Moments())
        cur.merge(agg.Moments(m.n, m.mean, m.m2, m.vmin, m.vmax))
    rows = [[t0, m.n, m.mean, m.vmin, m.vmax] for t0, m in sorted(merged.items())]
    return {"bucket_seconds": w, "buckets": rows, "readings": sum(r[1] for r in rows)}


def characteristic_digest(conn: sqlite3.Connection, name: str, cc: Any, p: Period, episodes: list[dict]) -> dict[str, Any]:
    width, bs = agg.buckets(conn, name, p.start_t, p.end_t)
    m = agg.Moments()
    for _t, b in bs:
        m.merge(b)
    lsl = getattr(cc, "lsl", None)
    usl = getattr(cc, "usl", None)
    sd = m.sd
    eps = [e for e in episodes if e["characteristic"] == name]
    d: dict[str, Any] = {
        "name": name, "unit": getattr(cc, "unit", "") or "", "source": getattr(cc, "source", "") or "",
        "configured": cc is not None, "target": getattr(cc, "target", None), "lsl": lsl, "usl": usl,
        "n": m.n, "untimed": m.untimed,
        "mean": m.mean if m.n else None, "mean_interval": (list(mean_interval(m.mean, sd, m.n)) if m.n >= 2 and sd else None),
        "sd": sd, "min": m.vmin if m.n else None, "max": m.vmax if m.n else None,
        "below_lsl": {"count": m.below, "share": (m.below / m.n) if m.n and lsl is not None else None} if lsl is not None else None,
        "above_usl": {"count": m.above, "share": (m.above / m.n) if m.n and usl is not None else None} if usl is not None else None,
        "episodes": eps,
    }
    d["capability"] = _capability(m, lsl, usl) if m.n else None
    d["normality"] = _normality(conn, name, p) if m.n else None
    notes = []
    nrm = d["normality"]
    if d["capability"] and d["capability"].get("computed"):
        if nrm and nrm.get("computed") and nrm["rejected"]:
            pv = "below 1e-30" if nrm["pvalue"] == 0 else f"= {nrm['pvalue']:.2g}"
            notes.append(f"Readings are not normal (Anderson-Darling p {pv}): Cp, Cpk and their "
                         "intervals assume normal readings and are not to be trusted here.")
        unstable = [e for e in eps if e["pattern"] in PATTERN_EPISODES]
        if unstable:
            notes.append(f"The process was not stable in this period ({len(unstable)} pattern episode"
                         f"{'s' if len(unstable) != 1 else ''}): the figures describe a mixture, not what the "
                         "process can do.")
        if nrm and not nrm.get("computed"):
            notes.append("Normality could not be checked; treat the capability figures with care.")
    d["capability_notes"] = notes
    centre, sigma = _baseline_of(conn, name)
    d["baseline_centre"], d["baseline_sigma"] = centre, sigma
    d["chart"] = chart_series(width, bs)
    d["min_p"] = min((e["min_p"] for e in eps if e["min_p"] is not None), default=None)
    return d


# -- source health -----------------------------------------------------------------------------


def _between(col: str) -> str:
    return f"julianday({col}) >= julianday(?) AND julianday({col}) < julianday(?)"


def _quarantine(conn: sqlite3.Connection, p: Period) -> list[dict[str, Any]]:
    if not _table_exists(conn, "quarantine"):
        return []
    rows = conn.execute(
        f"SELECT source, reason, COUNT(*), MIN(id) FROM quarantine WHERE {_between('created_at')} "
        "GROUP BY source, reason ORDER BY source, COUNT(*) DESC, reason",
        (_iso(p.start), _iso(p.end)),
    ).fetchall()
    out = []
    for source, reason, n, first_id in rows:
        f = conn.execute("SELECT file, line_no FROM quarantine WHERE id = ?", (first_id,)).fetchone()
        out.append({"source": source, "reason": reason, "count": n, "first_file": f[0], "first_line": f[1]})
    return out


def _alerts(conn: sqlite3.Connection, p: Period) -> dict[str, list[dict[str, Any]]]:
    if not _table_exists(conn, "alert_delivery"):
        return {"expired": [], "undelivered": [], "held_for_digest": []}
    q = ("SELECT d.target, d.status, d.attempts, d.last_error, d.created, a.episode_id, a.kind, a.severity, a.title,"
         " a.created_at FROM alert_delivery d JOIN alert_outbox a ON a.id = d.alert_id"
         " WHERE d.created >= ? AND d.created < ? AND ({}) ORDER BY d.id")
    keys = ("target", "status", "attempts", "last_error", "created", "episode_id", "kind", "severity", "title",
            "created_at")

    def rows(cond: str) -> list[dict[str, Any]]:
        return [dict(zip(keys, r)) for r in conn.execute(q.format(cond), (p.start_t, p.end_t)).fetchall()]

    return {
        "expired": rows("d.status = 'expired'"),
        "undelivered": rows("d.status = 'pending' AND d.attempts > 0"),
        "held_for_digest": rows("d.status = 'digest'"),
    }


def source_health(conn: sqlite3.Connection, cfg: Any, p: Period, episodes: list[dict], chars: list[dict]) -> dict[str, Any]:
    readings: dict[str, int] = {}
    for c in chars:
        if c["source"]:
            readings[c["source"]] = readings.get(c["source"], 0) + c["n"]
    sources = [s.name for s in getattr(cfg, "sources", [])] if cfg is not None else sorted(readings)
    q = _quarantine(conn, p)
    return {
        "sources": [{"name": s, "readings": readings.get(s, 0),
                     "quarantined": sum(x["count"] for x in q if x["source"] == s)} for s in sources],
        "silences": [e for e in episodes if e["pattern"] == "silence"],
        "quarantine": q,
        "quarantine_total": sum(x["count"] for x in q),
        "alerts": _alerts(conn, p),
    }


# -- the whole digest ---------------------------------------------------------------------------


def build_digest(conn: sqlite3.Connection, cfg: Any, period: Period, *, now: datetime | None = None) -> dict[str, Any]:
    """The digest of ``period`` as plain data (see the module docstring for what is in it)."""
    tz = ZoneInfo(period.tz)
    episodes = _episodes(conn, period, tz)
    configured = {c.name: c for c in getattr(cfg, "characteristics", [])} if cfg is not None else {}
    names = list(configured)
    for n in agg.characteristics(conn, period.start_t, period.end_t):
        if n not in configured:
            names.append(n)
    chars = [characteristic_digest(conn, n, configured.get(n), period, episodes) for n in names]
    with_eps = [c for c in chars if c["episodes"]]
    quiet = [c for c in chars if not c["episodes"]]
    with_eps.sort(key=lambda c: (c["min_p"] if c["min_p"] is not None else 2.0, c["name"]))
    chars = with_eps + quiet
    return {
        "kind": "linewatch digest",
        "version": DIGEST_VERSION,
        "generated_at": _iso(now or datetime.now(timezone.utc)),
        "config": getattr(cfg, "file", None),
        "period": period.to_dict(),
        "characteristics": chars,
        "health": source_health(conn, cfg, period, episodes, chars),
        "caution": CAUTION,
    }


# -- the command ----------------------------------------------------------------------------------


def add_digest_arguments(p: Any) -> None:
    """Arguments of ``linewatch digest CONFIG [--since 24h | --from T --to T] [--out DIR] [--send]``."""
    p.add_argument("config")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--since", help="the period ending now, e.g. 24h, 90m, 7d (default 24h)")
    g.add_argument("--from", dest="from_", metavar="T", help="period start, ISO 8601 (local time of the site unless an offset is given)")
    p.add_argument("--to", metavar="T", help="period end, ISO 8601 (with --from; default now)")
    p.add_argument("--out", metavar="DIR", help="write the digest here (default: the config's digest folder)")
    p.add_argument("--send", action="store_true", help="also send it to the digest targets (digest.to)")


def period_from_args(args: Any, tz: str, now: datetime | None = None) -> Period:
    """The period named by --since / --from / --to (ValueError with a plain reason)."""
    from watcher.config import parse_duration

    zone = ZoneInfo(tz)
    now = (now or datetime.now(timezone.utc)).replace(microsecond=0)
    if getattr(args, "to", None) and not getattr(args, "from_", None):
        raise ValueError("--to needs --from")
    if getattr(args, "from_", None):
        start = agg.to_utc(args.from_, zone)
        if start is None:
            raise ValueError(f"--from: expected an ISO 8601 time such as 2026-12-01T06:30, got {args.from_!r}")
        end = agg.to_utc(args.to, zone) if args.to else now
        if end is None:
            raise ValueError(f"--to: expected an ISO 8601 time such as 2026-12-02T06:30, got {args.to!r}")
        if not end > start:
            raise ValueError("--to must be after --from")
        return Period(start, end, tz)
    seconds = parse_duration(args.since) if getattr(args, "since", None) else 86400.0
    if seconds <= 0:
        raise ValueError("--since must be a positive duration")
    return Period(now - timedelta(seconds=seconds), now, tz)


def run_digest(args: Any) -> int:
    """``linewatch digest``: write the digest of a period (and send it with --send).

    Exit 0 when written (and sent), 1 when a target did not take it, 2 for bad input.
    """
    import sys
    from pathlib import Path

    from watcher.config import ConfigError, load_config
    from watcher.store import Store

    try:
        cfg = load_config(args.config)
    except ConfigError as e:
        for line in e.problems:
            print(line, file=sys.stderr)
        return 2
    try:
        period = period_from_args(args, cfg.timezone)
    except ValueError as e:
        print(f"digest: {e}", file=sys.stderr)
        return 2
    try:
        store = Store(cfg.state_dir, readonly=True)
    except FileNotFoundError as e:
        print(f"digest: {e}", file=sys.stderr)
        return 2
    from watcher.schedule import deliver, digest_folder, make_digest

    try:
        d, paths = make_digest(store.conn, cfg, period, Path(args.out) if args.out else digest_folder(cfg))
    finally:
        store.close()
    loud = sum(1 for c in d["characteristics"] if c["episodes"])
    print(f"digest of {d['period']['start_local']} to {d['period']['end_local']}: "
          f"{len(d['characteristics'])} characteristics, {loud} with episodes")
    for key in ("html", "text", "json"):
        print(f"  {key:4s} {paths[key]}")
    if not args.send:
        return 0
    urls = list(cfg.digest.to) if cfg.digest else []
    if not urls:
        print("digest: --send given but the config names no digest targets (digest.to)", file=sys.stderr)
        return 2
    delivered, errors = deliver(urls, f"linewatch digest {d['period']['label']}",
                                paths["text"].read_text(encoding="utf-8"),
                                paths["html"].read_text(encoding="utf-8"), paths["html"])
    for k, ok in delivered.items():
        print(f"  sent to {k}: {'ok' if ok else 'FAILED ' + errors.get(k, '')}")
    return 0 if all(delivered.values()) else 1
