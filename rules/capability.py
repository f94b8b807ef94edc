"""Process capability indices Cp, Cpu, Cpl, Cpk with confidence intervals.

Definitions (Kane 1986, *J. Quality Technology* 18(1):41-52), estimated with
the sample mean and the ddof=1 standard deviation ``s``::

    Cp  = (USL - LSL) / (6 s)      Cpu = (USL - mean) / (3 s)
    Cpl = (mean - LSL) / (3 s)     Cpk = min(Cpu, Cpl)

Intervals assume independent normal readings:

* Cp, chi-square (``s^2 (n-1)/sigma^2 ~ chi2(n-1)``)::

      Cp * sqrt(chi2_{a/2, n-1} / (n-1))  <=  Cp  <=  Cp * sqrt(chi2_{1-a/2, n-1} / (n-1))

  with ``chi2_q`` the lower-q quantile; one-sided lower bound with ``chi2_{a, n-1}``.
* Cpk (and Cpu / Cpl when only one limit is given), Bissell (1990),
  *Applied Statistics* 39(3):331-340, normal approximation::

      Cpk +/- z_{1-a/2} * sqrt(1/(9n) + Cpk^2 / (2(n-1)))

  one-sided lower bound with ``z_{1-a}``.

The indices say nothing unless the process is in control and the readings
are close to normal; check that first (``rules.baseline``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from rules.detector import check_float, check_int

__all__ = ["CapabilityResult", "bissell_cpk_interval", "capability", "capability_from_summary", "cp_interval"]


@dataclass(frozen=True)
class CapabilityResult:
    """Capability indices, their two-sided ``confidence`` intervals and one-sided lower bounds.

    Indices that need a missing limit are ``None``; ``cpk`` is the smaller of
    the available one-sided indices.
    """

    n: int
    mean: float
    sigma: float
    lsl: float | None
    usl: float | None
    cp: float | None
    cpu: float | None
    cpl: float | None
    cpk: float
    cp_interval: tuple[float, float] | None
    cp_lower_bound: float | None
    cpk_interval: tuple[float, float]
    cpk_lower_bound: float
    confidence: float
    method: str


def cp_interval(cp: float, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Chi-square interval for Cp from a ddof=1 sd of n readings.

    Montgomery's illustration (inputs from memory: USL 62, LSL 38, s = 1.75, n = 20):

    >>> lo, hi = cp_interval(24 / (6 * 1.75), 20)
    >>> round(lo, 4), round(hi, 4)
    (1.5649, 3.0056)
    """
    n = check_int("n", n, 2)
    confidence = check_float("confidence", confidence, 0.0, 1.0, open_lo=True, open_hi=True)
    a = 1.0 - confidence
    df = n - 1
    return (
        float(cp * math.sqrt(stats.chi2.ppf(a / 2, df) / df)),
        float(cp * math.sqrt(stats.chi2.ppf(1 - a / 2, df) / df)),
    )


def _bissell_se(cpk: float, n: int) -> float:
    return math.sqrt(1.0 / (9.0 * n) + cpk * cpk / (2.0 * (n - 1)))


def bissell_cpk_interval(cpk: float, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Bissell's (1990) approximate interval for Cpk.

    >>> lo, hi = bissell_cpk_interval(1.33, 20)
    >>> round(lo, 4), round(hi, 4)
    (0.8826, 1.7774)
    """
    n = check_int("n", n, 2)
    confidence = check_float("confidence", confidence, 0.0, 1.0, open_lo=True, open_hi=True)
    z = float(stats.norm.ppf(0.5 + confidence / 2))
    se = _bissell_se(cpk, n)
    return float(cpk - z * se), float(cpk + z * se)


def capability_from_summary(
    mean: float, sd: float, n: int, *, lsl: float | None = None, usl: float | None = None, confidence: float = 0.95
) -> CapabilityResult:
    """Capability from a mean, a ddof=1 sd and n (formulas in the module docstring).

    >>> r = capability_from_summary(97.0, 1.6, 30, lsl=90.0, usl=100.0)
    >>> round(r.cp, 4), round(r.cpk, 4), tuple(round(v, 4) for v in r.cpk_interval), round(r.cpk_lower_bound, 4)
    (1.0417, 0.625, (0.4248, 0.8252), 0.4569)
    """
    mean = check_float("mean", mean)
    sd = check_float("sd", sd, 0.0, open_lo=True)
    n = check_int("n", n, 2)
    confidence = check_float("confidence", confidence, 0.0, 1.0, open_lo=True, open_hi=True)
    if lsl is None and usl is None:
        raise ValueError("give at least one specification limit (lsl or usl)")
    if lsl is not None:
        lsl = check_float("lsl", lsl)
    if usl is not None:
        usl = check_float("usl", usl)
    if lsl is not None and usl is not None and not usl > lsl:
        raise ValueError(f"usl must be above lsl, got lsl={lsl}, usl={usl}")
    cpu = (usl - mean) / (3 * sd) if usl is not None else None
    cpl = (mean - lsl) / (3 * sd) if lsl is not None else None
    cpk = min(v for v in (cpu, cpl) if v is not None)
    a = 1.0 - confidence
    if usl is not None and lsl is not None:
        cp = (usl - lsl) / (6 * sd)
        cp_ci = cp_interval(cp, n, confidence)
        cp_lb = float(cp * math.sqrt(stats.chi2.ppf(a, n - 1) / (n - 1)))
    else:
        cp, cp_ci, cp_lb = None, None, None
    cpk_ci = bissell_cpk_interval(cpk, n, confidence)
    cpk_lb = float(cpk - stats.norm.ppf(1 - a) * _bissell_se(cpk, n))
    return CapabilityResult(
        n=n,
        mean=mean,
        sigma=sd,
        lsl=lsl,
        usl=usl,
        cp=cp,
        cpu=cpu,
        cpl=cpl,
        cpk=float(cpk),
        cp_interval=cp_ci,
        cp_lower_bound=cp_lb,
        cpk_interval=cpk_ci,
        cpk_lower_bound=cpk_lb,
        confidence=confidence,
        method="Cp interval by chi-square on n-1 d.f.; Cpk interval by Bissell (1990) normal approximation; "
        "sigma = sample sd (ddof=1); assumes independent normal readings",
    )


def capability(x, *, lsl: float | None = None, usl: float | None = None, confidence: float = 0.95) -> CapabilityResult:
    """Capability of readings ``x`` (mean and ddof=1 sd).

    >>> r = capability([9.9, 10.1, 10.0, 10.2, 9.8, 10.0], lsl=9.4, usl=10.6)
    >>> round(r.cp, 3), round(r.cpk, 3)
    (1.414, 1.414)
    """
    a = np.asarray(x, dtype=float)
    if a.ndim != 1 or a.size < 2:
        raise ValueError("capability needs a one-dimensional array of at least 2 readings")
    if not np.all(np.isfinite(a)):
        raise ValueError("readings contain NaN or infinite values")
    sd = float(a.std(ddof=1))
    if sd == 0:
        raise ValueError("all readings are equal: no spread, capability is undefined")
    return capability_from_summary(float(a.mean()), sd, int(a.size), lsl=lsl, usl=usl, confidence=confidence)
