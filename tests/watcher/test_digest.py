"""The digest: its figures against independent computations and published examples, its HTML and text.

References
* numpy / scipy (pinned below) on the raw readings: mean, sd, t interval, chi-square and normal quantiles.
* statsmodels 0.15.0 ``normal_ad``: Anderson-Darling A^2 and p (D'Agostino & Stephens 1986, Table 4.9).
* Cp interval worked example: Montgomery, *Introduction to Statistical Quality Control*, Ch. 8 -- the
  inputs (USL 62, LSL 38, n 20, s 1.75) and the printed answer 1.57 <= Cp <= 3.01 are from memory;
  the interval to 4 decimals (1.5649, 3.0056) is computed by the chi-square formula (check-values.md 9.2).
* Cpk interval worked example: Bissell (1990) approximation with Cpk 1.33, n 20 -- Montgomery's inputs from
  memory, printed answer recalled as 0.88 <= Cpk <= 1.78; (0.8826, 1.7774) computed, not a published value.
"""

from __future__ import annotations

import argparse
import base64
import io
import json
import math
from datetime import datetime, timedelta, timezone
from html.parser import HTMLParser

import numpy as np
import pytest
import scipy
from scipy import stats

from watcher import aggregates as agg
from watcher.config import parse_config
from watcher.digest import Period, build_digest, period_from_args, run_digest
from watcher.digest_render import render_html, render_json, render_text, write_digest
from watcher.episodes import EpisodeBook, EpisodeSettings
from watcher.records import Finding, Quarantined
from watcher.store import Store

T0 = datetime(2026, 12, 1, 5, 30, tzinfo=timezone.utc)
DAY = Period(T0, T0 + timedelta(hours=24), "Europe/Berlin")
EVIL = "<script>alert(1)</script>"

CFG = f"""
timezone: Europe/Berlin
state: ./state
sources: [{{name: cw, path: cw.csv, time_column: t}}, {{name: lathe, path: l.csv, time_column: t}}]
characteristics:
  - {{name: pack_mass, source: cw, column: m, unit: g, lsl: 495, usl: 505}}
  - {{name: pin, source: lathe, column: d, unit: mm, lsl: 7.985, usl: 8.015}}
  - {{name: '{EVIL}', source: lathe, column: s, unit: mm}}
digest: {{at: "06:30", folder: ./digests}}
"""


def _scipy_pinned():
    if scipy.__version__ != "1.17.1":
        pytest.skip(f"reference values checked with scipy 1.17.1, found {scipy.__version__}")


