"""Episodes: one alert per opening, one per escalation, closing by absence, silence.

These are behaviour checks of our own alerting rules (no published values
apply); the expected counts are derived by hand in the comments.
"""

from __future__ import annotations

import random
import sqlite3
from datetime import datetime, time as dtime, timedelta, timezone
from zoneinfo import ZoneInfo

import pytest

from watcher.episodes import (
    EpisodeBook,
    EpisodeSettings,
    SilenceRule,
    SilenceWatch,
    WorkingHours,
    acknowledge,
    close_for_rebaseline,
    default_close_after,
    get_episode,
    ensure_schema,
    list_episodes,
)
from watcher.records import Finding

SPEC = {"unit": "g", "target": 500.0, "lsl": 495.0, "usl": 505.0, "centre": 500.0, "sigma": 0.5}


def finding(index, pattern="shift", p=1e-5, characteristic="fill weight", **kw):
    base = dict(
        characteristic=characteristic,
        pattern=pattern,
        detector=kw.pop("detector", "CUSUM" if pattern != "out_of_spec" else "specification limits"),
        p_value=p if pattern != "out_of_spec" else None,
        index=index,
        time=kw.pop("time", f"2026-12-02T08:{index // 60 % 60:02d}:{index % 60:02d}"),
        onset_index=kw.pop("onset_index", max(0, index - 10)),
        onset_time=kw.pop("onset_time", None),
        direction=kw.pop("direction", "up"),
        size=kw.pop("size", 0.8),
        message="",
        source=kw.pop("source", "line2-checkweigher"),
        value=kw.pop("value", 500.9),
    )
    base.update(kw)
    return Finding(**base)


@pytest.fixture
def conn(tmp_path):
    c = sqlite3.connect(tmp_path / "state.sqlite")
    c.execute("PRAGMA journal_mode=WAL")
    yield c
    c.close()


def run_stream(book, events, n_readings, characteristic="fill weight", recent=None):
    """Feed findings (dict index -> list of findings) and readings 0..n-1; collect intents."""
    out = []
    for i in range(n_readings):
        for f in events.get(i, []):
            out += book.on_finding(f, SPEC, recent)
        out += book.on_reading(characteristic, i, None)
    return out


def test_default_close_after_rule():
    # max(100, 2 x largest window): common practice, no source.
    assert default_close_after(None) == 100
    assert default_close_after(50) == 100
    assert default_close_after(51) == 102
    assert default_close_after(400) == 800


def test_long_pattern_gives_one_opening_and_one_escalation_per_news(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=100))
    rng = random.Random(7)
    events = {}
    # 360 findings of the same shift, one every 5 readings (200..1995), with
    # p-values within a factor 10 of each other: never 100x below the first.
    for i in range(200, 2000, 5):
        events.setdefault(i, []).append(finding(i, p=10 ** rng.uniform(-5, -4)))
    # readings beyond the limit at 1500..1509: one escalation only
    for i in range(1500, 1510):
        events.setdefault(i, []).append(finding(i, pattern="out_of_spec", value=505.4))
    intents = run_stream(book, events, 2050)
    kinds = [i.kind for i in intents]
    assert kinds == ["opened", "escalated"], kinds
    assert intents[1].severity == "urgent"
    assert intents[0].severity == "notice"
    # same episode id in both, and in every message
    assert intents[0].episode_id == intents[1].episode_id
    for it in intents:
        assert it.episode_id in it.body
    ep = get_episode(conn, intents[0].episode_id)
    assert ep.findings == 360 + 10
    assert ep.out_of_spec == 10
    assert ep.first_index == 200 and ep.last_index == 1995
    assert ep.state == "escalated"


