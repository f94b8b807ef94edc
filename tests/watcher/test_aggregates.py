"""Bounded aggregates for the digest, checked against numpy on the raw readings.

Reference: numpy's mean / var(ddof=1) / min / max on the very readings fed in
(a general-purpose library, independent of the merge formulas used here).
The reservoir check is a property of Vitter's (1985) algorithm R: every
position of the input is kept with the same probability.
"""

from __future__ import annotations

import math
import random
import sqlite3
from datetime import datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from watcher import aggregates as agg
from watcher.store import Store

T0 = datetime(2026, 12, 1, 6, 0, tzinfo=timezone.utc)


def _conn() -> sqlite3.Connection:
    c = sqlite3.connect(":memory:")
    agg.ensure_schema(c)
    return c


def _feed(conn, name, values, times, batch_sizes, limits=None, now=T0):
    i = 0
    sizes = iter(batch_sizes)
    while i < len(values):
        k = next(sizes, 50)
        items = [(float(v), t) for v, t in zip(values[i:i + k], times[i:i + k])]
        agg.record_values(conn, {name: items}, now.isoformat(), limits=limits)
        i += k


def test_period_stats_match_numpy_for_any_whole_minute_period():
    rng = np.random.default_rng(11)
    n = 6000
    x = 500.0 + rng.normal(0, 1.3, n)
    secs = np.sort(rng.uniform(0, 5 * 3600, n))
    times = [(T0 + timedelta(seconds=float(s))).isoformat() for s in secs]
    c = _conn()
    batch = [int(b) for b in rng.integers(1, 200, 500)]
    _feed(c, "mass", x, times, batch, limits={"mass": (497.0, 503.0)})
    for a_min, b_min in ((0, 300), (17, 211), (61, 62), (120, 299)):
        a = T0.timestamp() + 60 * a_min
        b = T0.timestamp() + 60 * b_min
        sel = x[(T0.timestamp() + secs >= a) & (T0.timestamp() + secs < b)]
        m = agg.period_stats(c, "mass", a, b)
        assert m.n == sel.size
        if sel.size == 0:
            continue
        assert m.mean == pytest.approx(sel.mean(), rel=1e-12)
        if sel.size > 1:
            assert m.sd == pytest.approx(sel.std(ddof=1), rel=1e-9)
        assert m.vmin == sel.min() and m.vmax == sel.max()
        assert m.below == int((sel < 497.0).sum()) and m.above == int((sel > 503.0).sum())


def test_merge_keeps_precision_with_a_large_offset():
    # A running sum of squares would lose most digits here (values ~1e8, sd ~1e-3).
    rng = np.random.default_rng(3)
    x = 1e8 + rng.normal(0, 1e-3, 3000)
    times = [(T0 + timedelta(seconds=2 * i)).isoformat() for i in range(x.size)]
    c = _conn()
    _feed(c, "big", x, times, [7, 300, 1, 999, 13] * 100)
    m = agg.period_stats(c, "big", T0.timestamp(), T0.timestamp() + 86400)
    assert m.sd == pytest.approx(x.std(ddof=1), rel=1e-6)


