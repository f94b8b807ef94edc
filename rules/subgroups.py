"""Rational subgroups: subgroup means and ranges, and sigma from R-bar / d2(n).

For subgroups of ``n`` independent N(mu, sigma^2) values the expected range is
``d2(n) * sigma`` where::

    d2(n) = integral over all w of [1 - Phi(w)^n - (1 - Phi(w))^n] dw

(Tippett 1925).  ``D2`` holds the values printed to three decimals in the
usual tables of control-chart constants (ASTM STP 15D, *Manual on
Presentation of Data and Control Chart Analysis*, 1976; Montgomery,
*Introduction to Statistical Quality Control*, Appendix VI).  The figures
are quoted from memory of those tables; the tests recompute each one by
numerical integration of the formula above.

The process sigma is estimated as ``R-bar / d2(n)``.  With unequal
subgroup sizes each range is scaled by its own ``d2(n_i)`` and the ratios are
averaged (each ``R_i / d2(n_i)`` is unbiased for sigma, so their mean is too).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["D2", "SubgroupSummary", "d2", "consecutive_subgroups", "summarise_subgroups"]

D2: dict[int, float] = {
    2: 1.128, 3: 1.693, 4: 2.059, 5: 2.326, 6: 2.534, 7: 2.704, 8: 2.847,
    9: 2.970, 10: 3.078, 11: 3.173, 12: 3.258, 13: 3.336, 14: 3.407,
    15: 3.472, 16: 3.532, 17: 3.588, 18: 3.640, 19: 3.689, 20: 3.735,
    21: 3.778, 22: 3.819, 23: 3.858, 24: 3.895, 25: 3.931,
}  # fmt: skip


def d2(n: int) -> float:
    """Tabled d2 constant for subgroup size ``n`` (2..25).

    >>> d2(2), d2(5)
    (1.128, 2.326)
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or int(n) not in D2:
        raise ValueError(f"subgroup size must be a whole number from 2 to 25, got {n!r}")
    return D2[int(n)]


@dataclass(frozen=True)
class SubgroupSummary:
    """Means, ranges and the R-bar/d2 sigma of a set of subgroups.

    ``sigma`` estimates the within-subgroup (short-term) standard deviation of
    single values; ``sigma_of_means`` is ``sigma / sqrt(n)`` for equal sizes
    (``None`` when sizes differ).
    """

    means: np.ndarray
    ranges: np.ndarray
    sizes: np.ndarray
    grand_mean: float
    r_bar: float
    sigma: float
    sigma_of_means: float | None
    method: str

    @property
    def n_subgroups(self) -> int:
        return int(self.means.size)


def consecutive_subgroups(x, size: int) -> np.ndarray:
    """Cut a stream into consecutive subgroups of ``size`` values; an incomplete tail is left out.

    >>> consecutive_subgroups([1, 2, 3, 4, 5], 2).tolist()
    [[1.0, 2.0], [3.0, 4.0]]
    """
    d2(size)  # validates the size
    a = np.asarray(x, dtype=float).ravel()
    k = a.size // size
    return a[: k * size].reshape(k, size)


def summarise_subgroups(groups) -> SubgroupSummary:
    """Subgroup means and ranges; sigma = mean of R_i / d2(n_i) (= R-bar/d2(n) for equal sizes).

    ``groups`` is a 2-D array (one subgroup per row) or a sequence of
    sequences of sizes 2..25.  Sources for d2: see the module docstring.

    >>> s = summarise_subgroups([[10.0, 12.0], [11.0, 11.5], [9.0, 10.0]])
    >>> round(s.r_bar, 4), round(s.sigma, 4)
    (1.1667, 1.0343)
    """
    rows = [np.asarray(g, dtype=float).ravel() for g in groups]
    if not rows:
        raise ValueError("no subgroups given")
    for i, r in enumerate(rows):
        if not np.all(np.isfinite(r)):
            raise ValueError(f"subgroup {i} contains NaN or infinite values")
        if r.size not in D2:
            raise ValueError(f"subgroup {i} has {r.size} values; sizes 2 to 25 are supported")
    sizes = np.array([r.size for r in rows])
    means = np.array([r.mean() for r in rows])
    ranges = np.array([r.max() - r.min() for r in rows])
    r_bar = float(ranges.mean())
    equal = bool(np.all(sizes == sizes[0]))
    if equal:
        sigma = r_bar / D2[int(sizes[0])]
        method = f"sigma = R-bar / d2({int(sizes[0])}), d2 = {D2[int(sizes[0])]}"
    else:
        sigma = float(np.mean(ranges / np.array([D2[int(s)] for s in sizes])))
        method = "sigma = mean of R_i / d2(n_i) (unequal subgroup sizes)"
    grand = float(np.sum(means * sizes) / np.sum(sizes))
    return SubgroupSummary(
        means=means,
        ranges=ranges,
        sizes=sizes,
        grand_mean=grand,
        r_bar=r_bar,
        sigma=float(sigma),
        sigma_of_means=float(sigma / np.sqrt(sizes[0])) if equal else None,
        method=method,
    )
