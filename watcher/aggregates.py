"""Bounded storage for the digest: period aggregates instead of every reading.

The digest needs, for any period, each characteristic's count, mean, sd,
min, max, readings beyond each specification limit, a chart of the period
and a sample for the normality check.  None of that needs every reading
kept forever.  Three tables, all keyed by characteristic and bucket start
(UTC epoch seconds), grow with characteristics and days, not with readings:

``agg_minute`` (one-minute buckets, kept ``FINE_DAYS`` = 31 days)
    n, mean, M2 (sum of squared deviations from the mean), min, max,
    readings below lsl / above usl, readings that carried no time of their
    own.  At most 1440 rows per characteristic and day.  These give exact
    figures for any period boundary on a whole minute, and the chart
    (bucket min / max / mean).
``agg_hour`` (one-hour buckets, kept ``retention_days``, default 400)
    the same fields.  At most 24 rows per characteristic and day; used for
    periods older than the minute buckets.
``agg_sample`` (one row per characteristic and hour, kept ``retention_days``)
    a uniform random sample (reservoir) of at most ``SAMPLE_PER_HOUR`` = 64
    readings of that hour (Vitter 1985, "Random sampling with a reservoir",
    ACM TOMS 11(1):37-57, algorithm R), packed as float64.  The normality
    check of a period draws a proportional stratified sample from these
    (every reading of the period when no hour had more than 64).

Means and M2 are merged with the pairwise update of Chan, Golub & LeVeque
(1979/1983, "Algorithms for computing the sample variance", Am. Stat.
37(3):242-247)::

    n = na + nb;  d = mean_b - mean_a
    mean = mean_a + d * nb / n;  M2 = M2a + M2b + d^2 * na * nb / n

so no precision is lost to a running sum of squares of large values
(a 500 g pack weighed to 0.01 g).  sd = sqrt(M2 / (n - 1)).

Readings are bucketed by their own time; a reading without a time (or with
one that does not parse) is put at the arrival time ``now_iso`` and counted
as ``untimed``.  Naive times (no offset) are read in ``tz`` (the site's
zone; UTC by default).  Limits are those in force when the reading is
recorded.

>>> import sqlite3
>>> conn = sqlite3.connect(":memory:")
>>> ensure_schema(conn)
>>> record_values(conn, {"pin": [(8.001, "2026-12-02T08:00:10+00:00"), (7.999, "2026-12-02T08:00:50+00:00"),
...                              (8.004, None)]}, "2026-12-02T08:05:00+00:00", limits={"pin": (7.985, 8.003)})
3
>>> s = period_stats(conn, "pin", iso_epoch("2026-12-02T08:00:00Z"), iso_epoch("2026-12-02T09:00:00Z"))
>>> s.n, round(s.mean, 4), s.above, s.untimed
(3, 8.0013, 1, 1)
"""

from __future__ import annotations

import math
import random
import sqlite3
from array import array
from dataclasses import dataclass
from datetime import datetime, timezone, tzinfo
from typing import Any, Iterable, Mapping, Sequence

from watcher.store import register_schema

MINUTE = 60
HOUR = 3600
DAY = 86400
FINE_DAYS = 31  # one-minute buckets are kept this many days
SAMPLE_PER_HOUR = 64  # reservoir size per characteristic and hour
DEFAULT_RETENTION_DAYS = 400

_STATS_COLS = "n INTEGER NOT NULL, mean REAL NOT NULL, m2 REAL NOT NULL, vmin REAL NOT NULL, vmax REAL NOT NULL, " \
              "below INTEGER NOT NULL, above INTEGER NOT NULL, untimed INTEGER NOT NULL"

