"""Mann-Kendall test, Sen's slope and the rolling Mann-Kendall drift detector.

Sources: Mann (1945); Kendall (1975); Gilbert (1987) Ch. 16 formulas and Table A18 (exact
P(S >= s); our values for n = 4, 5 are recalled as equal to it, from memory); Sen (1968);
a Wisconsin Administrative Code hand-worked example (S = -5); reference library
scipy 1.17.x (``kendalltau``, ``theilslopes``), version pinned below.
"""

import itertools
import json
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from rules.detector import StateError
from rules.registry import DETECTORS
from rules.trend import (
    EXACT_MAX_N,
    MannKendallDetector,
    mann_kendall_s_sf,
    mann_kendall_test,
    sen_slope,
)


def _s_by_pairs(x):
    """Independent S: concordant minus discordant pairs, plain loops."""
    s = 0
    for i in range(len(x)):
        for j in range(i + 1, len(x)):
            s += int(x[j] > x[i]) - int(x[j] < x[i])
    return s


def _s_of_permutations(n):
    p = np.array(list(itertools.permutations(range(n))), dtype=np.int8)
    i, j = np.triu_indices(n, 1)
    return np.sign(p[:, j] - p[:, i]).sum(axis=1)


def _exact_sf_fractions(n):
    """P(S >= s) by the integer Mahonian recursion in exact fractions (independent of the float code)."""
    counts = [1]
    for m in range(2, n + 1):
        new = [0] * (len(counts) + m - 1)
        for k, c in enumerate(counts):
            for j in range(m):
                new[k + j] += c
        counts = new
    total = math.factorial(n)
    npairs = n * (n - 1) // 2
    sf = {}
    for s in range(-npairs, npairs + 1, 2):
        kmax = (npairs - s) // 2
        sf[s] = Fraction(sum(counts[: kmax + 1]), total)
    return sf


# Gilbert (1987) Table A18 / Kendall (1975) exact upper tails; values from check-values.md 6.2
# (EXACT there, recomputed below by enumeration and exact fractions).
TABLE_6_2 = {
    4: {0: 0.6250, 2: 0.3750, 4: 0.1667, 6: 0.0417},
    5: {0: 0.5917, 2: 0.4083, 4: 0.2417, 6: 0.1167, 8: 0.0417, 10: 0.0083},
    6: {1: 0.5000, 3: 0.3597, 5: 0.2347, 7: 0.1361, 9: 0.0681, 11: 0.0278, 13: 0.0083, 15: 0.0014},
    8: {0: 0.5476, 2: 0.4524, 12: 0.0894, 14: 0.0543, 16: 0.0305, 18: 0.0156, 20: 0.0071, 22: 0.0028},
    10: {1: 0.5000, 15: 0.1082, 17: 0.0779, 19: 0.0542, 21: 0.0363, 23: 0.0233, 25: 0.0143, 27: 0.0083, 29: 0.0046},
}


@pytest.mark.parametrize("n", sorted(TABLE_6_2))
def test_exact_table(n):
    exact = _exact_sf_fractions(n)
    for s, p in TABLE_6_2[n].items():
        assert mann_kendall_s_sf(s, n) == pytest.approx(p, abs=5e-5)
        assert mann_kendall_s_sf(s, n) == pytest.approx(float(exact[s]), rel=1e-12)


@pytest.mark.parametrize("n", [4, 5, 6, 8])
def test_exact_distribution_by_enumeration(n):
    s_all = _s_of_permutations(n)
    npairs = n * (n - 1) // 2
    for s in range(-npairs, npairs + 1, 2):
        assert mann_kendall_s_sf(s, n) == pytest.approx(np.mean(s_all >= s), rel=1e-12)


def test_exact_tails_deep_for_largest_exact_n():
    # relative accuracy in the far tail at n = EXACT_MAX_N, against exact fractions
    n = EXACT_MAX_N
    exact = _exact_sf_fractions(n)
    npairs = n * (n - 1) // 2
    for s in (npairs, npairs - 2, npairs - 40, 300, 200, 100, 0):
        assert mann_kendall_s_sf(s, n) == pytest.approx(float(exact[s]), rel=1e-9)


