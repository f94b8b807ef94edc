"""Subgroup means, ranges and R-bar/d2 sigma.

d2 table: ASTM STP 15D (1976) / Montgomery, *Introduction to Statistical Quality Control*,
Appendix VI, quoted from memory; every entry is recomputed here by numerical integration
of d2(n) = integral [1 - Phi(w)^n - (1 - Phi(w))^n] dw (Tippett 1925), which is the check.
"""

import numpy as np
import pytest
from scipy import integrate, stats

from rules.subgroups import D2, consecutive_subgroups, d2, summarise_subgroups


def _d2_integral(n: int) -> float:
    f = lambda w: 1.0 - stats.norm.cdf(w) ** n - stats.norm.sf(w) ** n  # noqa: E731
    # beyond |w| = 12 the integrand is below n * 1e-32, so a finite range loses nothing
    val, err = integrate.quad(f, -12.0, 12.0, epsabs=1e-12, limit=200)
    assert err < 1e-7
    return val


@pytest.mark.parametrize("n", sorted(D2))
def test_d2_table_matches_integral(n):
    # computed value rounds to the tabled 3 decimals
    assert abs(D2[n] - _d2_integral(n)) <= 5e-4 + 1e-9


def test_d2_two_closed_form():
    # E|X1 - X2| for two N(0,1) readings = 2/sqrt(pi) (exact)
    assert _d2_integral(2) == pytest.approx(2 / np.sqrt(np.pi), rel=1e-9)
    assert D2[2] == pytest.approx(2 / np.sqrt(np.pi), abs=5e-4)


def test_d2_by_simulation():
    # Monte Carlo (computed): mean range of 5 N(0,1) readings; 40000 subgroups, SE ~ 0.0043.
    r = np.ptp(np.random.default_rng(8).normal(size=(40000, 5)), axis=1)
    assert abs(r.mean() - d2(5)) < 4 * r.std() / np.sqrt(r.size)


def test_summary_against_independent_computation():
    rng = np.random.default_rng(9)
    g = rng.normal(20.0, 0.4, size=(25, 4))
    s = summarise_subgroups(g)
    means = g.mean(axis=1)
    ranges = g.max(axis=1) - g.min(axis=1)
    assert np.allclose(s.means, means) and np.allclose(s.ranges, ranges)
    assert s.r_bar == pytest.approx(ranges.mean())
    assert s.sigma == pytest.approx(ranges.mean() / 2.059)
    assert s.sigma_of_means == pytest.approx(s.sigma / 2.0)
    assert s.grand_mean == pytest.approx(g.mean())
    assert s.n_subgroups == 25
    assert "d2(4)" in s.method


def test_sigma_is_unbiased_by_simulation():
    # R-bar/d2 estimates sigma without bias (Monte Carlo, computed): 2000 studies of 25
    # subgroups of 5 with sigma = 2; tolerance 4 Monte Carlo standard errors of the mean.
    rng = np.random.default_rng(10)
    est = np.array([summarise_subgroups(rng.normal(0, 2.0, size=(25, 5))).sigma for _ in range(2000)])
    assert abs(est.mean() - 2.0) < 4 * est.std(ddof=1) / np.sqrt(est.size)


def test_unequal_sizes():
    groups = [[1.0, 2.0], [1.0, 2.0, 4.0], [3.0, 3.5, 2.5, 3.0]]
    s = summarise_subgroups(groups)
    assert s.sigma == pytest.approx(np.mean([1 / 1.128, 3 / 1.693, 1 / 2.059]))
    assert s.sigma_of_means is None
    assert s.grand_mean == pytest.approx(np.mean(sum(groups, [])))


def test_consecutive_and_validation():
    assert consecutive_subgroups(np.arange(7.0), 3).tolist() == [[0, 1, 2], [3, 4, 5]]
    with pytest.raises(ValueError, match="2 to 25"):
        d2(1)
    with pytest.raises(ValueError, match="2 to 25"):
        d2(26)
    with pytest.raises(ValueError, match="sizes 2 to 25"):
        summarise_subgroups([[1.0]])
    with pytest.raises(ValueError, match="NaN"):
        summarise_subgroups([[1.0, np.nan]])
    with pytest.raises(ValueError, match="no subgroups"):
        summarise_subgroups([])
