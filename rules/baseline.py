"""The in-control baseline of one characteristic: centre, sigma and the checks behind them.

Estimates from a run of individual readings ``x_1..x_n`` taken while the
process is believed to be in control:

* centre = mean of the readings kept, and their median;
* short-term sigma = MR-bar / d2 with ``MR_i = |x_i - x_{i-1}|`` and
  ``d2 = 1.128`` for spans of two (table of control-chart constants, ASTM
  STP 15D 1976 / Montgomery, *Introduction to Statistical Quality Control*,
  Appendix VI; exact value 2/sqrt(pi) = 1.12838);
* overall sd (ddof = 1), which exceeds the short-term sigma when the mean
  wanders within the baseline.

Screening: a reading further than 3.5 robust sigmas from the median is
dropped and everything is estimated again (repeatedly, until nothing more is
dropped).  The robust sigma is the *median* moving range divided by
``sqrt(2) * z_0.75 = 0.95387`` (the median of |X1 - X2| for independent
N(mu, sigma^2) readings is that multiple of sigma; computed, not a tabled
value).  Moving ranges that span a dropped reading are not used.  If the
median moving range is zero (coarse resolution), the MAD about the median
times 1.4826 is used instead.  The 3.5 cut-off is common practice, no source.

Checks reported on the readings kept: runs about the median (two-sided,
``rules.runs.median_runs_test`` when present); lag-1 autocorrelation with the
Ljung & Box (1978, Biometrika 65(2):297-303) statistic at one lag,
``Q = n(n+2) r1^2 / (n-1)`` against chi-square(1); normality by
Anderson-Darling (``rules.normality``).  When normality is rejected and all
readings are positive a Box-Cox exponent is fitted (maximum likelihood,
alternating with the screen on the transformed scale until the kept set
settles, at most 5 rounds; exponents beyond +/-5 are refused); if the transformed readings pass, ``transform = {"boxcox": lambda}`` and centre and sigmas are
those of the transformed readings (values are then monitored transformed,
see :meth:`Baseline.standardise`); otherwise ``distribution_free_only`` is set
and only detectors that need no normal model should be trusted.

Default baseline length: ``DEFAULT_BASELINE_LENGTH = 100`` readings.  What it
buys (computed here, not a published figure): for independent normal
readings Var(|D|) = 2 - 4/pi and Cov(|D_i|, |D_{i+1}|) = (4/pi)(sqrt(3)/2 + pi/12)
- 4/pi for ``D = X_i - X_{i-1}`` (sigma = 1), so the relative standard error
of MR-bar/d2 from ``m = n - 1`` moving ranges is about ``0.909 / sqrt(m)``:
9.1 % at n = 100 (for the ddof=1 sd it would be 7.1 %; MR-bar is about 60 %
efficient).  That is roughly the widely used ``1 / sqrt(2 * 0.62 * n)``.
Halving the error needs four times the readings; 100 is a common
compromise between a quick start and a stable sigma (common practice, no
source).  Detectors calibrated on the baseline carry the remaining error.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass, field, fields
from typing import Any

import numpy as np
from scipy import special, stats

from rules.normality import anderson_darling_test, boxcox_normalise

__all__ = [
    "Baseline",
    "DEFAULT_BASELINE_LENGTH",
    "D2_SPAN_TWO",
    "MIN_BASELINE_LENGTH",
    "estimate_baseline",
    "fixed_baseline",
    "lag1_autocorrelation",
]

DEFAULT_BASELINE_LENGTH = 100
MIN_BASELINE_LENGTH = 20  # fewer readings give a sigma error above ~21 % (0.909/sqrt(19)); common practice, no source
D2_SPAN_TWO = 1.128  # ASTM STP 15D / Montgomery Appendix VI, n = 2
_MEDIAN_MR_CONST = math.sqrt(2.0) * float(stats.norm.ppf(0.75))  # 0.95387
_MAD_CONST = 1.0 / float(stats.norm.ppf(0.75))  # 1.4826
_FORMAT_VERSION = 1


@dataclass(frozen=True)
class Baseline:
    """A frozen baseline.  Centre and sigmas are on the monitored scale (transformed if ``transform``).

    ``source`` is ``"estimated"`` or ``"fixed"``.  Fields that a fixed
    baseline cannot know are ``None``.

    ``n``: readings used (after screening) out of ``n_offered``;
    ``sigma``: short-term, MR-bar/1.128; ``sigma_overall``: sd with ddof=1;
    ``dropped_indices`` / ``dropped_reasons``: positions (0-based, among the
    readings offered) removed by the screen and why; ``normality_statistic``
    is Anderson-Darling A* and ``normality_pvalue`` its Table 4.9 p, on the
    monitored scale; ``lag1_pvalue`` is the Ljung-Box p at one lag;
    ``runs_pvalue`` the two-sided runs-about-the-median p (None when that
    check could not run); ``warnings`` are plain sentences for the operator.
    """

    source: str
    n: int | None
    centre: float
    sigma: float
    median: float | None = None
    sigma_overall: float | None = None
    mr_bar: float | None = None
    n_offered: int | None = None
    dropped_indices: tuple[int, ...] = ()
    dropped_reasons: tuple[str, ...] = ()
    normality_statistic: float | None = None
    normality_pvalue: float | None = None
    transform: dict[str, float] | None = None
    distribution_free_only: bool = False
    no_spread: bool = False
    no_spread_reason: str | None = None
    lag1_autocorrelation: float | None = None
    lag1_pvalue: float | None = None
    autocorrelated: bool = False
    runs_pvalue: float | None = None
    warnings: tuple[str, ...] = ()
    method: str = ""
    extra: dict[str, Any] = field(default_factory=dict)

    # -- use -----------------------------------------------------------------
    def transform_values(self, values) -> np.ndarray:
        """Readings on the monitored scale (Box-Cox applied when the baseline says so)."""
        a = np.asarray(values, dtype=float)
        if self.transform and "boxcox" in self.transform:
            if np.any(a <= 0):
                raise ValueError("this baseline monitors Box-Cox transformed values; readings must be positive")
            return special.boxcox(a, self.transform["boxcox"])
        return a

    def standardise(self, values) -> np.ndarray:
        """z = (value - centre) / sigma on the monitored scale.  Refused when the baseline has no spread.

        >>> b = fixed_baseline(10.0, 0.5)
        >>> b.standardise([10.0, 11.0]).tolist()
        [0.0, 2.0]
        """
        if self.no_spread or not self.sigma > 0:
            raise ValueError(f"cannot standardise: the baseline has no spread ({self.no_spread_reason})")
        return (self.transform_values(values) - self.centre) / self.sigma

    # -- storage ---------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able data, with a format version."""
        d = asdict(self)
        d["dropped_indices"] = list(self.dropped_indices)
        d["dropped_reasons"] = list(self.dropped_reasons)
        d["warnings"] = list(self.warnings)
        d["format_version"] = _FORMAT_VERSION
        return d

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "Baseline":
        if data.get("format_version") != _FORMAT_VERSION:
            raise ValueError(
                f"baseline format version {data.get('format_version')!r} is not supported "
                f"(this build reads version {_FORMAT_VERSION})"
            )
        names = {f.name for f in fields(cls)}
        unknown = set(data) - names - {"format_version"}
        if unknown:
            raise ValueError(f"unknown baseline fields: {sorted(unknown)}")
        kw = {k: v for k, v in data.items() if k in names}
        for k in ("dropped_indices", "dropped_reasons", "warnings"):
            if k in kw:
                kw[k] = tuple(kw[k])
        return cls(**kw)


