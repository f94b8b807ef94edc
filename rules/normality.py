"""Anderson-Darling test of normality (mean and variance estimated) and a Box-Cox helper.

The Anderson-Darling statistic (Anderson & Darling 1952, 1954) for a sample
standardised with its own mean and standard deviation (``w = (x - mean) / s``,
``s`` with ``n - 1`` degrees of freedom, the "case 3" of Stephens) is::

    A^2 = -n - (1/n) * sum_{i=1..n} (2i - 1) * [ln F(w_(i)) + ln(1 - F(w_(n+1-i)))]

with ``F`` the standard normal distribution function and ``w_(i)`` the ordered
values.  Stephens' small-sample modification (D'Agostino & Stephens 1986,
*Goodness-of-Fit Techniques*, Table 4.7, case 3) is::

    A* = A^2 * (1 + 0.75/n + 2.25/n^2)

and is referred to the upper-tail points of Table 4.7 (``AD_CRITICAL_POINTS``)
or to the p-value formulas of D'Agostino & Stephens 1986, Table 4.9 (case 3),
see :func:`ad_pvalue`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

__all__ = [
    "AD_CRITICAL_POINTS",
    "AndersonDarlingResult",
    "BoxCoxResult",
    "ad_critical_value",
    "ad_pvalue",
    "anderson_darling_test",
    "boxcox_apply",
    "boxcox_normalise",
]

# Upper-tail significance level -> percentage point of A* (D'Agostino & Stephens
# 1986, Table 4.7, p. 123, case 3: mean and variance estimated).
AD_CRITICAL_POINTS: dict[float, float] = {
    0.50: 0.341,
    0.25: 0.470,
    0.15: 0.561,
    0.10: 0.631,
    0.05: 0.752,
    0.025: 0.873,
    0.01: 1.035,
    0.005: 1.159,
}

# Above this A* the last Table 4.9 piece is no longer used: its quadratic term
# makes it turn upward, and its value there is below 5e-31.  Same cap as
# statsmodels' ``normal_ad``.
_AD_PVALUE_CAP = 13.0


@dataclass(frozen=True)
class AndersonDarlingResult:
    """Result of :func:`anderson_darling_test`.

    ``statistic`` is A^2, ``adjusted`` is A*, ``pvalue`` comes from A* via
    D'Agostino & Stephens (1986) Table 4.9.
    """

    statistic: float
    adjusted: float
    pvalue: float
    n: int
    method: str

    def critical_value(self, alpha: float) -> float:
        """Table 4.7 point for ``alpha`` on the A* scale."""
        return ad_critical_value(alpha)

    def rejects(self, alpha: float = 0.05) -> bool:
        """True when normality is rejected at level ``alpha`` (p < alpha)."""
        return self.pvalue < alpha


def ad_critical_value(alpha: float, n: int | None = None) -> float:
    """Percentage point of D'Agostino & Stephens (1986) Table 4.7, case 3.

    With ``n`` omitted the point is on the A* scale (compare with
    ``result.adjusted``).  With ``n`` given it is divided by
    ``1 + 0.75/n + 2.25/n^2`` so that it compares with A^2 directly (the
    convention of ``scipy.stats.anderson`` from scipy 1.17).

    >>> ad_critical_value(0.05)
    0.752
    >>> round(ad_critical_value(0.05, n=8), 3)
    0.666
    """
    if alpha not in AD_CRITICAL_POINTS:
        raise ValueError(f"alpha must be one of {sorted(AD_CRITICAL_POINTS)}, got {alpha!r}")
    point = AD_CRITICAL_POINTS[alpha]
    if n is None:
        return point
    return point / (1.0 + 0.75 / n + 2.25 / n**2)


def ad_pvalue(adjusted: float) -> float:
    """p-value of the modified statistic A* (D'Agostino & Stephens 1986, Table 4.9, case 3).

    ::

        A* >= 0.60         p = exp(1.2937 - 5.709 A* + 0.0186 A*^2)
        0.34 <= A* < 0.60  p = exp(0.9177 - 4.279 A* - 1.38 A*^2)
        0.20 <= A* < 0.34  p = 1 - exp(-8.318 + 42.796 A* - 59.938 A*^2)
        A* < 0.20          p = 1 - exp(-13.436 + 101.14 A* - 223.73 A*^2)

    The pieces do not join exactly (jumps up to 0.003 at the joins).  Above
    A* = 13 the value returned is 0.0, as in statsmodels' ``normal_ad``.

    >>> round(ad_pvalue(0.752), 4)
    0.0503
    """
    a = float(adjusted)
    if not math.isfinite(a) or a < 0:
        raise ValueError(f"adjusted statistic must be finite and >= 0, got {adjusted!r}")
    if a < 0.2:
        p = 1.0 - math.exp(-13.436 + 101.14 * a - 223.73 * a * a)
    elif a < 0.34:
        p = 1.0 - math.exp(-8.318 + 42.796 * a - 59.938 * a * a)
    elif a < 0.6:
        p = math.exp(0.9177 - 4.279 * a - 1.38 * a * a)
    elif a <= _AD_PVALUE_CAP:
        p = math.exp(1.2937 - 5.709 * a + 0.0186 * a * a)
    else:
        p = 0.0
    return min(max(p, 0.0), 1.0)


def _finite_1d(x, name: str = "x") -> np.ndarray:
    a = np.asarray(x, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} contains NaN or infinite values")
    return a


def anderson_darling_test(x) -> AndersonDarlingResult:
    """Anderson-Darling test of normality with mean and variance estimated.

    Formula in the module docstring.  Needs at least 3 values that are not
    all equal (the standardisation divides by ``s``).  The Table 4.9
    p-value formulas are stated by D'Agostino & Stephens for the modified
    statistic; for n below 8 treat the p-value as rough (they give the
    modification for n >= 8, from memory).

    >>> r = anderson_darling_test(np.arange(8))
    >>> round(r.statistic, 6), round(r.adjusted, 6), round(r.pvalue, 6)
    (0.134, 0.151274, 0.961456)
    """
    a = _finite_1d(x)
    n = a.size
    if n < 3:
        raise ValueError(f"the Anderson-Darling test needs at least 3 values, got {n}")
    s = a.std(ddof=1)
    if not s > 0:
        raise ValueError("all values are equal: no spread, so normality cannot be tested")
    w = np.sort((a - a.mean()) / s)
    # log Phi(w) and log(1 - Phi(w)) = log Phi(-w), both accurate in the tails.
    log_cdf = special.log_ndtr(w)
    log_sf = special.log_ndtr(-w[::-1])
    i = np.arange(1, n + 1)
    a2 = float(-n - np.sum((2 * i - 1) * (log_cdf + log_sf)) / n)
    a_star = a2 * (1.0 + 0.75 / n + 2.25 / n**2)
    return AndersonDarlingResult(
        statistic=a2,
        adjusted=a_star,
        pvalue=ad_pvalue(a_star),
        n=n,
        method="Anderson-Darling normality test, mean and variance estimated; "
        "A* = A^2(1 + 0.75/n + 2.25/n^2), p from D'Agostino & Stephens (1986) Table 4.9",
    )


@dataclass(frozen=True)
class BoxCoxResult:
    """Result of :func:`boxcox_normalise`.

    ``lmbda`` is the maximum-likelihood Box-Cox exponent; ``before`` and
    ``after`` are the Anderson-Darling results on the raw and transformed
    values; ``normal_after`` says whether normality is no longer rejected at
    ``alpha``.
    """

    lmbda: float
    transformed: np.ndarray
    before: AndersonDarlingResult
    after: AndersonDarlingResult
    normal_after: bool
    alpha: float
    method: str


def boxcox_apply(x, lmbda: float) -> np.ndarray:
    """Box-Cox transform with a given exponent: (x^lambda - 1)/lambda, or ln x when lambda = 0.

    Positive values only (Box & Cox 1964).

    >>> boxcox_apply([1.0, np.e], 0.0).round(6).tolist()
    [0.0, 1.0]
    """
    a = _finite_1d(np.atleast_1d(np.asarray(x, dtype=float)))
    if np.any(a <= 0):
        raise ValueError("the Box-Cox transform needs strictly positive values")
    return special.boxcox(a, float(lmbda))


def boxcox_normalise(x, alpha: float = 0.05) -> BoxCoxResult:
    """Fit a Box-Cox exponent (``scipy.stats.boxcox``, maximum likelihood) and retest normality.

    Box G.E.P., Cox D.R. (1964) "An analysis of transformations", JRSS B 26:211-252.
    Strictly positive data only.

    >>> rng = np.random.default_rng(1)
    >>> r = boxcox_normalise(rng.lognormal(0.0, 0.8, size=200))
    >>> r.before.pvalue < 0.05, r.normal_after, abs(r.lmbda) < 0.3
    (True, True, True)
    """
    a = _finite_1d(x)
    if a.size < 3:
        raise ValueError(f"the Box-Cox helper needs at least 3 values, got {a.size}")
    if np.any(a <= 0):
        raise ValueError("the Box-Cox transform needs strictly positive values")
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha!r}")
    before = anderson_darling_test(a)
    y, lmbda = stats.boxcox(a)
    after = anderson_darling_test(y)
    return BoxCoxResult(
        lmbda=float(lmbda),
        transformed=y,
        before=before,
        after=after,
        normal_after=not after.rejects(alpha),
        alpha=alpha,
        method="Box-Cox (1964), exponent by maximum likelihood (scipy.stats.boxcox); "
        "normality retested by Anderson-Darling",
    )