@pytest.fixture()
def world(tmp_path):
    """A real state folder: readings in the aggregates, one shift episode, a bad line, a failed alert."""
    (tmp_path / "cfg.yaml").write_text(CFG)
    cfg = parse_config(CFG, str(tmp_path / "cfg.yaml"))
    store = Store(tmp_path / "state")
    rng = np.random.default_rng(42)
    n = 3000
    secs = np.arange(n) * 25.0  # 20.8 h of readings
    mass = 500 + rng.normal(0, 1.5, n)
    mass[2000:] += 2.0  # a shift
    pin = 8.0 + rng.normal(0, 0.003, n)
    evil = rng.gamma(2.0, 1.0, n)  # skewed: normality must be rejected
    times = [(T0 + timedelta(seconds=float(s))).isoformat() for s in secs]
    with store.transaction() as c:
        agg.record_values(c, {"pack_mass": list(zip(mass, times)), "pin": list(zip(pin, times)),
                              EVIL: list(zip(evil, times))}, T0.isoformat(), limits=agg.limits_from_config(cfg))
        book = EpisodeBook(c, EpisodeSettings(clock=lambda: T0 + timedelta(hours=15)))
        onset = T0 + timedelta(seconds=2000 * 25)
        f = Finding("pack_mass", "shift", "CUSUM", 3e-9, 2040, (onset + timedelta(seconds=1000)).isoformat(), 2000,
                    onset.isoformat(), "up", 2.0, "", "cw", 502.5)
        ep = book.on_finding(f)[0].episode_id
        book.acknowledge(ep, "filler head 2 checked by night shift")
        old = Finding("pin", "drift", "Mann-Kendall", 1e-4, 10, (T0 - timedelta(days=3)).isoformat(), 5,
                      (T0 - timedelta(days=3)).isoformat(), "up", 0.01, "", "lathe", 8.01)
        book2 = EpisodeBook(c, EpisodeSettings(clock=lambda: T0 - timedelta(days=3)))
        old_id = book2.on_finding(old)[0].episode_id
        book2._close(book2.open_episodes("pin")[0], "test", None, None)
        store.add_quarantined(c, [Quarantined("lathe", "l.csv", 17 + i, 100 * i, "x", "not a number in column 'd'")
                                  for i in range(3)] + [Quarantined("cw", "cw.csv", 5, 0, "y", "too few fields")])
        c.execute("UPDATE quarantine SET created_at = ?", ((T0 + timedelta(hours=2)).isoformat(),))
        from watcher.outbox import enqueue, ensure_schema
        from watcher.notify import Target

        ensure_schema(c)
        from watcher.episodes import AlertIntent

        intent = AlertIntent(ep, "opened", "notice", "pack_mass", "cw", "shift", "pack_mass: shift [notice]", "b",
                             (T0 + timedelta(hours=15)).isoformat())
        enqueue(c, intent, [Target("json://127.0.0.1:9/x", name="desk")], now=(T0 + timedelta(hours=15)).timestamp())
        c.execute("UPDATE alert_delivery SET status = 'expired', attempts = 9, last_error = 'connection refused'")
    yield {"cfg": cfg, "store": store, "mass": mass, "pin": pin, "evil": evil, "episode": ep, "old": old_id,
           "tmp": tmp_path}
    store.close()


def _char(d, name):
    return next(c for c in d["characteristics"] if c["name"] == name)


def test_figures_match_numpy_and_scipy(world):
    _scipy_pinned()
    d = build_digest(world["store"].conn, world["cfg"], DAY)
    for name, x in (("pack_mass", world["mass"]), ("pin", world["pin"])):
        c = _char(d, name)
        n = x.size
        assert c["n"] == n
        assert c["mean"] == pytest.approx(x.mean(), rel=1e-12)
        assert c["sd"] == pytest.approx(x.std(ddof=1), rel=1e-9)
        lo, hi = stats.t.interval(0.95, n - 1, loc=x.mean(), scale=x.std(ddof=1) / math.sqrt(n))
        assert c["mean_interval"] == pytest.approx([lo, hi], rel=1e-9)
        assert (c["min"], c["max"]) == (x.min(), x.max())
        lsl, usl = (495, 505) if name == "pack_mass" else (7.985, 8.015)
        assert c["below_lsl"]["share"] == pytest.approx((x < lsl).mean())
        assert c["above_usl"]["count"] == int((x > usl).sum())
        # Capability, recomputed here from the formulas (Kane 1986; chi-square for Cp; Bissell 1990 for Cpk)
        s, m = x.std(ddof=1), x.mean()
        cp = (usl - lsl) / (6 * s)
        cpk = min(usl - m, m - lsl) / (3 * s)
        cap = c["capability"]
        assert cap["cp"] == pytest.approx(cp, rel=1e-9) and cap["cpk"] == pytest.approx(cpk, rel=1e-9)
        assert cap["cp_interval"] == pytest.approx(
            [cp * math.sqrt(stats.chi2.ppf(0.025, n - 1) / (n - 1)),
             cp * math.sqrt(stats.chi2.ppf(0.975, n - 1) / (n - 1))], rel=1e-9)
        se = math.sqrt(1 / (9 * n) + cpk**2 / (2 * (n - 1)))
        assert cap["cpk_interval"] == pytest.approx([cpk - stats.norm.ppf(0.975) * se,
                                                      cpk + stats.norm.ppf(0.975) * se], rel=1e-9)