def fixed_baseline(centre: float, sigma: float, *, transform: dict[str, float] | None = None, note: str = "") -> Baseline:
    """A baseline given by the user (e.g. from a specification or an earlier study).

    >>> b = fixed_baseline(250.0, 1.2)
    >>> b.source, b.centre, b.sigma, b.no_spread
    ('fixed', 250.0, 1.2, False)
    """
    c = float(centre)
    s = float(sigma)
    if not math.isfinite(c):
        raise ValueError(f"centre must be a finite number, got {centre!r}")
    if not math.isfinite(s) or s < 0:
        raise ValueError(f"sigma must be a finite number >= 0, got {sigma!r}")
    if transform is not None and set(transform) != {"boxcox"}:
        raise ValueError(f"transform must be None or {{'boxcox': lambda}}, got {transform!r}")
    return Baseline(
        source="fixed",
        n=None,
        centre=c,
        sigma=s,
        median=None,
        transform=dict(transform) if transform else None,
        no_spread=s == 0,
        no_spread_reason="the given sigma is 0" if s == 0 else None,
        method="fixed: centre and sigma given" + (f" ({note})" if note else ""),
    )


def lag1_autocorrelation(x) -> tuple[float, float]:
    """Lag-1 sample autocorrelation r1 and its Ljung-Box (1978) p-value at one lag.

    ``r1 = sum (x_t - m)(x_{t+1} - m) / sum (x_t - m)^2``,
    ``Q = n (n + 2) r1^2 / (n - 1)`` referred to chi-square with 1 d.f. (two-sided in r1).

    >>> r, p = lag1_autocorrelation([1.0, 2.0, 1.0, 2.0, 1.0, 2.0, 1.0, 2.0])
    >>> round(r, 4), p < 0.05
    (-0.875, True)
    """
    a = np.asarray(x, dtype=float)
    n = a.size
    if n < 3:
        raise ValueError(f"lag-1 autocorrelation needs at least 3 values, got {n}")
    d = a - a.mean()
    den = float(d @ d)
    if den == 0:
        raise ValueError("all values are equal: autocorrelation is undefined")
    r1 = float(d[:-1] @ d[1:]) / den
    q = n * (n + 2) * r1 * r1 / (n - 1)
    return r1, float(stats.chi2.sf(q, 1))


