"""Routing (filters, quiet hours, rate limit), console target, message text and chart.

Outside references: the IANA time zone database (Europe/Berlin leaves CET
for CEST on the last Sunday of March at 01:00 UTC, EU Directive 2000/84/EC),
through Python's zoneinfo; Python's ``fnmatch`` for globs; the PNG
signature and IHDR layout of the W3C PNG specification (2nd ed., 2003,
sections 5.2 and 11.2.2), read back with Pillow.
"""

from __future__ import annotations

import io
import subprocess
import sqlite3
import sys
from datetime import datetime, time as dtime
from zoneinfo import ZoneInfo

import pytest

from tests.watcher.http_receiver import HttpReceiver
from watcher.alert_text import CAUTION, CharacteristicFacts, facts_from, opening_body
from watcher.charts import render_recent_chart
from watcher.episodes import AlertIntent, EpisodeBook
from watcher.notify import QuietHours, Target, quiet_decision, target_from_dict
from watcher.outbox import OutboxSender, OutboxSettings, digest_alerts, enqueue, ensure_schema
from watcher.records import Finding

BERLIN = ZoneInfo("Europe/Berlin")
FAST = dict(poll_s=0.02, backoff_base_s=0.05, backoff_cap_s=0.2, connect_timeout_s=0.5,
            read_timeout_s=0.5, call_timeout_s=2.0, tz="Europe/Berlin", chart_process=False)


def intent(n, severity="notice", characteristic="fill weight", source="line2-checkweigher"):
    return AlertIntent(
        episode_id=f"ep{n:06d}", kind="opened", severity=severity, characteristic=characteristic,
        source=source, pattern="shift", title=f"{characteristic}: shift [{severity}] #{n}",
        body=f"Episode ep{n:06d}.", created_at="2026-12-02T08:00:00Z",
    )


@pytest.fixture
def db(tmp_path):
    path = tmp_path / "state.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA journal_mode=WAL")
    ensure_schema(conn)
    conn.commit()
    yield path, conn
    conn.close()


def epoch(*args, tz=BERLIN):
    return datetime(*args, tzinfo=tz).timestamp()


def titles(rx):
    return [r["body"]["title"] for r in rx.received()]


# -- static filters ------------------------------------------------------------------------
def test_filters_globs_and_min_severity():
    t = Target("json://h/x", characteristics=("fill*", "seal temp"), sources=("line2-*",),
               min_severity="notice")
    assert t.wants("fill weight", "line2-checkweigher", "notice")
    assert t.wants("seal temp", "line2-sealer", "urgent")
    assert not t.wants("pin diameter", "line2-lathe", "urgent")  # characteristic
    assert not t.wants("fill weight", "line3-checkweigher", "urgent")  # source
    assert not t.wants("fill weight", "line2-checkweigher", "info")  # severity
    # silence alerts carry no characteristic: only the source filter applies
    assert t.wants("", "line2-checkweigher", "notice")
    assert not t.wants("", "line9", "notice")
    urgent_only = target_from_dict({"url": "console://", "min_severity": "urgent"})
    assert not urgent_only.wants("fill weight", "x", "notice")
    with pytest.raises(ValueError, match="severity"):
        Target("json://h/x", min_severity="loud")
    with pytest.raises(ValueError, match="quiet_policy"):
        Target("json://h/x", quiet_policy="drop")


def test_enqueue_writes_one_delivery_per_accepting_target(db):
    _path, conn = db
    a = Target("json://h/a", name="a", characteristics=("fill*",))
    b = Target("json://h/b", name="b", min_severity="urgent")
    c = Target("console://", name="c")
    enqueue(conn, intent(1, "notice"), [a, b, c])
    enqueue(conn, intent(2, "urgent", characteristic="pin diameter"), [a, b, c])
    rows = conn.execute("SELECT alert_id, target FROM alert_delivery ORDER BY id").fetchall()
    assert rows == [(1, "a"), (1, "c"), (2, "b"), (2, "c")]


# -- quiet hours -------------------------------------------------------------------------------
def test_quiet_hours_hold_then_release_and_top_severity_passes(db):
    path, conn = db
    clock = [epoch(2026, 12, 2, 23, 0)]
    with HttpReceiver() as rx:
        tg = Target(rx.url(), quiet_hours=QuietHours(dtime(22), dtime(6)), quiet_policy="hold")
        enqueue(conn, intent(1, "notice"), [tg], now=clock[0])
        enqueue(conn, intent(2, "urgent"), [tg], now=clock[0])
        conn.commit()
        s = OutboxSender(path, [tg], OutboxSettings(**FAST), now=lambda: clock[0])
        s.run_once()
        assert titles(rx) == [intent(2, "urgent").title]
        clock[0] = epoch(2026, 12, 3, 5, 59, 59)
        s.run_once()
        assert len(titles(rx)) == 1
        clock[0] = epoch(2026, 12, 3, 6, 0, 0)
        s.run_once()
        assert titles(rx) == [intent(2, "urgent").title, intent(1, "notice").title]


