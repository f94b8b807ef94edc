"""Exact null distributions of run statistics, built once and cached.

Everything here is a pure function of small integers (counts, lengths, an
alpha) and is memoised at module level, so every detector instance and every
array test shares the same tables.

Counting is done in Python integers (no overflow at any size) and a tail
probability is formed as one integer divided by another, which Python rounds
correctly; only the longest monotone run uses floating point (a dynamic
programme over probabilities, error about 1e-15 absolute).

Contents
--------
* runs about the median, given n1 values above and n2 below
  (Wald & Wolfowitz 1940; Swed & Eisenhart 1943):
  :func:`median_runs_counts`, :func:`median_runs_table`,
  :func:`median_runs_critical`;
* runs up and down among n values (André 1884; Levene & Wolfowitz 1944;
  Edgington 1961): :func:`updown_counts`, :func:`updown_table`,
  :func:`updown_critical`;
* the longest run on one side of the median given n1, n2:
  :func:`longest_median_run_sf`, :func:`longest_median_run_critical`;
* the longest monotone run among n iid continuous values:
  :func:`longest_monotone_run_sf`, :func:`longest_monotone_run_critical`.

Critical values follow one convention everywhere: a tail probability *equal*
to alpha is significant (reject when p <= alpha).  This keeps the test's size
at most alpha (for a discrete statistic P(p <= alpha) <= alpha) and is the
usual "reject if p <= alpha" rule.  Some printed tables use "< alpha"; the two
differ only where a tail probability hits alpha exactly, e.g. runs about the
median with (n1, n2) = (3, 14), where P(R <= 3) = 1/40 = 0.025 exactly: here
the lower critical value at alpha = 0.025 is 3, a table using "<" prints 2.
"""

from __future__ import annotations

import math
from functools import lru_cache
from math import comb

import numpy as np
from scipy.special import ndtr

# Exact null distributions are used up to these sizes, normal approximation (with the
# 0.5 continuity correction) beyond (method="auto").  Justification, measured by
# bench/bench_runs.py: a table costs about 1 ms (runs about the median, n1 = n2 = 200)
# and 20-40 ms (André recursion to n = 300), once per size; the normal approximation of a
# one-sided tail near 0.001 is off by 22 % at n1 = n2 = 25 and 9 % at 50, still 2 % at
# 200; for runs up and down its upper tail is off by 140 % at n = 25, 28 % at 100 and
# 11 % at 300.  So every window a detector is likely to use gets exact tails, and the
# approximation is left to long arrays where its error is small.
MEDIAN_EXACT_MAX_COUNT = 200
UPDOWN_EXACT_MAX_N = 300
# The longest-run tails are exact only (no approximation is implemented); their cost
# grows about as n^2 big-integer operations (median) or n^2 * L float operations
# (monotone): 1.4 s at n1 = n2 = 1000 and 3 s at n = 5000 for a critical value, so
# inputs beyond these sizes are refused rather than left to run for minutes.
LONGEST_MEDIAN_MAX_COUNT = 1000
LONGEST_MONOTONE_MAX_N = 5000


def _check_alpha(alpha: float) -> float:
    a = float(alpha)
    if not (0.0 < a < 0.5):
        raise ValueError(f"alpha must be between 0 and 0.5 (exclusive), got {alpha!r}")
    return a