def test_wisconsin_hand_example():
    # Wisconsin Administrative Code hand example (published): 100, 50, 85, 75, 50 gives S = -5.
    # Var, Z, p and Sen's slope: computed (check-values.md 6.3), not published.
    x = [100, 50, 85, 75, 50]
    r = mann_kendall_test(x)
    assert r.s == -5 == _s_by_pairs(x)
    assert r.var_s == pytest.approx(282 / 18)
    assert r.z == pytest.approx(-1.01058, abs=1e-5)
    assert r.pvalue == pytest.approx(0.31222, abs=1e-5)
    assert "normal" in r.method  # ties: no exact distribution
    assert sen_slope(x).slope == pytest.approx(-9.1667, abs=1e-4)


def test_tie_example():
    # check-values.md 6.3 tie example (computed; pymannkendall 1.4.3 agreed there)
    x = [10, 12, 12, 14, 13, 15, 15, 15, 18, 17, 20, 19]
    r = mann_kendall_test(x)
    assert r.s == 56 == _s_by_pairs(x)
    assert r.var_s == pytest.approx(208.0)
    assert r.z == pytest.approx(3.813564, abs=1e-6)
    assert r.pvalue == pytest.approx(1.3698e-4, rel=1e-4)
    assert sen_slope(x).slope == pytest.approx(0.8)


def test_exact_against_normal_example():
    # check-values.md 6.3 (computed): n = 9, S = 18, Var = 92, Z = 1.77237,
    # normal p = 0.07633, exact p = P(|S| >= 18) = 0.07518 (recomputed here by enumerating 9! orders).
    x = [3.1, 2.8, 3.4, 3.0, 4.2, 4.6, 3.9, 4.4, 4.1]
    ex = mann_kendall_test(x)
    no = mann_kendall_test(x, method="normal")
    assert ex.s == 18 and ex.var_s == pytest.approx(92.0) and ex.z == pytest.approx(1.77237, abs=1e-5)
    assert no.pvalue == pytest.approx(0.07633, abs=1e-5)
    s_all = _s_of_permutations(9)
    assert ex.pvalue == pytest.approx(np.mean(np.abs(s_all) >= 18), rel=1e-12)
    assert ex.pvalue == pytest.approx(0.07518, abs=1e-5)
    assert "exact" in ex.method


def test_one_sided_alternatives():
    x = [3.1, 2.8, 3.4, 3.0, 4.2, 4.6, 3.9, 4.4, 4.1]
    up = mann_kendall_test(x, alternative="increasing").pvalue
    dn = mann_kendall_test(x, alternative="decreasing").pvalue
    assert up == pytest.approx(mann_kendall_s_sf(18, 9))
    # P(S >= 18) + P(S <= 18) = 1 + P(S = 18)
    assert up + dn == pytest.approx(1 + mann_kendall_s_sf(18, 9) - mann_kendall_s_sf(20, 9))
    nu = mann_kendall_test(x, alternative="increasing", method="normal")
    assert nu.pvalue == pytest.approx(stats.norm.sf(17 / math.sqrt(92)))


def test_s_against_pair_count_random():
    rng = np.random.default_rng(40)
    for n in (7, 30, 61):
        for x in (rng.normal(size=n), rng.integers(0, 5, size=n).astype(float)):
            assert mann_kendall_test(x).s == _s_by_pairs(list(x))


def _pinned_scipy():
    import scipy

    if not scipy.__version__.startswith("1.17."):
        pytest.skip(f"reference values pinned to scipy 1.17.x, installed {scipy.__version__}")


