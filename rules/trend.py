"""Mann-Kendall trend test, Sen's slope, and a rolling-window Mann-Kendall drift detector.

Mann-Kendall (Mann 1945, Econometrica 13(3):245-259; Kendall 1975, *Rank
Correlation Methods*; formulas as in Gilbert 1987, *Statistical Methods for
Environmental Pollution Monitoring*, Ch. 16)::

    S      = sum_{i<j} sgn(x_j - x_i)
    Var(S) = [n(n-1)(2n+5) - sum_p t_p(t_p-1)(2t_p+5)] / 18     (t_p: size of tie group p)
    Z      = (S - 1)/sqrt(Var) if S > 0,  0 if S = 0,  (S + 1)/sqrt(Var) if S < 0

Conventions: values that are equal contribute 0 to S and enter the tie
correction.  p-values: exact null distribution of S (all n! orders equally
likely; the number of inversions follows the Mahonian distribution) when
there are no ties and ``n <= EXACT_MAX_N = 40`` (our choice: Kendall's and
Gilbert's tables stop at about this size and the normal approximation is
good beyond it); otherwise the continuity-corrected normal approximation.

Sen's slope (Sen 1968, JASA 63(324):1379-1389): the median of the pairwise
slopes ``(x_j - x_i)/(t_j - t_i)``; confidence interval as in Gilbert (1987):
``C = z_{1-alpha/2} sqrt(Var S)``, ``M1 = (N' - C)/2``, ``M2 = (N' + C)/2``;
the limits are the M1-th and (M2+1)-th of the ascending slopes.
"""

from __future__ import annotations

import bisect
import math
from collections import deque
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from scipy import special, stats

from rules.detector import Signal, StreamDetector, check_choice, check_float, check_int
from rules.registry import register

try:  # the compiled window (rules/_windows.c); _KendallWindow below is the pure-Python reference
    from rules._windows import MAX_W as _C_MAX_W, KendallWindow as _CKendallWindow
except ImportError:  # not built (no compiler at install): the Python window does the same, slower
    _CKendallWindow, _C_MAX_W = None, 0

__all__ = [
    "EXACT_MAX_N",
    "MannKendallDetector",
    "MannKendallResult",
    "SenSlopeResult",
    "mann_kendall_s_sf",
    "mann_kendall_test",
    "sen_slope",
]

EXACT_MAX_N = 40
_ALTERNATIVES = ("two-sided", "increasing", "decreasing")
_SQRT2 = math.sqrt(2.0)


# -- exact null distribution of S ------------------------------------------------------


@lru_cache(maxsize=64)
def _inversion_cdf(n: int) -> np.ndarray:
    """P(inversions <= k), k = 0..n(n-1)/2, for a random order of n distinct values.

    Built by the recursion p_m(k) = (1/m) sum_{j=0}^{m-1} p_{m-1}(k - j): only sums of
    positive terms, so the small tail probabilities keep their relative accuracy.
    """
    p = np.ones(1)
    for m in range(2, n + 1):
        p = np.convolve(p, np.ones(m)) / m
    c = np.cumsum(p)
    c.setflags(write=False)
    return c


def mann_kendall_s_sf(s: float, n: int) -> float:
    """Exact P(S >= s) for n distinct values with no trend.

    S = N' - 2 * inversions with N' = n(n-1)/2, so P(S >= s) = P(inversions <= (N' - s)/2).

    >>> round(mann_kendall_s_sf(6, 4), 4), round(mann_kendall_s_sf(4, 5), 4)
    (0.0417, 0.2417)
    """
    n = check_int("n", n, 1)
    npairs = n * (n - 1) // 2
    kmax = math.floor((npairs - s) / 2)
    if kmax < 0:
        return 0.0
    if kmax >= npairs:
        return 1.0
    return float(_inversion_cdf(n)[kmax])


