"""Tabular CUSUM: run lengths against published tables (and independent computation),
the p-value definition against simulation, a worked example, golden indices,
streaming == scan, state round trip and validation.

Provenance labels used below:
  published  -- a value printed in the named source;
  from memory -- a published table value recalled, not checked against the print
                 (reference file /work/shared/references/check-values.md, tag MEM);
  computed   -- recomputed here by an independent method (not a published value).
"""

from __future__ import annotations

import doctest
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rules.cusum as cusum_mod
from rules.cusum import Cusum, cusum_arl, cusum_arl_siegmund, cusum_h_for_arl, cusum_pvalue, signal_pvalue
from rules.detector import StateError
from rules.registry import DETECTORS


def stream(det, xs):
    return [s for v in xs if (s := det.update(float(v))) is not None]


def test_registered_and_doctests_run():
    assert DETECTORS["cusum"] is Cusum and Cusum.needs_reference
    res = doctest.testmod(cusum_mod)
    assert res.attempted >= 5 and res.failed == 0


# -- zero-state ARL --------------------------------------------------------------------

# Montgomery, Introduction to Statistical Quality Control (6th ed. 2009), Table 9.3,
# "ARL performance of the tabular CUSUM with k = 1/2 and h = 4 or h = 5" -- FROM MEMORY
# (high confidence; values of the same kind in Hawkins 1993, Quality Engineering 5(3)).
SHIFTS = [0.0, 0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 2.5, 3.0, 4.0]
TABLE_H4 = [168, 74.2, 26.6, 13.3, 8.38, 4.75, 3.34, 2.62, 2.19, 1.71]
TABLE_H5 = [465, 139, 38.0, 17.0, 10.4, 5.75, 4.01, 3.11, 2.57, 2.01]


def _rounds_to(value, printed):
    """True when value rounds to the printed figure at the printed precision (3 significant digits)."""
    digits = 3 - int(math.floor(math.log10(abs(printed)))) - 1
    return abs(value - printed) <= 0.5 * 10.0 ** (-digits) + 1e-9


@pytest.mark.parametrize("h,table", [(4.0, TABLE_H4), (5.0, TABLE_H5)])
def test_arl_table_k05_from_memory(h, table):
    # Montgomery Table 9.3 (from memory): every entry is the integral-equation ARL rounded.
    # One exception in the recalled h=5 row: 0.75 sigma gives 17.05 (exact), recalled as 17.0.
    for d, printed in zip(SHIFTS, table):
        v = cusum_arl(0.5, h, d)
        if (h, d) == (5.0, 0.75):
            assert abs(v - printed) < 0.06
        else:
            assert _rounds_to(v, printed), (h, d, v, printed)


def test_arl_key_values_computed():
    # check-values.md section 3.1 (Nystrom, computed, not a published value), tolerance 1e-3 relative.
    assert cusum_arl(0.5, 4.0) == pytest.approx(167.68, rel=1e-4)
    assert cusum_arl(0.5, 5.0) == pytest.approx(465.44, rel=1e-4)
    assert cusum_arl(0.5, 4.0, 1.0) == pytest.approx(8.383, rel=1e-3)
    assert cusum_arl(0.5, 5.0, 1.0) == pytest.approx(10.38, rel=1e-3)
    assert cusum_arl(0.5, 4.0, sides=1) == pytest.approx(335.37, rel=1e-4)
    assert cusum_arl(0.5, 5.0, sides=1) == pytest.approx(930.89, rel=1e-4)
    # published rounded figures (Hawkins 1993; Montgomery Table 9.3, from memory): 168, 465, 8.38, 10.4
    assert round(cusum_arl(0.5, 4.0)) == 168 and round(cusum_arl(0.5, 5.0)) == 465
    assert round(cusum_arl(0.5, 4.0, 1.0), 2) == 8.38 and round(cusum_arl(0.5, 5.0, 1.0), 1) == 10.4