def _tails_from_counts(counts: list[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """pmf[r], cdf[r] = P(R <= r) and sf[r] = P(R >= r) for r = 0..len-1, from exact counts."""
    total = sum(counts)
    pmf = np.array([c / total for c in counts])
    cdf = np.empty(len(counts))
    sf = np.empty(len(counts) + 1)
    run = 0
    for r, c in enumerate(counts):
        sf[r] = (total - run) / total
        run += c
        cdf[r] = run / total
    sf[len(counts)] = 0.0
    for a in (pmf, cdf, sf):
        a.flags.writeable = False
    return pmf, cdf, sf


def _critical_from_tails(cdf: np.ndarray, sf: np.ndarray, alpha: float, r_max: int) -> tuple[int, int]:
    """(r_lo, r_hi): largest r with P(R <= r) <= alpha (-1 if none); smallest r <= r_max
    with P(R >= r) <= alpha (r_max + 1 if none).  Boundary: equality is significant."""
    lo_idx = np.nonzero(cdf <= alpha)[0]
    r_lo = int(lo_idx[-1]) if lo_idx.size else -1
    hi_idx = np.nonzero(sf[: r_max + 1] <= alpha)[0]
    r_hi = int(hi_idx[0]) if hi_idx.size else r_max + 1
    return r_lo, r_hi


# ----------------------------------------------------------------------------
# runs about the median
# ----------------------------------------------------------------------------


@lru_cache(maxsize=None)
def median_runs_counts(n1: int, n2: int) -> tuple[int, ...]:
    """Number of the C(N, n1) arrangements of n1 + n2 symbols having r runs, r = 0..N.

    P(R = 2k) = 2 C(n1-1, k-1) C(n2-1, k-1) / C(N, n1) and
    P(R = 2k+1) = [C(n1-1, k) C(n2-1, k-1) + C(n1-1, k-1) C(n2-1, k)] / C(N, n1)
    (Wald & Wolfowitz 1940; Swed & Eisenhart 1943).

    >>> median_runs_counts(2, 2)
    (0, 0, 2, 2, 2)
    """
    n = n1 + n2
    c = [0] * (n + 1)
    if n1 == 0 or n2 == 0:
        if n:
            c[1] = 1
        return tuple(c)
    for r in range(2, n + 1):
        k, odd = divmod(r, 2)
        if odd:
            c[r] = comb(n1 - 1, k) * comb(n2 - 1, k - 1) + comb(n1 - 1, k - 1) * comb(n2 - 1, k)
        else:
            c[r] = 2 * comb(n1 - 1, k - 1) * comb(n2 - 1, k - 1)
    return tuple(c)


@lru_cache(maxsize=None)
def median_runs_table(n1: int, n2: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact (pmf, cdf, sf) of the number of runs, indexed by r = 0..N (sf has N+2 entries).

    >>> pmf, cdf, sf = median_runs_table(3, 14)
    >>> float(cdf[3])  # exactly 1/40
    0.025
    """
    return _tails_from_counts(list(median_runs_counts(n1, n2)))


def median_runs_moments(n1: int, n2: int) -> tuple[float, float]:
    """E[R] = 1 + 2 n1 n2 / N and Var[R] = 2 n1 n2 (2 n1 n2 - n1 - n2) / (N^2 (N - 1))."""
    n = n1 + n2
    if n1 == 0 or n2 == 0:
        return (1.0 if n else 0.0), 0.0
    p = 2.0 * n1 * n2
    return 1.0 + p / n, p * (p - n) / (n * n * (n - 1.0))


def median_runs_exact(n1: int, n2: int, method: str = "auto") -> bool:
    if method == "exact":
        return True
    if method == "asymptotic":
        return False
    return n1 <= MEDIAN_EXACT_MAX_COUNT and n2 <= MEDIAN_EXACT_MAX_COUNT


def _normal_tails(r: np.ndarray | float, mean: float, var: float, correction: bool):
    """(P(R <= r), P(R >= r)) by the normal approximation, optionally with the 0.5 continuity correction."""
    if var <= 0.0:
        one = np.ones_like(np.asarray(r, dtype=float))
        return one, one
    sd = math.sqrt(var)
    c = 0.5 if correction else 0.0
    r = np.asarray(r, dtype=float)
    return ndtr((r + c - mean) / sd), ndtr(-(r - c - mean) / sd)


def median_runs_tails(
    n1: int, n2: int, r: int, method: str = "auto", correction: bool = True
) -> tuple[float, float, str]:
    """(P(R <= r), P(R >= r), method used) for runs about the median."""
    if n1 == 0 or n2 == 0:
        return 1.0, 1.0, "exact"
    if median_runs_exact(n1, n2, method):
        _, cdf, sf = median_runs_table(n1, n2)
        n = n1 + n2
        lo = float(cdf[min(max(r, 0), n)]) if r >= 0 else 0.0
        hi = float(sf[min(max(r, 0), n + 1)])
        return lo, hi, "exact"
    m, v = median_runs_moments(n1, n2)
    lo, hi = _normal_tails(r, m, v, correction)
    return float(lo), float(hi), "asymptotic"


_MEDIAN_CRIT: dict[tuple[int, int, float, str], tuple[int, int]] = {}


def median_runs_critical(n1: int, n2: int, alpha: float, method: str = "auto") -> tuple[int, int]:
    """(r_lo, r_hi): reject 'fewer runs' when R <= r_lo, 'more runs' when R >= r_hi, each at
    one-sided level alpha (equality significant).  Cached per (n1, n2, alpha, method).

    >>> median_runs_critical(10, 10, 0.025)   # Swed & Eisenhart 1943: 6 and 16
    (6, 16)
    """
    key = (n1, n2, alpha, method)
    got = _MEDIAN_CRIT.get(key)
    if got is not None:
        return got
    _check_alpha(alpha)
    n = n1 + n2
    if n1 == 0 or n2 == 0:
        got = (-1, n + 1)
    elif median_runs_exact(n1, n2, method):
        _, cdf, sf = median_runs_table(n1, n2)
        got = _critical_from_tails(cdf, sf, alpha, n)
    else:
        m, v = median_runs_moments(n1, n2)
        rr = np.arange(n + 2)
        lo, hi = _normal_tails(rr, m, v, True)
        lo[0] = lo[1] = 0.0  # at least 2 runs when both kinds are present
        got = _critical_from_tails(lo[: n + 1], hi, alpha, n)
    _MEDIAN_CRIT[key] = got
    return got


# ----------------------------------------------------------------------------
# runs up and down
# ----------------------------------------------------------------------------


@lru_cache(maxsize=None)
def updown_counts(n: int) -> tuple[int, ...]:
    """N(n, k), k = 0..n-1: permutations of n distinct values whose n-1 first differences
    form k runs of equal sign.  André's recursion (André 1884):
    N(n, k) = k N(n-1, k) + 2 N(n-1, k-1) + (n-k) N(n-1, k-2), N(2, 1) = 2.
    For n <= 1 there are no differences: a single arrangement with 0 runs.

    >>> updown_counts(6)
    (0, 2, 60, 236, 300, 122)
    """
    if n <= 1:
        return (1,)
    row = [0, 2]  # n = 2
    for m in range(3, n + 1):
        new = [0] * m
        for k in range(1, m):
            v = 0
            if k < m - 1:
                v += k * row[k]
            if k - 1 >= 1:
                v += 2 * row[k - 1]
            if k - 2 >= 1:
                v += (m - k) * row[k - 2]
            new[k] = v
        row = new
    return tuple(row)


@lru_cache(maxsize=None)
def updown_table(n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact (pmf, cdf, sf) of the number of runs up and down among n values, indexed by k."""
    return _tails_from_counts(list(updown_counts(n)))


def updown_moments(n: int) -> tuple[float, float]:
    """E[R] = (2n - 1)/3, Var[R] = (16n - 29)/90 (Levene & Wolfowitz 1944), for n >= 3."""
    if n <= 1:
        return 0.0, 0.0
    if n == 2:
        return 1.0, 0.0
    return (2.0 * n - 1.0) / 3.0, (16.0 * n - 29.0) / 90.0


def updown_exact(n: int, method: str = "auto") -> bool:
    if method == "exact":
        return True
    if method == "asymptotic":
        return False
    return n <= UPDOWN_EXACT_MAX_N


def updown_tails(n: int, r: int, method: str = "auto", correction: bool = True) -> tuple[float, float, str]:
    """(P(R <= r), P(R >= r), method used) for runs up and down among n values."""
    if n <= 2:
        return 1.0, 1.0, "exact"
    if updown_exact(n, method):
        _, cdf, sf = updown_table(n)
        lo = float(cdf[min(r, n - 1)]) if r >= 0 else 0.0
        hi = float(sf[min(max(r, 0), n)])
        return lo, hi, "exact"
    m, v = updown_moments(n)
    lo, hi = _normal_tails(r, m, v, correction)
    return float(lo), float(hi), "asymptotic"


_UPDOWN_CRIT: dict[tuple[int, float, str], tuple[int, int]] = {}


def updown_critical(n: int, alpha: float, method: str = "auto") -> tuple[int, int]:
    """(r_lo, r_hi) for runs up and down among n values (equality significant). Cached.

    >>> updown_critical(20, 0.025)
    (8, 17)
    """
    key = (n, alpha, method)
    got = _UPDOWN_CRIT.get(key)
    if got is not None:
        return got
    _check_alpha(alpha)
    if n <= 2:
        got = (-1, n + 1)
    elif updown_exact(n, method):
        _, cdf, sf = updown_table(n)
        got = _critical_from_tails(cdf, sf, alpha, n - 1)
    else:
        m, v = updown_moments(n)
        rr = np.arange(n + 1)
        lo, hi = _normal_tails(rr, m, v, True)
        lo[0] = 0.0  # at least one run
        got = _critical_from_tails(lo[:n], hi, alpha, n - 1)
    _UPDOWN_CRIT[key] = got
    return got


# ----------------------------------------------------------------------------
# longest run on one side of the median
# ----------------------------------------------------------------------------


def _compositions(n: int, r: int, m: int) -> int:
    """Compositions of n into r parts each in 1..m (inclusion-exclusion):
    sum_j (-1)^j C(r, j) C(n - j m - 1, r - 1)."""
    if r == 0:
        return 1 if n == 0 else 0
    if n < r or n > r * m:
        return 0
    total = 0
    for j in range(0, min(r, (n - r) // m) + 1):
        t = comb(r, j) * comb(n - j * m - 1, r - 1)
        total += -t if j & 1 else t
    return total


@lru_cache(maxsize=None)
def _median_no_run_reaching(n1: int, n2: int, length: int) -> int:
    """Arrangements of n1 ones and n2 zeros in which every run of ones is shorter than ``length``.

    Put the r runs of ones into r of the n2 + 1 gaps around the zeros (at most one run
    per gap): sum_r C(n2 + 1, r) * #compositions of n1 into r parts of size <= length - 1.
    """
    m = length - 1
    if m <= 0:
        return 1 if n1 == 0 else 0
    if m >= n1:
        return comb(n1 + n2, n1)
    return sum(comb(n2 + 1, r) * _compositions(n1, r, m) for r in range(1, min(n1, n2 + 1) + 1))


def longest_median_run_sf(n1: int, n2: int, length: int) -> float:
    """P(the longest run of the n1 'type 1' symbols has >= ``length`` members), all
    C(n1+n2, n1) arrangements equally likely.  Exact (integer count / integer count);
    the counting argument is in :func:`_median_no_run_reaching`.  Used for the longest
    run above (type 1 = above) or below the median.

    >>> longest_median_run_sf(5, 5, 5)   # (n2 + 1) / C(10, 5) = 6/252
    0.023809523809523808
    """
    if length <= 0:
        return 1.0
    if length > n1:
        return 0.0
    total = comb(n1 + n2, n1)
    return (total - _median_no_run_reaching(n1, n2, length)) / total


_LONG_MED_CRIT: dict[tuple[int, int, float], int] = {}


def longest_median_run_critical(n1: int, n2: int, alpha: float) -> int:
    """Smallest L with P(longest type-1 run >= L) <= alpha (n1 + 1 if none). Cached."""
    key = (n1, n2, alpha)
    got = _LONG_MED_CRIT.get(key)
    if got is not None:
        return got
    _check_alpha(alpha)
    lo, hi = 1, n1 + 1  # sf(hi) = 0 <= alpha; find the first L in [lo, hi] with sf <= alpha
    while lo < hi:
        mid = (lo + hi) // 2
        if longest_median_run_sf(n1, n2, mid) <= alpha:
            hi = mid
        else:
            lo = mid + 1
    _LONG_MED_CRIT[key] = lo
    return lo


# ----------------------------------------------------------------------------
# longest monotone run among n iid continuous values
# ----------------------------------------------------------------------------


@lru_cache(maxsize=None)
def longest_monotone_run_sf(n: int, length: int) -> float:
    """P(n iid continuous values contain ``length`` consecutive values that are strictly
    increasing or strictly decreasing), i.e. a run of at least length - 1 first
    differences of one sign.

    Recursion (derived here; the same state space as André's count): add values one at a
    time keeping the rank r of the last value among the j so far, the direction of the
    current run and its length l (in differences).  The new value's rank r' is uniform on
    0..j, and it lies above the previous value iff r' > r, so
    up_{j+1}(l+1, r') = sum_{r < r'} up_j(l, r) / (j+1),
    up_{j+1}(1, r')   = sum_{r < r'} down_j(., r) / (j+1),
    and down is the mirror image (down_j(l, r) = up_j(l, j-1-r)).  Mass reaching
    length - 1 differences is absorbed; the absorbed total is the probability.

    >>> round(longest_monotone_run_sf(3, 3), 12)   # 2 of the 3! orders are monotone
    0.333333333333
    """
    d = length - 1  # differences needed
    if length <= 1:
        return 1.0 if n >= 1 else 0.0
    if n < length:
        return 0.0
    if d == 1:
        return 1.0
    # u[l-1, r]: last run up with length l (1..d-1), last value has rank r among j values
    u = np.zeros((d - 1, 2))
    u[0, 1] = 0.5
    absorbed = 0.0
    for j in range(2, n):
        dn = u[:, ::-1]
        cu = np.zeros((d - 1, j + 1))
        np.cumsum(u, axis=1, out=cu[:, 1:])
        cd = np.zeros(j + 1)
        np.cumsum(dn.sum(axis=0), out=cd[1:])
        absorbed += 2.0 * cu[-1].sum() / (j + 1)
        new = np.empty((d - 1, j + 1))
        new[0] = cd
        new[1:] = cu[:-1]
        new /= j + 1
        u = new
    return float(min(1.0, absorbed))


_LONG_MONO_CRIT: dict[tuple[int, float], int] = {}


def longest_monotone_run_critical(n: int, alpha: float) -> int:
    """Smallest L (in values) with P(longest monotone run >= L) <= alpha (n + 1 if none). Cached."""
    key = (n, alpha)
    got = _LONG_MONO_CRIT.get(key)
    if got is not None:
        return got
    _check_alpha(alpha)
    length = 2
    while length <= n and longest_monotone_run_sf(n, length) > alpha:
        length += 1
    _LONG_MONO_CRIT[key] = length
    return length


def tail_moments(sf, upper: int) -> tuple[float, float]:
    """Mean and variance of a statistic L >= 0 from its survival function sf(l) = P(L >= l),
    l = 1..upper, stopping once sf is negligible: E L = sum sf(l), E L^2 = sum (2l-1) sf(l)."""
    m1 = m2 = 0.0
    for l in range(1, upper + 1):
        s = sf(l)
        if s < 1e-18:
            break
        m1 += s
        m2 += (2 * l - 1) * s
    return m1, max(0.0, m2 - m1 * m1)
