"""Calibrated thresholds in the watcher: budget -> ARL0 -> thresholds, the disk cache, user-set thresholds,
the measured reading rate, and the same thresholds in the daemon's route and in replay."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from watcher import calibration
from watcher.calibration import Calibrator, measured_rate
from watcher.config import BaselineConfig, Budget, CharacteristicConfig, parse_config
from watcher.monitor import Monitor


def char(**kw) -> CharacteristicConfig:
    base = dict(name="pack_mass", source="cw", column="mass_g", unit="g", window=50,
                baseline=BaselineConfig(readings=100))
    base.update(kw)
    return CharacteristicConfig(**base)


def fresh(cache_dir=None, budget=None) -> Calibrator:
    calibration._MEMORY.clear()  # the test wants to see the disk cache, not the process's memory
    return Calibrator(budget, cache_dir)


def test_cusum_alone_at_370_gets_the_published_decision_interval(tmp_path):
    # Known baseline, one two-sided CUSUM k = 0.5, budget 1 per 370 readings: h = 4.77.
    # Source: Hawkins (1993), Quality Engineering 5(3), table of h for ARL0 = 370 (k = 0.5: 4.77, recalled);
    # exact integral-equation value 4.7738 (check-values.md 3.3).
    cc = char(baseline=BaselineConfig(mean=500.0, sigma=1.0), detectors={"cusum": {"k": 0.5}},
              false_alarms=Budget(1, readings=370))
    cal = fresh(tmp_path).calibrate(cc)
    assert cal.spec["cusum"]["h"] == pytest.approx(4.7738, abs=0.002)
    assert cal.report["baseline"] is None


def test_a_budget_per_day_uses_the_configured_rate(tmp_path):
    # 1 per 2 days at 120 readings/hour = one per 5760 readings; a CUSUM k = 0.5 alone gets the h whose
    # exact two-sided ARL0 is 5760 (rules.runlength's chain, itself checked against Brook & Evans 1972).
    from rules.runlength import cusum_chain_arl

    cc = char(baseline=BaselineConfig(mean=0.0, sigma=1.0), detectors={"cusum": {}},
              false_alarms=Budget(1, seconds=2 * 86400), readings_per_hour=120)
    cal = fresh(tmp_path).calibrate(cc)
    assert cal.arl0 == pytest.approx(5760)
    assert cal.summary()["false_per_day"] == pytest.approx(0.5)
    assert cusum_chain_arl(0.5, cal.spec["cusum"]["h"], 0.0) == pytest.approx(5760, rel=1e-3)


def test_a_budget_per_day_without_a_rate_falls_back_and_says_so(tmp_path):
    cc = char(false_alarms=Budget(1, seconds=30 * 86400), detectors={"cusum": {}, "ewma": {}})
    cal = fresh(tmp_path).calibrate(cc)
    assert cal.arl0 == 10_000 and cal.rate_origin == "unknown"
    assert any("needs a reading rate" in w for w in cal.warnings)
    # measured from time stamps instead: 1 per 30 days at 1800 readings/hour
    cal2 = fresh(tmp_path).calibrate(cc, measured_per_hour=1800.4)
    assert cal2.readings_per_hour == 1800 and cal2.arl0 == pytest.approx(30 * 24 * 1800)
    assert not any("needs a reading rate" in w for w in cal2.warnings)


def test_thresholds_set_in_the_config_are_kept_and_the_rest_share_what_is_left(tmp_path):
    from rules.runlength import cusum_chain_arl, ewma_chain_arl

    cc = char(baseline=BaselineConfig(mean=0.0, sigma=1.0),
              detectors={"cusum": {"k": 0.5, "h": 6.0}, "ewma": {"lam": 0.1}}, false_alarms=Budget(1, readings=500))
    cal = fresh(tmp_path).calibrate(cc)
    assert cal.spec["cusum"]["h"] == 6.0 and cal.kept == ["cusum"]
    rate = 1 / cusum_chain_arl(0.5, 6.0, 0.0) + 1 / ewma_chain_arl(0.1, cal.spec["ewma"]["L"], 0.0)
    assert rate == pytest.approx(1 / 500, rel=1e-3)  # rates add: the set still meets the budget


def test_a_user_threshold_that_spends_the_whole_budget_is_reported_not_fatal(tmp_path):
    cc = char(baseline=BaselineConfig(mean=0.0, sigma=1.0),
              detectors={"cusum": {"h": 2.0}, "ewma": {}}, false_alarms=Budget(1, readings=5000))
    cal = fresh(tmp_path).calibrate(cc)
    assert cal.report is None and cal.spec["cusum"]["h"] == 2.0
    assert any("could not calibrate" in w and "not controlled" in w for w in cal.warnings)


def test_results_are_cached_on_disk_by_configuration(tmp_path):
    cc = char(detectors={"cusum": {}, "shewhart": {}})
    a = fresh(tmp_path)
    first = a.calibrate(cc)
    assert a.computed == 1
    files = list(tmp_path.glob("*.thresholds.json"))
    assert len(files) == 1 and json.loads(files[0].read_text())["key"] == first.key
    b = fresh(tmp_path)
    again = b.calibrate(cc)
    assert b.computed == 0 and again.spec == first.spec  # read back, not recalibrated
    c = fresh(tmp_path)
    other = c.calibrate(char(detectors={"cusum": {}, "shewhart": {}}, false_alarms=Budget(1, readings=20_000)))
    assert c.computed == 1 and other.key != first.key and other.spec["cusum"]["h"] > first.spec["cusum"]["h"]
    assert len(list(tmp_path.glob("*.thresholds.json"))) == 2


def test_a_torn_cache_file_is_recalibrated(tmp_path):
    cc = char(detectors={"cusum": {}})
    good = fresh(tmp_path).calibrate(cc)
    (path,) = tmp_path.glob("*.thresholds.json")
    path.write_text(path.read_text()[:40])
    c = fresh(tmp_path)
    assert c.calibrate(cc).spec == good.spec and c.computed == 1
    assert json.loads(path.read_text())["key"] == good.key


def test_estimated_baseline_raises_the_thresholds_and_warns_when_short(tmp_path):
    known = fresh(tmp_path).calibrate(char(baseline=BaselineConfig(mean=0.0, sigma=1.0), detectors={"cusum": {}}))
    short = fresh(tmp_path).calibrate(char(baseline=BaselineConfig(readings=100), detectors={"cusum": {}}))
    assert short.spec["cusum"]["h"] > known.spec["cusum"]["h"]
    assert short.report["baseline"]["adjusted_p_budget_met"] >= 0.9
    assert any("too short" in w for w in short.warnings)


def test_measured_rate_ignores_a_break_and_unparsable_stamps():
    times = [f"2026-03-02T06:00:{s:02d}" for s in range(0, 40, 2)] + [f"2026-03-02T07:00:{s:02d}" for s in range(0, 40, 2)]
    assert measured_rate(times + ["not a time", None]) == pytest.approx(1800)
    assert measured_rate(times[:5]) is None


def _series(n=900, seed=3):
    rng = np.random.default_rng(seed)
    x = 500 + rng.normal(size=n)
    x[600:] += 1.5
    times = [f"2026-03-02T06:{i // 30:02d}:{(2 * i) % 60:02d}" for i in range(n)]
    return x, times


def test_live_monitor_measures_its_rate_and_keeps_its_thresholds_across_a_restart(tmp_path):
    x, times = _series()
    cc = char(false_alarms=Budget(1, seconds=7 * 86400), detectors={"cusum": {}, "ewma": {}})
    cal = Calibrator(None, tmp_path)
    m = Monitor(cc, "cw", calibrator=cal)
    for v, t in zip(x[:300], times[:300]):
        m.feed(float(v), t)
    assert m.measured_per_hour == pytest.approx(1800)
    assert m.calibration.arl0 == pytest.approx(7 * 24 * 1800)
    state = json.loads(json.dumps(m.export_state()))
    assert state["calibration"]["thresholds"] == {"cusum": m.spec["cusum"]["h"], "ewma": m.spec["ewma"]["L"]}
    back = Monitor.from_state(cc, "cw", state, calibrator=cal)
    assert back.spec == m.spec and back.detectors["cusum"].export_state() == m.detectors["cusum"].export_state()
    # a tighter budget in the config: same baseline, new thresholds, detectors start afresh
    tighter = Monitor.from_state(char(false_alarms=Budget(1, seconds=86400), detectors={"cusum": {}, "ewma": {}}),
                                 "cw", state, calibrator=cal)
    assert tighter.baseline.centre == m.baseline.centre
    assert tighter.spec["cusum"]["h"] < m.spec["cusum"]["h"]


def test_replay_and_the_live_route_run_the_same_calibrated_thresholds(tmp_path):
    from watcher.replay import replay_file

    x, times = _series()
    csv = tmp_path / "cw.csv"
    csv.write_text("time,mass_g\n" + "".join(f"{t},{v:.4f}\n" for t, v in zip(times, x)))
    cfg = parse_config(f"""