def test_pvalue_escalation_factor_100(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=100, pvalue_factor=100, max_p_escalations=3))
    # Hand-derived: alerted at 1e-3; 1.1e-5 is not <= 1e-3/100 = 1e-5; 9e-6 is
    # (alert 2, new reference 9e-6); 1e-7 is not <= 9e-8; 8e-8 is (alert 3);
    # 1e-9 is not <= 8e-10; 5e-10 is (alert 4).
    ps = [1e-3, 5e-4, 2e-4, 1.1e-5, 9e-6, 1e-7, 8e-8, 1e-9, 5e-10]
    intents = []
    for k, p in enumerate(ps):
        intents += book.on_finding(finding(100 + 10 * k, p=p), SPEC)
    assert [i.kind for i in intents] == ["opened", "escalated", "escalated", "escalated"]
    assert [i.finding_index for i in intents] == [100, 140, 160, 180]
    assert "Stronger evidence" in intents[1].body
    ep = get_episode(conn, intents[0].episode_id)
    assert ep.last_alert_p == pytest.approx(5e-10)
    assert ep.min_p == pytest.approx(5e-10)


def test_pvalue_escalations_are_capped(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=100, pvalue_factor=100))  # default: 2 of them
    ps = [1e-3, 9e-6, 8e-8, 5e-10, 1e-14]
    intents = []
    for k, p in enumerate(ps):
        intents += book.on_finding(finding(100 + 10 * k, p=p), SPEC)
    assert [i.finding_index for i in intents] == [100, 110, 120]
    # A reading beyond specification is still news after the cap.
    oos = book.on_finding(finding(200, "out_of_spec", value=506.0), SPEC)
    assert [i.kind for i in oos] == ["escalated"]


def test_close_after_absence_and_reopen_with_new_id(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=100, alert_on_close=True))
    events = {500: [finding(500)], 700: [finding(700)]}
    out = []
    for i in range(0, 800):
        for f in events.get(i, []):
            out += book.on_finding(f, SPEC)
        got = book.on_reading("fill weight", i, None)
        if i == 599:
            assert got == []  # 99 readings without it: still open
        out += got
    kinds = [(i.kind, i.finding_index) for i in out]
    assert kinds == [("opened", 500), ("closed", 600), ("opened", 700)]
    assert out[0].episode_id != out[2].episode_id
    assert out[1].severity == "info"
    assert get_episode(conn, out[0].episode_id).state == "closed"


def test_no_close_alert_unless_configured(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=10, alert_on_close=False))
    out = book.on_finding(finding(5), SPEC)
    for i in range(6, 40):
        out += book.on_reading("fill weight", i, None)
    assert [i.kind for i in out] == ["opened"]
    assert book.open_episodes() == []


def test_acknowledged_gets_no_escalation(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=100))
    (opened,) = book.on_finding(finding(10, p=1e-4), SPEC)
    acknowledge(conn, opened.episode_id, "tool change planned at 10:00")
    later = book.on_finding(finding(20, pattern="out_of_spec", value=506.0), SPEC)
    later += book.on_finding(finding(30, p=1e-12), SPEC)
    assert later == []
    ep = get_episode(conn, opened.episode_id)
    assert ep.state == "acknowledged"
    assert "tool change planned" in ep.notes
    with pytest.raises(KeyError):
        acknowledge(conn, "nosuchid", "")


def test_rebaseline_closes_and_next_finding_opens_new(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=1000, alert_on_close=True))
    (a,) = book.on_finding(finding(10), SPEC)
    closed = close_for_rebaseline(conn, "fill weight", "new film reel", book.settings)
    assert [c.kind for c in closed] == ["closed"]
    assert "re-baselined" in closed[0].body
    (b,) = book.on_finding(finding(11), SPEC)
    assert b.kind == "opened" and b.episode_id != a.episode_id


def test_drift_projection_severity_and_single_escalation(conn):
    book = EpisodeBook(conn, EpisodeSettings(close_after=500, urgent_horizon_hours=8))
    out = book.on_finding(finding(10, pattern="drift", detail={"hours_to_limit": 20.0}), SPEC)
    assert [(i.kind, i.severity) for i in out] == [("opened", "notice")]
    assert "20.0 hours" in out[0].body
    out = book.on_finding(finding(50, pattern="drift", detail={"hours_to_limit": 5.0}), SPEC)
    assert [(i.kind, i.severity) for i in out] == [("escalated", "urgent")]
    assert "5.0 hours" in out[0].body
    out = book.on_finding(finding(90, pattern="drift", detail={"hours_to_limit": 4.0}), SPEC)
    assert out == []  # already urgent: no news
    # an episode that opens inside the horizon opens as urgent
    out = book.on_finding(
        finding(10, pattern="drift", characteristic="pin diameter", detail={"hours_to_limit": 1.5}), SPEC
    )
    assert [(i.kind, i.severity) for i in out] == [("opened", "urgent")]