def _pvalues_from_s(s: int, tie_term: int, n: int) -> tuple[float, float, float, str]:
    """(p_increasing, p_decreasing, z, method) for one sample; the shared core of test and detector."""
    var = (n * (n - 1) * (2 * n + 5) - tie_term) / 18.0
    if var <= 0:
        return 1.0, 1.0, 0.0, "normal"
    z = (s - 1) / math.sqrt(var) if s > 0 else ((s + 1) / math.sqrt(var) if s < 0 else 0.0)
    if tie_term == 0 and n <= EXACT_MAX_N:
        cdf = _inversion_cdf(n)
        npairs = n * (n - 1) // 2
        # P(S >= s) and, by symmetry, P(S <= s) = P(S >= -s).
        k_up = (npairs - s) // 2
        k_dn = (npairs + s) // 2
        p_up = float(cdf[k_up]) if k_up < npairs else 1.0
        p_dn = float(cdf[k_dn]) if k_dn < npairs else 1.0
        return p_up, p_dn, z, "exact"
    p_up = 0.5 * math.erfc(z / _SQRT2)
    p_dn = 0.5 * math.erfc(-z / _SQRT2)
    return p_up, p_dn, z, "normal"


def _tie_term(a: np.ndarray) -> int:
    _, counts = np.unique(a, return_counts=True)
    t = counts[counts > 1].astype(np.int64)
    return int(np.sum(t * (t - 1) * (2 * t + 5)))


def _s_statistic(a: np.ndarray) -> int:
    n = a.size
    s = 0
    for start in range(0, n, 1024):  # row blocks keep memory at O(1024 n)
        rows = a[start : start + 1024]
        sg = np.sign(a[None, :] - rows[:, None])
        i = np.arange(start, start + rows.size)[:, None]
        s += int(sg[np.arange(n)[None, :] > i].sum())
    return s


@dataclass(frozen=True)
class MannKendallResult:
    """Result of :func:`mann_kendall_test`.

    ``statistic`` is S (Mann's statistic, same as ``s``); ``z`` its
    continuity-corrected normal score; ``tau`` = S / (n(n-1)/2).
    """

    s: int
    var_s: float
    z: float
    statistic: int
    pvalue: float
    tau: float
    n: int
    alternative: str
    method: str