def test_integral_equation_converged_and_agrees_with_brook_evans_chain():
    # Two independent numerical methods (computed): Nystrom (64 vs 128 nodes) and the
    # Brook & Evans (1972) Markov chain, whose error falls like 1/states^2.
    for h, d in [(4.0, 0.0), (5.0, 0.0), (4.0, 1.0), (5.0, 0.5)]:
        a = cusum_arl(0.5, h, d)
        assert cusum_arl(0.5, h, d, nodes=128) == pytest.approx(a, rel=1e-9)
        e150 = abs(cusum_arl(0.5, h, d, method="markov", states=150) - a)
        e300 = abs(cusum_arl(0.5, h, d, method="markov", states=300) - a)
        assert e300 < 3e-4 * a and e300 < e150 / 2


def test_siegmund_approximation():
    # Siegmund (1985), b = h + 1.166; evaluated values from check-values.md section 3.2.
    assert cusum_arl_siegmund(0.5, 4.0) == pytest.approx(169.05, abs=0.01)
    assert cusum_arl_siegmund(0.5, 5.0) == pytest.approx(469.11, abs=0.01)
    assert cusum_arl_siegmund(0.5, 5.0, sides=1) == pytest.approx(938.22, abs=0.01)
    assert cusum_arl_siegmund(0.5, 5.0, 1.0, sides=1) == pytest.approx(10.336, abs=1e-3)
    # its stated accuracy: about 1 % of the exact ARL for shifts up to 1 sigma
    for h in (4.0, 5.0):
        for d in (0.0, 0.25, 0.5, 0.75, 1.0):
            assert cusum_arl_siegmund(0.5, h, d) == pytest.approx(cusum_arl(0.5, h, d), rel=0.012)


def test_h_for_arl0_370():
    # Hawkins (1993) / Montgomery Table 9.4 (from memory): h = 8.01, 4.77, 3.34, 2.52, 1.99 for
    # k = 0.25, 0.5, 0.75, 1.0, 1.25; exact solutions (computed) 8.0083, 4.7738, 3.3390, 2.5163, 1.9862, 1.6041.
    exact = {0.25: 8.0083, 0.5: 4.7738, 0.75: 3.3390, 1.0: 2.5163, 1.25: 1.9862, 1.5: 1.6041}
    recalled = {0.25: 8.01, 0.5: 4.77, 0.75: 3.34, 1.0: 2.52, 1.25: 1.99}
    for k, hx in exact.items():
        h = cusum_h_for_arl(k, 370.0)
        assert h == pytest.approx(hx, abs=1.5e-4)
        assert cusum_arl(k, h) == pytest.approx(370.0, rel=1e-7)
        if k in recalled:
            assert round(h, 2) == recalled[k]
    # one-sided ARL0 = 370 (computed): 4.0954 at k = 0.5
    assert cusum_h_for_arl(0.5, 370.0, sides=1) == pytest.approx(4.0954, abs=1.5e-4)
    # h rounded to 4.77 gives ARL0 368.56 (computed)
    assert cusum_arl(0.5, 4.77) == pytest.approx(368.56, abs=0.02)


def _simulate_two_sided_run_lengths(k, h, n_streams, rng, delta=0.0, headstart=0.0, sides=2):
    cp = np.full(n_streams, headstart)
    cn = np.full(n_streams, headstart)
    rl = np.zeros(n_streams, dtype=np.int64)
    alive = np.arange(n_streams)
    t = 0
    while alive.size:
        t += 1
        x = rng.standard_normal(alive.size) + delta
        cp[alive] = np.maximum(0.0, cp[alive] + x - k)
        cn[alive] = np.maximum(0.0, cn[alive] - x - k)
        hit = cp[alive] > h
        if sides == 2:
            hit |= cn[alive] > h
        rl[alive[hit]] = t
        alive = alive[~hit]
    return rl


def test_arl0_h4_by_simulation():
    # Monte Carlo (computed) of the full two-sided scheme, both sides running together:
    # 20 000 independent streams; the mean must lie within 3 standard errors of the
    # integral-equation ARL0 (167.68), which also checks the 1/ARL+ + 1/ARL- combination.
    rng = np.random.default_rng(20260101)
    rl = _simulate_two_sided_run_lengths(0.5, 4.0, 20_000, rng)
    se = rl.std(ddof=1) / math.sqrt(rl.size)
    assert abs(rl.mean() - cusum_arl(0.5, 4.0)) < 3 * se


