"""Process capability indices and their intervals.

Sources: Kane (1986) JQT 18(1) for the definitions; chi-square interval for Cp; Bissell
(1990) Applied Statistics 39(3) for the Cpk interval (printed form as quoted by Rodriguez
1992, JQT 24(4)).  Worked examples from check-values.md 9.2: the first two rows use the
inputs of Montgomery's (Introduction to SQC, Ch. 8) illustrations as recalled from memory,
whose answers are recalled as 1.57 <= Cp <= 3.01 and 0.88 <= Cpk <= 1.78; the four-decimal
intervals are computed (formula evaluated), not published values.
"""

import math

import numpy as np
import pytest
from scipy import stats

from rules.capability import bissell_cpk_interval, capability, capability_from_summary, cp_interval


def test_cp_interval_montgomery_inputs():
    r = capability_from_summary(50.0, 1.75, 20, lsl=38.0, usl=62.0)
    assert r.cp == pytest.approx(2.2857, abs=5e-5)
    lo, hi = r.cp_interval
    assert (lo, hi) == pytest.approx((1.5649, 3.0056), abs=5e-5)  # computed
    # book answer 1.57 <= Cp <= 3.01 (from memory); it rounds Cp to 2.29 before the interval,
    # hence agreement to 0.01 rather than to the last digit
    assert (lo, hi) == pytest.approx((1.57, 3.01), abs=0.01)
    # the chi-square quantiles behind it (computed, check-values.md 9.2)
    assert stats.chi2.ppf(0.025, 19) == pytest.approx(8.906516, abs=1e-6)
    assert stats.chi2.ppf(0.975, 19) == pytest.approx(32.852327, abs=1e-6)


def test_bissell_interval_rows():
    lo, hi = bissell_cpk_interval(1.33, 20)
    assert (lo, hi) == pytest.approx((0.8826, 1.7774), abs=5e-5)  # computed
    assert (round(lo, 2), round(hi, 2)) == (0.88, 1.78)  # book answer, from memory
    assert bissell_cpk_interval(1.0, 50) == pytest.approx((0.7815, 1.2185), abs=5e-5)
    assert bissell_cpk_interval(1.33, 100) == pytest.approx((1.1336, 1.5264), abs=5e-5)
    # the 2n variant in circulation differs in the 3rd decimal at n = 20 (0.8927-1.7673): we use 2(n-1)
    assert abs(lo - 0.8927) > 0.005


def test_off_centre_exercise():
    # textbook exercise inputs (solution not seen); values computed, check-values.md 9.2
    r = capability_from_summary(97.0, 1.6, 30, lsl=90.0, usl=100.0)
    assert r.cp == pytest.approx(1.0417, abs=5e-5)
    assert r.cpu == pytest.approx(0.6250, abs=5e-5)
    assert r.cpl == pytest.approx(1.4583, abs=5e-5)
    assert r.cpk == pytest.approx(0.6250, abs=5e-5)
    assert r.cpk_interval == pytest.approx((0.4248, 0.8252), abs=5e-5)
    assert r.cpk_lower_bound == pytest.approx(0.4569, abs=5e-5)
    assert r.cp_interval == pytest.approx((0.7749, 1.3080), abs=5e-5)
    # one-sided Cp lower bound with the lower 5 % chi-square point
    assert r.cp_lower_bound == pytest.approx(r.cp * math.sqrt(stats.chi2.ppf(0.05, 29) / 29))
    assert "Bissell" in r.method and "chi-square" in r.method


def test_from_readings_and_one_sided_spec():
    rng = np.random.default_rng(60)
    x = rng.normal(250.0, 1.2, size=60)  # checkweigher, grams; only a lower legal limit
    r = capability(x, lsl=246.0)
    s = x.std(ddof=1)
    assert r.cp is None and r.cpu is None and r.cp_interval is None
    assert r.cpk == pytest.approx((x.mean() - 246.0) / (3 * s))
    assert r.cpk_interval == pytest.approx(bissell_cpk_interval(r.cpk, 60))


def test_cp_interval_coverage_by_simulation():
    # Monte Carlo (computed): the chi-square interval is exact for normal data, coverage 0.95;
    # 3000 samples of 15, SE 0.004; tolerance 4 SE.
    rng = np.random.default_rng(61)
    true_cp = 10.0 / 6.0
    cover = 0
    for _ in range(3000):
        x = rng.normal(0.0, 1.0, size=15)
        lo, hi = cp_interval(10.0 / (6 * x.std(ddof=1)), 15)
        cover += lo <= true_cp <= hi
    assert abs(cover / 3000 - 0.95) < 4 * math.sqrt(0.95 * 0.05 / 3000)


def test_bad_input():
    with pytest.raises(ValueError, match="specification limit"):
        capability_from_summary(1.0, 1.0, 10)
    with pytest.raises(ValueError, match="usl must be above lsl"):
        capability_from_summary(1.0, 1.0, 10, lsl=2.0, usl=1.0)
    with pytest.raises(ValueError, match="no spread"):
        capability([3.0] * 10, lsl=0.0, usl=5.0)
    with pytest.raises(ValueError, match="sd"):
        capability_from_summary(1.0, 0.0, 10, lsl=0.0)
