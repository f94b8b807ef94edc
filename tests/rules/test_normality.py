"""Anderson-Darling normality test and the Box-Cox helper.

Sources: D'Agostino R.B. & Stephens M.A. (eds.) 1986, *Goodness-of-Fit Techniques*,
Table 4.7 (percentage points of A*, case 3) and Table 4.9 (p-value formulas, case 3);
reference libraries scipy 1.17.x (``scipy.stats.anderson``) and statsmodels 0.15.x
(``statsmodels.stats.diagnostic.normal_ad``), versions pinned below.
"""

import math
import warnings

import numpy as np
import pytest
from scipy import stats

from rules.normality import (
    AD_CRITICAL_POINTS,
    ad_critical_value,
    ad_pvalue,
    anderson_darling_test,
    boxcox_apply,
    boxcox_normalise,
)

# D'Agostino & Stephens 1986, Table 4.7, case 3 (published; corroborated by the table
# scipy 1.17.1 ships after its PR #23974).
TABLE_4_7 = {0.50: 0.341, 0.25: 0.470, 0.15: 0.561, 0.10: 0.631, 0.05: 0.752, 0.025: 0.873, 0.01: 1.035, 0.005: 1.159}


def test_critical_points_are_table_4_7():
    assert AD_CRITICAL_POINTS == TABLE_4_7


@pytest.mark.parametrize("alpha,point", sorted(TABLE_4_7.items()))
def test_table_4_9_formula_reproduces_table_4_7_levels(alpha, point):
    # Two published tables of the same source must agree: the Table 4.9 p-value at each
    # Table 4.7 point is the point's level, to the accuracy of a fitted formula
    # (0.005 absolute, or 5 % relative for the small levels).
    p = ad_pvalue(point)
    assert p == pytest.approx(alpha, abs=0.005, rel=0.05)


# Table 4.9 evaluated at the Table 4.7 points: computed, not published values
# (check-values.md section 8.1, "PF evaluated").
@pytest.mark.parametrize(
    "a_star,p",
    [(0.341, 0.4956), (0.470, 0.2470), (0.561, 0.1470), (0.631, 0.1001),
     (0.752, 0.0503), (0.873, 0.0253), (1.035, 0.0101), (1.159, 0.0050)],
)  # fmt: skip
def test_table_4_9_values_at_points(a_star, p):
    assert ad_pvalue(a_star) == pytest.approx(p, abs=6e-5)


def test_table_4_9_piece_joins():
    # Left and right limits at the joins (computed from the D&S 1986 Table 4.9 formulas,
    # not published values): the pieces do not meet exactly.
    eps = 1e-12
    for join, left, right in [(0.20, 0.88435, 0.88425), (0.34, 0.50152, 0.49823), (0.60, 0.11689, 0.11943)]:
        assert ad_pvalue(join - eps) == pytest.approx(left, abs=1e-5)
        assert ad_pvalue(join) == pytest.approx(right, abs=1e-5)


def test_pvalue_cap_as_statsmodels():
    # statsmodels 0.15.0 normal_ad returns 0.0 above A* = 13; the raw formula would turn upward.
    assert 0 < ad_pvalue(13.0) < 5e-31
    assert ad_pvalue(13.0001) == 0.0
    assert ad_pvalue(40.0) == 0.0
    ps = [ad_pvalue(a) for a in np.linspace(0.6, 13, 200)]
    assert all(b < a for a, b in zip(ps, ps[1:]))  # decreasing over the last piece
    with pytest.raises(ValueError):
        ad_pvalue(-0.1)


@pytest.mark.parametrize(
    "data,a2,a_star,p",
    [
        (np.arange(8), 0.134000, 0.151274, 0.961456),
        ([1.1, 1.2, 1.2, 1.3, 1.4, 1.5, 1.7, 1.9, 2.2, 2.6, 3.1, 3.9, 5.0, 6.8, 9.5], 1.359111, 1.440658, 0.001015),
    ],
)
def test_computed_examples(data, a2, a_star, p):
    # check-values.md section 8.2: formula evaluated, statsmodels 0.15.0 and scipy 1.17.1 agree on A^2
    # (computed, not published values).
    r = anderson_darling_test(data)
    assert r.statistic == pytest.approx(a2, abs=2e-6)
    assert r.adjusted == pytest.approx(a_star, abs=2e-6)
    assert r.pvalue == pytest.approx(p, abs=2e-6)
    assert r.n == len(data)
    assert "Table 4.9" in r.method


def test_statistic_by_direct_formula():
    # Independent computation of A^2 straight from the defining sum with the normal cdf
    # (no log_ndtr), on a sample where that is accurate.
    x = np.random.default_rng(3).normal(5.0, 2.0, size=37)
    w = np.sort((x - x.mean()) / x.std(ddof=1))
    n = x.size
    F = stats.norm.cdf(w)
    i = np.arange(1, n + 1)
    a2 = -n - np.sum((2 * i - 1) * (np.log(F) + np.log(1 - F[::-1]))) / n
    assert anderson_darling_test(x).statistic == pytest.approx(a2, rel=1e-10)


def test_invariant_to_location_and_scale():
    x = np.random.default_rng(4).gamma(2.0, size=50)
    r1, r2 = anderson_darling_test(x), anderson_darling_test(3.0 * x - 7.0)
    assert r1.statistic == pytest.approx(r2.statistic, rel=1e-9)