def test_headstart_arl_by_simulation():
    # Fast initial response (Lucas & Crosier 1982), one-sided, head start h/2 at a 0.5-sigma
    # shift: simulation (computed) against the integral equation started at the head start.
    rng = np.random.default_rng(11)
    rl = _simulate_two_sided_run_lengths(0.5, 4.0, 20_000, rng, delta=0.5, headstart=2.0, sides=1)
    exact = cusum_arl(0.5, 4.0, 0.5, sides=1, headstart=2.0)
    se = rl.std(ddof=1) / math.sqrt(rl.size)
    assert abs(rl.mean() - exact) < 3 * se
    assert exact < cusum_arl(0.5, 4.0, 0.5, sides=1)  # the head start shortens detection
    assert cusum_arl(0.5, 4.0, 0.5, sides=1, headstart=2.0, method="markov") == pytest.approx(exact, rel=2e-3)


def test_detector_renewal_mean_matches_arl0():
    # The detector restarts at zero after each signal, so gaps between in-control signals are
    # iid zero-state run lengths: their mean over a long seeded stream estimates ARL0 (h = 3:
    # ARL0 computed by the integral equation), within 3 standard errors.
    rng = np.random.default_rng(5)
    x = rng.standard_normal(60_000)
    sigs = Cusum.scan(x, k=0.5, h=3.0)
    gaps = np.diff([-1] + [s.index for s in sigs])
    se = gaps.std(ddof=1) / math.sqrt(gaps.size)
    assert abs(gaps.mean() - cusum_arl(0.5, 3.0)) < 3 * se


# -- p-value --------------------------------------------------------------------------


@pytest.mark.parametrize("level,n,start", [(3.0, 25, 0.0), (5.2, 40, 0.0), (4.0, 12, 2.0)])
def test_pvalue_definition_by_simulation(level, n, start):
    # Definition: P(max_{t<=n} C+_t >= level | C+_0 = start), iid N(0,1), k = 0.5.
    # Simulation (computed) of 40 000 paths; agreement within 3 Monte Carlo standard errors
    # plus the chain's discretisation allowance (0.3 % relative).
    rng = np.random.default_rng(int(level * 100 + n))
    m = 40_000
    c = np.full(m, start)
    reached = np.zeros(m, dtype=bool)
    for _ in range(n):
        c = np.maximum(0.0, c + rng.standard_normal(m) - 0.5)
        reached |= c >= level
    p_mc = reached.mean()
    p = cusum_pvalue(0.5, level, n, start)
    se = math.sqrt(p * (1 - p) / m)
    assert abs(p_mc - p) < 3 * se + 3e-3 * p


def test_pvalue_chain_converges():
    p = [cusum_pvalue(0.5, 5.3, 7, states=s) for s in (150, 600)]
    assert p[0] == pytest.approx(p[1], rel=2e-3)
    # long horizons use repeated squaring; same answer as plain iteration
    q = cusum_pvalue(0.5, 5.3, 1000)
    assert 0.0 < cusum_pvalue(0.5, 5.3, 400) < q < 1.0
    assert cusum_pvalue(0.5, 5.3, 0) == 0.0


def test_pvalue_extreme_levels_stay_tiny_and_ordered():
    p = [cusum_pvalue(0.5, c, 5) for c in (5.0, 8.0, 12.0, 30.0)]
    assert p == sorted(p, reverse=True) and p[-1] < 1e-40  # ~ P(N(0,5) > 32.5) = 1e-47
    assert cusum_pvalue(0.5, 1000.0, 50) < 1e-100


def test_public_signatures_are_stable():
    # the calibration code calls these by keyword; changing them is an API change
    import inspect

    assert str(inspect.signature(cusum_arl)) == (
        "(k: 'float', h: 'float', delta: 'float' = 0.0, *, sides: 'int' = 2, headstart: 'float' = 0.0, "
        "method: 'str' = 'integral', nodes: 'int' = 64, states: 'int' = 400) -> 'float'"
    )
    assert str(inspect.signature(cusum_h_for_arl)) == (
        "(k: 'float', arl0: 'float', *, sides: 'int' = 2, headstart: 'float' = 0.0) -> 'float'"
    )