def mann_kendall_test(x, alternative: str = "two-sided", method: str = "auto") -> MannKendallResult:
    """Mann-Kendall test for a monotonic trend in the order given.

    ``alternative``: ``"two-sided"``, ``"increasing"`` or ``"decreasing"``.
    ``method``: ``"auto"`` (exact when no ties and n <= 40, else normal),
    ``"exact"`` or ``"normal"``.  Formulas in the module docstring.

    Wisconsin Administrative Code hand example (concentrations 100, 50, 85, 75, 50):

    >>> r = mann_kendall_test([100, 50, 85, 75, 50], method="normal")
    >>> r.s, round(r.var_s, 4), round(r.z, 5), round(r.pvalue, 5)
    (-5, 15.6667, -1.01058, 0.31222)
    """
    check_choice("alternative", alternative, _ALTERNATIVES)
    check_choice("method", method, ("auto", "exact", "normal"))
    a = np.asarray(x, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"x must be one-dimensional, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("x contains NaN or infinite values")
    n = a.size
    if n < 3:
        raise ValueError(f"the Mann-Kendall test needs at least 3 values, got {n}")
    s = _s_statistic(a)
    tie = _tie_term(a)
    var = (n * (n - 1) * (2 * n + 5) - tie) / 18.0
    if method == "exact":
        if tie:
            raise ValueError("the exact distribution of S is for data without ties")
        if n > 200:
            raise ValueError("the exact distribution is computed for n <= 200 only")
        use_exact = True
    elif method == "normal":
        use_exact = False
    else:
        use_exact = tie == 0 and n <= EXACT_MAX_N
    if use_exact:
        npairs = n * (n - 1) // 2
        cdf = _inversion_cdf(n)
        p_up = float(cdf[(npairs - s) // 2]) if (npairs - s) // 2 < npairs else 1.0
        p_dn = float(cdf[(npairs + s) // 2]) if (npairs + s) // 2 < npairs else 1.0
        z = (s - np.sign(s)) / math.sqrt(var)
        how = f"Mann-Kendall, exact null distribution of S (no ties, n = {n})"
    else:
        if var > 0:
            z = (s - np.sign(s)) / math.sqrt(var)
        else:
            z = 0.0
        p_up = float(special.ndtr(-z)) if var > 0 else 1.0
        p_dn = float(special.ndtr(z)) if var > 0 else 1.0
        how = "Mann-Kendall, normal approximation with tie-corrected variance and continuity correction"
    if alternative == "increasing":
        p = p_up
    elif alternative == "decreasing":
        p = p_dn
    else:
        p = min(1.0, 2.0 * min(p_up, p_dn))
    return MannKendallResult(
        s=int(s),
        var_s=float(var),
        z=float(z),
        statistic=int(s),
        pvalue=float(p),
        tau=float(s / (n * (n - 1) / 2)),
        n=n,
        alternative=alternative,
        method=how,
    )


# -- Sen's slope ----------------------------------------------------------------------


@dataclass(frozen=True)
class SenSlopeResult:
    """Sen's slope with its confidence interval (Gilbert 1987 ranks).

    ``intercept`` = median(x) - slope * median(t) (Conover's convention, as in
    ``scipy.stats.theilslopes``).
    """

    slope: float
    intercept: float
    low: float
    high: float
    confidence: float
    n_slopes: int
    method: str


def _value_at_rank(sorted_vals: np.ndarray, rank: float) -> float:
    """Value at a 1-based, possibly fractional rank, linearly interpolated; ranks clipped to [1, N]."""
    n = sorted_vals.size
    r = min(max(rank, 1.0), float(n))
    lo = int(math.floor(r))
    frac = r - lo
    if frac == 0 or lo >= n:
        return float(sorted_vals[lo - 1])
    return float(sorted_vals[lo - 1] + frac * (sorted_vals[lo] - sorted_vals[lo - 1]))


def sen_slope(x, t=None, confidence: float = 0.95, ci_rank: str = "interpolate") -> SenSlopeResult:
    """Sen's (1968) slope: median of pairwise slopes, with Gilbert's (1987) confidence interval.

    ``t`` defaults to 0, 1, 2, ...; pairs with equal ``t`` are skipped.  Var(S)
    for the interval is corrected for ties in x and in t (Sen 1968, eq. 2.6).
    ``ci_rank="interpolate"`` interpolates fractional ranks M1 and M2 + 1;
    ``"round"`` rounds them to the nearest rank (as ``scipy.stats.theilslopes``).

    >>> round(sen_slope([100, 50, 85, 75, 50]).slope, 4)
    -9.1667
    """
    check_choice("ci_rank", ci_rank, ("interpolate", "round"))
    check_float("confidence", confidence, 0.0, 1.0, open_lo=True, open_hi=True)
    y = np.asarray(x, dtype=float)
    tt = np.arange(y.size, dtype=float) if t is None else np.asarray(t, dtype=float)
    if y.ndim != 1 or tt.shape != y.shape:
        raise ValueError("x and t must be one-dimensional and of equal length")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(tt))):
        raise ValueError("x or t contains NaN or infinite values")
    if y.size < 2:
        raise ValueError("Sen's slope needs at least 2 values")
    i, j = np.triu_indices(y.size, k=1)
    dt = tt[j] - tt[i]
    ok = dt != 0
    if not ok.any():
        raise ValueError("all t are equal: no slope can be formed")
    slopes = np.sort((y[j] - y[i])[ok] / dt[ok])
    nslopes = slopes.size
    med = float(np.median(slopes))
    n = y.size
    var = (n * (n - 1) * (2 * n + 5) - _tie_term(y) - _tie_term(tt)) / 18.0
    c = float(stats.norm.ppf(0.5 + confidence / 2.0)) * math.sqrt(max(var, 0.0))
    m1 = (nslopes - c) / 2.0
    m2 = (nslopes + c) / 2.0
    if ci_rank == "interpolate":
        low = _value_at_rank(slopes, m1)
        high = _value_at_rank(slopes, m2 + 1.0)
    else:
        low = float(slopes[max(int(np.round(m1)) - 1, 0)])
        high = float(slopes[min(int(np.round(m2)), nslopes - 1)])
    return SenSlopeResult(
        slope=med,
        intercept=float(np.median(y) - med * np.median(tt)),
        low=low,
        high=high,
        confidence=confidence,
        n_slopes=int(nslopes),
        method=f"Sen (1968) median pairwise slope; CI ranks M1, M2+1 (Gilbert 1987), {ci_rank}",
    )


def _sen_median_unit(values: np.ndarray) -> float:
    """Sen's slope per reading for equally spaced values (t = 0, 1, ...)."""
    i, j = np.triu_indices(values.size, k=1)
    return float(np.median((values[j] - values[i]) / (j - i)))


# -- streaming detector ----------------------------------------------------------------------


def _tie_increment(c: int) -> int:
    """f(c+1) - f(c) for f(t) = t(t-1)(2t+5): the change in the tie term when a group grows from c to c+1."""
    return (c + 1) * c * (2 * c + 7) - c * (c - 1) * (2 * c + 5)


class _KendallWindow:
    """The last w values with Mann-Kendall's S and the tie term kept up to date (pure Python;
    the reference for the compiled ``rules._windows.KendallWindow``, which does the same).

    Over a sorted copy of the window: the entering value adds (#smaller - #larger) to S,
    the leaving one removes (#larger - #smaller), each found by bisection (O(log w)
    comparisons plus an O(w) memory move), no pair recount.
    """

    __slots__ = ("w", "buf", "sorted", "s", "ties")

    def __init__(self, w: int) -> None:
        self.w = w
        self.buf: deque[float] = deque()
        self.sorted: list[float] = []
        self.s = 0
        self.ties = 0

    def push(self, v: float) -> tuple[int, int] | None:
        """Add ``v``; None until the window is full, then ``(S, tie term)``."""
        sl = self.sorted
        if len(self.buf) == self.w:
            old = self.buf.popleft()
            lo = bisect.bisect_left(sl, old)
            hi = bisect.bisect_right(sl, old)
            c = hi - lo  # copies of old, itself included
            del sl[lo]
            # pairs (old, later j): sgn(x_j - old) = #larger - #smaller among the others
            self.s -= (len(sl) + 1 - hi) - lo
            self.ties -= _tie_increment(c - 1)
        lo = bisect.bisect_left(sl, v)
        hi = bisect.bisect_right(sl, v)
        self.s += lo - (len(sl) - hi)
        self.ties += _tie_increment(hi - lo)
        sl.insert(hi, v)
        self.buf.append(v)
        return (self.s, self.ties) if len(self.buf) == self.w else None

    def values(self) -> list[float]:
        return list(self.buf)

    def state(self) -> tuple[int, int, int]:
        """(values held, S, tie term)."""
        return len(self.buf), self.s, self.ties


@register
class MannKendallDetector(StreamDetector):
    """Rolling-window Mann-Kendall test for a drift (``pattern="drift"``).

    Over the last ``window`` values, S and the tie term of Var(S) are kept
    up to date as a value enters and the oldest leaves, using a sorted copy
    of the window: the entering value adds (#smaller - #larger) to S, the
    leaving one removes (#larger - #smaller), each found by bisection
    (O(log w) comparisons plus an O(w) memory move), no pair recount.

    p-values are those of :func:`mann_kendall_test` on the window (exact when
    the window has no ties and ``window <= 40``, else normal with continuity
    correction).  ``direction="both"`` fires when the one-sided p of either
    side is <= alpha/2 (a two-sided test at ``alpha``); ``"up"`` or ``"down"``
    test one side at ``alpha``.  The signal's ``p_value`` is the one-sided p
    of the side that fired; ``statistic`` is S; ``onset_index`` is the first
    value of the window; ``detail["slope_per_reading"]`` is Sen's slope of the
    window and ``size = slope * (window - 1)``, the estimated change across
    the window, in the units fed.  After a signal the window is cleared.

    >>> det = MannKendallDetector(window=30, alpha=0.001)
    >>> sigs = [det.update(0.05 * i + ((-1) ** i) * 0.3) for i in range(60)]
    >>> [s.index for s in sigs if s is not None]
    [29, 59]
    """

    key = "mann_kendall"
    name = "Mann-Kendall trend test"
    STATE_VERSION = 1
    PARAMS = ("window", "alpha", "direction")

    def __init__(self, window: int = 50, alpha: float = 0.001, direction: str = "both") -> None:
        self.window = check_int("window", window, 4, 100_000)
        self.alpha = check_float("alpha", alpha, 0.0, 0.5, open_lo=True)
        self.direction = check_choice("direction", direction, ("both", "up", "down"))
        self.min_values = self.window
        self._thr = self.alpha / 2.0 if self.direction == "both" else self.alpha
        w = self.window
        self._nterm = w * (w - 1) * (2 * w + 5)
        # Cheap, conservative gates so that the p-value is computed only near the threshold;
        # the decision itself is always _decide's (shared with scan).
        self._z_gate = float(stats.norm.isf(self._thr)) - 1e-6
        self._s_gate: int | None = None
        if w <= EXACT_MAX_N:
            npairs = w * (w - 1) // 2
            loose = self._thr * (1.0 + 1e-9)
            self._s_gate = next(
                (s for s in range(-npairs, npairs + 1, 2) if mann_kendall_s_sf(s, w) <= loose), npairs + 1
            )
        self._n = 0
        self._reset()

    def _reset(self) -> None:
        if _CKendallWindow is not None and self.window <= _C_MAX_W:
            self._win = _CKendallWindow(self.window)
        else:
            self._win = _KendallWindow(self.window)
        self._push = self._win.push
        self.last: int | None = None
        self._last_st: tuple[int, int] | None = None

    @property
    def last_pvalue(self) -> float | None:
        """p-value of the latest full window (two-sided for direction "both"), None before the window fills."""
        if self._last_st is None:
            return None
        p_up, p_dn, _, _ = _pvalues_from_s(self._last_st[0], self._last_st[1], self.window)
        if self.direction == "up":
            return p_up
        if self.direction == "down":
            return p_dn
        return min(1.0, 2.0 * min(p_up, p_dn))

    def _decide(self, s: int, ties: int) -> tuple[str | None, float, float, float]:
        p_up, p_dn, z, _ = _pvalues_from_s(s, ties, self.window)
        side = None
        if self.direction != "down" and p_up <= self._thr:
            side = "up"
        elif self.direction != "up" and p_dn <= self._thr:
            side = "down"
        return side, p_up, p_dn, z

    def _signal(self, index: int, values: np.ndarray, s: int, ties: int, side: str, p: float, z: float) -> Signal:
        w = self.window
        slope = _sen_median_unit(values)
        return Signal(
            pattern="drift",
            detector=self.name,
            p_value=p,
            index=index,
            onset_index=index - w + 1,
            direction=side,
            size=slope * (w - 1),
            statistic=float(s),
            detail={
                "slope_per_reading": slope,
                "window": w,
                "z": z,
                "var_s": (w * (w - 1) * (2 * w + 5) - ties) / 18.0,
                "method": "exact" if ties == 0 and w <= EXACT_MAX_N else "normal",
            },
        )

    def update(self, x: float) -> Signal | None:
        v = float(x)
        if not math.isfinite(v):
            raise ValueError(f"value must be finite, got {x!r}")
        index = self._n
        self._n += 1
        got = self._push(v)
        if got is None:
            self.last = None
            self._last_st = None
            return None
        s, ties = got
        self.last = s
        self._last_st = (s, ties)
        a = s if s >= 0 else -s
        if ties == 0 and self._s_gate is not None:
            if a < self._s_gate:
                return None
        else:
            var18 = self._nterm - ties
            if var18 <= 0 or (a - 1 if a else 0) < self._z_gate * math.sqrt(var18 / 18.0):
                return None
        side, p_up, p_dn, z = self._decide(s, ties)
        if side is None:
            return None
        sig = self._signal(index, np.array(self._win.values(), dtype=float), s, ties, side,
                           p_up if side == "up" else p_dn, z)
        self._reset()
        return sig

    # -- state -----------------------------------------------------------------------------
    def _get_state(self) -> dict[str, Any]:
        return {"n_seen": self._n, "values": self._win.values()}

    def _set_state(self, state: dict[str, Any]) -> None:
        vals = [float(v) for v in state["values"]]
        if len(vals) > self.window:
            raise ValueError(f"state holds {len(vals)} values, more than the window {self.window}")
        if not all(math.isfinite(v) for v in vals):
            raise ValueError("state holds non-finite values")
        self._n = check_int("n_seen", state["n_seen"], len(vals))
        self._reset()
        for v in vals:
            got = self._push(v)
        if len(vals) == self.window:
            self.last, self._last_st = got[0], got

    # -- batch -----------------------------------------------------------------------------
    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        """Signals over ``x`` from a fresh start, identical to feeding ``update``.

        S and the tie term of every full window come from the compiled window
        pushed along ``x`` (``KendallWindow.scan``), or without it from per-lag
        cumulative sums of sgn differences (O(n w) vectorised) and
        :meth:`_window_tie_terms`; after a signal the window restarts,
        which only means the next window must end at least ``window`` values later.
        """
        det = cls(**params)
        a = np.asarray(x, dtype=float).ravel()
        bad = np.flatnonzero(~np.isfinite(a))
        if bad.size:
            raise ValueError(f"value must be finite, got {a[bad[0]]!r} at position {int(bad[0])}")
        n, w = a.size, det.window
        if n < w:
            return []
        m = n - w + 1  # windows [start, start + w)
        if _CKendallWindow is not None and w <= _C_MAX_W:  # the compiled window pushed along a
            st = np.empty((n, 2), dtype=np.int64)
            _CKendallWindow(w).scan(np.ascontiguousarray(a), st)
            s_all, ties = st[w - 1 :, 0].copy(), st[w - 1 :, 1].copy()
        else:
            starts = np.arange(m)
            s_all = np.zeros(m, dtype=np.int64)
            for k in range(1, w):
                d = np.sign(a[k:] - a[:-k]).astype(np.int64)
                c = np.concatenate(([0], np.cumsum(d)))
                s_all += c[starts + (w - k)] - c[starts]
            ties = cls._window_tie_terms(a, w)
        npairs = w * (w - 1) // 2
        var = (w * (w - 1) * (2 * w + 5) - ties) / 18.0
        exact = (ties == 0) & (w <= EXACT_MAX_N)
        p_up = np.ones(m)
        p_dn = np.ones(m)
        pos = var > 0
        z = np.zeros(m)
        z[pos] = (s_all[pos] - np.sign(s_all[pos])) / np.sqrt(var[pos])
        p_up[pos] = 0.5 * special.erfc(z[pos] / _SQRT2)
        p_dn[pos] = 0.5 * special.erfc(-z[pos] / _SQRT2)
        if exact.any():
            cdf = _inversion_cdf(w)
            ku = (npairs - s_all) // 2  # 0..npairs, as in _pvalues_from_s
            kd = (npairs + s_all) // 2
            p_up[exact] = np.where(ku[exact] < npairs, cdf[ku[exact]], 1.0)
            p_dn[exact] = np.where(kd[exact] < npairs, cdf[kd[exact]], 1.0)
        loose = det._thr * (1.0 + 1e-9)
        cand = np.zeros(m, dtype=bool)
        if det.direction != "down":
            cand |= p_up <= loose
        if det.direction != "up":
            cand |= p_dn <= loose
        out: list[Signal] = []
        next_end = w - 1
        for start in np.flatnonzero(cand):
            end = int(start) + w - 1
            if end < next_end:
                continue
            s, t = int(s_all[start]), int(ties[start])
            side, pu, pd, zz = det._decide(s, t)  # the streaming decision, scalar arithmetic
            if side is None:
                continue
            out.append(det._signal(end, a[start : start + w].copy(), s, t, side, pu if side == "up" else pd, zz))
            next_end = end + w
        return out

    @staticmethod
    def _window_tie_terms(a: np.ndarray, w: int) -> np.ndarray:
        """Tie term sum t(t-1)(2t+5) of every window of length w (zeros when x has no ties).

        Since t(t-1)(2t+5) = 18 C(t, 2) + 12 C(t, 3), a window's term is the sum, over
        every pair i < j of equal values inside it, of 18 + 12 (the equal values between
        them).  Pairs are enumerated by following each value's chain of earlier equal
        values (one vectorised pass per step back) while they lie within w - 1; each adds
        its weight to the windows [j - w + 1, i] that hold it, through a difference array.
        Integer arithmetic throughout: identical to the streaming update.
        """
        n = a.size
        m = n - w + 1
        order = np.argsort(a, kind="stable")
        same = a[order[1:]] == a[order[:-1]]
        if not same.any():
            return np.zeros(m, dtype=np.int64)
        prev = np.full(n, -1, dtype=np.int64)  # index of the previous equal value, or -1
        prev[order[1:][same]] = order[:-1][same]
        diff = np.zeros(m + 1, dtype=np.int64)
        j = np.flatnonzero(prev >= 0)
        i = prev[j]
        back = 1  # i is the back-th equal value before j
        while j.size:
            near = j - i < w
            j, i = j[near], i[near]
            if not j.size:
                break
            weight = 18 + 12 * (back - 1)
            lo = np.maximum(j - w + 1, 0)
            hi = np.minimum(i, m - 1)  # windows lo..hi hold both
            diff += np.bincount(lo, minlength=m + 1)[: m + 1] * weight
            diff -= np.bincount(hi + 1, minlength=m + 1)[: m + 1] * weight
            i = prev[i]
            more = i >= 0
            j, i = j[more], i[more]
            back += 1
        return np.cumsum(diff[:m])
