"""One characteristic's monitor: baseline, detectors, sizes in the unit, state, and the vectorised path."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from watcher.config import BaselineConfig, CharacteristicConfig
from watcher.monitor import Monitor


def char(**kw) -> CharacteristicConfig:
    base = dict(name="pack_mass", source="cw", column="mass_g", unit="g", window=30,
                baseline=BaselineConfig(readings=100))
    base.update(kw)
    return CharacteristicConfig(**base)


def live(cc, x, times=None, restart_at=None):
    m = Monitor(cc, "cw")
    out = []
    for j, v in enumerate(x):
        out += m.feed(float(v), None if times is None else times[j])
        if restart_at is not None and j == restart_at:
            m = Monitor.from_state(cc, "cw", json.loads(json.dumps(m.export_state())))
    return out, m


def test_step_is_found_with_its_size_in_the_unit():
    rng = np.random.default_rng(4)
    x = 500 + 0.8 * rng.normal(size=600)
    x[350:] += 2.4  # 3 sigma up
    found, m = live(char(), x)
    shifts = [f for f in found if f.pattern == "shift" and f.direction == "up" and f.index >= 350]
    assert shifts and shifts[0].index < 380
    assert shifts[0].onset_index is not None and 330 <= shifts[0].onset_index <= shifts[0].index
    assert 0.5 < shifts[0].size < 3.3  # an early estimate: the onset may include a few in-control readings
    assert "g" in shifts[0].message and shifts[0].characteristic == "pack_mass"
    assert m.baseline.n == 100 and abs(m.baseline.centre - 500) < 0.3


def test_out_of_spec_regardless_of_statistics():
    x = [500.0, 500.5, 511.0, 499.0, 494.0]
    found, _ = live(char(lsl=495.0, usl=510.0), x)
    assert [(f.index, f.pattern, f.direction, f.p_value) for f in found] == [(2, "out_of_spec", "up", None),
                                                                              (4, "out_of_spec", "down", None)]
    assert found[0].size == pytest.approx(1.0)


def test_no_spread_baseline_runs_no_detector():
    found, m = live(char(), [500.0] * 300)
    assert m.baseline.no_spread and m.detectors == {} and found == []


def test_fixed_baseline_watches_from_the_first_reading():
    rng = np.random.default_rng(1)
    x = 8.0 + 0.002 * rng.normal(size=200)
    x[100:] += 0.008
    found, m = live(char(baseline=BaselineConfig(mean=8.0, sigma=0.002)), x)
    assert m.watch_start == 0
    assert any(f.pattern == "shift" and f.direction == "up" and f.index >= 100 for f in found)


def test_lognormal_readings_are_watched_on_the_box_cox_scale():
    rng = np.random.default_rng(8)
    x = np.exp(rng.normal(1.0, 0.5, 800))
    x[500:] *= 2.5
    found, m = live(char(baseline=BaselineConfig(readings=200)), x)
    assert m.baseline.transform and "boxcox" in m.baseline.transform
    assert any(f.pattern == "shift" and f.direction == "up" and f.index >= 500 for f in found)


def test_subgroup_sigma_comes_from_within_subgroup_ranges():
    rng = np.random.default_rng(2)
    x = 20 + rng.normal(size=400)
    _, m = live(char(subgroup=5, baseline=BaselineConfig(readings=100)), x)
    g = x[:100].reshape(20, 5)
    r_bar = float(np.mean(g.max(axis=1) - g.min(axis=1)))
    # d2(5) = 2.326 (ASTM STP 15D; Montgomery, Appendix VI; from memory, checked numerically in tests/rules/test_subgroups.py)
    assert m.baseline.sigma == pytest.approx(r_bar / 2.326 / np.sqrt(5), rel=1e-3)
    assert m.baseline.centre == pytest.approx(float(g.mean()))


@pytest.mark.parametrize("k", [1, 4])
def test_state_round_trip_gives_identical_findings(k):
    rng = np.random.default_rng(5)
    x = np.round(500 + rng.normal(size=2000) + np.r_[np.zeros(1200), np.linspace(0, 3, 800)], 1)
    cc = char(subgroup=k if k > 1 else None, usl=503.0)
    a, _ = live(cc, x)
    b, _ = live(cc, x, restart_at=777)
    assert [f.to_dict() for f in a] == [f.to_dict() for f in b]


def test_saved_state_packs_the_detector_windows_and_reads_plain_ones():
    """The windows are stored as packed doubles (exact, and much cheaper to write than JSON
    numbers); a state written with plain lists (before packing) still loads to the same detectors."""
    from watcher.monitor import PACKED

    rng = np.random.default_rng(6)
    cc = char()
    m = Monitor(cc, "cw")
    for v in (500 + rng.normal(size=400)).tolist():
        m.feed(v)
    state = json.loads(json.dumps(m.export_state()))
    runs = state["detectors"]["median_runs"]["state"]
    assert set(runs["window_values"]) == {PACKED}
    plain = json.loads(json.dumps(state))
    for k, d in m.detectors.items():
        plain["detectors"][k] = d.export_state()
    again = Monitor.from_state(cc, "cw", plain)
    packed = Monitor.from_state(cc, "cw", state)
    assert {k: d.export_state() for k, d in again.detectors.items()} == {k: d.export_state() for k, d in m.detectors.items()}
    assert {k: d.export_state() for k, d in packed.detectors.items()} == {k: d.export_state() for k, d in m.detectors.items()}


@pytest.mark.parametrize("lognormal", [False, True])
def test_saved_text_is_the_exported_state_at_every_stage(lognormal):
    """The daemon saves ``export_state_text()`` (parts kept encoded between saves); it must
    read back as ``export_state()`` while learning, once watching, after findings, after a
    new baseline is asked for and learnt, and a monitor restored from it must go on exactly
    as the one that never stopped."""
    rng = np.random.default_rng(12)
    x = 500 + rng.normal(size=1500) + np.r_[np.zeros(700), np.full(800, 1.5)]
    if lognormal:  # the Box-Cox scale and its own raw centre and sigma
        x = np.exp(rng.normal(1.0, 0.5, 1500)) * np.r_[np.ones(700), np.full(800, 2.0)]
    times = [None if j % 11 == 0 else f"2026-12-03T06:{j // 60 % 60:02d}:{j % 60:02d}+00:00" for j in range(x.size)]
    cc = char(usl=float(np.quantile(x, 0.999)))
    m, twin = Monitor(cc, "cw"), None
    found, found_twin = [], []
    for j, v in enumerate(x.tolist()):
        found += m.feed(v, times[j])
        if twin is not None:
            found_twin += twin.feed(v, times[j])
        if j in (50, 99, 100, 400, 900, 1000, 1120, 1499):
            text = m.export_state_text()
            assert json.loads(text) == json.loads(json.dumps(m.export_state()))
            if j == 400:
                twin = Monitor.from_state(cc, "cw", json.loads(text))
        if j == 1000:
            m.rebaseline()
            twin.rebaseline()
    assert m.baseline is not None and any(f.index > 1000 for f in found)
    assert [f.to_dict() for f in found if f.index > 400] == [f.to_dict() for f in found_twin]
    # a detector made afresh with other settings (a new calibration) under the same name
    from rules import DETECTORS

    m.export_state_text()
    m.detectors["cusum"] = DETECTORS["cusum"](k=0.25, h=7.5)
    assert json.loads(m.export_state_text())["detectors"]["cusum"]["params"]["h"] == 7.5


def test_time_stamps_are_saved_as_one_text_unless_one_holds_a_space():
    from watcher.monitor import _pack_times, _unpack_times

    for times in ([], [None], ["2026-12-03T06:00:00+00:00", None, "2026-12-03T06:00:01+00:00"]):
        packed = _pack_times(times)
        assert isinstance(packed, str) and _unpack_times(packed) == times
    odd = ["2026-12-03 06:00:00", None]
    assert _pack_times(odd) == odd and _unpack_times(odd) == odd


@settings(max_examples=20, deadline=None)
@given(st.integers(0, 2**32 - 1), st.sampled_from([1, 3]), st.sampled_from([0.0, 1.0, 2.0]),
       st.sampled_from([0.0, 0.002, 0.01]), st.sampled_from([None, 1]))
def test_vectorised_path_equals_live(seed, k, step, slope, rounding):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(150, 1500))
    x = 50 + rng.normal(size=n) + np.where(np.arange(n) > n // 2, step, 0.0) + slope * np.arange(n)
    if rounding is not None:
        x = np.round(x, rounding)  # ties
    cc = char(subgroup=k if k > 1 else None, usl=53.0, lsl=47.0)
    times = [f"2026-01-01T00:00:{i % 60:02d}Z" for i in range(n)]
    a, _ = live(cc, x, times)
    b = Monitor(cc, "cw").scan_all(x, times)
    assert [f.to_dict() for f in a] == [f.to_dict() for f in b]


def test_drift_carries_slope_per_hour_and_projection():
    # An invented lathe: pins read every 15 s (240 an hour), the tool wears 0.0001 mm per pin after pin 300.
    rng = np.random.default_rng(12)
    n = 700
    x = 8.0 + 0.0005 * rng.normal(size=n) + np.r_[np.zeros(300), 0.0001 * np.arange(n - 300)]
    times = [f"2026-01-05T{6 + (15 * i) // 3600:02d}:{(15 * i) // 60 % 60:02d}:{15 * i % 60:02d}+00:00" for i in range(n)]
    found, _ = live(char(usl=8.1, window=30, detectors={"mann_kendall": {}}), x, times)
    drifts = [f for f in found if f.pattern == "drift" and f.index > 300]
    assert drifts and drifts[0].direction == "up"
    f = drifts[0]
    d = f.detail
    # The slope is Sen's slope over the window that fired (scipy.stats.theilslopes as the reference), times the
    # reading rate measured from the timestamps (240 an hour).
    from scipy.stats import theilslopes

    window = x[f.onset_index: f.index + 1]
    assert d["slope_per_hour"] == pytest.approx(theilslopes(window).slope * 240, rel=1e-6)
    # Hours to the limit: (limit - fitted level at the last reading) / slope per hour.
    level = window.mean() + theilslopes(window).slope * (len(window) - 1) / 2
    assert d["hours_to_limit"] == pytest.approx((8.1 - level) / d["slope_per_hour"], rel=1e-6)
    assert d["limit"] == 8.1
