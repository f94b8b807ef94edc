"""Shewhart limit, Western Electric rules and Nelson tests: window probabilities, exact
zone-chain ARLs against Champ & Woodall (1987), single-test ARLs, rule semantics,
golden indices, streaming == scan, state round trip, validation.

Provenance labels: published / from memory (check-values.md tag MEM) / computed
(recomputed here by an independent method, not a published value).
"""

from __future__ import annotations

import doctest
import itertools
import json
import math

import numpy as np
import pytest
import scipy
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

import rules.zones as zones_mod
from rules.detector import StateError
from rules.registry import DETECTORS
from rules.zones import (
    RULE_WINDOW_PROBABILITY as P,
    Nelson,
    Shewhart,
    WesternElectric,
    euler_zigzag,
    nelson_arl,
    shewhart_arl,
    western_electric_arl,
    zone_rules_arl,
)

SCIPY = tuple(int(p) for p in scipy.__version__.split(".")[:2])


def stream(det, xs):
    return [s for v in xs if (s := det.update(float(v))) is not None]


def test_registered_and_doctests_run():
    for key, cls in (("shewhart", Shewhart), ("western_electric", WesternElectric), ("nelson", Nelson)):
        assert DETECTORS[key] is cls and cls.needs_reference
    res = doctest.testmod(zones_mod)
    assert res.attempted >= 8 and res.failed == 0


# -- per-window probabilities ------------------------------------------------------------------


def test_shewhart_three_sigma_false_alarm_rate():
    # Shewhart (1931); Montgomery Ch. 6: P(|Z| > 3) = 0.0027, ARL0 = 370.4 (published, rounded)
    assert P["beyond3"] == pytest.approx(0.0027, abs=5e-6)
    assert shewhart_arl(3.0) == pytest.approx(370.4, abs=0.05)
    assert shewhart_arl(3.0) == pytest.approx(370.3983, abs=1e-4)  # check-values 5.1 (computed)
    assert shewhart_arl(3.09) == pytest.approx(499.6, abs=0.05)  # 3.09-sigma limits (computed)


@pytest.mark.skipif(SCIPY < (1, 11), reason="reference values taken with scipy >= 1.11 (check-values: 1.17.1)")
def test_shewhart_pvalue_is_two_sided_normal_tail():
    for z in (3.01, -3.5, 4.2, -6.0):
        s = Shewhart().update(z)
        assert s.p_value == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-12)
        assert (s.pattern, s.direction, s.size, s.onset_index) == ("spike", "up" if z > 0 else "down", z, 0)
    assert Shewhart().update(3.0) is None  # strict: exactly on the limit is not beyond it


def _zone_pattern_probability(window, predicate):
    """Enumerate zone-symbol windows (independent of the module): P(predicate) for iid N(0,1)."""
    cuts = [-np.inf, -3, -2, -1, 0, 1, 2, 3, np.inf]
    mids = [-3.5, -2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 3.5]
    pr = np.diff(stats.norm.cdf(cuts))
    total = 0.0
    for combo in itertools.product(range(8), repeat=window):
        if predicate([mids[c] for c in combo]):
            total += math.prod(pr[c] for c in combo)
    return total


def test_window_probabilities_western_electric():
    # check-values.md section 5.2: rule 2 = 2[3p^2(1-p)+p^3], p = P(Z>2): 0.003058;
    # rule 3 = 2[5q^4(1-q)+q^5], q = P(Z>1): 0.005532; rule 4 = 2 * 0.5^8 = 0.007813.
    assert P["2of3"] == pytest.approx(0.003058, abs=5e-7)
    assert P["4of5"] == pytest.approx(0.005532, abs=5e-7)
    assert P["run8"] == pytest.approx(0.0078125, rel=1e-12)
    # the same by enumerating zone patterns (computed)
    two3 = _zone_pattern_probability(3, lambda w: sum(v > 2 for v in w) >= 2 or sum(v < -2 for v in w) >= 2)
    four5 = _zone_pattern_probability(5, lambda w: sum(v > 1 for v in w) >= 4 or sum(v < -1 for v in w) >= 4)
    assert P["2of3"] == pytest.approx(two3, rel=1e-9)
    assert P["4of5"] == pytest.approx(four5, rel=1e-9)