def test_against_scipy_kendalltau():
    _pinned_scipy()
    rng = np.random.default_rng(41)
    t = np.arange(30)
    for _ in range(5):
        x = rng.normal(size=30) + 0.03 * t
        r = mann_kendall_test(x)  # exact: no ties and n <= 40
        ref = stats.kendalltau(t, x, method="exact")
        assert r.tau == pytest.approx(ref.statistic, rel=1e-12)
        assert r.pvalue == pytest.approx(ref.pvalue, rel=1e-9)
        # scipy's asymptotic p has no continuity correction: compare S / sqrt(Var S)
        asym = stats.kendalltau(t, x, method="asymptotic")
        assert 2 * stats.norm.sf(abs(r.s) / math.sqrt(r.var_s)) == pytest.approx(asym.pvalue, rel=1e-9)
    # ties in x (t distinct): scipy's tau-b variance reduces to the tie-corrected Var(S)
    x = rng.integers(0, 6, size=50).astype(float)
    r = mann_kendall_test(x)
    asym = stats.kendalltau(np.arange(50), x, method="asymptotic")
    assert 2 * stats.norm.sf(abs(r.s) / math.sqrt(r.var_s)) == pytest.approx(asym.pvalue, rel=1e-9)


def test_sen_against_scipy_theilslopes():
    _pinned_scipy()
    rng = np.random.default_rng(42)
    for t in (None, np.sort(rng.uniform(0, 100, size=40))):
        tt = np.arange(40.0) if t is None else t
        x = 3.0 + 0.2 * tt + rng.normal(0, 2.0, size=40)
        x[5] = x[6]  # a tie in x
        ref = stats.theilslopes(x, tt, alpha=0.95)
        r = sen_slope(x, t, ci_rank="round")
        assert r.slope == pytest.approx(ref.slope, rel=1e-12)
        assert r.intercept == pytest.approx(ref.intercept, rel=1e-12)
        assert (r.low, r.high) == pytest.approx((ref.low_slope, ref.high_slope), rel=1e-12)
        ri = sen_slope(x, t)
        # interpolated limits lie within one rank of scipy's rounded ones
        slopes = np.sort([(x[j] - x[i]) / (tt[j] - tt[i]) for i in range(40) for j in range(i + 1, 40)])
        k_lo = np.searchsorted(slopes, ref.low_slope)
        assert slopes[max(k_lo - 1, 0)] <= ri.low <= slopes[min(k_lo + 1, slopes.size - 1)]
        assert ri.low <= ri.slope <= ri.high


def test_sen_interpolation_rule():
    # Gilbert (1987): limits at ranks M1 and M2 + 1 of the ascending slopes; check one by hand.
    x = [10, 12, 12, 14, 13, 15, 15, 15, 18, 17, 20, 19]
    r = sen_slope(x)
    slopes = np.sort([(x[j] - x[i]) / (j - i) for i in range(12) for j in range(i + 1, 12)])
    c = stats.norm.ppf(0.975) * math.sqrt(208.0)
    m1, m2 = (66 - c) / 2, (66 + c) / 2
    lo = slopes[int(m1) - 1] + (m1 - int(m1)) * (slopes[int(m1)] - slopes[int(m1) - 1])
    hi = slopes[int(m2)] + (m2 - int(m2)) * (slopes[int(m2) + 1] - slopes[int(m2)])
    assert (r.low, r.high) == pytest.approx((lo, hi))


def test_bad_input():
    with pytest.raises(ValueError, match="at least 3"):
        mann_kendall_test([1.0, 2.0])
    with pytest.raises(ValueError, match="ties"):
        mann_kendall_test([1.0, 1.0, 2.0], method="exact")
    with pytest.raises(ValueError, match="alternative"):
        mann_kendall_test([1.0, 2.0, 3.0], alternative="up")
    r = mann_kendall_test([4.0] * 10)
    assert r.s == 0 and r.pvalue == 1.0


# -- detector -------------------------------------------------------------------------------------


