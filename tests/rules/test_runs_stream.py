"""Streaming run detectors: agreement with the array tests of rules.runs (which are checked
against published tables and enumeration in test_runs.py), streaming == batch scan,
restart rule, state round trip, validation."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rules import runs_null as rn
from rules.detector import Signal, StateError
from rules.registry import DETECTORS
from rules.runs import (
    longest_median_run_test,
    longest_monotone_run_test,
    median_runs_test,
    updown_runs_test,
)
from rules.runs_stream import (
    LongestMedianRunDetector,
    LongestMonotoneRunDetector,
    MedianRunsDetector,
    UpDownRunsDetector,
    _FAST_CRIT,
    _DiffWindow,
    _MedianWindow,
    _RunCounter,
    _RunLedger,
)
from rules.runs import compressed_runs, sample_median

ALL = [MedianRunsDetector, UpDownRunsDetector, LongestMedianRunDetector, LongestMonotoneRunDetector]


def stream(det, xs):
    return [s for v in xs if (s := det.update(float(v))) is not None]


def test_registered_under_their_keys():
    for cls in ALL:
        assert DETECTORS[cls.key] is cls
    assert {c.key for c in ALL} == {"median_runs", "updown_runs", "longest_median_run", "longest_monotone_run"}


# -- incremental bookkeeping against a recount ------------------------------------------


@pytest.mark.parametrize("ledger", [_RunLedger, _RunCounter])
def test_ledger_matches_recount_with_ties(ledger):
    rng = np.random.default_rng(7)
    for _ in range(60):
        w = int(rng.integers(2, 16))
        x = rng.integers(0, int(rng.integers(1, 6)), size=70).astype(float)
        mw, dw = _MedianWindow(w, ledger), _DiffWindow(w, ledger)
        for i, v in enumerate(x):
            mw.add(float(v))
            dw.add(float(v))
            seg = x[max(0, i - w + 1) : i + 1]
            lab = list(np.sign(seg - sample_median(np.sort(seg))).astype(int))
            for led, labels in ((mw.ledger, lab), (dw.ledger, list(np.sign(np.diff(seg)).astype(int)))):
                assert led.labels() == labels
                runs = compressed_runs(labels)
                assert led.runs == len(runs)
                assert (led.n_pos, led.n_neg) == (labels.count(1), labels.count(-1))
                if ledger is _RunLedger:
                    for s in (1, -1):
                        assert led.top[s] == max([k for q, k, _ in runs if q == s], default=0)


# -- the compiled windows against the pure-Python reference -----------------------------

from tests.rules.compiled import compiled, needs_compiled, python_only


@needs_compiled
@settings(max_examples=80, deadline=None)
@given(data=st.lists(st.integers(-3, 3), min_size=0, max_size=200), scale=st.sampled_from([1.0, 0.5, -0.0]),
       w=st.integers(2, 70), kind=st.sampled_from([0, 1]), zeros=st.booleans())
def test_compiled_window_equals_python_window(data, scale, w, kind, zeros):
    """Same summary on every reading, same labels and values, with many ties (and signed zeros).
    Windows up to 64 keep their median labels as bit masks, wider ones relabel on every push:
    both are drawn."""
    x = np.cumsum(np.array(data, dtype=float)) * scale
    if zeros:
        x[::3] = -0.0
    c = compiled.RunWindow(w, kind)
    py = (_MedianWindow if kind == 0 else _DiffWindow)(w, _RunLedger)
    for v in x.tolist():
        assert c.push(v) == py.push(v)
        assert c.full() == py.full() and c.values() == py.values()
        if py.full():
            assert c.labels() == py.labels()


@needs_compiled
@pytest.mark.parametrize("w", [49, 50, 63, 64, 65])
def test_compiled_median_window_equals_python_on_long_streams(w):
    """Thousands of pushes through the bit-mask labels (w <= 64) and the relabelling path
    (w = 65): continuous readings, readings on a coarse grid (many values equal to the
    median) and a step, each push's summary as the Python window gives it."""
    rng = np.random.default_rng(w)
    for x in (rng.normal(size=3000), np.round(rng.normal(size=3000) * 2) / 2,
              np.r_[rng.normal(size=1500), rng.normal(size=1500) + 2.0]):
        c = compiled.RunWindow(w, 0)
        py = _MedianWindow(w, _RunLedger)
        assert [c.push(v) for v in x.tolist()] == [py.push(v) for v in x.tolist()]