state: {tmp_path / 'state'}
false_alarms: 1 per 7 days
sources: [{{name: cw, path: {csv}, time_column: time}}]
characteristics: [{{name: pack_mass, source: cw, column: mass_g, window: 50}}]
""")
    src = cfg.sources[0]
    fast = replay_file(csv, cfg, src, warn=None, engine="fast").findings
    live = replay_file(csv, cfg, src, warn=None, engine="live").findings
    assert [(f.detector, f.index) for f in fast] == [(f.detector, f.index) for f in live]
    assert any(f.index >= 600 and f.pattern == "shift" for f in fast)  # the 1.5 sigma step is found
    assert not any(f.index < 600 for f in fast if f.pattern != "out_of_spec")  # none before it
    assert list((tmp_path / "state" / "calibration").glob("*.thresholds.json"))
    # the route the daemon uses picks the same thresholds for the same config
    from watcher.route import Route

    r = Route(cfg)
    m = r.monitors["pack_mass"]
    for v, t in zip(x[:200], times[:200]):
        m.feed(float(v), t)
    cal = Calibrator.for_config(cfg).calibrate(cfg.characteristics[0], 1800)
    assert m.spec == cal.spec and math.isclose(m.calibration.arl0, 7 * 24 * 1800)


def test_check_reports_budget_thresholds_false_per_day_and_detection_power(tmp_path):
    from watcher.check import check_report, format_check

    cfg = parse_config(f"""