def test_quiet_hours_across_spring_dst_change(db):
    # Night of 27/28 March 2027: Berlin clocks go 02:00 CET -> 03:00 CEST
    # (01:00 UTC).  Quiet hours 22:00-06:00 local end at 04:00 UTC, 7 hours
    # after they began at 21:00 UTC.
    path, conn = db
    clock = [epoch(2027, 3, 27, 23, 30)]
    with HttpReceiver() as rx:
        tg = Target(rx.url(), quiet_hours=QuietHours(dtime(22), dtime(6)))
        enqueue(conn, intent(1), [tg], now=clock[0])
        conn.commit()
        s = OutboxSender(path, [tg], OutboxSettings(**FAST), now=lambda: clock[0])
        s.run_once()
        nb = conn.execute("SELECT not_before FROM alert_delivery").fetchone()[0]
        assert nb == datetime(2027, 3, 28, 4, 0, tzinfo=ZoneInfo("UTC")).timestamp()
        clock[0] = nb - 1
        s.run_once()
        assert titles(rx) == []
        clock[0] = nb
        s.run_once()
        assert titles(rx) == [intent(1).title]


def test_quiet_hours_digest_policy(db):
    path, conn = db
    clock = [epoch(2026, 12, 2, 23, 0)]
    with HttpReceiver() as rx:
        tg = Target(rx.url(), name="office", quiet_hours=QuietHours(dtime(22), dtime(6)), quiet_policy="digest")
        enqueue(conn, intent(1, "notice"), [tg], now=clock[0])
        conn.commit()
        s = OutboxSender(path, [tg], OutboxSettings(**FAST), now=lambda: clock[0])
        s.run_once()
        clock[0] = epoch(2026, 12, 3, 9, 0)
        s.run_once()
        assert titles(rx) == []
    (d,) = digest_alerts(conn)
    assert d["episode_id"] == "ep000001" and d["target"] == "office"


def test_quiet_decision_days_filter():
    q = QuietHours(dtime(0), dtime(23, 59), days=frozenset({5, 6}))  # weekends only
    t = Target("console://", quiet_hours=q)
    assert quiet_decision(t, "notice", datetime(2026, 12, 5, 12, tzinfo=BERLIN))[0] == "hold"  # Saturday
    assert quiet_decision(t, "notice", datetime(2026, 12, 7, 12, tzinfo=BERLIN))[0] == "send"  # Monday


# -- rate limit ----------------------------------------------------------------------------------
def test_rate_limit_merges_into_one_summary_when_window_rolls(db):
    path, conn = db
    t0 = epoch(2026, 12, 2, 10, 0)
    clock = [t0]
    with HttpReceiver() as rx:
        tg = Target(rx.url(), rate_limit=3)
        s = OutboxSender(path, [tg], OutboxSettings(**FAST), now=lambda: clock[0])
        for n in range(10):  # one notice every minute
            clock[0] = t0 + 60 * n
            enqueue(conn, intent(n), [tg], now=clock[0])
            conn.commit()
            s.run_once()
        # an urgent alert passes the limit (rate_limit_urgent=False)
        enqueue(conn, intent(99, "urgent"), [tg], now=clock[0])
        conn.commit()
        s.run_once()
        assert titles(rx) == [intent(n).title for n in range(3)] + [intent(99, "urgent").title]
        clock[0] = t0 + 3599
        s.run_once()
        assert len(titles(rx)) == 4
        clock[0] = t0 + 3600  # the window opened by the first message closes
        s.run_once()
        got = rx.received()
        assert len(got) == 5
        summary = got[-1]["body"]
        assert "7 held-back alert(s)" in summary["title"]
        for n in range(3, 10):
            assert f"ep{n:06d}" in summary["message"]
        for n in (0, 1, 2, 99):
            assert f"ep{n:06d}" not in summary["message"]
        s.run_once()
        assert len(rx.received()) == 5  # the summary is sent once
    counts = dict(conn.execute("SELECT status, COUNT(*) FROM alert_delivery GROUP BY status").fetchall())
    assert counts == {"sent": 5, "summarised": 7}


# -- console target ------------------------------------------------------------------------------
def test_console_target_prints(db):
    path, conn = db
    out = io.StringIO()
    tg = target_from_dict({"url": "console://", "name": "screen"})
    enqueue(conn, intent(1), [tg])
    conn.commit()
    OutboxSender(path, [tg], OutboxSettings(**FAST), stream=out).run_once()
    text = out.getvalue()
    assert intent(1).title in text and "ep000001" in text
    assert conn.execute("SELECT status FROM alert_delivery").fetchone()[0] == "sent"