def _reference_first_signal(x, w, alpha):
    """First window end where the batch test says p <= alpha/2 on either side (no restart needed)."""
    for end in range(w - 1, len(x)):
        win = x[end - w + 1 : end + 1]
        up = mann_kendall_test(win, alternative="increasing").pvalue
        dn = mann_kendall_test(win, alternative="decreasing").pvalue
        if min(up, dn) <= alpha / 2:
            return end, ("up" if up <= alpha / 2 else "down"), min(up, dn)
    return None


@pytest.mark.parametrize("w,seed,slope", [(50, 1, 0.04), (25, 2, 0.08), (40, 3, -0.06)])
def test_golden_index_on_ramp(w, seed, slope):
    # a lathe's pin diameter drifting as the tool wears: 150 steady readings, then a ramp
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 1, 400)
    x[150:] += slope * np.arange(250)
    x = np.round(x, 2)  # gauge resolution 0.01: some ties
    ref = _reference_first_signal(x, w, 0.001)
    assert ref is not None
    det = MannKendallDetector(window=w, alpha=0.001)
    sigs = [s for s in (det.update(v) for v in x) if s is not None]
    first = sigs[0]
    assert (first.index, first.direction) == ref[:2]
    assert first.p_value == pytest.approx(ref[2], rel=1e-12)
    assert first.index > 150  # never before the ramp on these seeds
    assert first.onset_index == first.index - w + 1
    assert first.pattern == "drift" and first.detector == "Mann-Kendall trend test"
    win = x[first.onset_index : first.index + 1]
    assert first.statistic == _s_by_pairs(list(win))
    assert first.detail["slope_per_reading"] == pytest.approx(stats.theilslopes(win).slope)
    assert first.size == pytest.approx(first.detail["slope_per_reading"] * (w - 1))
    # restart: the next signal needs a fresh full window
    assert all(b.index - a.index >= w for a, b in zip(sigs, sigs[1:]))


def test_quiet_on_constant_and_short_streams():
    det = MannKendallDetector(window=20, alpha=0.05)
    assert all(det.update(7.0) is None for _ in range(500))
    det = MannKendallDetector(window=50, alpha=0.4)
    assert all(det.update(float(i)) is None for i in range(49))  # rising, but shorter than the window
    assert det.update(49.0) is not None
    assert MannKendallDetector.scan(np.arange(49.0), window=50) == []


def test_one_sided_direction():
    x = 100.0 - 0.5 * np.arange(200)
    assert MannKendallDetector.scan(x, window=30, direction="up") == []
    down = MannKendallDetector.scan(x, window=30, direction="down")
    assert down and all(s.direction == "down" for s in down)
    assert down[0].index == 29  # a perfect 30-reading fall: exact p = 1/30! at the first full window


def test_exact_p_for_small_window():
    # window <= 40 without ties: the signal's p is the exact tail; a perfect rise of w readings has p = 1/w!
    det = MannKendallDetector(window=12, alpha=0.01)
    sig = [det.update(float(v)) for v in range(12)][-1]
    assert sig is not None and sig.p_value == pytest.approx(1 / math.factorial(12), rel=1e-9)
    assert sig.detail["method"] == "exact"


@settings(max_examples=40, deadline=None)
@given(
    st.lists(st.sampled_from([0.0, 0.5, 1.0, 1.5, 2.0, 3.0]) | st.floats(-3, 3), min_size=40, max_size=200),
    st.integers(4, 30),
    st.sampled_from([0.2, 0.05, 0.001]),
    st.sampled_from(["both", "up", "down"]),
    st.floats(-0.2, 0.2),
    st.booleans(),
)
def test_scan_equals_streaming(values, w, alpha, direction, slope, numpy_kernel):
    # numpy_kernel: the scan's per-lag sums and tie terms (no compiled window) instead
    # of the compiled window pushed along the series
    import rules.trend as tr

    x = np.asarray(values, dtype=float) + slope * np.arange(len(values))
    det = MannKendallDetector(window=w, alpha=alpha, direction=direction)
    stream = [s for s in (det.update(v) for v in x) if s is not None]
    with python_only(tr, "_CKendallWindow", numpy_kernel):
        assert MannKendallDetector.scan(x, window=w, alpha=alpha, direction=direction) == stream