state: {tmp_path / 'state'}
sources: [{{name: cw, path: {tmp_path / 'cw.csv'}, time_column: time}}]
characteristics:
  - {{name: pack_mass, source: cw, column: mass_g, baseline: {{mean: 500, sigma: 1}}, readings_per_hour: 3600,
      false_alarms: 1 per 30 days, detectors: {{cusum: {{}}, shewhart: {{}}}}}}
""")
    r = check_report(cfg)
    (c,) = r["characteristics"]
    cal, det = c["calibration"], c["detection"]
    assert cal["arl0"] == pytest.approx(30 * 24 * 3600) and cal["false_per_day"] == pytest.approx(1 / 30)
    assert cal["set_arl0"] == pytest.approx(cal["arl0"], rel=1e-3)
    assert set(det["shift"]) == {"0.5", "1", "2", "3"} and set(det["drift"]) == {"0.01", "0.05"}
    means = [det["shift"][k]["mean"] for k in ("0.5", "1", "2", "3")]
    assert means == sorted(means, reverse=True) and means[-1] < 10  # bigger steps are found sooner
    text = format_check(r)
    assert "readings to detect a step of" in text and "cusum h" in text and "1 false finding per 2,592,000 readings" in text


def test_status_and_check_use_the_rate_the_running_watcher_measured(tmp_path):
    """A budget per time with no configured rate: the state's measured rate reaches status and check."""
    from watcher.check import check_report
    from watcher.status import read_status
    from watcher.store import Store

    x, times = _series(300)
    cfg = parse_config(f"""
state: {tmp_path / 'state'}
false_alarms: 1 per 7 days
sources: [{{name: cw, path: {tmp_path / 'cw.csv'}, time_column: time}}]
characteristics: [{{name: pack_mass, source: cw, column: mass_g, detectors: {{cusum: {{}}, shewhart: {{}}}}}}]
""")
    cc = cfg.characteristics[0]
    m = Monitor(cc, "cw", calibrator=Calibrator.for_config(cfg))
    for v, t in zip(x, times):
        m.feed(float(v), t)
    store = Store(cfg.state_dir)
    with store.transaction() as tx:
        store.save_characteristic(tx, cc.name, "cw", m.export_state(), m.count, m.last_time, m.last_value)
    store.close()
    st = read_status(cfg)["characteristics"]["pack_mass"]
    assert st["calibration"]["readings_per_hour"] == pytest.approx(1800)
    c = check_report(cfg, power=False)["characteristics"][0]
    assert c["calibration"]["arl0"] == pytest.approx(7 * 24 * 1800)
    assert c["calibration"]["rate_origin"].startswith("measured")
    assert c["detectors"]["cusum"]["h"] == m.spec["cusum"]["h"]