def _kept_moving_ranges(a: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """|x_i - x_{i-1}| for neighbouring positions that are both kept."""
    both = keep[1:] & keep[:-1]
    return np.abs(np.diff(a))[both]


def _robust_sigma(a: np.ndarray, keep: np.ndarray) -> tuple[float, str]:
    mr = _kept_moving_ranges(a, keep)
    if mr.size and np.median(mr) > 0:
        return float(np.median(mr)) / _MEDIAN_MR_CONST, "median moving range / 0.9539"
    kept = a[keep]
    mad = float(np.median(np.abs(kept - np.median(kept))))
    return mad * _MAD_CONST, "MAD x 1.4826 (median moving range was 0)"


def _screen(a: np.ndarray, cut: float, max_rounds: int = 20) -> tuple[np.ndarray, list[int], list[str]]:
    keep = np.ones(a.size, dtype=bool)
    dropped: list[int] = []
    reasons: list[str] = []
    for _ in range(max_rounds):
        rs, how = _robust_sigma(a, keep)
        if not rs > 0:
            break
        med = float(np.median(a[keep]))
        dist = np.abs(a - med) / rs
        out = keep & (dist > cut)
        if not out.any():
            break
        for i in np.flatnonzero(out):
            dropped.append(int(i))
            reasons.append(
                f"reading {int(i)} = {a[i]:.6g} lies {dist[i]:.2f} robust sigmas from the median "
                f"{med:.6g} (robust sigma {rs:.4g} by {how}; limit {cut})"
            )
        keep &= ~out
    order = np.argsort(dropped, kind="stable")
    return keep, [dropped[i] for i in order], [reasons[i] for i in order]


def _spread(a: np.ndarray, keep: np.ndarray) -> tuple[float, float, float]:
    mr = _kept_moving_ranges(a, keep)
    mr_bar = float(mr.mean()) if mr.size else 0.0
    kept = a[keep]
    sd = float(kept.std(ddof=1)) if kept.size > 1 else 0.0
    return mr_bar, mr_bar / D2_SPAN_TWO, sd


def _runs_pvalue(kept: np.ndarray) -> float | None:
    """Two-sided runs-about-the-median p, or None while rules.runs is not available."""
    try:
        from rules.runs import median_runs_test  # lazy: written by another module's owner
    except ImportError:
        return None
    try:
        res = median_runs_test(kept, alternative="two-sided")
    except ValueError:  # e.g. every reading on one side of the median
        return None
    return float(res.pvalue)


_FEW_DISTINCT = 10  # fewer distinct readings than this: resolution warning (common practice, no source)
_MAX_ABS_LAMBDA = 5.0  # wider exponents mean nearly constant or coarse data; common practice, no source


def _fit_boxcox_screened(a: np.ndarray, keep: np.ndarray, cut: float, alpha: float):
    """Alternate the Box-Cox fit and the screen until the kept set settles (at most 5 rounds).

    Returns (lambda, transformed values, keep, dropped, reasons, AD result) or None when no
    usable exponent exists (|lambda| > 5, or the transformed values lose their spread).
    """
    k_fit = keep
    try:
        # scipy warns when its exponent had to be held back from overflowing (a spread tiny
        # beside the level, e.g. 500 +- 1); such an exponent is far past _MAX_ABS_LAMBDA and
        # refused below, so the warning would only reach the daemon's output as noise
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="The optimal lambda is", category=UserWarning)
            for _ in range(5):
                lam = boxcox_normalise(a[k_fit], alpha=alpha).lmbda
                if not abs(lam) <= _MAX_ABS_LAMBDA:
                    return None
                a_t = special.boxcox(a, lam)
                if not np.all(np.isfinite(a_t)):
                    return None
                keep_t, dropped_t, reasons_t = _screen(a_t, cut)
                if np.array_equal(keep_t, k_fit):
                    break
                k_fit = keep_t
            return lam, a_t, keep_t, dropped_t, reasons_t, anderson_darling_test(a_t[keep_t])
    except ValueError:  # e.g. the transformed readings are all equal
        return None