def test_signal_carries_the_defined_pvalue():
    rng = np.random.default_rng(3)
    x = np.concatenate([rng.standard_normal(60), rng.standard_normal(40) + 1.5])
    sigs = Cusum.scan(x)
    assert sigs
    for s in sigs:
        n = s.index - s.onset_index + 1
        assert s.detail["readings_since_zero"] == n
        assert s.p_value == pytest.approx(cusum_pvalue(0.5, s.statistic, n, 0.0), rel=1e-6)
        assert s.size == pytest.approx((0.5 + s.statistic / n) * (1 if s.direction == "up" else -1))


def test_tabled_signal_pvalue_matches_the_chain():
    # The table per (k, h) (4-point interpolation in log p every 0.1 of level) must agree
    # with the direct chain far inside the chain's own 1e-3 discretisation error.
    rng = np.random.default_rng(11)
    for k, h in ((0.5, 4.77), (0.25, 8.0)):
        for _ in range(60):
            level = h + rng.uniform(0.0, 4.0)
            n = int(rng.integers(1, 513))
            assert signal_pvalue(k, h, level, n) == pytest.approx(cusum_pvalue(k, level, n), rel=1e-6)
    # beyond the table (level, horizon) or with an untouched head start: the chain itself
    assert signal_pvalue(0.5, 4.77, 9.5, 10) == cusum_pvalue(0.5, 9.5, 10)
    assert signal_pvalue(0.5, 4.77, 5.2, 600) == cusum_pvalue(0.5, 5.2, 600)
    assert signal_pvalue(0.5, 4.77, 5.2, 30, 2.0) == cusum_pvalue(0.5, 5.2, 30, 2.0)


# -- worked example ----------------------------------------------------------------------

# Data recalled from memory of Montgomery Example 9.1 (Table 9.1), not verified against the
# print: mu0 = 10, sigma = 1, k = 0.5, h = 5.  (check-values.md section 3.4, MEM-m data.)
EXAMPLE_91 = [9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34, 9.03, 11.47, 10.51, 9.40, 10.08,
              9.37, 10.62, 10.31, 8.52, 10.84, 10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52]  # fmt: skip
EXAMPLE_91_CPLUS = [0, 0, 0, 1.16, 2.82, 2.50, 0.04, 1.00, 0, 0, 0, 0.97, 0.98, 0, 0, 0, 0.12, 0, 0, 0.34,
                    0.74, 0, 1.79, 2.79, 2.89, 3.47, 3.35, 4.47, 5.28]  # fmt: skip


def test_worked_example_montgomery_9_1_recalled():
    z = np.array(EXAMPLE_91) - 10.0
    det = Cusum(k=0.5, h=5.0)
    uppers, lowers, sig = [], [], None
    for v in z:
        sig = det.update(v) or sig
        if sig is None:
            uppers.append(det.upper)
            lowers.append(det.lower)
        else:
            break
    np.testing.assert_allclose(uppers, EXAMPLE_91_CPLUS[:-1], atol=0.006)
    assert max(lowers) < 1.78  # "C- never exceeds 1.77"
    # first signal at t = 29 (1-based; index 28), N+ = 7, change after t = 22 (onset index 22)
    assert sig.index == 28 and sig.direction == "up"
    assert sig.detail["readings_since_zero"] == 7 and sig.onset_index == 22
    assert sig.statistic == pytest.approx(5.28, abs=0.006)
    assert 10.0 + sig.size == pytest.approx(11.25, abs=0.005)  # estimated new mean
    assert Cusum.scan(z)[0] == sig


# -- golden indices ------------------------------------------------------------------------


def test_hand_computed_step_ramp_spike():
    # step of +2 sigma at index 50: C+ grows 1.5 per reading, exceeds 5 on the 4th (6.0): index 53
    s = Cusum.scan(np.r_[np.zeros(50), np.full(30, 2.0)])[0]
    assert (s.index, s.onset_index, s.direction, s.size) == (53, 50, "up", 2.0)
    # ramp z = 0.1 j from index 50 (j = 0, 1, ...): increments 0.1 j - 0.5 are positive from j = 6;
    # sum_{j=6}^{14} = 4.5, sum_{j=6}^{15} = 5.5 > 5, so index 65; the last zero is at j = 5 (index 55)
    s = Cusum.scan(np.r_[np.zeros(50), 0.1 * np.arange(40)])[0]
    assert (s.index, s.onset_index) == (65, 56)
    assert s.statistic == pytest.approx(5.5)
    # downward spike of -8 at index 30: C- = 7.5 at once
    s = Cusum.scan(np.r_[np.zeros(30), [-8.0], np.zeros(10)])
    assert len(s) == 1 and (s[0].index, s[0].onset_index, s[0].direction) == (30, 30, "down")
    assert s[0].size == pytest.approx(-8.0)