def test_window_probabilities_nelson():
    # test 2: 2 * 0.5^9; test 7: P(|Z|<=1)^15 = 0.6826895^15 = 0.003261;
    # test 8: 0.3173105^8 = 0.00010277, minus 2 * 0.158655^8 = 8.0e-7 when both sides are required
    assert P["run9"] == pytest.approx(0.00390625, rel=1e-12)
    assert P["zoneC15"] == pytest.approx(0.6826895**15, rel=1e-6) and P["zoneC15"] == pytest.approx(0.003261, abs=5e-7)
    assert P["mix8_one_side_allowed"] == pytest.approx(0.00010277, abs=5e-9)
    assert P["mix8_one_side_allowed"] - P["mix8"] == pytest.approx(8.0e-7, abs=5e-9)
    # test 3: 2 of the 6! orderings of 6 continuous iid values are monotone (enumeration)
    mono = sum(1 for p in itertools.permutations(range(6)) if list(p) in (sorted(p), sorted(p, reverse=True)))
    assert mono == 2 and P["trend6"] == pytest.approx(mono / math.factorial(6), rel=1e-12)
    # test 4: 2 E_14 / 14!, E_14 = 199 360 981 (Euler zigzag numbers, OEIS A000111, published)
    assert euler_zigzag(14) == 199_360_981
    assert P["alt14"] == pytest.approx(0.004574, abs=5e-7)


def test_euler_zigzag_by_enumeration():
    # brute force: permutations of n alternating up-down (E_n counts one starting direction)
    for n in range(1, 9):
        count = 0
        for p in itertools.permutations(range(n)):
            d = [p[i + 1] > p[i] for i in range(n - 1)]
            if all(d[i] != d[i + 1] for i in range(len(d) - 1)) and (not d or d[0]):
                count += 1
        assert count == euler_zigzag(n)
    assert [euler_zigzag(n) for n in range(11)] == [1, 1, 1, 2, 5, 16, 61, 272, 1385, 7936, 50521]  # OEIS A000111


# -- exact zone-chain ARLs ----------------------------------------------------------------------


def test_western_electric_rules_1_to_4_arl0_champ_woodall():
    # Champ & Woodall (1987), Technometrics 29(4): ARL0 = 91.75 for the four rules together (published)
    assert round(western_electric_arl((1, 2, 3, 4)), 2) == 91.75


def test_western_electric_combinations():
    # check-values.md section 5.2 table (zone Markov chain, computed); pairwise values 225.44,
    # 166.05, 152.73 also recalled from Champ & Woodall 1987 (from memory)
    table = {
        (1,): (370.40, 43.89), (1, 2): (225.44, 20.01), (1, 3): (166.05, 12.66), (1, 4): (152.73, 14.58),
        (1, 2, 3): (132.89, 10.95), (1, 2, 4): (122.05, 11.73), (1, 3, 4): (105.78, 10.19),
        (1, 2, 3, 4): (91.75, 9.22),
    }  # fmt: skip
    for rules, (a0, a1) in table.items():
        assert western_electric_arl(rules) == pytest.approx(a0, abs=0.006)
        assert western_electric_arl(rules, 1.0) == pytest.approx(a1, abs=0.006)
    assert western_electric_arl((1,), 2.0) == pytest.approx(shewhart_arl(3.0, 2.0), rel=1e-10)
    assert western_electric_arl((1, 2, 3, 4), 3.0) == pytest.approx(1.67, abs=0.006)


def test_nelson_single_and_combined_arls():
    # closed forms (computed): test 2 alone 2^9 - 1 = 511 (run of 9 on one side, fair coin);
    # test 7 alone (1 - p^15) / ((1 - p) p^15), p = P(|Z| <= 1); test 8 without the both-sides
    # requirement, the same run formula with p = P(|Z| > 1)
    assert nelson_arl((2,)) == pytest.approx(511.0, rel=1e-10)
    pc = 1 - 2 * stats.norm.sf(1.0)
    assert nelson_arl((7,)) == pytest.approx((1 - pc**15) / ((1 - pc) * pc**15), rel=1e-10)
    assert nelson_arl((7,)) == pytest.approx(963.27, abs=0.006)
    po = 1 - pc
    assert nelson_arl((8,), mixture_both_sides=False) == pytest.approx((1 - po**8) / ((1 - po) * po**8), rel=1e-9)
    assert nelson_arl((8,), mixture_both_sides=False) == pytest.approx(14251.4, abs=0.05)
    assert nelson_arl((8,)) > nelson_arl((8,), mixture_both_sides=False)
    # check-values.md section 5.3 (zone chain, computed)
    assert nelson_arl((5,)) == pytest.approx(510.69, abs=0.006)
    assert nelson_arl((6,)) == pytest.approx(291.32, abs=0.006)
    assert nelson_arl((1, 2)) == pytest.approx(216.70, abs=0.006)
    assert nelson_arl((1, 2, 5, 6)) == pytest.approx(109.05, abs=0.006)
    assert nelson_arl((1, 2, 5, 6, 7, 8)) == pytest.approx(98.18, abs=0.006)
    # "the chain reproduces the WE value 91.75 when test 2 is replaced by 8 in a row"
    assert zone_rules_arl(["beyond3", "run8", "2of3", "4of5"]) == pytest.approx(91.75, abs=0.006)