def test_out_of_spec_alone_opens_its_own_episode(conn):
    book = EpisodeBook(conn)
    out = book.on_finding(finding(10, pattern="out_of_spec", value=494.0, direction="down"), SPEC)
    out += book.on_finding(finding(11, pattern="out_of_spec", value=494.2, direction="down"), SPEC)
    assert [(i.kind, i.severity, i.pattern) for i in out] == [("opened", "urgent", "out_of_spec")]
    # a pattern found later is a separate episode
    out = book.on_finding(finding(30, pattern="shift"), SPEC)
    assert [(i.kind, i.pattern) for i in out] == [("opened", "shift")]


def test_state_survives_restart(tmp_path):
    path = tmp_path / "state.sqlite"
    c1 = sqlite3.connect(path)
    book = EpisodeBook(c1)
    (a,) = book.on_finding(finding(10), SPEC)
    c1.commit()
    c1.close()
    c2 = sqlite3.connect(path)
    book2 = EpisodeBook(c2)
    assert book2.on_finding(finding(20), SPEC) == []  # same episode continues, no new opening
    assert [e.id for e in list_episodes(c2, live_only=True)] == [a.episode_id]
    c2.close()


def test_runs_inside_callers_transaction(tmp_path):
    path = tmp_path / "state.sqlite"
    c = sqlite3.connect(path)
    c.execute("PRAGMA journal_mode=WAL")
    book = EpisodeBook(c)
    c.commit()
    other = sqlite3.connect(path)
    book.on_finding(finding(10), SPEC)
    # not committed by the book: invisible to another connection
    assert other.execute("SELECT COUNT(*) FROM episodes").fetchone()[0] == 0
    c.rollback()
    assert c.execute("SELECT COUNT(*) FROM episodes").fetchone()[0] == 0
    book.on_finding(finding(11), SPEC)
    c.commit()
    assert other.execute("SELECT COUNT(*) FROM episodes").fetchone()[0] == 1
    other.close()
    c.close()


def test_chart_data_carried_with_onset(conn):
    book = EpisodeBook(conn)
    values = [500 + 0.01 * i for i in range(60)]
    (it,) = book.on_finding(finding(100, onset_index=80), SPEC, recent=(values, None, 41))
    assert it.chart["first_index"] == 41
    assert it.chart["onset_pos"] == 80 - 41
    assert it.chart["usl"] == 505.0


# -- silence --------------------------------------------------------------------------------
def test_silence_opens_once_and_closes_on_resumption(conn):
    t0 = datetime(2026, 12, 2, 8, 0, tzinfo=timezone.utc)
    book = EpisodeBook(conn, EpisodeSettings(alert_on_close=True, clock=lambda: t0))
    watch = SilenceWatch(book, {"line2-checkweigher": SilenceRule(gap_seconds=600)})
    assert watch.check(t0) == []  # first sight: counting starts
    assert watch.seen("line2-checkweigher", t0 + timedelta(seconds=60)) == []
    assert watch.check(t0 + timedelta(seconds=600)) == []  # 540 s silent
    assert watch.check(t0 + timedelta(seconds=660)) == []  # exactly 600 s: not more than the gap
    out = watch.check(t0 + timedelta(seconds=661))
    assert [(i.kind, i.pattern, i.source) for i in out] == [("silence", "silence", "line2-checkweigher")]
    assert out[0].episode_id in out[0].body
    assert watch.check(t0 + timedelta(seconds=2000)) == []  # still the same episode: no repeat
    back = watch.seen("line2-checkweigher", t0 + timedelta(seconds=2100))
    assert [i.kind for i in back] == ["resumed"]
    assert back[0].episode_id == out[0].episode_id
    assert book.live_silence("line2-checkweigher") is None