@needs_compiled
def test_compiled_window_refuses_nan():
    """A NaN has no side of a median and would break the sorted copy: refused, window unchanged."""
    c = compiled.RunWindow(5, 0)
    for v in (1.0, 2.0, 3.0):
        c.push(v)
    with pytest.raises(ValueError, match="NaN"):
        c.push(float("nan"))
    out = np.empty((3, 5), dtype=np.int64)
    with pytest.raises(ValueError, match="NaN"):
        c.scan(np.array([4.0, float("nan"), 5.0]), out)
    assert c.values() == [1.0, 2.0, 3.0]


@needs_compiled
@pytest.mark.parametrize("cls", ALL)
def test_detectors_give_the_same_signals_on_python_windows(cls, monkeypatch):
    """The fallback (no compiler, or windows above the compiled limit) finds exactly what the compiled path finds."""
    import rules.runs_stream as rs

    rng = np.random.default_rng(4)
    x = np.round(rng.normal(size=4000) + np.r_[np.zeros(2000), np.linspace(0, 3, 2000)], 1)
    fast = stream(cls(window=30, alpha=0.01), x)
    assert isinstance(cls(window=30)._win, compiled.RunWindow)
    monkeypatch.setattr(rs, "_RunWindow", None)
    slow = cls(window=30, alpha=0.01)
    assert not isinstance(slow._win, compiled.RunWindow)
    assert fast and stream(slow, x) == fast


# -- each detector agrees with the array test on the window that fired -------------------


def test_signals_agree_with_array_tests():
    rng = np.random.default_rng(11)
    x = np.concatenate([rng.normal(size=300), rng.normal(size=120) + 1.5, np.arange(60) * 0.2,
                        np.tile([1.0, -1.0], 40), rng.normal(size=200)])  # fmt: skip
    checks = 0
    for cls, fn in ((MedianRunsDetector, median_runs_test), (UpDownRunsDetector, updown_runs_test)):
        det = cls(window=30, alpha=0.01)
        for s in stream(det, x):
            win = x[s.index - 29 : s.index + 1]
            res = fn(win, method="exact")
            assert s.statistic == res.statistic and s.onset_index == s.index - 29
            low = s.pattern in ("grouping", "drift")
            assert s.p_value == (res.pvalue_less if low else res.pvalue_greater)
            assert s.p_value <= 0.01
            checks += 1
    det = LongestMedianRunDetector(window=30, alpha=0.01)
    for s in stream(det, x):
        win = x[s.index - 29 : s.index + 1]
        res = longest_median_run_test(win, side="above" if s.direction == "up" else "below")
        assert s.statistic == res.statistic and s.p_value == res.pvalue <= 0.01
        assert s.onset_index == s.index - 29 + res.onset
        checks += 1
    det = LongestMonotoneRunDetector(window=30, alpha=0.01)
    for s in stream(det, x):
        res = longest_monotone_run_test(x[s.index - 29 : s.index + 1])
        assert (s.statistic, s.direction, s.p_value) == (res.statistic, res.direction, res.pvalue)
        checks += 1
    assert checks >= 8


def test_patterns_on_invented_scenarios():
    # A checkweigher whose filler steps up by 2 sigma; a lathe whose tool wear makes the
    # diameter climb steadily; a filler head alternating between two settings.
    rng = np.random.default_rng(5)
    base = rng.normal(size=60)
    shifted = np.concatenate([base, rng.normal(size=40) + 2.0])
    s = stream(LongestMedianRunDetector(window=40, alpha=0.001), shifted)
    assert s and s[0].pattern == "shift" and s[0].direction == "up" and s[0].onset_index >= 50
    ramp = np.arange(40) * 0.05 + rng.normal(scale=0.01, size=40)
    s = stream(LongestMonotoneRunDetector(window=40, alpha=0.001), ramp)
    assert s and s[0].pattern == "drift" and s[0].direction == "up"
    s = stream(UpDownRunsDetector(window=40, alpha=0.001), np.arange(40) * 0.5 + rng.normal(scale=0.01, size=40))
    assert s and s[0].pattern == "drift" and s[0].index == 39
    alt = np.tile([0.3, -0.3], 20) + rng.normal(scale=0.05, size=40)
    assert stream(MedianRunsDetector(window=40, alpha=0.001), alt)[0].pattern == "mixture"
    assert stream(UpDownRunsDetector(window=40, alpha=0.001), alt)[0].pattern == "sawtooth"
    grouped = np.repeat([1.0, -1.0, 1.0, -1.0], 10) + rng.normal(scale=0.05, size=40)
    assert stream(MedianRunsDetector(window=40, alpha=0.001), grouped)[0].pattern == "grouping"