def test_public_signatures_are_stable():
    # the calibration code calls these by keyword; changing them is an API change
    import inspect

    assert list(inspect.signature(western_electric_arl).parameters) == ["rules", "delta"]
    assert list(inspect.signature(nelson_arl).parameters) == ["tests", "delta", "mixture_both_sides"]
    assert list(inspect.signature(zone_rules_arl).parameters) == ["rules", "delta", "mixture_both_sides"]
    assert list(inspect.signature(shewhart_arl).parameters) == ["limit", "delta"]


def test_chain_refuses_order_based_tests():
    with pytest.raises(ValueError, match="order"):
        nelson_arl((1, 3))
    with pytest.raises(ValueError):
        zone_rules_arl(["trend6"])
    with pytest.raises(ValueError):
        western_electric_arl((5,))


def _mean_gap(sigs):
    gaps = np.diff([-1] + [s.index for s in sigs])
    return gaps.mean(), gaps.std(ddof=1) / math.sqrt(gaps.size)


def test_detector_in_control_arl_matches_chain():
    # The detectors restart after each finding (history cleared), so gaps are iid zero-state run
    # lengths: the mean gap over a seeded in-control stream must be within 3 standard errors of
    # the exact chain ARL (computed).
    rng = np.random.default_rng(2027)
    x = rng.standard_normal(250_000)
    m, se = _mean_gap(WesternElectric.scan(x))
    assert abs(m - 91.75) < 3 * se
    m, se = _mean_gap(Nelson.scan(x, tests=(1, 2, 5, 6, 7, 8)))
    assert abs(m - nelson_arl((1, 2, 5, 6, 7, 8))) < 3 * se


def test_nelson_trend_and_alternation_arls_by_simulation():
    # Tests 3 and 4 alone have no zone chain: check-values.md section 5.3 gives 421.60 and 601.01
    # (numerical, Richardson-extrapolated; computed, not published). Mean gap of the detector over
    # a seeded stream within 3 standard errors.
    rng = np.random.default_rng(31)
    x = rng.standard_normal(1_500_000)
    m, se = _mean_gap(Nelson.scan(x, tests=(3,)))
    assert abs(m - 421.60) < 3 * se
    m, se = _mean_gap(Nelson.scan(x, tests=(4,)))
    assert abs(m - 601.01) < 3 * se


# -- rule semantics --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "cls,kw,xs,label,pattern,direction,index,onset,pkey",
    [
        (WesternElectric, {}, [0.5, 3.2], "Western Electric rule 1", "spike", "up", 1, 1, "beyond3"),
        (WesternElectric, {}, [-2.5, -0.3, -2.1], "Western Electric rule 2", "shift", "down", 2, 0, "2of3"),
        (WesternElectric, {}, [1.5, 1.2, 0.3, 1.1, 1.8], "Western Electric rule 3", "shift", "up", 4, 0, "4of5"),
        (WesternElectric, {}, [0.2] * 8, "Western Electric rule 4", "shift", "up", 7, 0, "run8"),
        (Nelson, {}, [-0.2] * 9, "Nelson test 2", "shift", "down", 8, 0, "run9"),
        (Nelson, {}, [0.1, 0.2, 0.3, 0.4, 0.5, 0.6], "Nelson test 3", "drift", "up", 5, 0, "trend6"),
        (Nelson, {}, [0.5, -0.5] * 7, "Nelson test 4", "sawtooth", None, 13, 0, "alt14"),
        (Nelson, {}, [2.5, 0.0, 2.1], "Nelson test 5", "shift", "up", 2, 0, "2of3"),
        (Nelson, {}, [0.3, 0.2, -0.4, -0.1, 0.5] * 3, "Nelson test 7", "grouping", None, 14, 0, "zoneC15"),
        (Nelson, {}, [1.5, 1.5, -1.5, -1.5] * 2, "Nelson test 8", "mixture", None, 7, 0, "mix8"),
    ],
)  # fmt: skip
def test_each_rule_fires_with_its_name_pattern_and_probability(cls, kw, xs, label, pattern, direction, index, onset, pkey):
    sigs = stream(cls(**kw), xs)
    assert len(sigs) == 1
    s = sigs[0]
    assert (s.detector, s.pattern, s.direction, s.index, s.onset_index) == (label, pattern, direction, index, onset)
    assert s.detail["rule_name"] == label and s.detail["rule"] == int(label.split()[-1])
    assert s.p_value == P[pkey]
    assert cls.scan(xs, **kw) == sigs