def test_normality_matches_statsmodels_on_an_exact_period(tmp_path):
    sm = pytest.importorskip("statsmodels")
    if sm.__version__ != "0.15.0":
        pytest.skip(f"checked against statsmodels 0.15.0, found {sm.__version__}")
    from statsmodels.stats.diagnostic import normal_ad

    # 60 readings in one hour (within the hour's reservoir of 64): the check runs on every reading.
    x = np.random.default_rng(9).gamma(3.0, 1.0, 60)
    h = datetime(2026, 12, 1, 6, 0, tzinfo=timezone.utc)
    cfg = parse_config("sources: [{name: s, path: a.csv}]\ncharacteristics: [{name: c, source: s, column: v}]\n",
                       str(tmp_path / "c.yaml"))
    store = Store(tmp_path / "st")
    with store.transaction() as c:
        agg.record_values(c, {"c": [(v, (h + timedelta(seconds=60 * i)).isoformat()) for i, v in enumerate(x)]},
                          h.isoformat())
    nrm = _char(build_digest(store.conn, cfg, Period(h, h + timedelta(hours=1))), "c")["normality"]
    store.close()
    assert nrm["all_readings"] and nrm["n"] == 60
    a2, pv = normal_ad(x)
    assert nrm["statistic"] == pytest.approx(a2, rel=1e-9)
    assert nrm["pvalue"] == pytest.approx(pv, rel=1e-9)


def test_non_normal_and_unstable_periods_carry_notes(world):
    d = build_digest(world["store"].conn, world["cfg"], DAY)
    evil = _char(d, EVIL)
    assert evil["normality"]["rejected"] and not evil["normality"]["all_readings"]
    assert evil["capability"] is None  # no limits, no capability
    mass = _char(d, "pack_mass")
    assert any("not stable" in n for n in mass["capability_notes"])
    pin = _char(d, "pin")
    assert not pin["normality"]["rejected"] and pin["capability_notes"] == []


@pytest.mark.parametrize("usl, lsl, mean, sd, n, cp_iv, cpk, cpk_iv", [
    # Montgomery Ch. 8 illustration (inputs from memory); printed answer recalled as 1.57 <= Cp <= 3.01.
    (62.0, 38.0, 50.0, 1.75, 20, (1.5649, 3.0056), None, None),
    # Cpk = 1.33 at n = 20 (Montgomery's inputs from memory, printed 0.88 <= Cpk <= 1.78 recalled);
    # the limits put the mean 3.99 sd below the USL, the LSL far away.
    (13.99, -1000.0, 10.0, 1.0, 20, None, 1.33, (0.8826, 1.7774)),
    # Textbook exercise inputs (check-values.md 9.2, seen without a solution); answers computed, not published.
    (100.0, 90.0, 97.0, 1.6, 30, (0.7749, 1.3080), 0.625, (0.4248, 0.8252)),
])
def test_capability_interval_worked_examples(tmp_path, usl, lsl, mean, sd, n, cp_iv, cpk, cpk_iv):
    rng = np.random.default_rng(1)
    z = rng.normal(size=n)
    x = mean + sd * (z - z.mean()) / z.std(ddof=1)  # exactly this mean and sd
    cfg = parse_config(f"sources: [{{name: s, path: a.csv}}]\ncharacteristics: [{{name: c, source: s, column: v, "
                       f"lsl: {lsl}, usl: {usl}}}]\n", str(tmp_path / "c.yaml"))
    store = Store(tmp_path / "st")
    with store.transaction() as c:
        agg.record_values(c, {"c": [(v, (T0 + timedelta(minutes=i)).isoformat()) for i, v in enumerate(x)]},
                          T0.isoformat(), limits={"c": (lsl, usl)})
    cap = _char(build_digest(store.conn, cfg, DAY), "c")["capability"]
    store.close()
    if cp_iv:
        assert cap["cp_interval"] == pytest.approx(cp_iv, abs=1e-4)
    if cpk is not None:
        assert cap["cpk"] == pytest.approx(cpk, abs=1e-9)
        assert cap["cpk_interval"] == pytest.approx(cpk_iv, abs=1e-4)
    # The recalled printed answers (two decimals) agree to within 0.01.  Note 1.5649 rounds to 1.56, not the
    # recalled 1.57: the book seems to round Cp to 2.29 before multiplying (2.29 * 0.6847 = 1.568); from memory.
    if usl == 62.0:
        assert cap["cp_interval"] == pytest.approx([1.57, 3.01], abs=0.01)
    if usl == 13.99:
        assert cap["cpk_interval"] == pytest.approx([0.88, 1.78], abs=0.01)