def test_restart_after_signal():
    det = MedianRunsDetector(window=10, alpha=0.01)
    xs = [0.0, 1.0] * 20  # every full window alternates: fires at 9, then again 10 later
    sigs = stream(det, xs)
    assert [s.index for s in sigs] == [9, 19, 29, 39]
    assert all(s.onset_index == s.index - 9 for s in sigs)


def test_side_selection():
    xs = [0.0, 1.0] * 20
    assert stream(MedianRunsDetector(window=10, alpha=0.01, side="grouping"), xs) == []
    assert len(stream(MedianRunsDetector(window=10, alpha=0.01, side="mixture"), xs)) == 4
    step = np.r_[np.ones(10), np.zeros(10)] + np.arange(20) * 1e-3  # 10 above, then 10 below
    (dn,) = stream(LongestMedianRunDetector(window=20, alpha=0.01, side="down"), step)
    (up,) = stream(LongestMedianRunDetector(window=20, alpha=0.01, side="up"), step)
    assert (dn.direction, dn.onset_index, up.direction, up.onset_index) == ("down", 10, "up", 0)
    assert stream(LongestMonotoneRunDetector(window=10, alpha=0.01, side="down"), np.arange(10.0)) == []
    assert stream(LongestMonotoneRunDetector(window=10, alpha=0.01, side="up"), np.arange(10.0))


def test_no_signal_on_constant_stream():
    xs = [5.0] * 500
    for cls in ALL:
        det = cls(window=20, alpha=0.2)
        assert stream(det, xs) == []
        assert cls.scan(np.array(xs), window=20, alpha=0.2) == []


def test_exact_tables_are_shared_between_instances():
    rn._MEDIAN_CRIT.clear()
    _FAST_CRIT.clear()
    a, b = MedianRunsDetector(window=20), MedianRunsDetector(window=20)
    assert a._fast is b._fast
    xs = np.random.default_rng(1).normal(size=200)
    stream(a, xs)
    n_cached = len(rn._MEDIAN_CRIT)
    stream(b, xs)
    assert n_cached > 0 and len(rn._MEDIAN_CRIT) == n_cached


# -- streaming == batch ------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    data=st.lists(st.integers(-3, 3), min_size=0, max_size=160),
    scale=st.sampled_from([1.0, 0.5, 1e-3]),
    which=st.sampled_from(range(4)),
    window=st.integers(0, 20),
    alpha=st.sampled_from([0.001, 0.01, 0.05, 0.3]),
    side_pick=st.integers(0, 2),
    numpy_kernel=st.booleans(),
)
def test_stream_equals_scan(data, scale, which, window, alpha, side_pick, numpy_kernel):
    # numpy_kernel: the scan's numpy summaries (no compiled window) instead of the
    # compiled window pushed along the series
    import rules.runs_stream as rs

    cls = ALL[which]
    w = cls.MIN_WINDOW + window
    side = cls.SIDES[side_pick]
    x = np.cumsum(np.array(data, dtype=float)) * scale  # a random walk with many ties
    det = cls(window=w, alpha=alpha, side=side)
    want = stream(det, x)
    with python_only(rs, "_RunWindow", numpy_kernel):
        assert want == cls.scan(x, window=w, alpha=alpha, side=side)


@pytest.mark.parametrize("numpy_kernel", [False, True])
def test_stream_equals_scan_long_random(numpy_kernel):
    import rules.runs_stream as rs

    rng = np.random.default_rng(2026)
    for cls in ALL:
        for w in (cls.MIN_WINDOW, 25, 64):
            x = np.round(rng.normal(size=3000) + np.sin(np.arange(3000) / 40), 1)
            want = stream(cls(window=w, alpha=0.01), x)
            with python_only(rs, "_RunWindow", numpy_kernel):
                got = cls.scan(x, window=w, alpha=0.01)
            assert got == want
            assert all(isinstance(s, Signal) for s in got)