def test_bad_input():
    with pytest.raises(ValueError, match="at least 3"):
        anderson_darling_test([1.0, 2.0])
    with pytest.raises(ValueError, match="no spread"):
        anderson_darling_test([2.0] * 10)
    with pytest.raises(ValueError, match="NaN"):
        anderson_darling_test([1.0, np.nan, 2.0, 3.0])


def test_level_by_simulation():
    # Monte Carlo (computed): under normality P(p < 0.05) is about 0.05 at n = 20.
    # 4000 samples: SE = sqrt(.05 * .95 / 4000) = 0.0034; tolerance 4 SE.
    rng = np.random.default_rng(20261202)
    rej = sum(anderson_darling_test(rng.normal(size=20)).pvalue < 0.05 for _ in range(4000))
    assert abs(rej / 4000 - 0.05) < 4 * math.sqrt(0.05 * 0.95 / 4000)


# -- reference libraries, pinned ----------------------------------------------------------------


def _pinned(module, prefix):
    if not module.__version__.startswith(prefix):
        pytest.skip(f"reference values pinned to {module.__name__} {prefix}x, installed {module.__version__}")


def test_against_statsmodels_normal_ad():
    sm = pytest.importorskip("statsmodels")
    _pinned(sm, "0.15.")
    from statsmodels.stats.diagnostic import normal_ad

    rng = np.random.default_rng(11)
    for n in (8, 15, 30, 100, 500):
        for x in (rng.normal(size=n), rng.exponential(size=n), rng.uniform(size=n)):
            a2, p = normal_ad(x)
            r = anderson_darling_test(x)
            assert r.statistic == pytest.approx(float(a2), rel=1e-9)
            assert r.pvalue == pytest.approx(float(p), rel=1e-9, abs=1e-300)


def test_against_scipy_anderson():
    # scipy 1.17 (PR #23974, Nov. 2025) switched its critical values to D&S 1986 Table 4.7
    # divided by (1 + 0.75/n + 2.25/n^2); earlier releases used Stephens (1974) points, so pin 1.17.x.
    import scipy

    _pinned(scipy, "1.17.")
    rng = np.random.default_rng(12)
    for n in (8, 20, 60):
        x = rng.normal(size=n)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)  # legacy call still returns critical values in 1.17
            ref = stats.anderson(x, dist="norm")
        r = anderson_darling_test(x)
        assert r.statistic == pytest.approx(float(ref.statistic), rel=1e-9)
        for level, cv in zip(ref.significance_level, ref.critical_values):
            # scipy rounds its critical values to 3 decimals
            assert ad_critical_value(float(level) / 100, n) == pytest.approx(float(cv), abs=6e-4)
    # section 8.2: n = 8 points are 0.497, 0.559, 0.666, 0.773, 0.917 (scipy 1.17.1 output)
    got = [round(ad_critical_value(a, 8), 3) for a in (0.15, 0.10, 0.05, 0.025, 0.01)]
    assert got == [0.497, 0.559, 0.666, 0.773, 0.917]


# -- Box-Cox ----------------------------------------------------------------------------------------


def test_boxcox_restores_normality_on_lognormal():
    x = np.random.default_rng(5).lognormal(mean=2.0, sigma=0.7, size=150)
    r = boxcox_normalise(x)
    assert r.before.pvalue < 0.001  # lognormal is clearly skewed at n = 150
    assert r.normal_after
    assert abs(r.lmbda) < 0.3  # the log (lambda = 0) is the true normalising transform
    # lambda is the maximum-likelihood value of scipy.stats.boxcox
    assert r.lmbda == pytest.approx(stats.boxcox(x)[1], rel=1e-12)


def test_boxcox_apply_matches_definition():
    # Box & Cox 1964: (x^lambda - 1)/lambda, ln x at lambda = 0
    x = np.array([0.5, 1.0, 2.0, 7.5])
    assert np.allclose(boxcox_apply(x, 0.5), (x**0.5 - 1) / 0.5)
    assert np.allclose(boxcox_apply(x, 0.0), np.log(x))
    with pytest.raises(ValueError, match="positive"):
        boxcox_apply([1.0, -1.0], 0.5)
    with pytest.raises(ValueError, match="positive"):
        boxcox_normalise(np.r_[np.ones(10), 0.0])


def test_boxcox_cannot_fix_bimodal():
    rng = np.random.default_rng(6)
    x = np.r_[rng.normal(10, 0.3, 100), rng.normal(14, 0.3, 100)]
    assert not boxcox_normalise(x).normal_after


def test_against_scipy_interpolated_pvalue():
    # scipy 1.17 method='interpolate' interpolates between the Table 4.7 levels and clips to
    # [0.01, 0.15] (check-values.md 8.2 caveat 1).  Inside that range it must agree with the
    # Table 4.9 formula to within the formula's fitting error plus interpolation (0.008, our
    # tolerance); outside, scipy returns the clip value.
    import scipy

    _pinned(scipy, "1.17.")
    rng = np.random.default_rng(13)
    inside = 0
    for _ in range(600):
        x = rng.standard_t(5, size=40)
        ours = anderson_darling_test(x).pvalue
        ref = float(stats.anderson(x, dist="norm", method="interpolate").pvalue)
        if 0.012 < ours < 0.145:
            inside += 1
            assert abs(ref - ours) < 0.008
        elif ours >= 0.16:
            assert ref == 0.15
        elif ours <= 0.0095:
            assert ref == 0.01
    assert inside > 50