def test_nelson_test_6_and_sizes():
    s = stream(Nelson(tests=(6,)), [1.5, 1.2, 0.3, 1.1, 1.8])[0]
    assert s.detector == "Nelson test 6" and s.size == pytest.approx(np.mean([1.5, 1.2, 0.3, 1.1, 1.8]))
    s = stream(Nelson(tests=(3,)), [0.1, 0.3, 0.5, 0.7, 0.9, 1.1])[0]
    assert s.size == pytest.approx(0.2)  # mean increase per reading
    s = stream(Nelson(tests=(8,), mixture_both_sides=False), [1.5] * 3 + [2.5] + [1.5] * 4)[0]
    assert s.p_value == P["mix8_one_side_allowed"]
    assert stream(Nelson(tests=(8,)), [1.5] * 3 + [1.7] + [1.5] * 4) == []  # one side only: not a mixture


def test_several_matches_pick_the_least_probable_and_list_the_rest():
    s = stream(Nelson(), [2.5, 3.5])[0]
    assert s.detector == "Nelson test 1" and s.detail["also_matched"] == ["Nelson test 5"]


def test_restart_clears_history_and_boundaries_are_strict():
    sigs = stream(WesternElectric(rules=(4,)), [0.2] * 16)
    assert [s.index for s in sigs] == [7, 15]  # not 8: the run starts afresh after a finding
    assert stream(WesternElectric(rules=(4,)), [0.2] * 7 + [0.0] + [0.2] * 7) == []  # 0 is on neither side
    assert stream(WesternElectric(rules=(2,)), [2.0, 2.0, 2.0]) == []  # exactly 2 sigma is not beyond it
    assert stream(WesternElectric(rules=(1,)), [3.0, -3.0]) == []
    assert stream(Nelson(tests=(3,)), [0.1, 0.2, 0.3, 0.3, 0.4, 0.5, 0.6]) == []  # a tie breaks the trend


# -- golden indices -------------------------------------------------------------------------------


def test_hand_computed_step_ramp_spike():
    # step to exactly +2 at index 50 (zeros before are on neither side): 2.0 is not beyond 2, so
    # rule 2 never fires; rule 3 (4 of 5 beyond 1) fires on the 4th reading: index 53, onset 50
    s = WesternElectric.scan(np.r_[np.zeros(50), np.full(20, 2.0)])[0]
    assert (s.detector, s.index, s.onset_index, s.direction) == ("Western Electric rule 3", 53, 50, "up")
    # ramp 0.1 j from index 50: j = 0 is on the centre line; 8 positives j = 1..8 -> rule 4 at index 58
    s = WesternElectric.scan(np.r_[np.zeros(50), 0.1 * np.arange(40)])[0]
    assert (s.detector, s.index, s.onset_index) == ("Western Electric rule 4", 58, 51)
    # spike
    z = np.r_[np.zeros(30), [5.0], np.zeros(10)]
    assert [(s.index, s.detector) for s in WesternElectric.scan(z)] == [(30, "Western Electric rule 1")]
    assert [(s.index, s.onset_index) for s in Shewhart.scan(z)] == [(30, 30)]


def _seeded():
    rng = np.random.default_rng(42)
    noise = rng.standard_normal(200)
    spike = noise.copy()
    spike[120] += 9.0
    return {
        "step": noise + np.r_[np.zeros(100), np.full(100, 1.5)],
        "ramp": noise + np.r_[np.zeros(100), 0.04 * np.arange(100)],
        "spike": spike,
    }


GOLDEN = {  # regression values (this implementation, seed 42); earlier in-control findings are ignored
    ("shewhart", "step"): 118, ("shewhart", "ramp"): 138, ("shewhart", "spike"): 120,
    ("western_electric", "step"): 103, ("western_electric", "ramp"): 124, ("western_electric", "spike"): 120,
    ("nelson", "step"): 103, ("nelson", "ramp"): 124, ("nelson", "spike"): 120,
}  # fmt: skip