def test_silence_counts_only_working_hours():
    tz = ZoneInfo("Europe/Berlin")
    wh = WorkingHours(dtime(8), dtime(16), frozenset(range(5)))
    c = sqlite3.connect(":memory:")
    book = EpisodeBook(c)
    watch = SilenceWatch(book, {"lathe-3": SilenceRule(2 * 3600, wh)}, tz="Europe/Berlin")
    fri = datetime(2026, 12, 4, 15, 0, tzinfo=tz)  # 2026-12-04 is a Friday
    watch.seen("lathe-3", fri)
    # Friday 15-16 counts (1 h); the weekend does not.
    assert watch.check(datetime(2026, 12, 5, 12, 0, tzinfo=tz)) == []
    # Monday 09:00: 1 h + 1 h = 2 h, not more than the gap
    assert watch.check(datetime(2026, 12, 7, 9, 0, tzinfo=tz)) == []
    out = watch.check(datetime(2026, 12, 7, 9, 30, tzinfo=tz))
    assert [i.kind for i in out] == ["silence"]


def test_working_hours_overnight_window():
    tz = ZoneInfo("UTC")
    night = WorkingHours(dtime(22), dtime(6), frozenset(range(7)))
    a = datetime(2026, 12, 2, 21, 0, tzinfo=tz)
    b = datetime(2026, 12, 3, 7, 0, tzinfo=tz)
    assert night.seconds_between(a, b, tz) == 8 * 3600


def test_settings_validation():
    with pytest.raises(ValueError, match="close_after"):
        EpisodeSettings(close_after=0)
    with pytest.raises(ValueError, match="pvalue_factor"):
        EpisodeSettings(pvalue_factor=1)
    with pytest.raises(ValueError, match="gap_seconds"):
        SilenceRule(0)


def test_pattern_opened_while_out_of_spec_does_not_escalate_for_it_again(conn):
    book = EpisodeBook(conn)
    # the monitor reports the limit first, then the detector, for the same reading
    out = book.on_finding(finding(40, pattern="out_of_spec", value=505.5, detail={"limit": 505.0}), SPEC)
    out += book.on_finding(finding(40, pattern="shift", value=505.5), SPEC)
    out += book.on_finding(finding(41, pattern="out_of_spec", value=505.7, detail={"limit": 505.0}), SPEC)
    assert [(i.kind, i.pattern) for i in out] == [("opened", "out_of_spec"), ("opened", "shift")]
    assert out[0].episode_id in out[1].body  # the shift message points at the limit episode
    assert out[1].severity == "urgent"  # its reading is beyond the limit


def test_out_of_spec_escalation_names_the_limit(conn):
    book = EpisodeBook(conn)
    book.on_finding(finding(10), SPEC)
    (esc,) = book.on_finding(finding(12, pattern="out_of_spec", value=505.4, detail={"limit": 505.0}), SPEC)
    assert "beyond the specification limit 505 g" in esc.body


def test_onset_is_the_earliest_estimate(conn):
    # after a restart a detector dates the onset from its restart point: later
    # findings must not move the episode's onset forward
    book = EpisodeBook(conn)
    (it,) = book.on_finding(finding(100, p=1e-4, onset_index=80, onset_time="t80"), SPEC)
    book.on_finding(finding(140, p=1e-9, onset_index=101, onset_time="t101"), SPEC)
    book.on_finding(finding(150, p=1e-5, onset_index=75, onset_time="t75", detector="EWMA"), SPEC)
    ep = get_episode(conn, it.episode_id)
    assert (ep.onset_index, ep.onset_time) == (75, "t75")
    assert ep.min_p == pytest.approx(1e-9) and ep.min_p_detector == "CUSUM"


def test_spike_during_a_shift_joins_the_shift_episode(conn):
    ensure_schema(conn)
    book = EpisodeBook(conn, EpisodeSettings(close_after=100))
    assert [i.kind for i in book.on_finding(finding(200, p=1e-6, direction="up"), SPEC)] == ["opened"]
    assert book.on_finding(finding(205, "spike", p=1e-3, direction="up"), SPEC) == []
    assert [e.pattern for e in book.open_episodes("fill weight")] == ["shift"]
    # A spike the other way is news of its own.
    assert [i.kind for i in book.on_finding(finding(210, "spike", p=1e-3, direction="down"), SPEC)] == ["opened"]
