"""Checks of rules.runs / rules.runs_null against sources outside the project.

Sources named beside each check:
* brute-force enumeration of every arrangement / permutation (done here);
* Swed & Eisenhart (1943), Ann. Math. Statist. 14(1):66-87, and the derived textbook
  "Table A-10 Critical Values for Number of Runs G" (alpha = 0.05; attributed to Triola,
  Elementary Statistics, Pearson 2004 - attribution from memory), as transcribed in
  check-values section 1.3;
* "Table A.18 P(V <= v*) in the Runs Test" (attributed to Walpole, Myers, Myers & Ye -
  attribution from memory), check-values section 1.2;
* OEIS A059427 (after David, Kendall & Barton 1966, Symmetric Function and Allied
  Tables, Table 7.2.1), check-values section 2.2;
* Levene & Wolfowitz (1944), Ann. Math. Statist. 15(1):58-69 (moments of runs up/down);
* statsmodels 0.15.0 ``runstest_1samp`` (general-purpose reference library).
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction
from functools import lru_cache

import numpy as np
import pytest

from rules import runs_null as rn
from rules.runs import (
    longest_median_run_test,
    longest_monotone_run_test,
    median_runs_test,
    updown_runs_test,
)
from rules.runs_stream import _summarise

# ----------------------------------------------------------------------------------
# brute-force helpers (independent of the code under test)
# ----------------------------------------------------------------------------------


@lru_cache(maxsize=None)
def arrangements(n1: int, n2: int) -> np.ndarray:
    """Every arrangement of n1 (+1) and n2 (-1) labels, one per row."""
    n = n1 + n2
    rows = []
    for pos in itertools.combinations(range(n), n1):
        r = [-1] * n
        for p in pos:
            r[p] = 1
        rows.append(r)
    return np.array(rows, dtype=np.int8).reshape(-1, n)


@lru_cache(maxsize=None)
def permutations(n: int) -> np.ndarray:
    """Every permutation of 0..n-1, one per row (built by inserting the largest value)."""
    p = np.zeros((1, 1), dtype=np.int8)
    for m in range(2, n + 1):
        k = p.shape[0]
        out = np.empty((k * m, m), dtype=np.int8)
        for pos in range(m):
            blk = out[pos * k : (pos + 1) * k]
            blk[:, :pos] = p[:, :pos]
            blk[:, pos] = m - 1
            blk[:, pos + 1 :] = p[:, pos:]
        p = out
    return p


def brute_runs(rows: np.ndarray) -> np.ndarray:
    """Number of runs in each row of non-zero labels."""
    if rows.shape[1] == 0:
        return np.zeros(rows.shape[0], dtype=int)
    return 1 + np.count_nonzero(rows[:, 1:] != rows[:, :-1], axis=1)


def brute_longest(rows: np.ndarray, sign: int | None) -> np.ndarray:
    """Longest run of label ``sign`` (or of either label if None) in each row, column by column."""
    best = np.zeros(rows.shape[0], dtype=int)
    cur = np.zeros(rows.shape[0], dtype=int)
    for c in range(rows.shape[1]):
        same = rows[:, c] == rows[:, c - 1] if c else np.zeros(rows.shape[0], bool)
        cur = np.where(same, cur + 1, 1)
        ok = np.ones(rows.shape[0], bool) if sign is None else rows[:, c] == sign
        best = np.maximum(best, np.where(ok, cur, 0))
    return best


def updown_signs(n: int) -> np.ndarray:
    return np.sign(np.diff(permutations(n).astype(np.int16), axis=1)).astype(np.int8)


# ----------------------------------------------------------------------------------
# 1. runs about the median
# ----------------------------------------------------------------------------------


@pytest.mark.parametrize("n_total", range(2, 11))
def test_median_runs_exact_equals_enumeration(n_total):
    # Source: brute-force enumeration of all C(N, n1) arrangements, N <= 10.
    for n1 in range(1, n_total):
        n2 = n_total - n1
        rows = arrangements(n1, n2)
        r = brute_runs(rows)
        pmf, cdf, sf = rn.median_runs_table(n1, n2)
        for k in range(n_total + 1):
            assert abs(pmf[k] - np.mean(r == k)) < 1e-12
            assert abs(cdf[k] - np.mean(r <= k)) < 1e-12
            assert abs(sf[k] - np.mean(r >= k)) < 1e-12
            lo, hi, method = rn.median_runs_tails(n1, n2, k, method="exact")
            assert method == "exact" and abs(lo - np.mean(r <= k)) < 1e-12 and abs(hi - np.mean(r >= k)) < 1e-12


def test_median_runs_test_end_to_end_matches_permutations():
    # Source: enumeration of all 8! orders of a fixed sample of 8 values: the p-value is
    # the fraction of orders at least as extreme.
    x = np.array([3.0, 1.0, 4.0, 1.5, 5.0, 9.0, 2.0, 6.0])
    perms = permutations(8)
    xs = x[perms]
    med = np.median(x)
    lab = np.sign(xs - med).astype(np.int8)
    r = brute_runs(lab)  # no value equals this median (even n, distinct middle values)
    for order in ([0, 1, 2, 3, 4, 5, 6, 7], [1, 0, 6, 3, 2, 4, 7, 5], [0, 3, 6, 1, 2, 4, 5, 7]):
        res = median_runs_test(x[order], method="exact")
        obs = res.statistic
        assert abs(res.pvalue_less - np.mean(r <= obs)) < 1e-12
        assert abs(res.pvalue_greater - np.mean(r >= obs)) < 1e-12
        assert res.pvalue == pytest.approx(min(1.0, 2 * min(np.mean(r <= obs), np.mean(r >= obs))), abs=1e-12)


def test_median_runs_10_10_cdf_by_enumeration():
    # Source: enumeration of all C(20, 10) = 184756 arrangements; check-values section 1.3
    # lists the same cdf (EXACT, computed, not a published value).
    r = brute_runs(arrangements(10, 10))
    _, cdf, _ = rn.median_runs_table(10, 10)
    for k in range(2, 21):
        assert abs(cdf[k] - np.mean(r <= k)) < 1e-12
    assert [round(float(cdf[k]), 5) for k in range(6, 11)] == [0.01852, 0.05126, 0.12764, 0.24221, 0.41407]


@pytest.mark.parametrize("n1,n2", [(5, 5), (10, 10), (7, 12), (20, 20), (3, 14), (40, 11)])
def test_median_runs_moments_exact_fractions(n1, n2):
    # Source: Wald & Wolfowitz (1940) mean and variance, checked in exact rationals
    # against the exact distribution.
    c = rn.median_runs_counts(n1, n2)
    tot = sum(c)
    mean = Fraction(sum(k * v for k, v in enumerate(c)), tot)
    var = Fraction(sum(k * k * v for k, v in enumerate(c)), tot) - mean**2
    n = n1 + n2
    assert mean == 1 + Fraction(2 * n1 * n2, n)
    assert var == Fraction(2 * n1 * n2 * (2 * n1 * n2 - n1 - n2), n * n * (n - 1))
    m, v = rn.median_runs_moments(n1, n2)
    assert m == pytest.approx(float(mean), rel=1e-14) and v == pytest.approx(float(var), rel=1e-14)


def runs_counts_by_dp(n1: int, n2: int) -> list[int]:
    """Arrangements of n1 A's and n2 B's by number of runs, by dynamic programming over
    (A's used, B's used, last symbol); independent of the closed formula under test."""
    n = n1 + n2
    f = {}
    if n1:
        f[(1, 0, 0)] = {1: 1}
    if n2:
        f[(0, 1, 1)] = {1: 1}
    for total in range(1, n):
        for i in range(max(0, total - n2), min(n1, total) + 1):
            j = total - i
            for last in (0, 1):
                cur = f.get((i, j, last))
                if not cur:
                    continue
                for sym, (ni, nj) in ((0, (i + 1, j)), (1, (i, j + 1))):
                    if ni > n1 or nj > n2:
                        continue
                    dst = f.setdefault((ni, nj, sym), {})
                    for r, c in cur.items():
                        r2 = r + (sym != last)
                        dst[r2] = dst.get(r2, 0) + c
    out = [0] * (n + 1)
    for last in (0, 1):
        for r, c in f.get((n1, n2, last), {}).items():
            out[r] += c
    return out


def critical_by_fractions(counts: list[int], alpha: Fraction) -> tuple[int, int]:
    """(largest r with P(R <= r) <= alpha, smallest r with P(R >= r) <= alpha), exactly."""
    tot = sum(counts)
    cum = list(itertools.accumulate(counts))
    lo = max((r for r in range(len(counts)) if Fraction(cum[r], tot) <= alpha), default=-1)
    hi = min((r for r in range(len(counts)) if Fraction(tot - (cum[r - 1] if r else 0), tot) <= alpha),
             default=len(counts))  # fmt: skip
    return lo, hi


# Two-sided alpha = 0.05 (0.025 per tail) critical values, (n1, n2): (r_lo, r_hi).
CRITICAL_0025 = {
    # Swed & Eisenhart (1943) / textbook Table A-10 (alpha = 0.05).  n1 = n2 = 5..10 are the
    # classic table's diagonal, recalled from memory; check-values 1.3 reports that every
    # transcribed Table A-10 cell (n1 <= 10, n2 <= 20) except (3, 14) equals the exact value,
    # which covers these and (10, 15), (10, 20).
    (5, 5): (2, 10),
    (6, 6): (3, 11),
    (7, 7): (3, 13),
    (8, 8): (4, 14),
    (9, 9): (5, 15),
    (10, 10): (6, 16),
    (10, 15): (7, 18),
    (10, 20): (9, 20),
    # n1 = n2 = 20: Swed & Eisenhart (1943) / Siegel (1956) Table F, from memory (check-values
    # 1.3, MEM-h); recomputed here in exact fractions.
    (20, 20): (14, 28),
    # computed, not a published value (check-values 1.3 EXACT); recomputed here:
    (12, 12): (7, 19),
    (15, 15): (10, 22),
    (15, 20): (12, 25),
}


@pytest.mark.parametrize("pair,expected", sorted(CRITICAL_0025.items()))
def test_median_runs_critical_values_published(pair, expected):
    dp = runs_counts_by_dp(*pair)
    assert tuple(dp) == rn.median_runs_counts(*pair)  # closed formula == independent count
    assert critical_by_fractions(dp, Fraction(1, 40)) == expected
    assert rn.median_runs_critical(*pair, 0.025) == expected
    assert rn.median_runs_critical(pair[1], pair[0], 0.025) == expected  # symmetric in n1, n2


def test_median_runs_critical_other_levels():
    # Computed, not a published value (check-values 1.3, EXACT); recomputed here in exact
    # fractions from the independent count.
    for pair, alpha, expected in [((10, 10), 0.005, (5, 17)), ((20, 20), 0.05, (15, 27)),
                                  ((20, 20), 0.005, (12, 30))]:  # fmt: skip
        assert critical_by_fractions(runs_counts_by_dp(*pair), Fraction(alpha)) == expected
        assert rn.median_runs_critical(*pair, alpha) == expected
    dp = runs_counts_by_dp(20, 20)
    assert Fraction(sum(dp[:15]), sum(dp)) == Fraction(416861, 22951470)
    _, cdf, _ = rn.median_runs_table(20, 20)
    assert float(cdf[14]) == 416861 / 22951470


def test_boundary_convention_equal_to_alpha_is_significant():
    # (n1, n2) = (3, 14): P(R <= 3) = 1/40 exactly. Table A-10 prints 2 (it requires a tail
    # strictly below alpha); linewatch treats p == alpha as significant and gives 3.
    c = rn.median_runs_counts(3, 14)
    assert Fraction(sum(c[:4]), sum(c)) == Fraction(1, 40)
    assert rn.median_runs_critical(3, 14, 0.025)[0] == 3
    lo, _, _ = rn.median_runs_tails(3, 14, 3, method="exact")
    assert lo == 0.025  # the float is exactly the correctly rounded 1/40
    assert rn.median_runs_critical(3, 14, 0.0249)[0] == 2  # just below: the table's value
    # and the same rule for runs up and down: n = 7, P(R <= 2) = 126/5040 = 0.025 exactly
    assert Fraction(sum(rn.updown_counts(7)[:3]), math.factorial(7)) == Fraction(1, 40)
    assert rn.updown_critical(7, 0.025)[0] == 2


# Table A.18 (check-values 1.2): P(V <= v*) for v* = 2, 3, ...
TABLE_A18 = {
    (2, 3): [0.200, 0.500, 0.900, 1.000],
    (3, 7): [0.017, 0.083, 0.283, 0.583, 0.833, 1.000],
    (4, 6): [0.010, 0.048, 0.190, 0.405, 0.690, 0.881, 0.976, 1.000],
    (4, 10): [0.002, 0.014, 0.068, 0.203, 0.419, 0.706, 0.874, 1.000],
    (5, 5): [0.008, 0.040, 0.167, 0.357, 0.643, 0.833, 0.960, 0.992, 1.000],
    (5, 8): [0.002, 0.010, 0.054, 0.152, 0.347, 0.576, 0.793, 0.929, 0.984],
    (6, 6): [0.002, 0.013, 0.067, 0.175, 0.392, 0.608, 0.825, 0.933, 0.987],
    (7, 7): [0.001, 0.004, 0.025, 0.078, 0.209, 0.383, 0.617, 0.791, 0.922],
    (6, 10): [0.000, 0.002, 0.013, 0.047, 0.137, 0.288, 0.497, 0.706, 0.864],
}


@pytest.mark.parametrize("pair,printed", sorted(TABLE_A18.items()))
def test_median_runs_cumulative_table_a18(pair, printed):
    _, cdf, _ = rn.median_runs_table(*pair)
    for v, p in enumerate(printed, start=2):
        if pair == (6, 10) and v == 7:
            # printed .288; the exact value is 287/1001 = 0.28671 (a rounding slip in the print)
            c = rn.median_runs_counts(6, 10)
            assert Fraction(sum(c[: v + 1]), sum(c)) == Fraction(287, 1001)
            continue
        assert round(float(cdf[v]), 3) == pytest.approx(p, abs=1e-9), (pair, v)


def test_median_runs_worked_cases_from_check_values():
    # Inputs of check-values 1.4: counts and runs by hand; exact two-sided p-values there are
    # computed, not published values; case B also as an exact fraction 2 * 2 / C(20, 10).
    a = median_runs_test([5, 3, 8, 9, 1, 2, 7, 6, 4, 10, 12, 11])
    assert (a.n_above, a.n_below, a.statistic) == (6, 6, 6)
    assert a.pvalue == pytest.approx(0.783550, abs=1e-6)
    b = median_runs_test(list(range(1, 21)))
    assert (b.statistic, b.pvalue) == (2, pytest.approx(4 / math.comb(20, 10), rel=1e-12))
    c = median_runs_test([1, 9, 2, 8, 3, 7, 4, 6, 5, 10, 0, 11, -1, 12, -2, 13])
    assert (c.statistic, c.pattern) == (16, "mixture") and c.pvalue == pytest.approx(0.000311, abs=1e-6)
    d = median_runs_test([10.2, 9.8, 10.5, 10.1, 9.7, 10.4, 10.6, 9.9, 10.0, 10.3, 9.6, 10.8, 10.7,
                          9.5, 10.9, 9.4, 11.0, 9.3, 10.05, 9.95])  # fmt: skip
    assert (d.n_above, d.n_below, d.statistic) == (10, 10, 14)
    assert d.pvalue == pytest.approx(0.255277, abs=1e-6)


def test_median_runs_ties_dropped_and_degenerate():
    res = median_runs_test([1, 2, 2, 2, 3])  # median 2: three readings dropped
    assert (res.n_dropped, res.n_above, res.n_below, res.statistic) == (3, 1, 1, 2)
    const = median_runs_test([4.0] * 12)
    assert const.pvalue == 1.0 and const.n_dropped == 12


def test_auto_switches_to_normal_beyond_threshold():
    rng = np.random.default_rng(3)
    small = median_runs_test(rng.normal(size=400))
    big = median_runs_test(rng.normal(size=402))
    assert small.method == "exact" and big.method == "asymptotic"
    assert median_runs_test(rng.normal(size=30), method="asymptotic").method == "asymptotic"


# ----------------------------------------------------------------------------------
# statsmodels runstest_1samp (asymptotic statistic)
# ----------------------------------------------------------------------------------


def _statsmodels_runstest():
    sm = pytest.importorskip("statsmodels")
    if sm.__version__ != "0.15.0":
        pytest.skip(f"values pinned to statsmodels 0.15.0, found {sm.__version__}")
    from statsmodels.sandbox.stats.runs import runstest_1samp

    return runstest_1samp


def test_asymptotic_matches_statsmodels_on_tie_free_inputs():
    # statsmodels codes x >= cutoff as "above" (readings equal to the median go above);
    # linewatch drops them.  With an even number of distinct values no reading equals
    # the median, so both count the same runs.  correction=False on both sides because
    # statsmodels' continuity correction flips the sign of z when -0.5 < R - E < 0
    # (see test_statsmodels_correction_quirk_not_copied).
    runstest_1samp = _statsmodels_runstest()
    rng = np.random.default_rng(20261202)
    for n in (20, 36, 50, 120, 300):
        for _ in range(5):
            x = rng.normal(size=n)
            z_ref, p_ref = runstest_1samp(x, cutoff="median", correction=False)
            res = median_runs_test(x, method="asymptotic", correction=False)
            assert res.zscore == pytest.approx(z_ref, rel=1e-10, abs=1e-12)
            assert res.pvalue == pytest.approx(p_ref, rel=1e-9)


def test_statsmodels_fixed_cases_check_values_1_4():
    # [LIB statsmodels 0.15.0] values recorded in check-values 1.4 (cutoff='median', correction=False).
    _statsmodels_runstest()
    a = median_runs_test([5, 3, 8, 9, 1, 2, 7, 6, 4, 10, 12, 11], method="asymptotic", correction=False)
    assert a.zscore == pytest.approx(-0.6055300708194983, rel=1e-12)
    assert a.pvalue == pytest.approx(0.5448268505172666, rel=1e-12)
    b = median_runs_test(list(range(1, 21)), method="asymptotic", correction=False)
    assert b.zscore == pytest.approx(-4.135214625627066, rel=1e-12)


def test_statsmodels_correction_quirk_not_copied():
    # check-values 1.4: indicator 11001100110 (n1=6, n2=5, R=6, E=6.4545): statsmodels'
    # corrected z is +0.029161 (sign flipped).  linewatch keeps z = (R - E)/sd negative and
    # applies the 0.5 correction to each tail separately, towards the mean.
    runstest_1samp = _statsmodels_runstest()
    ind = [1, 1, 0, 0, 1, 1, 0, 0, 1, 1, 0]
    z_sm, _ = runstest_1samp(np.array(ind, float), cutoff=0.5, correction=True)
    assert z_sm == pytest.approx(0.029161, abs=1e-6)
    mean, var = rn.median_runs_moments(6, 5)
    assert (6 - mean) / math.sqrt(var) == pytest.approx(-0.291606, abs=1e-6)  # uncorrected, negative
    lo, hi, method = rn.median_runs_tails(6, 5, 6, method="asymptotic")
    assert method == "asymptotic" and lo > 0.5 and hi > 0.5  # both tails contain the centre
    assert lo == pytest.approx(0.5 * math.erfc(-(6.5 - mean) / math.sqrt(2 * var)), rel=1e-12)


# ----------------------------------------------------------------------------------
# 2. runs up and down
# ----------------------------------------------------------------------------------

# OEIS A059427 (David, Kendall & Barton 1966, Table 7.2.1, doubled); check-values 2.2.
A059427 = {
    6: [2, 60, 236, 300, 122],
    7: [2, 124, 836, 1852, 1682, 544],
    8: [2, 252, 2766, 9576, 14622, 10332, 2770],
    9: [2, 508, 8814, 45096, 103326, 119964, 69298, 15872],
    10: [2, 1020, 27472, 201060, 650892, 1106820, 1034992, 505500, 101042],
    11: [2, 2044, 84472, 866324, 3821412, 8948004, 12062152, 9434444, 3990362, 707584],
    12: [2, 4092, 257522, 3650592, 21431012, 66528792, 121438132, 135391872, 90968602, 33925452, 5405530],
}


@pytest.mark.parametrize("n", sorted(A059427))
def test_updown_counts_published(n):
    assert list(rn.updown_counts(n)[1:]) == A059427[n]
    assert sum(rn.updown_counts(n)) == math.factorial(n)


@pytest.mark.parametrize("n", range(3, 13))
def test_updown_counts_satisfy_andre_recursion(n):
    # André (1884): N(n,k) = k N(n-1,k) + 2 N(n-1,k-1) + (n-k) N(n-1,k-2)
    prev, row = rn.updown_counts(n - 1), rn.updown_counts(n)
    at = lambda r, k: r[k] if 1 <= k < len(r) else 0  # noqa: E731
    for k in range(1, n):
        assert row[k] == k * at(prev, k) + 2 * at(prev, k - 1) + (n - k) * at(prev, k - 2)


@pytest.mark.parametrize("n", range(2, 11))
def test_updown_exact_equals_enumeration(n):
    # Source: enumeration of all n! permutations, n <= 10.
    r = brute_runs(updown_signs(n))
    counts = np.bincount(r, minlength=n)
    assert list(counts) == list(rn.updown_counts(n))
    pmf, cdf, sf = rn.updown_table(n)
    for k in range(n):
        assert abs(cdf[k] - np.mean(r <= k)) < 1e-12 and abs(sf[k] - np.mean(r >= k)) < 1e-12


@pytest.mark.parametrize("n", [5, 10, 12, 20, 30, 61])
def test_updown_moments_exact_fractions(n):
    # Levene & Wolfowitz (1944): E R = (2n - 1)/3, Var R = (16n - 29)/90, exactly.
    c = rn.updown_counts(n)
    tot = math.factorial(n)
    mean = Fraction(sum(k * v for k, v in enumerate(c)), tot)
    var = Fraction(sum(k * k * v for k, v in enumerate(c)), tot) - mean**2
    assert mean == Fraction(2 * n - 1, 3)
    assert var == Fraction(16 * n - 29, 90)


def test_updown_tails_and_critical_values():
    # Computed, not a published value (check-values 2.3, EXACT; Edgington 1961 tabulates the
    # same quantity, not compared with the print).  n <= 10 also checked by enumeration above.
    assert rn.updown_tails(10, 3)[0] == pytest.approx(0.007852, abs=1e-6)
    assert rn.updown_tails(12, 11)[1] == pytest.approx(0.011285, abs=1e-6)
    assert rn.updown_tails(9, 8)[1] == pytest.approx(0.043739, abs=1e-6)
    for n, lo, hi in [(11, 4, 10), (12, 4, 11), (15, 6, 14), (20, 8, 17), (25, 11, 21), (30, 14, 25)]:
        assert rn.updown_critical(n, 0.025) == (lo, hi)
    assert rn.updown_critical(10, 0.025) == (3, 10)  # upper "-" : 10 runs impossible with 10 values
    assert rn.updown_critical(20, 0.05) == (9, 17)


def test_updown_runs_test_ties_merge_readings():
    # 1 2 2 3 2: differences + 0 + -: the zero is dropped -> + + - : 2 runs, n = 4
    res = updown_runs_test([1, 2, 2, 3, 2])
    assert (res.statistic, res.n_dropped, res.n_above, res.n_below) == (2, 1, 2, 1)
    assert res.pvalue_less == pytest.approx(sum(rn.updown_counts(4)[:3]) / 24, rel=1e-12)
    assert res.expected == pytest.approx(7 / 3)


def test_updown_runs_test_end_to_end_matches_permutations():
    # Source: enumeration of all 9! orders.
    r = brute_runs(updown_signs(9))
    x = np.array([0.2, 1.4, 0.9, 1.1, 2.5, 3.0, 1.7, 2.2, 4.0])
    res = updown_runs_test(x, method="exact")
    assert res.pvalue_less == pytest.approx(np.mean(r <= res.statistic), abs=1e-12)
    assert res.pvalue_greater == pytest.approx(np.mean(r >= res.statistic), abs=1e-12)


# ----------------------------------------------------------------------------------
# 3. longest runs
# ----------------------------------------------------------------------------------


@pytest.mark.parametrize("n_total", range(2, 11))
def test_longest_median_run_equals_enumeration(n_total):
    # Source: enumeration of all arrangements, N <= 10.
    for n1 in range(0, n_total + 1):
        n2 = n_total - n1
        rows = arrangements(n1, n2)
        up = brute_longest(rows, 1)
        for length in range(0, n1 + 2):
            assert abs(rn.longest_median_run_sf(n1, n2, length) - np.mean(up >= length)) < 1e-12


@pytest.mark.parametrize("n", range(2, 11))
def test_longest_monotone_run_equals_enumeration(n):
    # Source: enumeration of all n! permutations, n <= 10 (run length in readings = run of
    # equal-sign differences + 1).
    longest = brute_longest(updown_signs(n), None) + 1
    for length in range(1, n + 2):
        assert abs(rn.longest_monotone_run_sf(n, length) - np.mean(longest >= length)) < 1e-12


def test_longest_monotone_closed_forms():
    # P(all n readings monotone) = 2/n!; computed in exact arithmetic.
    for n in (5, 8, 12):
        assert rn.longest_monotone_run_sf(n, n) == pytest.approx(2 / math.factorial(n), rel=1e-10)


def test_longest_median_run_test_fields():
    x = [1, 2, 1.5, 0.5, 9, 8, 7, 9.5, 8.5, 0.2]  # median 4.75: five above in a row
    res = longest_median_run_test(x, side="above")
    assert (res.statistic, res.direction, res.onset, res.pattern) == (5, "up", 4, "shift")
    assert res.pvalue == pytest.approx(6 / 252, rel=1e-12)  # (n2 + 1)/C(10, 5)
    both = longest_median_run_test(x)
    assert both.pvalue == pytest.approx(12 / 252, rel=1e-12)
    down = longest_median_run_test(x, side="below")
    assert (down.direction, down.statistic, down.onset) == ("down", 4, 0)
    # exact moments by enumeration (computed, not a published value)
    up = brute_longest(arrangements(5, 5), 1)
    assert res.expected == pytest.approx(up.mean(), rel=1e-12)
    assert res.variance == pytest.approx(up.var(), rel=1e-10)


def test_longest_monotone_run_test_fields():
    res = longest_monotone_run_test([0.3, 0.1, 0.4, 0.5, 0.7, 0.9, 1.2, 0.8, 0.6, 1.0])
    assert (res.statistic, res.direction, res.onset, res.n_above, res.n_below) == (6, "up", 1, 6, 3)
    longest = brute_longest(updown_signs(10), None) + 1
    assert res.pvalue == pytest.approx(np.mean(longest >= 6), abs=1e-12)
    assert res.expected == pytest.approx(longest.mean(), rel=1e-10)
    # ties merge: 1 2 2 3 4 is one increasing run of 4 distinct readings
    tie = longest_monotone_run_test([1, 2, 2, 3, 4])
    assert (tie.statistic, tie.n_dropped) == (4, 1)
    assert tie.pvalue == pytest.approx(2 / 24, rel=1e-12)


# ----------------------------------------------------------------------------------
# size under the null: never liberal
# ----------------------------------------------------------------------------------

N_SIM = 20_000
LIMIT = 0.05 + 3 * math.sqrt(0.05 * 0.95 / N_SIM)  # alpha + 3 Monte Carlo standard errors


def _rows_pvalue(keys: np.ndarray, fn) -> np.ndarray:
    """p-value per row, computed once per distinct key row."""
    uniq, inv = np.unique(keys, axis=0, return_inverse=True)
    vals = np.array([fn(*map(int, u)) for u in uniq])
    return vals[inv.ravel()]


def _median_summary(x: np.ndarray):
    lab = np.sign(x - np.median(x, axis=1, keepdims=True)).astype(np.int8)
    return _summarise(lab)


def _diff_summary(x: np.ndarray):
    return _summarise(np.sign(np.diff(x, axis=1)).astype(np.int8))


def _two_sided(lo_hi):
    return min(1.0, 2 * min(lo_hi[0], lo_hi[1]))


@pytest.mark.parametrize("w", [12, 25, 60])
def test_null_rejection_rate_not_liberal(w):
    # Monte Carlo: 20 000 iid N(0,1) windows; rate <= 0.05 + 3 SE for every method.
    rng = np.random.default_rng(1000 + w)
    x = rng.normal(size=(N_SIM, w))
    n_pos, n_neg, runs, top_pos, top_neg = _median_summary(x)
    keys = np.stack([n_pos, n_neg, runs], axis=1)
    for method in ("exact", "asymptotic"):
        p = _rows_pvalue(keys, lambda a, b, r: _two_sided(rn.median_runs_tails(a, b, r, method)))
        assert np.mean(p <= 0.05) <= LIMIT, ("median runs", method, w, np.mean(p <= 0.05))
    p_up = _rows_pvalue(np.stack([n_pos, n_neg, top_pos], 1), rn.longest_median_run_sf)
    p_dn = _rows_pvalue(np.stack([n_neg, n_pos, top_neg], 1), rn.longest_median_run_sf)
    assert np.mean(np.minimum(1, 2 * np.minimum(p_up, p_dn)) <= 0.05) <= LIMIT

    d_pos, d_neg, d_runs, d_top_pos, d_top_neg = _diff_summary(x)
    n = d_pos + d_neg + 1
    for method in ("exact", "asymptotic"):
        p = _rows_pvalue(np.stack([n, d_runs], 1), lambda m, r: _two_sided(rn.updown_tails(m, r, method)))
        assert np.mean(p <= 0.05) <= LIMIT, ("updown", method, w, np.mean(p <= 0.05))
    top = np.maximum(d_top_pos, d_top_neg) + 1
    p = _rows_pvalue(np.stack([n, top], 1), rn.longest_monotone_run_sf)
    assert np.mean(p <= 0.05) <= LIMIT
    # and the exact tests are not absurdly conservative here (power is kept): the rate is
    # within 3 SE of the exact size of the test, computed from the null distribution
    c_lo, c_hi = rn.median_runs_critical(w // 2, w - w // 2, 0.025)
    if w % 2 == 0:
        _, cdf, sf = rn.median_runs_table(w // 2, w // 2)
        size = cdf[c_lo] + sf[c_hi]
        rate = np.mean((runs <= c_lo) | (runs >= c_hi))
        assert abs(rate - size) <= 3 * math.sqrt(size * (1 - size) / N_SIM)


# ----------------------------------------------------------------------------------
# validation
# ----------------------------------------------------------------------------------


def test_invalid_arguments_raise():
    with pytest.raises(ValueError, match="alternative"):
        median_runs_test([1, 2, 3], alternative="both")
    with pytest.raises(ValueError, match="method"):
        updown_runs_test([1, 2, 3], method="fast")
    with pytest.raises(ValueError, match="side"):
        longest_median_run_test([1, 2, 3], side="up")
    with pytest.raises(ValueError, match="NaN"):
        median_runs_test([1.0, float("nan"), 2.0])
    with pytest.raises(ValueError, match="one-dimensional"):
        longest_monotone_run_test([[1, 2], [3, 4]])
    for crit in (lambda a: rn.median_runs_critical(5, 5, a), lambda a: rn.updown_critical(9, a),
                 lambda a: rn.longest_median_run_critical(5, 5, a), lambda a: rn.longest_monotone_run_critical(9, a)):
        with pytest.raises(ValueError, match="alpha"):
            crit(0.7)
    with pytest.raises(ValueError, match="exact only"):
        longest_median_run_test(np.arange(2 * rn.LONGEST_MEDIAN_MAX_COUNT + 2.0))
    with pytest.raises(ValueError, match="exact only"):
        longest_monotone_run_test(np.arange(rn.LONGEST_MONOTONE_MAX_N + 1.0))


def test_docstring_examples_run():
    import doctest

    import rules.runs
    import rules.runs_null

    for mod in (rules.runs, rules.runs_null):
        res = doctest.testmod(mod)
        assert res.failed == 0 and res.attempted >= 5