def test_golden_indices_on_seeded_streams():
    data = _seeded()
    for (key, name), idx in GOLDEN.items():
        sigs = [s for s in DETECTORS[key].scan(data[name]) if s.index >= 100]
        assert sigs and sigs[0].index == idx, (key, name)


def test_no_signal_on_centre_or_short_stream():
    centre = np.zeros(3000)
    assert Shewhart.scan(centre) == [] and WesternElectric.scan(centre) == []
    assert Nelson.scan(centre, tests=(1, 2, 3, 4, 5, 6, 8)) == []
    # test 7 is the one rule made to flag a constant stream: zero spread is stratification
    assert [s.index for s in Nelson.scan(centre[:30], tests=(7,))] == [14, 29]
    # shorter than the rule's minimum: nothing, however extreme the values
    for cls, kw in ((WesternElectric, dict(rules=(4,))), (Nelson, dict(tests=(2,))), (Nelson, dict(tests=(7,)))):
        det = cls(**kw)
        assert stream(det, [2.9] * (det.min_values - 1)) == []
        assert cls.scan([0.5] * (det.min_values - 1), **kw) == []
    assert WesternElectric(rules=(2, 4)).min_values == 2 and Nelson(tests=(4, 7)).min_values == 14


# -- streaming == scan, state, validation ---------------------------------------------------------

values = st.lists(
    st.one_of(st.floats(-4, 4, allow_nan=False), st.sampled_from([0.0, 1.0, -1.0, 2.0, -2.0, 3.0, 0.5, -1.5])),
    max_size=300,
)


@settings(max_examples=60, deadline=None)
@given(xs=values, rules=st.sets(st.integers(1, 4), min_size=1))
def test_streaming_equals_scan_western_electric(xs, rules):
    assert stream(WesternElectric(rules=rules), xs) == WesternElectric.scan(xs, rules=rules)


@settings(max_examples=60, deadline=None)
@given(xs=values, tests=st.sets(st.integers(1, 8), min_size=1), both=st.booleans())
def test_streaming_equals_scan_nelson(xs, tests, both):
    kw = dict(tests=tests, mixture_both_sides=both)
    assert stream(Nelson(**kw), xs) == Nelson.scan(xs, **kw)


def test_streaming_equals_scan_long_random():
    rng = np.random.default_rng(4)
    for trial in range(12):
        n = int(rng.integers(50, 3000))
        x = [rng.normal(0, 1.3, n), np.round(rng.normal(0, 1.2, n) * 2) / 2,
             np.sin(np.arange(n) * rng.uniform(0.5, 3.1)) * 2][trial % 3]  # fmt: skip
        assert stream(Nelson(), x) == Nelson.scan(x)
        assert stream(WesternElectric(), x) == WesternElectric.scan(x)
        assert stream(Shewhart(limit=2.5), x) == Shewhart.scan(x, limit=2.5)


def test_state_round_trip_mid_stream():
    rng = np.random.default_rng(1)
    x = np.round(rng.normal(0.2, 1.1, 4000) * 4) / 4
    for cls, kw in ((WesternElectric, {}), (Nelson, {}), (Nelson, dict(tests=(3, 4, 8), mixture_both_sides=False)),
                    (Shewhart, dict(limit=2.0))):  # fmt: skip
        for cut in (5, 1001, 2345):
            a = cls(**kw)
            stream(a, x[:cut])
            b = cls.from_state(json.loads(json.dumps(a.export_state())))
            assert stream(a, x[cut:]) == stream(b, x[cut:])
    with pytest.raises(StateError):
        Nelson.from_state({"detector": "nelson", "version": 1, "params": {}, "state": {"t": 1}})


@pytest.mark.parametrize(
    "cls,kw,word",
    [(WesternElectric, dict(rules=(5,)), "rule numbers"), (WesternElectric, dict(rules=()), "rule numbers"),
     (Nelson, dict(tests=(0, 1)), "rule numbers"), (Nelson, dict(tests="x"), "rule numbers"),
     (Nelson, dict(mixture_both_sides="yes"), "mixture_both_sides"), (Shewhart, dict(limit=0), "limit"),
     (Shewhart, dict(limit=-1), "limit")],
)  # fmt: skip
def test_parameter_validation(cls, kw, word):
    with pytest.raises(ValueError, match=word):
        cls(**kw)


def test_rejects_non_finite_values():
    for cls in (Shewhart, WesternElectric, Nelson):
        with pytest.raises(ValueError, match="finite"):
            cls().update(float("nan"))
        with pytest.raises(ValueError, match="finite"):
            cls.scan([1.0, float("-inf")])
