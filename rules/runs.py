"""Run-pattern tests on a whole array: runs about the median, runs up and down, and
the longest run of each kind.  Pure functions returning frozen result objects.

Conventions shared by every test here
-------------------------------------
* Median: the sample median (middle value, or the mean of the two middle values).
  Readings *equal* to the median are dropped (the usual convention, e.g. Siegel 1956);
  the count dropped is reported as ``n_dropped``.  The remaining readings, in their
  order, form the sequence whose runs are counted.
* First differences: zero differences (equal consecutive readings) are dropped and
  counted in ``n_dropped``; equal neighbours are thereby merged into one reading, so
  the null distribution used is that of ``n = (number of non-zero differences) + 1``
  distinct values.
* Boundary: a tail probability equal to alpha is significant (reject when p <= alpha);
  see :mod:`rules.runs_null`.
* Two-sided p-value: min(1, 2 * smaller one-sided tail).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from rules import runs_null as rn

ALTERNATIVES = ("two-sided", "less", "greater")
METHODS = ("auto", "exact", "asymptotic")
SIDES = ("either", "above", "below")


@dataclass(frozen=True)
class RunsResult:
    """Result of a run test (scipy style).

    ``statistic`` is the run count (or the longest run's length); ``pvalue`` the p-value
    for ``alternative``; ``pvalue_less`` / ``pvalue_greater`` are the two one-sided tails
    P(S <= s) and P(S >= s).  ``n_above`` / ``n_below`` count readings above / below the
    median (or rising / falling differences); ``n_dropped`` the ties dropped.
    ``pattern`` names the non-random pattern the observed side points to, ``direction``
    is "up"/"down" where meaningful, ``onset`` the 0-based index in the input where the
    longest run starts (longest-run tests only).
    """

    statistic: float
    pvalue: float
    expected: float
    variance: float
    n_above: int
    n_below: int
    n_dropped: int
    method: str
    alternative: str
    pvalue_less: float = 1.0
    pvalue_greater: float = 1.0
    zscore: float | None = None
    pattern: str | None = None
    direction: str | None = None
    onset: int | None = None


def _as_array(x) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"x must be one-dimensional, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("x contains NaN or infinite values")
    return a


def sample_median(sorted_values) -> float:
    """Middle value, or the mean of the two middle values, of an already sorted sequence
    (the same arithmetic as the streaming detectors, so labels agree bit for bit)."""
    k = len(sorted_values)
    h = k // 2
    if k % 2:
        return float(sorted_values[h])
    return (float(sorted_values[h - 1]) + float(sorted_values[h])) / 2


def median_labels(x: np.ndarray) -> np.ndarray:
    """+1 above the sample median, -1 below, 0 equal (dropped)."""
    m = sample_median(np.sort(x)) if x.size else 0.0
    return np.sign(x - m).astype(np.int8)


def compressed_runs(labels) -> list[tuple[int, int, int]]:
    """Runs of the non-zero labels, zeros skipped: list of (sign, kept count, start index)."""
    out: list[list[int]] = []
    for i, v in enumerate(labels):
        v = int(v)
        if v == 0:
            continue
        if out and out[-1][0] == v:
            out[-1][1] += 1
        else:
            out.append([v, 1, i])
    return [tuple(r) for r in out]


def _finish(lo: float, hi: float, alternative: str, low_pattern: str, high_pattern: str):
    if alternative == "less":
        return lo, low_pattern
    if alternative == "greater":
        return hi, high_pattern
    return min(1.0, 2.0 * min(lo, hi)), (low_pattern if lo <= hi else high_pattern)


def _check_common(alternative: str, method: str) -> None:
    if alternative not in ALTERNATIVES:
        raise ValueError(f"alternative must be one of {ALTERNATIVES}, got {alternative!r}")
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")


def median_runs_test(x, alternative: str = "two-sided", method: str = "auto", correction: bool = True) -> RunsResult:
    """Runs above and below the sample median (Wald & Wolfowitz 1940; Swed & Eisenhart 1943).

    R = number of runs in the sequence of above/below labels, readings equal to the
    median dropped.  Under randomness, given n1 above and n2 below (N = n1 + n2), every
    arrangement is equally likely:
    P(R = 2k) = 2 C(n1-1, k-1) C(n2-1, k-1) / C(N, n1),
    P(R = 2k+1) = [C(n1-1, k) C(n2-1, k-1) + C(n1-1, k-1) C(n2-1, k)] / C(N, n1),
    E R = 1 + 2 n1 n2 / N, Var R = 2 n1 n2 (2 n1 n2 - n1 - n2) / (N^2 (N - 1)).

    ``method='auto'`` uses the exact distribution while both counts are <=
    ``rules.runs_null.MEDIAN_EXACT_MAX_COUNT`` (200) and the normal approximation beyond
    (with the 0.5 continuity correction unless ``correction=False``).
    ``alternative='less'``: too few runs (pattern "grouping"); ``'greater'``: too many
    (pattern "mixture"); ``'two-sided'``: min(1, 2 * smaller tail).  A tail equal to
    alpha counts as significant (p <= alpha).

    >>> r = median_runs_test(list(range(1, 21)))   # 10 below then 10 above: 2 runs
    >>> r.statistic, r.n_above, r.n_below, round(r.pvalue_less, 8), r.pattern
    (2, 10, 10, 1.083e-05, 'grouping')
    """
    _check_common(alternative, method)
    a = _as_array(x)
    lab = median_labels(a)
    n1 = int((lab > 0).sum())
    n2 = int((lab < 0).sum())
    runs = len(compressed_runs(lab))
    mean, var = rn.median_runs_moments(n1, n2)
    lo, hi, used = rn.median_runs_tails(n1, n2, runs, method, correction)
    p, pattern = _finish(lo, hi, alternative, "grouping", "mixture")
    z = (runs - mean) / math.sqrt(var) if var > 0 else None
    return RunsResult(
        statistic=runs, pvalue=p, expected=mean, variance=var, n_above=n1, n_below=n2,
        n_dropped=int(a.size - n1 - n2), method=used, alternative=alternative,
        pvalue_less=lo, pvalue_greater=hi, zscore=z, pattern=pattern,
    )


def difference_signs(x: np.ndarray) -> np.ndarray:
    return np.sign(np.diff(x)).astype(np.int8)


def updown_runs_test(x, alternative: str = "two-sided", method: str = "auto", correction: bool = True) -> RunsResult:
    """Runs up and down: runs of equal sign among the first differences
    (Wallis & Moore 1941; Levene & Wolfowitz 1944; Edgington 1961).

    Zero differences are dropped (equal neighbours merged) and the null distribution is
    that of n = (non-zero differences) + 1 distinct iid values: N(n, k) / n! from André's
    recursion N(n,k) = k N(n-1,k) + 2 N(n-1,k-1) + (n-k) N(n-1,k-2) up to
    ``rules.runs_null.UPDOWN_EXACT_MAX_N`` (300), the normal approximation beyond with
    E R = (2n - 1)/3 and Var R = (16n - 29)/90.  ``'less'``: too few runs (pattern
    "drift"); ``'greater'``: too many (pattern "sawtooth").

    >>> r = updown_runs_test([1, 3, 2, 4, 3, 5, 4, 6, 5, 7, 6, 8])   # 11 alternating steps
    >>> r.statistic, round(r.pvalue_greater, 6), r.pattern
    (11, 0.011285, 'sawtooth')
    """
    _check_common(alternative, method)
    a = _as_array(x)
    d = difference_signs(a) if a.size > 1 else np.zeros(0, np.int8)
    ups = int((d > 0).sum())
    downs = int((d < 0).sum())
    n = ups + downs + 1
    runs = len(compressed_runs(d))
    mean, var = rn.updown_moments(n)
    lo, hi, used = rn.updown_tails(n, runs, method, correction)
    p, pattern = _finish(lo, hi, alternative, "drift", "sawtooth")
    z = (runs - mean) / math.sqrt(var) if var > 0 else None
    return RunsResult(
        statistic=runs, pvalue=p, expected=mean, variance=var, n_above=ups, n_below=downs,
        n_dropped=int(d.size - ups - downs), method=used, alternative=alternative,
        pvalue_less=lo, pvalue_greater=hi, zscore=z, pattern=pattern,
    )


def longest_median_run_test(x, side: str = "either") -> RunsResult:
    """Longest run on one side of the sample median, conditional on n1 above and n2 below
    (readings equal to the median dropped).

    Exact tail: P(longest run above >= L | n1, n2) = 1 - A / C(N, n1), where A counts the
    arrangements with every above-run shorter than L: choose r of the n2 + 1 gaps between
    the below readings and split n1 into r parts of size <= L - 1,
    A = sum_r C(n2 + 1, r) * sum_j (-1)^j C(r, j) C(n1 - j(L-1) - 1, r - 1)
    (compositions by inclusion-exclusion; the same argument as Mood 1940's run
    distributions).  Below: swap n1 and n2.  ``side='above'`` / ``'below'`` tests one
    side (direction "up" / "down", pattern "shift"); ``'either'`` reports the side with
    the smaller tail and p = min(1, 2 * smaller tail).  ``pvalue_greater`` holds the
    one-sided tail of the reported side; ``expected``/``variance`` are the exact moments
    of that side's longest run.

    >>> r = longest_median_run_test([1, 2, 1.5, 0.5, 9, 8, 7, 9.5, 8.5, 0.2])
    >>> r.statistic, r.direction, r.onset, round(r.pvalue_greater, 6)
    (5, 'up', 4, 0.02381)
    """
    if side not in SIDES:
        raise ValueError(f"side must be one of {SIDES}, got {side!r}")
    a = _as_array(x)
    lab = median_labels(a)
    n1 = int((lab > 0).sum())
    n2 = int((lab < 0).sum())
    if max(n1, n2) > rn.LONGEST_MEDIAN_MAX_COUNT:
        raise ValueError(
            f"longest_median_run_test is exact only: at most {rn.LONGEST_MEDIAN_MAX_COUNT} readings "
            f"on each side of the median, got {n1} above and {n2} below"
        )
    runs = compressed_runs(lab)
    best = {1: (0, None), -1: (0, None)}
    for s, length, start in runs:
        if length >= best[s][0]:  # latest run of the maximal length
            best[s] = (length, start)
    p_up = rn.longest_median_run_sf(n1, n2, best[1][0]) if n1 else 1.0
    p_dn = rn.longest_median_run_sf(n2, n1, best[-1][0]) if n2 else 1.0
    if side == "above" or (side == "either" and p_up <= p_dn):
        s, p1, na, nb = 1, p_up, n1, n2
    else:
        s, p1, na, nb = -1, p_dn, n2, n1
    length, onset = best[s]
    p = p1 if side != "either" else min(1.0, 2.0 * min(p_up, p_dn))
    mean, var = rn.tail_moments(lambda l: rn.longest_median_run_sf(na, nb, l), na)
    return RunsResult(
        statistic=length, pvalue=p, expected=mean, variance=var, n_above=n1, n_below=n2,
        n_dropped=int(a.size - n1 - n2), method="exact", alternative=side,
        pvalue_less=1.0, pvalue_greater=p1, pattern="shift",
        direction="up" if s == 1 else "down", onset=onset,
    )


def longest_monotone_run_test(x) -> RunsResult:
    """Longest strictly monotone run (increasing or decreasing), in readings, among n iid
    continuous values: statistic L = (longest run of equal-sign first differences) + 1.

    Zero differences are dropped (equal neighbours merged; n = non-zero differences + 1).
    Exact tail P(longest >= L) by the rank recursion in
    :func:`rules.runs_null.longest_monotone_run_sf`.  Pattern "drift", direction of the
    run ("up" increasing).  ``pvalue`` is the one-sided upper tail (long runs are the
    pattern); ``onset`` is the index of the run's first reading (latest run if several
    share the maximal length).

    >>> r = longest_monotone_run_test([0.3, 0.1, 0.4, 0.5, 0.7, 0.9, 1.2, 0.8, 0.6, 1.0])
    >>> r.statistic, r.direction, r.onset, round(r.pvalue, 6)
    (6, 'up', 1, 0.012302)
    """
    a = _as_array(x)
    d = difference_signs(a) if a.size > 1 else np.zeros(0, np.int8)
    ups = int((d > 0).sum())
    downs = int((d < 0).sum())
    n = ups + downs + 1
    if n > rn.LONGEST_MONOTONE_MAX_N:
        raise ValueError(
            f"longest_monotone_run_test is exact only: at most {rn.LONGEST_MONOTONE_MAX_N} distinct "
            f"consecutive readings, got {n}"
        )
    length, onset, s = 1, (0 if a.size else None), 0
    for sign, k, start in compressed_runs(d):
        if k + 1 >= length:
            length, onset, s = k + 1, start, sign
    p = rn.longest_monotone_run_sf(n, length) if n > 1 else 1.0
    mean, var = rn.tail_moments(lambda l: rn.longest_monotone_run_sf(n, l), n)
    return RunsResult(
        statistic=length, pvalue=p, expected=mean, variance=var, n_above=ups, n_below=downs,
        n_dropped=int(d.size - ups - downs), method="exact", alternative="greater",
        pvalue_less=1.0, pvalue_greater=p, pattern="drift",
        direction={1: "up", -1: "down"}.get(s), onset=onset,
    )