def estimate_baseline(
    x,
    *,
    screen_cut: float = 3.5,
    normality_alpha: float = 0.05,
    warning_alpha: float = 0.01,
    min_readings: int = MIN_BASELINE_LENGTH,
    try_boxcox: bool = True,
) -> Baseline:
    """Estimate a baseline from in-control readings (see the module docstring for every formula).

    ``normality_alpha``: level of the Anderson-Darling test.
    ``warning_alpha``: level for the runs and autocorrelation warnings.

    >>> rng = np.random.default_rng(7)
    >>> x = 250.0 + rng.normal(0.0, 2.0, size=100)
    >>> x[40] = 290.0                      # a mis-read on the checkweigher
    >>> b = estimate_baseline(x)
    >>> b.n, b.dropped_indices, round(b.centre, 1), round(b.sigma, 1)
    (99, (40,), 249.6, 1.8)
    """
    a = np.asarray(x, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"baseline readings must be one-dimensional, got shape {a.shape}")
    bad = np.flatnonzero(~np.isfinite(a))
    if bad.size:
        raise ValueError(f"baseline reading {int(bad[0])} is not a finite number ({a[bad[0]]!r})")
    if a.size < min_readings:
        raise ValueError(f"a baseline needs at least {min_readings} readings, got {a.size}")
    for name, v in (("normality_alpha", normality_alpha), ("warning_alpha", warning_alpha)):
        if not 0 < v < 1:
            raise ValueError(f"{name} must be between 0 and 1, got {v!r}")
    if not screen_cut > 0:
        raise ValueError(f"screen_cut must be > 0, got {screen_cut!r}")

    warnings: list[str] = []
    notes: list[str] = [
        f"centre = mean; sigma = MR-bar/{D2_SPAN_TWO}; screen: |x - median| > {screen_cut} robust sigmas dropped"
    ]
    keep, dropped, reasons = _screen(a, screen_cut)
    if len(dropped) > 0.1 * a.size:
        warnings.append(f"{len(dropped)} of {a.size} readings were screened out; the baseline may not be in control")
    kept = a[keep]
    if kept.size < min_readings:
        raise ValueError(f"only {kept.size} readings remain after screening; a baseline needs {min_readings}")
    mr_bar, sigma, sd = _spread(a, keep)

    def result(**kw: Any) -> Baseline:
        base = dict(
            source="estimated",
            n=int(keep.sum()),
            n_offered=int(a.size),
            dropped_indices=tuple(dropped),
            dropped_reasons=tuple(reasons),
        )
        base.update(kw)
        return Baseline(**base)

    if sd == 0 or sigma == 0:
        why = (
            "all kept readings are equal"
            if sd == 0
            else "every moving range between kept neighbours is 0, so the short-term sigma is 0"
        )
        return result(
            centre=float(kept.mean()),
            median=float(np.median(kept)),
            sigma=0.0,
            sigma_overall=sd,
            mr_bar=mr_bar,
            no_spread=True,
            no_spread_reason=why,
            warnings=tuple(warnings + [f"no spread: {why}; nothing can be standardised against this baseline"]),
            method="; ".join(notes),
        )

    distinct = int(np.unique(kept).size)
    if distinct < _FEW_DISTINCT:
        warnings.append(
            f"only {distinct} distinct values among {kept.size} readings: the gauge resolution is coarse "
            "for this spread, so normal-theory p-values are rough"
        )
    transform: dict[str, float] | None = None
    distribution_free = False
    ad = anderson_darling_test(kept)
    if ad.rejects(normality_alpha):
        if try_boxcox and np.all(a > 0):
            # Fit lambda and screen on the transformed scale in turn until the kept set settles:
            # a raw-scale screen of skewed data drops genuine tail readings and would bias lambda.
            bc_fit = _fit_boxcox_screened(a, keep, screen_cut, normality_alpha)
            if bc_fit is not None:
                lam, a_t, keep_t, dropped_t, reasons_t, ad_t = bc_fit
            if bc_fit is not None and not ad_t.rejects(normality_alpha) and keep_t.sum() >= min_readings:
                transform = {"boxcox": lam}
                a, keep, dropped, reasons, ad = a_t, keep_t, dropped_t, reasons_t, ad_t
                kept = a[keep]
                mr_bar, sigma, sd = _spread(a, keep)
                notes.append(f"Box-Cox lambda = {lam:.4g} restored normality; estimates are on the transformed scale")
            else:
                distribution_free = True
                after = "no usable exponent" if bc_fit is None else f"p = {ad_t.pvalue:.3g}"
                warnings.append(
                    f"normality rejected (Anderson-Darling p = {ad.pvalue:.3g}) and not restored by Box-Cox "
                    f"({after}); use distribution-free detectors only"
                )
        else:
            distribution_free = True
            why = "readings are not all positive" if try_boxcox else "Box-Cox not tried"
            warnings.append(
                f"normality rejected (Anderson-Darling p = {ad.pvalue:.3g}); {why}; use distribution-free detectors only"
            )

    r1, p_r1 = lag1_autocorrelation(kept)
    autocorrelated = p_r1 < warning_alpha
    if autocorrelated:
        warnings.append(
            f"readings are autocorrelated (lag-1 r = {r1:.3f}, Ljung-Box p = {p_r1:.3g}); "
            "limits from MR-bar understate the spread of a wandering process"
        )
    runs_p = _runs_pvalue(kept)
    if runs_p is None:
        notes.append("runs-about-the-median check skipped (rules.runs not available or not applicable)")
    elif runs_p < warning_alpha:
        warnings.append(f"runs about the median are not random (p = {runs_p:.3g}); the baseline may contain a pattern")

    return result(
        n=int(keep.sum()),
        dropped_indices=tuple(dropped),
        dropped_reasons=tuple(reasons),
        centre=float(kept.mean()),
        median=float(np.median(kept)),
        sigma=float(sigma),
        sigma_overall=float(sd),
        mr_bar=float(mr_bar),
        normality_statistic=float(ad.adjusted),
        normality_pvalue=float(ad.pvalue),
        transform=transform,
        distribution_free_only=distribution_free,
        lag1_autocorrelation=float(r1),
        lag1_pvalue=float(p_r1),
        autocorrelated=bool(autocorrelated),
        runs_pvalue=runs_p,
        warnings=tuple(warnings),
        method="; ".join(notes),
    )