SCHEMA = [
    f"CREATE TABLE IF NOT EXISTS agg_minute (characteristic TEXT NOT NULL, t0 INTEGER NOT NULL, {_STATS_COLS}, "
    "PRIMARY KEY (characteristic, t0)) WITHOUT ROWID",
    f"CREATE TABLE IF NOT EXISTS agg_hour (characteristic TEXT NOT NULL, t0 INTEGER NOT NULL, {_STATS_COLS}, "
    "PRIMARY KEY (characteristic, t0)) WITHOUT ROWID",
    "CREATE TABLE IF NOT EXISTS agg_sample (characteristic TEXT NOT NULL, t0 INTEGER NOT NULL, "
    "seen INTEGER NOT NULL, vals BLOB NOT NULL, PRIMARY KEY (characteristic, t0)) WITHOUT ROWID",
]


@register_schema
def ensure_schema(conn: sqlite3.Connection) -> None:
    """Create the aggregate tables (idempotent; no commit)."""
    for ddl in SCHEMA:
        conn.execute(ddl)


def has_schema(conn: sqlite3.Connection) -> bool:
    row = conn.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'agg_hour'").fetchone()
    return row is not None


# -- time -------------------------------------------------------------------------------


def to_utc(text: str | None, tz: tzinfo | None = None) -> datetime | None:
    """An ISO 8601 text as an aware UTC datetime (naive read in ``tz``, default UTC); None if unusable.

    >>> to_utc("2026-12-02T09:00:00+01:00").isoformat()
    '2026-12-02T08:00:00+00:00'
    >>> to_utc("not a time") is None
    True
    """
    if not text:
        return None
    try:
        dt = datetime.fromisoformat(str(text).strip().replace("Z", "+00:00"))
    except ValueError:
        return None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=tz or timezone.utc)
    return dt.astimezone(timezone.utc)


def iso_epoch(text: str, tz: tzinfo | None = None) -> float:
    """Epoch seconds of an ISO 8601 text (ValueError if it does not parse)."""
    dt = to_utc(text, tz)
    if dt is None:
        raise ValueError(f"not an ISO 8601 time: {text!r}")
    return dt.timestamp()


