"""The daily digest schedule: daylight-saving days in Europe/Berlin, missed digests, never twice.

Reference for the clock changes: the IANA tz database as shipped with Python's zoneinfo
(EU rule: clocks change at 01:00 UTC on the last Sunday of March and of October; 2026: 29 March and
25 October).  The send instants are checked against a brute-force walk over UTC minutes, an
independent computation of "the first instant whose local clock reads at least HH:MM on that day".
Sending uses a real HTTP receiver on 127.0.0.1 and apprise's json:// target.
"""

from __future__ import annotations

import base64
from datetime import date, datetime, time as dtime, timedelta, timezone
from zoneinfo import ZoneInfo

import pytest

from tests.watcher.http_receiver import HttpReceiver
from watcher import aggregates as agg
from watcher.config import parse_config
from watcher.schedule import DigestHook, DigestSchedule, local_instant
from watcher.store import Store

BERLIN = ZoneInfo("Europe/Berlin")
UTC = timezone.utc


def _cfg(tmp_path, at="02:30", to=()):
    to_yaml = "[" + ", ".join(f'"{u}"' for u in to) + "]"
    text = (f"timezone: Europe/Berlin\nstate: ./state\nsources: [{{name: s, path: a.csv, time_column: t}}]\n"
            f"characteristics: [{{name: mass, source: s, column: m, unit: g, lsl: 495, usl: 505}}]\n"
            f"digest: {{at: \"{at}\", to: {to_yaml}, folder: ./digests}}\n")
    (tmp_path / "cfg.yaml").write_text(text)
    return parse_config(text, str(tmp_path / "cfg.yaml"))


def _brute_force(day: date, at: dtime, tz) -> datetime:
    t = datetime.combine(day - timedelta(days=1), dtime(12), tzinfo=UTC)
    while True:
        loc = t.astimezone(tz)
        if loc.date() == day and loc.time() >= at:
            return t
        t += timedelta(minutes=1)


@pytest.mark.parametrize("day", [date(2026, 3, 28), date(2026, 3, 29), date(2026, 3, 30),
                                 date(2026, 10, 24), date(2026, 10, 25), date(2026, 10, 26)])
@pytest.mark.parametrize("hhmm", ["00:00", "01:59", "02:00", "02:30", "02:59", "03:00", "06:30", "23:59"])
def test_send_instant_is_the_first_instant_the_clock_shows_the_time(day, hhmm):
    at = dtime(*map(int, hhmm.split(":")))
    assert local_instant(day, at, BERLIN) == _brute_force(day, at, BERLIN)


def test_spring_forward_gap_and_fall_back_overlap():
    # 29 March 2026: 02:00 CET jumps to 03:00 CEST at 01:00 UTC; 02:30 does not exist
    assert local_instant(date(2026, 3, 29), dtime(2, 30), BERLIN) == datetime(2026, 3, 29, 1, 0, tzinfo=UTC)
    # 25 October 2026: 03:00 CEST falls back to 02:00 CET at 01:00 UTC; 02:30 happens twice, first at 00:30 UTC
    assert local_instant(date(2026, 10, 25), dtime(2, 30), BERLIN) == datetime(2026, 10, 25, 0, 30, tzinfo=UTC)


def _simulate(cfg, start: datetime, end: datetime, step: timedelta, conn) -> list[tuple[datetime, object]]:
    sch = DigestSchedule(cfg)
    sent = []
    t = start
    while t <= end:
        for p in sch.due(t, conn):
            assert sch.mark_sent(conn, p)
            sent.append((t, p))
        t += step
    return sent


@pytest.mark.parametrize("start, days, expect_short", [
    (datetime(2026, 3, 27, 12, tzinfo=UTC), 4, date(2026, 3, 29)),
    (datetime(2026, 10, 23, 12, tzinfo=UTC), 4, date(2026, 10, 25)),
])
def test_one_digest_per_day_across_a_clock_change(tmp_path, start, days, expect_short):
    cfg = _cfg(tmp_path)
    st = Store(tmp_path / "state")
    try:
        sent = _simulate(cfg, start, start + timedelta(days=days), timedelta(minutes=5), st.conn)
        keys = [p.key for _t, p in sent]
        assert len(keys) == len(set(keys)) == days
        for (t, p) in sent:
            assert p.end <= t < p.end + timedelta(minutes=5)  # sent at the first tick after its instant
            assert p.end == _brute_force(p.day, dtime(2, 30), BERLIN)
        for (_a, p), (_b, q) in zip(sent, sent[1:]):
            assert q.start == p.end  # periods tile time: nothing counted twice or left out
        by_day = {p.day: p for _t, p in sent}
        if expect_short.month == 3:
            # the digest of the 29th is sent at 03:00 CEST (01:00 UTC); its period is 23.5 h long
            assert by_day[date(2026, 3, 29)].end == datetime(2026, 3, 29, 1, 0, tzinfo=UTC)
            assert by_day[date(2026, 3, 29)].end - by_day[date(2026, 3, 29)].start == timedelta(hours=23, minutes=30)
        else:
            # sent once, at the first 02:30 (00:30 UTC), not again at the second 02:30 (01:30 UTC)
            assert by_day[date(2026, 10, 25)].end == datetime(2026, 10, 25, 0, 30, tzinfo=UTC)
            assert sum(1 for t, _p in sent if t.date() == date(2026, 10, 25)) == 1
            assert by_day[date(2026, 10, 26)].end - by_day[date(2026, 10, 26)].start == timedelta(hours=25)
    finally:
        st.close()