def test_episodes_health_and_order(world):
    d = build_digest(world["store"].conn, world["cfg"], DAY)
    names = [c["name"] for c in d["characteristics"]]
    assert names[0] == "pack_mass"  # the one with an episode first
    eps = _char(d, "pack_mass")["episodes"]
    assert [e["id"] for e in eps] == [world["episode"]]
    e = eps[0]
    assert e["pattern"] == "shift" and e["state"] == "acknowledged" and e["min_p"] == 3e-9
    assert any("filler head 2 checked" in n for n in e["notes"])
    # the drift that closed three days before the period is not in it
    assert all(e["id"] != world["old"] for c in d["characteristics"] for e in c["episodes"])
    h = d["health"]
    q = {(x["source"], x["reason"]): x["count"] for x in h["quarantine"]}
    assert q == {("lathe", "not a number in column 'd'"): 3, ("cw", "too few fields"): 1}
    assert [a["target"] for a in h["alerts"]["expired"]] == ["desk"]
    assert h["alerts"]["expired"][0]["last_error"] == "connection refused"
    text = render_text(d)
    quiet = text.split("QUIET")[1].split("SOURCES")[0]
    assert len([ln for ln in quiet.splitlines() if ln.startswith("* ")]) == 2  # one line each
    assert "3 line(s) of lathe set aside: not a number in column 'd', first at l.csv:17" in text
    assert "given up (expired) to desk" in text


def test_chart_is_a_faithful_reduction(world):
    d = build_digest(world["store"].conn, world["cfg"], DAY)
    ch = _char(d, "pack_mass")["chart"]
    x = world["mass"]
    assert sum(b[1] for b in ch["buckets"]) == x.size == ch["readings"]
    assert min(b[3] for b in ch["buckets"]) == x.min() and max(b[4] for b in ch["buckets"]) == x.max()
    # a week of buckets is merged to at most MAX_CHART_BUCKETS, extremes kept
    from watcher.digest import MAX_CHART_BUCKETS, chart_series

    ms = []
    for i in range(10_000):
        m = agg.Moments()
        m.add(float(i % 977))
        ms.append((60 * i, m))
    s = chart_series(60, ms)
    assert len(s["buckets"]) <= MAX_CHART_BUCKETS and s["readings"] == 10_000
    assert max(b[4] for b in s["buckets"]) == 976.0 and min(b[3] for b in s["buckets"]) == 0.0