def test_stored_merge_is_the_python_merge_to_the_last_bit():
    """The upsert adds a batch's moments in SQL; the stored row must equal Moments.merge
    (Chan, Golub & LeVeque 1983 pairwise update) of the same pieces, bit for bit."""
    rng = np.random.default_rng(21)
    c = _conn()
    expected: dict[int, agg.Moments] = {}
    for _ in range(200):
        k = int(rng.integers(1, 40))
        secs = np.sort(rng.uniform(0, 3 * 60, k))
        x = 10.0 + rng.normal(0, 0.01, k) * rng.choice([1, 1e3])  # some wide pieces, some narrow
        items = [(float(v), (T0 + timedelta(seconds=float(s))).isoformat()) for v, s in zip(x, secs)]
        agg.record_values(c, {"torque": items}, T0.isoformat(), limits={"torque": (9.99, 10.01)})
        by_minute: dict[int, list[float]] = {}
        for v, s in zip(x.tolist(), secs.tolist()):
            by_minute.setdefault(int((T0.timestamp() + s) // 60) * 60, []).append(v)
        for t0, vals in by_minute.items():
            piece = agg._moments_of(vals, 9.99, 10.01, 0)
            expected[t0] = piece if t0 not in expected else expected[t0].merge(piece)
    rows = {r[0]: r[1:] for r in c.execute(
        "SELECT t0, n, mean, m2, vmin, vmax, below, above, untimed FROM agg_minute WHERE characteristic = 'torque'")}
    assert set(rows) == set(expected)
    for t0, m in expected.items():
        assert rows[t0] == m.row()  # exact equality: the same operations in the same order


def test_storage_grows_with_time_not_with_readings():
    c = _conn()
    rng = np.random.default_rng(5)
    for rate in (1, 10):  # the same two hours, then ten times the readings in them
        n = 2 * 3600 // 10 * rate
        secs = np.linspace(0, 7199, n)
        _feed(c, f"c{rate}", rng.normal(0, 1, n), [(T0 + timedelta(seconds=float(s))).isoformat() for s in secs],
              [500] * 100)
    rows = {t: dict(c.execute(f"SELECT characteristic, COUNT(*) FROM {t} GROUP BY characteristic").fetchall())
            for t in ("agg_minute", "agg_hour", "agg_sample")}
    assert rows["agg_minute"] == {"c1": 120, "c10": 120}
    assert rows["agg_hour"] == {"c1": 2, "c10": 2}
    assert rows["agg_sample"] == {"c1": 2, "c10": 2}
    for (blob,) in c.execute("SELECT vals FROM agg_sample"):
        assert len(blob) // 8 <= agg.SAMPLE_PER_HOUR


def test_sample_is_every_reading_when_few_and_a_bounded_subset_when_many():
    c = _conn()
    few = [float(i) for i in range(40)]
    _feed(c, "few", few, [(T0 + timedelta(seconds=60 * i)).isoformat() for i in range(40)], [9] * 10)
    s = agg.period_sample(c, "few", T0.timestamp(), T0.timestamp() + 7200)
    assert s.exact and sorted(s.values) == few
    many = [float(i) for i in range(3000)]
    _feed(c, "many", many, [(T0 + timedelta(seconds=i)).isoformat() for i in range(3000)], [17] * 200)
    s = agg.period_sample(c, "many", T0.timestamp(), T0.timestamp() + 7200)
    assert not s.exact and s.readings == 3000
    assert set(s.values) <= set(many) and len(set(s.values)) == len(s.values)
    assert 0 < len(s.values) <= 2 * agg.SAMPLE_PER_HOUR
    again = agg.period_sample(c, "many", T0.timestamp(), T0.timestamp() + 7200)
    assert again.values == s.values  # seeded: the same digest twice gives the same check


def test_reservoir_keeps_every_position_with_equal_chance():
    # Algorithm R (Vitter 1985): each of the N readings of an hour is in the reservoir with
    # probability k/N.  Over 60 hours of N = 1000 readings whose value is their position,
    # the kept positions have mean (N-1)/2 = 499.5 and sd sqrt((N^2-1)/12) = 288.7; the mean
    # of 60*64 = 3840 kept positions has a standard error of about 288.7/sqrt(3840) = 4.66.
    c = _conn()
    rng = random.Random(2)
    for h in range(60):
        pos = list(range(1000))
        times = [(T0 + timedelta(hours=h, seconds=3.6 * i)).isoformat() for i in pos]
        _feed(c, "u", pos, times, [rng.randint(1, 120) for _ in range(200)])
    kept = []
    for (blob,) in c.execute("SELECT vals FROM agg_sample WHERE characteristic = 'u'"):
        kept += agg._unpack(blob)
    assert len(kept) == 60 * agg.SAMPLE_PER_HOUR
    assert abs(np.mean(kept) - 499.5) < 4 * 4.66
    # and not just the first or last readings of each hour (quartiles of a uniform position)
    q = np.quantile(kept, [0.25, 0.75])
    assert 200 < q[0] < 300 and 700 < q[1] < 800


def test_untimed_readings_use_arrival_time_and_naive_times_the_site_zone():
    c = _conn()
    berlin = ZoneInfo("Europe/Berlin")
    agg.record_values(c, {"p": [(1.0, None), (2.0, "garbage"), (3.0, "2026-12-01T09:10:00")]},
                      "2026-12-01T07:30:20+00:00", tz=berlin)
    # 09:10 Berlin (UTC+1) is 08:10 UTC; the two without a usable time sit at 07:30 UTC
    rows = c.execute("SELECT t0, n, untimed FROM agg_minute ORDER BY t0").fetchall()
    assert rows == [(int(datetime(2026, 12, 1, 7, 30, tzinfo=timezone.utc).timestamp()), 2, 2),
                    (int(datetime(2026, 12, 1, 8, 10, tzinfo=timezone.utc).timestamp()), 1, 0)]
    agg.record_values(c, {"p": [(math.nan, None), (math.inf, None)]}, "2026-12-01T07:30:20+00:00")
    assert agg.period_stats(c, "p", 0, 2e9).n == 3


def test_prune_removes_old_buckets_and_old_periods_fall_back_to_hours():
    c = _conn()
    rng = np.random.default_rng(8)
    days = 40
    x = rng.normal(10, 2, days * 24)
    times = [(T0 + timedelta(hours=i, minutes=7)).isoformat() for i in range(x.size)]
    _feed(c, "d", x, times, [24] * days)
    now = T0 + timedelta(days=days)
    deleted = agg.prune_for(c, 35, now)
    assert deleted > 0
    oldest_hour = c.execute("SELECT MIN(t0) FROM agg_hour").fetchone()[0]
    oldest_min = c.execute("SELECT MIN(t0) FROM agg_minute").fetchone()[0]
    assert oldest_hour >= (now - timedelta(days=35)).timestamp()
    assert oldest_min >= (now - timedelta(days=agg.FINE_DAYS)).timestamp()
    assert oldest_min - oldest_hour > 3 * 86400  # minutes went further back than hours
    # A period older than the minute buckets: hour buckets, still exact on whole hours
    a = (now - timedelta(days=34)).timestamp()
    b = a + 86400
    width, _ = agg.buckets(c, "d", a, b)
    assert width == agg.HOUR
    secs = np.array([T0.timestamp() + 3600 * i + 420 for i in range(x.size)])
    sel = x[(secs >= a) & (secs < b)]
    m = agg.period_stats(c, "d", a, b)
    assert m.n == sel.size == 24 and m.mean == pytest.approx(sel.mean(), rel=1e-12)
    # A recent period uses minute buckets
    assert agg.buckets(c, "d", (now - timedelta(days=2)).timestamp(), now.timestamp())[0] == agg.MINUTE


def test_tables_come_with_a_real_store(tmp_path):
    st = Store(tmp_path / "state")
    try:
        assert agg.has_schema(st.conn)
        with st.transaction() as tx:
            agg.record_values(tx, {"m": [(1.0, T0.isoformat()), (3.0, T0.isoformat())]}, T0.isoformat())
        assert agg.period_stats(st.conn, "m", T0.timestamp(), T0.timestamp() + 60).mean == 2.0
    finally:
        st.close()