def test_new_installation_sends_nothing_for_days_it_did_not_watch(tmp_path):
    cfg = _cfg(tmp_path, at="06:30")
    st = Store(tmp_path / "state")
    try:
        sch = DigestSchedule(cfg)
        assert sch.due(datetime(2026, 12, 2, 9, 0, tzinfo=UTC), st.conn) == []
        due = sch.due(datetime(2026, 12, 3, 5, 31, tzinfo=UTC), st.conn)
        assert [p.key for p in due] == ["2026-12-03"]
    finally:
        st.close()


def _readings(store, start, hours):
    with store.transaction() as c:
        vals = [(500.0 + (i % 7) * 0.3, (start + timedelta(minutes=2 * i)).isoformat()) for i in range(hours * 30)]
        agg.record_values(c, {"mass": vals}, start.isoformat(), limits={"mass": (495.0, 505.0)})


def test_missed_digest_is_sent_once_after_restart(tmp_path):
    with HttpReceiver() as rx:
        cfg = _cfg(tmp_path, at="06:30", to=[rx.url("/digest")])
        state = tmp_path / "state"
        # Day 1, 09:00 local: the daemon runs (arms the schedule), then stops before 06:30 next day.
        st = Store(state)
        _readings(st, datetime(2026, 12, 1, 8, tzinfo=UTC), 20)
        hook = DigestHook(cfg)
        assert hook.run_due(st, datetime(2026, 12, 1, 8, 0, tzinfo=UTC)) == []
        st.close()
        # Down over 06:30 on 2 December; started again at 09:15 local (08:15 UTC).
        st = Store(state)
        sent = DigestHook(cfg).run_due(st, datetime(2026, 12, 2, 8, 15, tzinfo=UTC))
        assert [r.period.key for r in sent] == ["2026-12-02"] and sent[0].ok
        got = rx.wait_for(1)
        assert len(got) == 1
        body = got[0]["body"]
        assert "linewatch digest 2026-12-02" in body["title"]
        assert "<!DOCTYPE html>" in body["message"] and "mass" in body["message"]
        att = body.get("attachments") or body.get("attachment")
        assert att, "the HTML file travels as an attachment"
        html_back = base64.b64decode(att[0]["base64"]).decode("utf-8")
        assert html_back == sent[0].paths["html"].read_text(encoding="utf-8")
        assert sent[0].paths["html"].parent == tmp_path / "digests"
        # restarted again the same morning: nothing more
        st.close()
        st = Store(state)
        assert DigestHook(cfg).run_due(st, datetime(2026, 12, 2, 9, 0, tzinfo=UTC)) == []
        row = st.conn.execute("SELECT status, delivered FROM digest_sent WHERE period = '2026-12-02'").fetchone()
        st.close()
        assert row[0] == "sent" and "ok" in row[1]
        assert len(rx.received(None)) == 1


def test_a_failed_delivery_is_recorded_and_not_repeated(tmp_path):
    rx = HttpReceiver(mode="error").start()
    try:
        cfg = _cfg(tmp_path, at="06:30", to=[rx.url("/digest")])
        st = Store(tmp_path / "state")
        _readings(st, datetime(2026, 12, 1, 8, tzinfo=UTC), 2)
        hook = DigestHook(cfg)
        hook.run_due(st, datetime(2026, 12, 1, 8, 0, tzinfo=UTC))
        r = hook.run_due(st, datetime(2026, 12, 2, 6, 0, tzinfo=UTC))
        assert len(r) == 1 and not r[0].ok and r[0].paths["html"].exists()
        n = len(rx.received(None))
        assert n >= 1
        assert hook.run_due(st, datetime(2026, 12, 2, 7, 0, tzinfo=UTC)) == []
        assert len(rx.received(None)) == n
        assert st.conn.execute("SELECT status FROM digest_sent").fetchone()[0] == "undelivered"
        st.close()
    finally:
        rx.stop()


def test_hook_tick_is_cheap_between_instants(tmp_path):
    cfg = _cfg(tmp_path, at="06:30")
    st = Store(tmp_path / "state")
    now = [datetime(2026, 12, 1, 8, 0, tzinfo=UTC)]
    hook = DigestHook(cfg, clock=lambda: now[0])

    class D:
        store = st

    hook.tick(D)
    assert hook._next == datetime(2026, 12, 2, 5, 30, tzinfo=UTC)
    now[0] = datetime(2026, 12, 2, 5, 29, tzinfo=UTC)
    hook.tick(D)
    assert hook.sent == []
    now[0] = datetime(2026, 12, 2, 5, 30, tzinfo=UTC)
    hook.tick(D)  # claims in this thread, sends in the background
    hook.close()
    assert [r.period.key for r in hook.sent] == ["2026-12-02"]
    assert (tmp_path / "digests").is_dir()
    assert st.conn.execute("SELECT status FROM digest_sent").fetchone()[0] == "sent"
    now[0] = datetime(2026, 12, 2, 5, 31, tzinfo=UTC)
    hook._next = None  # even when asked again, the period is not sent twice
    hook.tick(D)
    hook.close()
    assert len(hook.sent) == 1
    st.close()