class _Checker(HTMLParser):
    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.images, self.tags, self.text = [], [], [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.images.append(dict(attrs))
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def test_html_is_well_formed_self_contained_and_escaped(world):
    from PIL import Image

    d = build_digest(world["store"].conn, world["cfg"], DAY)
    page = render_html(d)
    p = _Checker()
    p.feed(page)
    p.close()
    assert p.errors == [] and p.stack == []
    assert p.tags.count("script") == 0 and "<script>" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert EVIL in "".join(p.text)  # shown to the reader as its literal name
    assert "http://" not in page and "https://" not in page and "<link" not in page  # no external assets
    assert 'name="viewport"' in page and "@media" in page
    assert len(p.images) == 1  # a chart for the characteristic with an episode
    for img in p.images:
        assert img["src"].startswith("data:image/png;base64,")
        raw = base64.b64decode(img["src"].split(",", 1)[1], validate=True)
        im = Image.open(io.BytesIO(raw))
        im.verify()
        assert im.format == "PNG" and im.size[0] >= 600


def test_json_round_trip_and_files(world):
    d = build_digest(world["store"].conn, world["cfg"], DAY)
    back = json.loads(render_json(d))
    assert back["characteristics"][0]["n"] == d["characteristics"][0]["n"]
    assert back["period"]["start"] == "2026-12-01T05:30:00Z"
    paths = write_digest(d, world["tmp"] / "out", charts=False)
    assert sorted(p.suffix for p in paths.values()) == [".html", ".json", ".txt"]
    assert all(p.stat().st_size > 200 for p in paths.values())


def test_command_writes_the_digest(world, capsys):
    args = argparse.Namespace(config=str(world["tmp"] / "cfg.yaml"), since=None, from_="2026-12-01T06:30",
                              to="2026-12-02T06:30", out=str(world["tmp"] / "cli"), send=False)
    assert run_digest(args) == 0
    out = capsys.readouterr().out
    assert "1 with episodes" in out
    html_file = next((world["tmp"] / "cli").glob("*.html"))
    assert "pack_mass" in html_file.read_text()
    args.from_ = "yesterday"
    assert run_digest(args) == 2
    assert "--from" in capsys.readouterr().err


def test_period_arguments():
    now = datetime(2026, 12, 2, 8, 0, tzinfo=timezone.utc)
    p = period_from_args(argparse.Namespace(since="90m", from_=None, to=None), "Europe/Berlin", now)
    assert p.end == now and p.start == now - timedelta(minutes=90)
    p = period_from_args(argparse.Namespace(since=None, from_="2026-12-01T06:30", to="2026-12-02T06:30"),
                         "Europe/Berlin", now)
    assert p.start == datetime(2026, 12, 1, 5, 30, tzinfo=timezone.utc)  # local time, UTC+1 in December
    with pytest.raises(ValueError):
        period_from_args(argparse.Namespace(since=None, from_="2026-12-02T06:30", to="2026-12-01T06:30"), "UTC", now)


def test_a_characteristic_without_readings_and_an_empty_store(tmp_path):
    cfg = parse_config(CFG, str(tmp_path / "cfg.yaml"))
    st = Store(tmp_path / "state")
    d = build_digest(st.conn, cfg, DAY)
    st.close()
    assert [c["n"] for c in d["characteristics"]] == [0, 0, 0]
    assert all(c["capability"] is None and c["normality"] is None for c in d["characteristics"])
    page = render_html(d)
    p = _Checker()
    p.feed(page)
    assert p.errors == [] and p.images == []
    assert "pack_mass: 0 readings" in render_text(d)
    json.loads(render_json(d))


def test_send_option_delivers_to_the_digest_targets(world, capsys):
    from tests.watcher.http_receiver import HttpReceiver

    with HttpReceiver() as rx:
        cfg_text = CFG.replace('digest: {at: "06:30", folder: ./digests}',
                               f'digest: {{at: "06:30", folder: ./digests, to: ["{rx.url("/d")}"]}}')
        (world["tmp"] / "send.yaml").write_text(cfg_text)
        args = argparse.Namespace(config=str(world["tmp"] / "send.yaml"), since=None, from_="2026-12-01T06:30",
                                  to="2026-12-02T06:30", out=str(world["tmp"] / "sent"), send=True)
        assert run_digest(args) == 0
        got = rx.wait_for(1)
    assert len(got) == 1 and "pack_mass" in got[0]["body"]["message"]
    assert "sent to" in capsys.readouterr().out