def test_shared_window_summaries_change_no_signal():
    """Detectors sharing one median-window pass inside ``shared_window_summaries`` give the
    signals each gives alone (and the streaming loop gives), also when the same array is
    changed in place between two scans: a summary is reused for equal values only."""
    from rules.runs_stream import shared_window_summaries

    rng = np.random.default_rng(77)
    x = np.round(rng.normal(size=2500) + (np.arange(2500) > 1200) * 0.8, 1)
    pair = (LongestMedianRunDetector, MedianRunsDetector)
    want = [stream(cls(window=30, alpha=0.01), x) for cls in pair]
    y = x.copy()
    with shared_window_summaries():
        got = [cls.scan(y, window=30, alpha=0.01) for cls in pair]
        y[:] = x[::-1]  # the same array object, other values
        got_reversed = [cls.scan(y, window=30, alpha=0.01) for cls in pair]
        got_short = [cls.scan(x[:900], window=30, alpha=0.01) for cls in pair]
    assert got == want and any(got)
    assert got_reversed == [stream(cls(window=30, alpha=0.01), x[::-1]) for cls in pair]
    assert got_short == [stream(cls(window=30, alpha=0.01), x[:900]) for cls in pair]


# -- state ------------------------------------------------------------------------------


@pytest.mark.parametrize("cls", ALL)
def test_state_round_trip_mid_stream(cls):
    rng = np.random.default_rng(3)
    x = np.round(rng.normal(size=1500) + np.repeat(rng.normal(size=30), 50), 1)
    ref = cls(window=30, alpha=0.02)
    full = stream(ref, x)
    for cut in (7, 400, 777, 1499):
        det = cls(window=30, alpha=0.02)
        first = stream(det, x[:cut])
        data = json.loads(json.dumps(det.export_state()))
        det2 = cls.from_state(data)
        assert det2.params() == det.params()
        second = stream(det2, x[cut:])
        assert first + second == full
    with pytest.raises(StateError):
        (UpDownRunsDetector if cls is not UpDownRunsDetector else MedianRunsDetector).from_state(data)
    bad = dict(data, version=99)
    with pytest.raises(StateError):
        cls.from_state(bad)


# -- validation -------------------------------------------------------------------------


@pytest.mark.parametrize("cls", ALL)
def test_parameter_validation(cls):
    with pytest.raises(ValueError, match="window"):
        cls(window=cls.MIN_WINDOW - 1)
    with pytest.raises(ValueError, match="window"):
        cls(window=20.5)
    with pytest.raises(ValueError, match="window"):
        cls(window=cls.MAX_WINDOW + 1)
    for bad in (0.0, 0.5, -0.1, float("nan"), "0.01"):
        with pytest.raises(ValueError, match="alpha"):
            cls(window=20, alpha=bad)
    with pytest.raises(ValueError, match="side"):
        cls(window=20, side="sideways")
    det = cls(window=20)
    for bad in (float("nan"), float("inf"), "3", None):
        with pytest.raises(ValueError, match="value"):
            det.update(bad)
    with pytest.raises(ValueError):
        cls.scan([1.0, float("nan")] * 20, window=20)
    assert cls(window=cls.MIN_WINDOW).window == cls.MIN_WINDOW


def test_minimum_windows_are_the_smallest_reaching_005():
    # the justification given in each docstring: the most extreme outcome at the minimum
    # window has tail probability <= 0.05, one reading fewer it does not.
    def median_extreme(w):  # tie-free window: w // 2 readings either side are kept
        h = w // 2
        _, cdf, sf = rn.median_runs_table(h, h)
        return max(cdf[2], sf[2 * h])

    assert median_extreme(8) <= 0.05 < median_extreme(7)
    assert rn.updown_table(9)[2][8] <= 0.05 < rn.updown_table(8)[2][7]
    assert rn.longest_median_run_sf(5, 5, 5) <= 0.05 < rn.longest_median_run_sf(4, 4, 4)
    assert rn.longest_monotone_run_sf(5, 5) <= 0.05 < rn.longest_monotone_run_sf(4, 4)
    assert [c.MIN_WINDOW for c in ALL] == [8, 9, 10, 5]


def test_docstring_examples_run():
    import doctest

    import rules.runs_stream

    res = doctest.testmod(rules.runs_stream)
    assert res.failed == 0 and res.attempted >= 10