def test_golden_indices_on_seeded_streams():
    # regression values of this implementation on seeded noise (numpy default_rng)
    rng = np.random.default_rng(42)
    noise = rng.standard_normal(200)
    step = noise + np.r_[np.zeros(100), np.full(100, 1.0)]
    ramp = noise + np.r_[np.zeros(100), 0.03 * np.arange(100)]
    spike = noise.copy()
    spike[120] += 9.0
    first = {name: Cusum.scan(v)[0] for name, v in (("step", step), ("ramp", ramp), ("spike", spike))}
    assert first["step"].index == GOLDEN["step"] and first["step"].direction == "up"
    assert first["ramp"].index == GOLDEN["ramp"] and first["ramp"].direction == "up"
    assert first["spike"].index == GOLDEN["spike"]
    assert Cusum.scan(noise) == []  # no false alarm on the plain noise (h = 5)


GOLDEN = {"step": 117, "ramp": 126, "spike": 120}  # regression values (this implementation, seed 42)


def test_no_signal_on_centre_or_short_stream():
    assert Cusum.scan(np.zeros(5000)) == []
    assert Cusum.scan([]) == []
    det = Cusum()
    assert stream(det, np.zeros(1000)) == [] and det.upper == 0.0 and det.lower == 0.0


# -- streaming == scan, state, validation ------------------------------------------------

values = st.lists(
    st.one_of(st.floats(-6, 6, allow_nan=False), st.sampled_from([0.0, 0.5, -0.5, 1.0, 5.5, -5.5, 2.25])),
    max_size=400,
)


@settings(max_examples=60, deadline=None)
@given(xs=values, h=st.sampled_from([0.5, 1.0, 2.0, 4.0, 5.0]), k=st.sampled_from([0.0, 0.25, 0.5, 1.0]),
       fir=st.booleans())  # fmt: skip
def test_streaming_equals_scan(xs, h, k, fir):
    kw = dict(k=k, h=h, headstart=h / 2 if fir else 0.0)
    assert stream(Cusum(**kw), xs) == Cusum.scan(xs, **kw)


def test_streaming_equals_scan_long_random():
    rng = np.random.default_rng(9)
    for _ in range(6):
        x = rng.normal(rng.uniform(-1, 1), 1, int(rng.integers(100, 1500)))
        kw = dict(k=0.5, h=float(rng.uniform(1, 5)))
        assert stream(Cusum(**kw), x) == Cusum.scan(x, **kw)


def test_state_round_trip_mid_stream():
    rng = np.random.default_rng(1)
    x = rng.normal(0.4, 1, 3000)
    for kw in (dict(), dict(k=0.25, h=4.0, headstart=2.0)):
        a = Cusum(**kw)
        first = stream(a, x[:1234])
        b = Cusum.from_state(json.loads(json.dumps(a.export_state())))
        assert stream(a, x[1234:]) == stream(b, x[1234:])
        assert first + stream(Cusum.from_state(a.export_state()), []) == first
    with pytest.raises(StateError):
        Cusum.from_state({"detector": "ewma", "version": 1, "params": {}, "state": {}})
    with pytest.raises(StateError):
        Cusum.from_state({"detector": "cusum", "version": 99, "params": {}, "state": {}})


@pytest.mark.parametrize(
    "kw,word",
    [(dict(k=-0.1), "k"), (dict(h=0.0), "h"), (dict(h=4.0, headstart=4.0), "headstart"), (dict(k="a"), "k"),
     (dict(h=float("nan")), "h")],
)  # fmt: skip
def test_parameter_validation(kw, word):
    with pytest.raises(ValueError, match=word):
        Cusum(**kw)


def test_rejects_non_finite_values():
    with pytest.raises(ValueError, match="finite"):
        Cusum().update(float("nan"))
    with pytest.raises(ValueError, match="finite"):
        Cusum.scan([0.0, float("inf")])
    with pytest.raises(ValueError):
        cusum_arl(0.5, 4.0, method="bogus")