# -- message text ----------------------------------------------------------------------------------
def test_message_contents():
    facts = CharacteristicFacts(unit="g", target=500.0, lsl=495.0, usl=505.0, centre=500.1, sigma=0.4)
    body = opening_body(
        episode_id="a1b2c3d4", characteristic="fill weight", pattern="drift", facts=facts,
        onset_index=1204, onset_time="2026-12-02T08:14:03", size=1.0, direction="up",
        p_value=2.5e-6, detector="Mann-Kendall trend test", index=1300, value=502.7,
        detail={"hours_to_limit": 3.46, "limit": "upper"},
    )
    assert "a1b2c3d4" in body
    assert "2026-12-02T08:14:03" in body and "1204" in body
    assert "1 g" in body and "2.5 baseline sigmas" in body  # 1.0 / 0.4 = 2.5
    assert "upwards" in body
    assert "p = 2.5e-06 from Mann-Kendall trend test" in body
    assert "latest value 502.7 g" in body and "target 500 g" in body and "495 g to 505 g" in body
    assert "upper specification limit in about 3.5 hours" in body
    assert body.endswith(CAUTION)
    assert "not a diagnosis" in CAUTION


def test_episode_messages_carry_id_and_units():
    conn = sqlite3.connect(":memory:")
    book = EpisodeBook(conn)
    f = Finding("pin diameter", "shift", "CUSUM", 1e-7, 300, None, 280, None, "down", -0.012, "",
                source="lathe-3", value=9.985)
    (it,) = book.on_finding(f, facts_from({"unit": "mm", "lower": 9.97, "upper": 10.03, "mean": 10.0,
                                            "sigma": 0.004}))
    assert it.title == "pin diameter: shift [notice]"
    assert it.episode_id in it.body
    assert "0.012 mm (3 baseline sigmas), downwards" in it.body  # 0.012 / 0.004 = 3
    assert "reading 280" in it.body


# -- chart ---------------------------------------------------------------------------------------------
def test_chart_is_a_png_of_the_requested_size():
    PIL = pytest.importorskip("PIL.Image")
    vals = [10.0 + 0.001 * i for i in range(120)]
    png = render_recent_chart(vals, None, 10.0, 0.004, 9.97, 10.03, 80, "pin diameter", width_px=640,
                              height_px=320)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, section 5.2
    # IHDR is the first chunk; width and height are its first two 4-byte big-endian fields (11.2.2)
    assert png[12:16] == b"IHDR"
    assert int.from_bytes(png[16:20], "big") == 640 and int.from_bytes(png[20:24], "big") == 320
    img = PIL.open(io.BytesIO(png))
    assert img.size == (640, 320)


def test_reading_path_modules_do_not_import_matplotlib_or_apprise():
    code = ("import sys, watcher.episodes, watcher.outbox, watcher.notify, watcher.alert_text, "
            "watcher.charts, watcher.redact; "
            "print(sorted(m for m in ('matplotlib', 'apprise') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_closing_message_goes_to_whoever_got_the_episode(db):
    from watcher.episodes import EpisodeSettings

    _path, conn = db
    book = EpisodeBook(conn, EpisodeSettings(close_after=10, alert_on_close=True))
    everyone = Target("json://h/a", name="everyone", min_severity="notice")
    urgent_only = Target("json://h/b", name="urgent-only", min_severity="urgent")
    mild = Finding("fill weight", "shift", "CUSUM", 1e-5, 5, None, 1, None, "up", 0.5, "", value=500.5)
    bad = Finding("seal temp", "drift", "Mann-Kendall", 1e-5, 5, None, 1, None, "up", 2.0, "",
                  value=181.0, detail={"hours_to_limit": 1.0})
    intents = book.on_finding(mild, {"usl": 505}) + book.on_finding(bad, {"usl": 185})
    intents += book.on_reading("fill weight", 20) + book.on_reading("seal temp", 20)
    assert [(i.kind, i.severity) for i in intents] == [
        ("opened", "notice"), ("opened", "urgent"), ("closed", "info"), ("closed", "info")]
    for it in intents:
        enqueue(conn, it, [everyone, urgent_only])
    rows = conn.execute("SELECT a.characteristic, a.kind, d.target FROM alert_delivery d "
                        "JOIN alert_outbox a ON a.id = d.alert_id ORDER BY d.id").fetchall()
    assert rows == [
        ("fill weight", "opened", "everyone"),
        ("seal temp", "opened", "everyone"), ("seal temp", "opened", "urgent-only"),
        ("fill weight", "closed", "everyone"),
        ("seal temp", "closed", "everyone"), ("seal temp", "closed", "urgent-only"),
    ]