@pytest.mark.parametrize("numpy_kernel", [False, True])
@pytest.mark.parametrize("w,decimals", [(10, 0), (25, 1), (45, 6)])
def test_scan_equals_streaming_long(w, decimals, numpy_kernel):
    # wandering streams (with ties when rounded) that fire many times
    import rules.trend as tr

    rng = np.random.default_rng(w)
    x = np.round(np.cumsum(rng.normal(size=3000)) * 0.1 + rng.normal(size=3000), decimals)
    det = MannKendallDetector(window=w, alpha=0.01)
    stream = [s for s in (det.update(v) for v in x) if s is not None]
    assert len(stream) > 5
    with python_only(tr, "_CKendallWindow", numpy_kernel):
        assert MannKendallDetector.scan(x, window=w, alpha=0.01) == stream


def test_state_round_trip():
    rng = np.random.default_rng(43)
    x = np.round(rng.normal(size=600) + np.r_[np.zeros(300), 0.02 * np.arange(300)], 1)
    full = MannKendallDetector(window=40, alpha=0.01)
    ref = [s for s in (full.update(v) for v in x) if s is not None]
    part = MannKendallDetector(window=40, alpha=0.01)
    got = [s for s in (part.update(v) for v in x[:333]) if s is not None]
    data = json.loads(json.dumps(part.export_state()))
    again = MannKendallDetector.from_state(data)
    assert again.last == part.last and again._win.state() == part._win.state()
    got += [s for s in (again.update(v) for v in x[333:]) if s is not None]
    assert got == ref
    data["detector"] = "cusum"
    with pytest.raises(StateError):
        MannKendallDetector.from_state(data)


def test_registered_and_validated():
    assert DETECTORS["mann_kendall"] is MannKendallDetector
    d = MannKendallDetector()
    assert (d.window, d.alpha, d.direction) == (50, 0.001, "both")
    with pytest.raises(ValueError, match="window"):
        MannKendallDetector(window=3)
    with pytest.raises(ValueError, match="alpha"):
        MannKendallDetector(alpha=0.0)
    with pytest.raises(ValueError, match="direction"):
        MannKendallDetector(direction="sideways")
    with pytest.raises(ValueError, match="finite"):
        d.update(float("nan"))


# -- the compiled window against the pure-Python reference ---------------------------------

from tests.rules.compiled import compiled, needs_compiled, python_only


@needs_compiled
@settings(max_examples=80, deadline=None)
@given(data=st.lists(st.integers(-3, 3), min_size=0, max_size=200), w=st.integers(4, 40), zeros=st.booleans())
def test_compiled_kendall_window_equals_python_window(data, w, zeros):
    """Same S and tie term on every reading, with many ties and signed zeros."""
    from rules.trend import _KendallWindow

    x = np.cumsum(np.array(data, dtype=float)) * 0.5
    if zeros:
        x[::3] = -0.0
    c, py = compiled.KendallWindow(w), _KendallWindow(w)
    for v in x.tolist():
        assert c.push(v) == py.push(v)
        assert c.values() == py.values() and c.state() == py.state()


@needs_compiled
def test_detector_gives_the_same_signals_on_the_python_window(monkeypatch):
    import rules.trend as tr

    rng = np.random.default_rng(8)
    x = np.round(rng.normal(size=5000) + np.r_[np.zeros(2500), np.linspace(0, 2, 2500)], 1)
    det = tr.MannKendallDetector(window=30, alpha=0.01)
    assert isinstance(det._win, compiled.KendallWindow)
    fast = [s for v in x.tolist() if (s := det.update(v)) is not None]
    monkeypatch.setattr(tr, "_CKendallWindow", None)
    slow_det = tr.MannKendallDetector(window=30, alpha=0.01)
    assert isinstance(slow_det._win, tr._KendallWindow)
    assert fast and [s for v in x.tolist() if (s := slow_det.update(v)) is not None] == fast