def epoch_iso(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z")


# -- statistics of one bucket -------------------------------------------------------------


@dataclass
class Moments:
    """Count, mean, M2, min, max and limit counts of a set of readings (mergeable)."""

    n: int = 0
    mean: float = 0.0
    m2: float = 0.0
    vmin: float = math.inf
    vmax: float = -math.inf
    below: int = 0
    above: int = 0
    untimed: int = 0

    def add(self, x: float) -> None:
        """Welford's (1962, Technometrics 4(3):419-420) one-value update."""
        self.n += 1
        d = x - self.mean
        self.mean += d / self.n
        self.m2 += d * (x - self.mean)
        if x < self.vmin:
            self.vmin = x
        if x > self.vmax:
            self.vmax = x

    def merge(self, o: "Moments") -> "Moments":
        """Chan, Golub & LeVeque pairwise merge (formula in the module docstring)."""
        if o.n == 0:
            return self
        if self.n == 0:
            self.n, self.mean, self.m2, self.vmin, self.vmax = o.n, o.mean, o.m2, o.vmin, o.vmax
        else:
            n = self.n + o.n
            d = o.mean - self.mean
            self.mean += d * o.n / n
            self.m2 += o.m2 + d * d * self.n * o.n / n
            self.n = n
            self.vmin = min(self.vmin, o.vmin)
            self.vmax = max(self.vmax, o.vmax)
        self.below += o.below
        self.above += o.above
        self.untimed += o.untimed
        return self

    @property
    def sd(self) -> float | None:
        """Sample standard deviation sqrt(M2/(n-1)); None below 2 readings."""
        if self.n < 2:
            return None
        return math.sqrt(max(self.m2, 0.0) / (self.n - 1))

    def row(self) -> tuple:
        return (self.n, self.mean, self.m2, self.vmin, self.vmax, self.below, self.above, self.untimed)

    @classmethod
    def from_row(cls, r: Sequence[Any]) -> "Moments":
        return cls(int(r[0]), float(r[1]), float(r[2]), float(r[3]), float(r[4]), int(r[5]), int(r[6]), int(r[7]))


def _moments_of(vals: list[float], lsl: float | None, usl: float | None, untimed: int) -> Moments:
    """Moments of a list of readings by two passes: mean from the exactly rounded sum
    (``math.fsum``), then M2 = sum (x - mean)^2 (the two-pass form, at least as accurate
    as Welford's update; Chan, Golub & LeVeque 1983)."""
    n = len(vals)
    mean = math.fsum(vals) / n
    m2 = math.fsum([(x - mean) * (x - mean) for x in vals])
    below = sum(1 for x in vals if x < lsl) if lsl is not None else 0
    above = sum(1 for x in vals if x > usl) if usl is not None else 0
    return Moments(n, mean, m2, min(vals), max(vals), below, above, untimed)


# -- writing (inside the caller's batch transaction) ------------------------------------------


def _merge_sql(table: str) -> str:
    """One statement that adds a bucket's moments to the stored row, or inserts them.

    The update is :meth:`Moments.merge` (stored row first, the new moments second) written
    in SQL with the same operations in the same order, so the stored figures are the same
    to the last bit as reading the row, merging and writing it back, without the read.  In
    an upsert's SET every column names the row's old value."""
    d = "(excluded.mean - mean)"
    return (
        f"INSERT INTO {table} (characteristic, t0, n, mean, m2, vmin, vmax, below, above, untimed)"
        " VALUES (?,?,?,?,?,?,?,?,?,?) ON CONFLICT (characteristic, t0) DO UPDATE SET"
        " n = n + excluded.n,"
        f" mean = mean + {d} * excluded.n / (n + excluded.n),"
        f" m2 = m2 + (excluded.m2 + {d} * {d} * n * excluded.n / (n + excluded.n)),"
        " vmin = min(vmin, excluded.vmin), vmax = max(vmax, excluded.vmax),"
        " below = below + excluded.below, above = above + excluded.above, untimed = untimed + excluded.untimed"
    )


_MERGE_SQL = {t: _merge_sql(t) for t in ("agg_minute", "agg_hour")}


def _merge_rows(conn: sqlite3.Connection, table: str, name: str, buckets: Mapping[int, Moments]) -> None:
    conn.executemany(_MERGE_SQL[table], [(name, t0, *m.row()) for t0, m in buckets.items() if m.n])


def _pack(vals: Sequence[float]) -> bytes:
    return array("d", vals).tobytes()


def _unpack(blob: bytes) -> list[float]:
    a = array("d")
    a.frombytes(blob)
    return a.tolist()


def _sample_into(conn: sqlite3.Connection, name: str, t0: int, values: Sequence[float], k: int) -> None:
    row = conn.execute("SELECT seen, vals FROM agg_sample WHERE characteristic = ? AND t0 = ?", (name, t0)).fetchone()
    seen, res = (int(row[0]), _unpack(row[1])) if row else (0, [])
    # A seed from the bucket and its count so far: the same readings give the same sample on
    # every run.  Seeding costs more than the rest, and is only needed once the sample is full.
    rng = random.Random(f"{name}|{t0}|{seen}") if len(res) + len(values) > k else None
    for x in values:
        seen += 1
        if len(res) < k:
            res.append(x)
        else:
            j = int(rng.random() * seen)  # uniform on 0 .. seen-1 (bias below seen / 2^53); randrange is ~10x slower
            if j < k:
                res[j] = x
    conn.execute("INSERT OR REPLACE INTO agg_sample (characteristic, t0, seen, vals) VALUES (?,?,?,?)",
                 (name, t0, seen, _pack(res)))


def limits_from_config(cfg: Any) -> dict[str, tuple[float | None, float | None]]:
    """{characteristic: (lsl, usl)} from a watcher.config.Config."""
    return {c.name: (c.lsl, c.usl) for c in cfg.characteristics}


def record_values(
    conn: sqlite3.Connection,
    values_by_characteristic: Mapping[str, Iterable[tuple[float, str | None]]],
    now_iso: str,
    *,
    limits: Mapping[str, tuple[float | None, float | None]] | None = None,
    tz: tzinfo | None = None,
    sample_per_hour: int = SAMPLE_PER_HOUR,
) -> int:
    """Add readings ``(value, time or None)`` to the aggregates; return how many were taken.

    Runs inside the caller's transaction (no commit).  Non-finite values are
    skipped (the parser quarantines them before they get here).  ``limits``:
    ``{characteristic: (lsl, usl)}``, see :func:`limits_from_config`.
    """
    now = to_utc(now_iso) or datetime.now(timezone.utc)
    now_t = now.timestamp()
    taken = 0
    # A line's time stamp is shared by every characteristic of the line: parse each text once.
    epochs: dict[str, float | None] = {}
    for name, items in values_by_characteristic.items():
        lsl, usl = (limits or {}).get(name, (None, None))
        by_minute: dict[int, list[float]] = {}
        untimed: dict[int, int] = {}
        samples: dict[int, list[float]] = {}
        for value, time in items:
            x = float(value)
            if not math.isfinite(x):
                continue
            if time:
                e = epochs.get(time, False)
                if e is False:
                    dt = to_utc(time, tz)
                    e = epochs[time] = None if dt is None else dt.timestamp()
            else:
                e = None
            t = now_t if e is None else e
            mk = int(t // MINUTE) * MINUTE
            got = by_minute.get(mk)
            if got is None:
                got = by_minute[mk] = []
            got.append(x)
            if e is None:
                untimed[mk] = untimed.get(mk, 0) + 1
            samples.setdefault(int(t // HOUR) * HOUR, []).append(x)
            taken += 1
        # each minute's readings summed at once, the hours merged from their minutes
        minutes = {mk: _moments_of(vals, lsl, usl, untimed.get(mk, 0)) for mk, vals in by_minute.items()}
        hours: dict[int, Moments] = {}
        for mk, m in minutes.items():
            hk = mk // HOUR * HOUR
            h = hours.get(hk)
            hours[hk] = Moments().merge(m) if h is None else h.merge(m)  # a copy: the minute stays as it is
        _merge_rows(conn, "agg_minute", name, minutes)
        _merge_rows(conn, "agg_hour", name, hours)
        for hk, vals in samples.items():
            _sample_into(conn, name, hk, vals, sample_per_hour)
    return taken


def prune(conn: sqlite3.Connection, before_iso: str, *, fine_before_iso: str | None = None) -> int:
    """Delete hour buckets and samples older than ``before_iso`` and minute buckets older
    than ``fine_before_iso`` (default: ``before_iso``); return rows deleted.  No commit."""
    before = int(iso_epoch(before_iso))
    fine = int(iso_epoch(fine_before_iso)) if fine_before_iso else before
    fine = max(fine, before)
    n = 0
    n += conn.execute("DELETE FROM agg_hour WHERE t0 < ?", (before,)).rowcount
    n += conn.execute("DELETE FROM agg_sample WHERE t0 < ?", (before,)).rowcount
    n += conn.execute("DELETE FROM agg_minute WHERE t0 < ?", (fine,)).rowcount
    return n


def prune_for(conn: sqlite3.Connection, retention_days: int, now_utc: datetime) -> int:
    """Apply the retention rules at ``now_utc``: hours and samples ``retention_days``,
    minutes ``min(FINE_DAYS, retention_days)``."""
    t = now_utc.timestamp()
    return prune(conn, epoch_iso(t - retention_days * DAY),
                 fine_before_iso=epoch_iso(t - min(FINE_DAYS, retention_days) * DAY))


# -- reading -------------------------------------------------------------------------------


def characteristics(conn: sqlite3.Connection, start: float, end: float) -> list[str]:
    """Characteristics with readings in [start, end)."""
    if not has_schema(conn):
        return []
    rows = conn.execute(
        "SELECT DISTINCT characteristic FROM agg_hour WHERE t0 < ? AND t0 + ? > ? ORDER BY characteristic",
        (end, HOUR, start),
    ).fetchall()
    return [r[0] for r in rows]


def fine_covers(conn: sqlite3.Connection, name: str, start: float) -> bool:
    """True when minute buckets reach back to ``start`` (they were not pruned there yet)."""
    row = conn.execute("SELECT MIN(t0) FROM agg_minute WHERE characteristic = ?", (name,)).fetchone()
    first_min = row[0] if row else None
    row = conn.execute("SELECT MIN(t0) FROM agg_hour WHERE characteristic = ? AND t0 + ? > ?",
                       (name, HOUR, start)).fetchone()
    first_hour = row[0] if row else None
    if first_hour is None:
        return True
    if first_min is None:
        return False
    return (first_min // HOUR) * HOUR <= max((int(start) // HOUR) * HOUR, first_hour)


def buckets(conn: sqlite3.Connection, name: str, start: float, end: float) -> tuple[int, list[tuple[int, Moments]]]:
    """(bucket seconds, [(t0, Moments)]) of the period, in time order.

    A bucket belongs to the period when its start lies in [start, end), so
    consecutive periods share no bucket.  Minute buckets where they still
    exist (exact at whole-minute bounds), hour buckets otherwise.
    """
    if not has_schema(conn):
        return MINUTE, []
    if fine_covers(conn, name, start):
        table, width = "agg_minute", MINUTE
    else:
        table, width = "agg_hour", HOUR
    lo = math.ceil(start / width) * width
    rows = conn.execute(
        f"SELECT t0, n, mean, m2, vmin, vmax, below, above, untimed FROM {table}"
        " WHERE characteristic = ? AND t0 >= ? AND t0 < ? ORDER BY t0",
        (name, lo, end),
    ).fetchall()
    return width, [(int(r[0]), Moments.from_row(r[1:])) for r in rows]


def period_stats(conn: sqlite3.Connection, name: str, start: float, end: float) -> Moments:
    """Merged moments of a characteristic over [start, end)."""
    _w, bs = buckets(conn, name, start, end)
    total = Moments()
    for _t0, m in bs:
        total.merge(m)
    return total


@dataclass(frozen=True)
class PeriodSample:
    values: list[float]
    exact: bool  # True: every reading of the period; False: a stratified random sample
    readings: int  # readings in the hours the sample comes from


def period_sample(conn: sqlite3.Connection, name: str, start: float, end: float, *, seed: int = 0) -> PeriodSample:
    """Readings for the period's normality check, from the hourly reservoirs.

    Hours whose start lies in [floor_hour(start), end) are used.  Where no
    hour held more than its reservoir, the result is every reading.  Else a
    proportional stratified sample: ``m = min_h(r_h * N / n_h)`` in total,
    ``round(m * n_h / N)`` from hour h (r_h values kept of n_h seen, N = sum n_h),
    so each reading of the period has (nearly) the same chance to be drawn.
    """
    if not has_schema(conn):
        return PeriodSample([], True, 0)
    lo = math.floor(start / HOUR) * HOUR
    rows = conn.execute(
        "SELECT t0, seen, vals FROM agg_sample WHERE characteristic = ? AND t0 >= ? AND t0 < ? ORDER BY t0",
        (name, lo, end),
    ).fetchall()
    strata = [(int(r[0]), int(r[1]), _unpack(r[2])) for r in rows]
    total = sum(s for _t, s, _v in strata)
    if all(len(v) == s for _t, s, v in strata):
        return PeriodSample([x for _t, _s, v in strata for x in v], True, total)
    m = min(len(v) * total / s for _t, s, v in strata if s > 0)
    rng = random.Random(f"{name}|{lo}|{end}|{seed}")
    out: list[float] = []
    for _t, s, v in strata:
        k = min(len(v), int(round(m * s / total)))
        out.extend(rng.sample(v, k))
    return PeriodSample(out, False, total)


def storage_rows(conn: sqlite3.Connection) -> dict[str, int]:
    """Row counts of the aggregate tables (for status and the storage test)."""
    return {t: conn.execute(f"SELECT COUNT(*) FROM {t}").fetchone()[0] for t in ("agg_minute", "agg_hour", "agg_sample")}
