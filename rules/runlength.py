"""Run lengths of detectors and detector sets: Markov chains and seeded simulation.

A *run length* is the number of readings from a fresh start up to and
including the first signal.  Its mean is the ARL: ARL0 in control, ARL1 (the
detection delay) after a change.  Because every detector restarts after a
signal (see :mod:`rules.detector`), the false signals of one detector form a
renewal process and its long-run false-finding rate is ``1 / ARL0``; a set of
detectors that each restart on their own signals has the summed rate
``sum_i 1 / ARL0_i`` (superposition of renewal processes: the expected number of
signals adds up whatever the dependence between detectors).

Chains (numerical, for independent normal readings, in sigma units)
--------------------------------------------------------------------

* :func:`cusum_chain_arl` -- tabular CUSUM, Brook & Evans (1972, *Biometrika*
  59(3):539-549) Markov chain: ``t`` states of width ``w = 2h/(2t-1)``, state 0
  holding the atom at zero.  The discretisation error is O(w^2), so the
  results for ``t`` and ``2t`` states are Richardson-extrapolated
  (``(a_2t w_t^2 - a_t w_2t^2)/(w_t^2 - w_2t^2)``), which gives 5-6 significant
  digits at ``t = 100``.  Two sides: ``1/ARL = 1/ARL+ + 1/ARL-`` (Lucas & Crosier
  1982 use the same combination; it is exact when both sides cannot be
  positive together and, at the usual k and h, agrees with a simulation of the
  joint scheme within its standard error).
* :func:`ewma_chain_arl` -- EWMA with asymptotic limits
  ``+-L sqrt(lam/(2-lam))``, Markov chain of Lucas & Saccucci (1990,
  *Technometrics* 32(1):1-12): the in-control band cut into ``n`` cells
  (``n`` odd), Richardson-extrapolated between ``n`` and ``3n`` cells.
* :func:`shewhart_arl` -- ``1 / P(|Z| > c)``.

Each chain takes the readings as ``N(mu, tau^2)`` *after* standardisation with
the baseline in use, which is how an estimated baseline enters: with true
mean ``m``, sigma ``s`` and estimates ``m^``, ``s^``, the standardised reading
``(x - m^)/s^`` is ``N((delta - e)/r, 1/r^2)`` with ``e = (m^ - m)/s`` and
``r = s^/s`` (see :func:`standardised_moments`).

Simulation
----------

:func:`simulate_run_lengths` runs many seeded streams (one
``numpy.random.SeedSequence`` child per stream, so every detector and every
method sees the same readings) and records, per stream, the first signal of
each detector and of the set.  CUSUM, EWMA, Shewhart and the Western Electric
zone rules have kernels vectorised over streams (one numpy step per reading
for all streams at once); every other registered detector is run through its
own ``scan`` on each stream.  Streams that have not signalled are extended
(4x, same seed, so the prefix is unchanged) up to ``max_readings``; streams
still silent then are *censored* and counted in the result.  The Monte Carlo
standard error of a mean run length is ``sd / sqrt(streams)``.

:func:`simulate_false_finding_rate` instead runs long in-control streams
through each detector's own ``scan`` (restarts included) and counts the
signals: the false-finding rate per reading with a between-stream standard
error.

>>> round(cusum_chain_arl(0.5, 5.0), 1)            # Brook-Evans, two-sided
465.4
>>> round(ewma_chain_arl(0.1, 2.814), 1)           # Lucas-Saccucci design for ARL0 ~ 500
499.6
>>> round(shewhart_arl(3.0), 1)
370.4
>>> res = simulate_run_lengths([("cusum", {"k": 0.5, "h": 4.0})], shift=1.0, n_streams=2000, seed=1)
>>> abs(res.first.mean - 8.38) < 3 * res.first.se   # Brook-Evans: 8.383
True
"""

from __future__ import annotations

import functools
import math
import threading
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Sequence

import numpy as np
from scipy import optimize
from scipy.special import ndtr

from rules.registry import DETECTORS

__all__ = [
    "DetectorSet",
    "RunLengthSummary",
    "SetRunLengths",
    "FalseFindingRate",
    "cusum_chain_arl",
    "ewma_chain_arl",
    "shewhart_arl",
    "cusum_h_for_arl0",
    "ewma_L_for_arl0",
    "shewhart_limit_for_arl0",
    "standardised_moments",
    "normalise_set",
    "simulate_run_lengths",
    "simulate_false_finding_rate",
    "detection_power",
    "KERNEL_KEYS",
    "WINDOW_KEYS",
    "WindowNull",
    "window_pvalues",
    "dead_time_count",
    "single_blas_thread",
]

DetectorSet = Sequence[tuple[str, dict[str, Any]]]

# The chains solve many small linear systems.  A multithreaded BLAS on a busy
# 2-core machine makes each solve ~50x slower than one thread does, so the
# public chain entry points run with BLAS limited to one thread (threadpoolctl,
# when installed; the outermost call sets the limit once).
_blas_depth = threading.local()
try:
    from threadpoolctl import ThreadpoolController as _Ctl
except ImportError:  # pragma: no cover
    _Ctl = None
_ctl = None


def single_blas_thread(fn: Callable) -> Callable:
    """Decorator: run ``fn`` with BLAS limited to one thread (outermost call only)."""

    @functools.wraps(fn)
    def wrapper(*a: Any, **kw: Any) -> Any:
        global _ctl
        if _Ctl is None or getattr(_blas_depth, "on", False):
            return fn(*a, **kw)
        if _ctl is None:
            _ctl = _Ctl()
        _blas_depth.on = True
        try:
            with _ctl.limit(limits=1, user_api="blas"):
                return fn(*a, **kw)
        finally:
            _blas_depth.on = False

    return wrapper


# ------------------------------------------------------------------ chains


def _richardson(a1: float, w1: float, a2: float, w2: float) -> float:
    return (a2 * w1 * w1 - a1 * w2 * w2) / (w1 * w1 - w2 * w2)


def _cusum_upper_chain(k: float, h: float, mu: float, tau: float, t: int) -> tuple[float, float]:
    """Brook & Evans chain for the upper CUSUM on N(mu, tau^2) readings; returns (ARL, w)."""
    w = 2.0 * h / (2 * t - 1)
    mid = np.arange(t) * w
    hi = (np.arange(t) + 0.5) * w
    cdf = ndtr((hi[None, :] - mid[:, None] + k - mu) / tau)
    Q = np.diff(np.concatenate([np.zeros((t, 1)), cdf], axis=1), axis=1)
    arl = np.linalg.solve(np.eye(t) - Q, np.ones(t))
    return float(arl[0]), w


@single_blas_thread
def cusum_chain_arl(
    k: float, h: float, delta: float = 0.0, *, mu: float | None = None, tau: float = 1.0, sides: int = 2, states: int = 100
) -> float:
    """Zero-state ARL of the tabular CUSUM (Page 1954) by the Brook & Evans (1972) chain.

    ``C+_t = max(0, C+_{t-1} + z_t - k)``, ``C-_t = max(0, C-_{t-1} - z_t - k)``,
    signal when either exceeds ``h``.  The standardised readings ``z`` are
    ``N(mu, tau^2)``; ``mu`` defaults to ``delta`` (a step of delta sigma from
    the first reading).  Richardson extrapolation over ``states`` and
    ``2 states`` cells.

    >>> round(cusum_chain_arl(0.5, 4.0), 2), round(cusum_chain_arl(0.5, 4.0, sides=1), 2)
    (167.68, 335.37)
    """
    if not (k >= 0 and h > 0 and tau > 0):
        raise ValueError(f"need k >= 0, h > 0, tau > 0; got k={k}, h={h}, tau={tau}")
    m = float(delta if mu is None else mu)

    def one(mm: float) -> float:
        a1, w1 = _cusum_upper_chain(k, h, mm, tau, states)
        a2, w2 = _cusum_upper_chain(k, h, mm, tau, 2 * states)
        return _richardson(a1, w1, a2, w2)

    up = one(m)
    if sides == 1:
        return up
    if sides != 2:
        raise ValueError(f"sides must be 1 or 2, got {sides!r}")
    return 1.0 / (1.0 / up + 1.0 / one(-m))


def _ewma_chain(lam: float, lo: float, hi: float, mu: float, tau: float, n: int) -> tuple[float, float]:
    w = (hi - lo) / n
    mid = lo + (np.arange(n) + 0.5) * w
    edges = lo + np.arange(n + 1) * w
    cdf = ndtr(((edges[None, :] - (1.0 - lam) * mid[:, None]) / lam - mu) / tau)
    Q = np.diff(cdf, axis=1)
    arl = np.linalg.solve(np.eye(n) - Q, np.ones(n))
    # start at z0 = 0: the cell holding 0 (exact centre when the band is symmetric and n odd)
    return float(np.interp(0.0, mid, arl)), w


@single_blas_thread
def ewma_chain_arl(
    lam: float,
    L: float,
    delta: float = 0.0,
    *,
    mu: float | None = None,
    tau: float = 1.0,
    lower: float | None = None,
    upper: float | None = None,
    states: int = 101,
) -> float:
    """Zero-state ARL of the EWMA chart with asymptotic limits (Lucas & Saccucci 1990 chain).

    ``y_t = lam z_t + (1 - lam) y_{t-1}``, ``y_0 = 0``; signal when
    ``|y_t| > L sqrt(lam / (2 - lam))`` (or outside ``[lower, upper]`` if given).
    ``z ~ N(mu, tau^2)``, ``mu`` defaulting to ``delta``.  ``states`` (odd) cells,
    extrapolated with ``3 states``.

    >>> round(ewma_chain_arl(0.25, 2.998, 0.5), 2)    # Lucas & Saccucci design, 0.5 sigma
    48.29
    """
    if not (0 < lam <= 1 and L > 0 and tau > 0):
        raise ValueError(f"need 0 < lam <= 1, L > 0, tau > 0; got lam={lam}, L={L}, tau={tau}")
    m = float(delta if mu is None else mu)
    c = L * math.sqrt(lam / (2.0 - lam))
    lo = -c if lower is None else float(lower)
    hi = c if upper is None else float(upper)
    if not lo < 0.0 < hi:
        raise ValueError("the start value 0 must lie inside the limits")
    if lam == 1.0:
        return 1.0 / float(ndtr((lo - m) / tau) + ndtr((m - hi) / tau))
    n = int(states) | 1
    a1, w1 = _ewma_chain(lam, lo, hi, m, tau, n)
    a2, w2 = _ewma_chain(lam, lo, hi, m, tau, 3 * n)
    return _richardson(a1, w1, a2, w2)


def shewhart_arl(limit: float, delta: float = 0.0, *, mu: float | None = None, tau: float = 1.0) -> float:
    """ARL of the individuals chart with limits ``+-limit``: ``1 / P(|z| > limit)``, z ~ N(mu, tau^2).

    >>> round(shewhart_arl(3.0), 4)                    # 1 / 0.0026998
    370.3983
    """
    m = float(delta if mu is None else mu)
    p = float(ndtr((-limit - m) / tau) + ndtr((m - limit) / tau))
    return math.inf if p == 0.0 else 1.0 / p


def _solve_log(f: Callable[[float], float], target: float, lo: float, hi: float) -> float:
    def g(v: float) -> float:
        a = f(v)
        # Far out in the tail the chain's linear solve loses all precision (a negative or
        # infinite ARL): such an ARL is far above any target, so count it as "too large".
        return math.log(a) - math.log(target) if 0 < a < math.inf else 50.0

    while g(hi) < 0:
        hi *= 1.5
        if hi > 1e3:
            raise ValueError(f"no threshold reaches ARL0 = {target}")
    if g(lo) > 0:
        raise ValueError(f"ARL0 = {target} is below what the smallest threshold gives")
    return float(optimize.brentq(g, lo, hi, xtol=1e-9))


@single_blas_thread
def cusum_h_for_arl0(k: float, arl0: float, **chain: Any) -> float:
    """h with two-sided :func:`cusum_chain_arl` ``== arl0`` (``chain`` passes mu/tau).

    >>> round(cusum_h_for_arl0(0.5, 370.0), 3)     # Hawkins 1993 / Montgomery: 4.77 (from memory)
    4.774
    """
    return _solve_log(lambda h: cusum_chain_arl(k, h, **chain), arl0, 0.05, 8.0)


@single_blas_thread
def ewma_L_for_arl0(lam: float, arl0: float, **chain: Any) -> float:
    """L with :func:`ewma_chain_arl` ``== arl0``.

    >>> round(ewma_L_for_arl0(0.1, 500.0), 3)
    2.814
    """
    return _solve_log(lambda L: ewma_chain_arl(lam, L, **chain), arl0, 0.3, 4.0)


def shewhart_limit_for_arl0(arl0: float, **kw: Any) -> float:
    """Limit c with ``1/P(|z| > c) == arl0``.

    >>> round(shewhart_limit_for_arl0(370.3983), 4)
    3.0
    """
    return _solve_log(lambda c: shewhart_arl(c, **kw), arl0, 0.5, 7.0)


def standardised_moments(delta: float, mean_error: float, sd_ratio: float) -> tuple[float, float]:
    """Mean and sd of ``(x - m^)/s^`` when x ~ N(m + delta s, s^2), ``m^ = m + e s``, ``s^ = r s``.

    >>> standardised_moments(1.0, 0.5, 2.0)
    (0.25, 0.5)
    """
    return (delta - mean_error) / sd_ratio, 1.0 / sd_ratio


# ------------------------------------------------------------- simulation


def normalise_set(detector_set: DetectorSet | Iterable) -> list[tuple[str, str, dict[str, Any]]]:
    """``[(label, key, params)]``; labels are keys, with ``#i`` appended to repeated keys."""
    items = []
    for item in detector_set:
        if isinstance(item, dict):
            key, params = item["key"], dict(item.get("params", {}))
        else:
            key, params = item[0], dict(item[1] if len(item) > 1 and item[1] is not None else {})
        if not isinstance(key, str):
            raise ValueError(f"detector key must be a string, got {key!r}")
        items.append((key, params))
    if not items:
        raise ValueError("the detector set is empty")
    counts: dict[str, int] = {}
    for key, _ in items:
        counts[key] = counts.get(key, 0) + 1
    seen: dict[str, int] = {}
    out = []
    for key, params in items:
        if counts[key] > 1:
            seen[key] = seen.get(key, 0) + 1
            label = f"{key}#{seen[key]}"
        else:
            label = key
        out.append((label, key, params))
    return out


class _Kernel:
    """State of one detector over many streams; ``step(x)`` returns a fired mask."""

    def __init__(self, m: int, p: dict[str, Any]) -> None:
        self.p = p
        self.reset_all(m)

    def reset_all(self, m: int) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    def take(self, keep: np.ndarray) -> None:  # keep only these rows
        for name, v in vars(self).items():
            if isinstance(v, np.ndarray):
                setattr(self, name, v[keep])


class _CusumKernel(_Kernel):
    def reset_all(self, m: int) -> None:
        hs = float(self.p.get("headstart", 0.0))
        self.cp = np.full(m, hs)
        self.cn = np.full(m, hs)

    def step(self, x: np.ndarray) -> np.ndarray:
        k, h = self.p["k"], self.p["h"]
        np.maximum(self.cp + x - k, 0.0, out=self.cp)
        np.maximum(self.cn - x - k, 0.0, out=self.cn)
        return (self.cp > h) | (self.cn > h)


class _EwmaKernel(_Kernel):
    def reset_all(self, m: int) -> None:
        self.y = np.zeros(m)
        lam, L = self.p["lam"], self.p["L"]
        self.c = L * math.sqrt(lam / (2.0 - lam))

    def step(self, x: np.ndarray) -> np.ndarray:
        lam = self.p["lam"]
        self.y = lam * x + (1.0 - lam) * self.y
        return np.abs(self.y) > self.c


class _ShewhartKernel(_Kernel):
    def reset_all(self, m: int) -> None:
        self.c = float(self.p["limit"])

    def step(self, x: np.ndarray) -> np.ndarray:
        return np.abs(x) > self.c

    def take(self, keep: np.ndarray) -> None:
        pass


class _ZoneKernel(_Kernel):
    """Western Electric rules 1-4 (two of three beyond 2, four of five beyond 1 on one
    side, eight on one side); history starts neutral, so rule 2 can fire on the second
    reading (the start-up convention of Champ & Woodall's 1987 chain)."""

    def reset_all(self, m: int) -> None:
        self.a_up = np.zeros((m, 3), bool)
        self.a_dn = np.zeros((m, 3), bool)
        self.b_up = np.zeros((m, 5), bool)
        self.b_dn = np.zeros((m, 5), bool)
        self.run_up = np.zeros(m, np.int64)
        self.run_dn = np.zeros(m, np.int64)

    def step(self, x: np.ndarray) -> np.ndarray:
        self.a_up = np.concatenate([self.a_up[:, 1:], (x > 2.0)[:, None]], axis=1)
        self.a_dn = np.concatenate([self.a_dn[:, 1:], (x < -2.0)[:, None]], axis=1)
        self.b_up = np.concatenate([self.b_up[:, 1:], (x > 1.0)[:, None]], axis=1)
        self.b_dn = np.concatenate([self.b_dn[:, 1:], (x < -1.0)[:, None]], axis=1)
        self.run_up = np.where(x > 0, self.run_up + 1, 0)
        self.run_dn = np.where(x < 0, self.run_dn + 1, 0)
        return (
            (np.abs(x) > 3.0)
            | (self.a_up.sum(1) >= 2)
            | (self.a_dn.sum(1) >= 2)
            | (self.b_up.sum(1) >= 4)
            | (self.b_dn.sum(1) >= 4)
            | (self.run_up >= 8)
            | (self.run_dn >= 8)
        )


# Keys with a vectorised-over-streams kernel and the parameters each kernel
# understands, with their defaults (None = required).  The class's own defaults
# are filled in first, so kernel and class agree; any parameter the kernel does
# not know (or a fixed option with another value, e.g. EWMA exact limits) sends
# the detector through its class ``scan`` instead.
_KERNELS: dict[str, tuple[type[_Kernel], dict[str, Any]]] = {
    "cusum": (_CusumKernel, {"k": None, "h": None, "headstart": 0.0}),
    "ewma": (_EwmaKernel, {"lam": None, "L": None, "limits": "asymptotic"}),
    "shewhart": (_ShewhartKernel, {"limit": None}),
    "western_electric": (_ZoneKernel, {}),
}
# parameters whose value the kernel can follow (others must equal the kernel default)
_FREE = {"k", "h", "headstart", "lam", "L", "limit"}
KERNEL_KEYS = tuple(_KERNELS)


def _class_defaults(key: str) -> dict[str, Any]:
    import inspect

    cls = DETECTORS.get(key)
    if cls is None:
        return {}
    out = {}
    for name, prm in inspect.signature(cls.__init__).parameters.items():
        if name != "self" and prm.default is not inspect.Parameter.empty:
            out[name] = prm.default
    return out


def _kernel_params(key: str, params: dict[str, Any]) -> dict[str, Any] | None:
    """Kernel parameters for ``(key, params)``, or None when the kernel does not cover them."""
    if key not in _KERNELS:
        return None
    _, known = _KERNELS[key]
    if key == "western_electric":
        # the kernel is rules 1-4 with neutral start-up history; any option: the class decides
        return {} if not params else None
    full = {**_class_defaults(key), **params}
    out: dict[str, Any] = {}
    for name, v in full.items():
        if name not in known or (name not in _FREE and v != known[name]):
            return None
        out[name] = v
    for name, default in known.items():
        if name not in out:
            if default is None:
                return None
            out[name] = default
    return out


def _make_rows(seeds: Sequence[np.random.SeedSequence], n: int, scenario: Callable | None, shift: float, drift: float) -> np.ndarray:
    """Readings of the given streams, shape (len(seeds), n); prefix-stable in n."""
    X = np.empty((len(seeds), n))
    t = np.arange(1, n + 1, dtype=float)
    path = shift + drift * t
    for i, ss in enumerate(seeds):
        noise_ss, aux_ss = ss.spawn(2) if scenario is not None else (ss, None)
        X[i] = np.random.default_rng(noise_ss).standard_normal(n) + path
        if scenario is not None:
            X[i] += scenario(np.random.default_rng(aux_ss), n)
    return X


def _kernel_first(kernel_cls: type[_Kernel], kp: dict[str, Any], X: np.ndarray) -> np.ndarray:
    """First-signal run length (1-based) per row of X, -1 where none."""
    m, n = X.shape
    out = np.full(m, -1, np.int64)
    XT = np.ascontiguousarray(X.T)
    rows = np.arange(m)
    ker = kernel_cls(m, kp)
    for t in range(n):
        fired = ker.step(XT[t, rows])
        if fired.any():
            out[rows[fired]] = t + 1
            keep = ~fired
            rows = rows[keep]
            ker.take(keep)
            if rows.size == 0:
                break
    return out


def _scan_first(cls: type, params: dict[str, Any], X: np.ndarray, horizon: np.ndarray | None = None) -> np.ndarray:
    out = np.full(X.shape[0], -1, np.int64)
    for i in range(X.shape[0]):
        row = X[i] if horizon is None or horizon[i] < 0 else X[i, : horizon[i]]
        sig = cls.scan(row, **params)
        if sig:
            out[i] = sig[0].index + 1
    return out


@dataclass(frozen=True)
class RunLengthSummary:
    """Mean run length with its Monte Carlo standard error (``sd/sqrt(n)``), median,
    number of streams, and how many streams were censored (no signal by ``max_readings``;
    when nonzero the mean is a lower bound)."""

    mean: float
    se: float
    median: float
    n: int
    censored: int = 0

    @classmethod
    def from_times(cls, times: np.ndarray, horizon: int) -> "RunLengthSummary":
        t = np.asarray(times, dtype=float)
        cens = int(np.sum(t < 0))
        t = np.where(t < 0, horizon, t)
        n = t.size
        return cls(float(t.mean()), float(t.std(ddof=1) / math.sqrt(n)) if n > 1 else math.nan, float(np.median(t)), n, cens)

    def to_dict(self) -> dict[str, Any]:
        return {"mean": self.mean, "se": self.se, "median": self.median, "n": self.n, "censored": self.censored}


@dataclass(frozen=True)
class SetRunLengths:
    """Per-detector and whole-set (first signal of any detector) run lengths of one scenario."""

    first: RunLengthSummary
    per_detector: dict[str, RunLengthSummary]
    shift: float
    drift: float
    seed: int
    method: str = "seeded simulation"
    times: np.ndarray | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict[str, Any]:
        return {
            "first": self.first.to_dict(),
            "per_detector": {k: v.to_dict() for k, v in self.per_detector.items()},
            "shift": self.shift,
            "drift": self.drift,
            "seed": self.seed,
            "method": self.method,
        }


def simulate_run_lengths(
    detector_set: DetectorSet,
    *,
    shift: float = 0.0,
    drift: float = 0.0,
    scenario: Callable[[np.random.Generator, int], np.ndarray] | None = None,
    n_streams: int = 2000,
    seed: int = 0,
    max_readings: int = 1 << 20,
    start_readings: int = 1024,
    per_detector: bool = True,
    use_kernels: bool = True,
    batch_cells: int = 1 << 22,
) -> SetRunLengths:
    """Zero-state run lengths of each detector and of the set, by seeded simulation.

    Readings of stream ``i`` are ``N(0, 1) + shift + drift * t`` (t = 1, 2, ...,
    so the change is present from the first reading) plus ``scenario(rng, n)``
    if given (drawn from its own child generator; it must be prefix-stable:
    the first n values may not depend on how many are asked for).  The set's
    run length is the first signal of any detector.  With ``per_detector=False``
    a stream stops as soon as the set has signalled (cheaper when one detector
    is rare).  ``use_kernels=False`` forces every detector through its own class ``scan``.
    """
    items = normalise_set(detector_set)
    if n_streams < 2:
        raise ValueError("n_streams must be at least 2")
    seeds = np.random.SeedSequence(seed).spawn(n_streams)
    d = len(items)
    times = np.full((d, n_streams), -1, np.int64)
    plans = []
    for label, key, params in items:
        kp = _kernel_params(key, params) if use_kernels else None
        if kp is None and key not in DETECTORS:
            raise ValueError(f"unknown detector key {key!r}; registered: {sorted(DETECTORS)}")
        plans.append((key, params, kp))
    n = max(16, int(start_readings))
    while True:
        if per_detector:
            todo = np.flatnonzero((times < 0).any(axis=0))
        else:
            done = (times > 0).any(axis=0)
            todo = np.flatnonzero(~done)
        if todo.size == 0:
            break
        rows_per_batch = max(1, batch_cells // n)
        for b0 in range(0, todo.size, rows_per_batch):
            idx = todo[b0 : b0 + rows_per_batch]
            X = _make_rows([seeds[i] for i in idx], n, scenario, shift, drift)
            best = np.full(idx.size, -1, np.int64)
            for j, (key, params, kp) in enumerate(plans):
                need = times[j, idx] < 0
                if not need.any():
                    continue
                sub = X[need]
                if kp is not None:
                    r = _kernel_first(_KERNELS[key][0], kp, sub)
                else:
                    hz = None if per_detector else best[need]
                    r = _scan_first(DETECTORS[key], params, sub, hz)
                tj = times[j, idx]
                tj[need] = r
                times[j, idx] = tj
                if not per_detector:
                    cur = times[: j + 1, idx]
                    cur = np.where(cur < 0, np.iinfo(np.int64).max, cur).min(axis=0)
                    best = np.where(cur == np.iinfo(np.int64).max, -1, cur)
        if n >= max_readings:
            break
        n = min(4 * n, max_readings)
    big = np.iinfo(np.int64).max
    firsts = np.where(times < 0, big, times).min(axis=0)
    firsts = np.where(firsts == big, -1, firsts)
    per = {}
    if per_detector:
        per = {label: RunLengthSummary.from_times(times[j], n) for j, (label, _, _) in enumerate(items)}
    return SetRunLengths(
        first=RunLengthSummary.from_times(firsts, n),
        per_detector=per,
        shift=float(shift),
        drift=float(drift),
        seed=int(seed),
        times=times,
    )


@dataclass(frozen=True)
class FalseFindingRate:
    """In-control false findings per reading over long streams, detectors restarting on their signals.

    ``rate`` = total signals / total readings; ``se`` from the spread of the
    per-stream rates (streams are independent); ``arl0 = 1/rate`` with the
    delta-method ``arl0_se = se / rate^2``.  ``per_detector`` holds the signal count of each.
    """

    rate: float
    se: float
    arl0: float
    arl0_se: float
    signals: int
    readings: int
    per_detector: dict[str, int]
    per_stream: tuple[int, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "rate": self.rate,
            "se": self.se,
            "arl0": self.arl0,
            "arl0_se": self.arl0_se,
            "signals": self.signals,
            "readings": self.readings,
            "per_detector": dict(self.per_detector),
        }


def _kernel_count_with_restart(kernel_cls: type[_Kernel], kp: dict[str, Any], X: np.ndarray) -> np.ndarray:
    m, n = X.shape
    counts = np.zeros(m, np.int64)
    XT = np.ascontiguousarray(X.T)
    ker = kernel_cls(m, kp)
    for t in range(n):
        fired = ker.step(XT[t])
        if fired.any():
            counts += fired
            fresh = kernel_cls(int(fired.sum()), kp)
            for name, v in vars(fresh).items():
                if isinstance(v, np.ndarray):
                    getattr(ker, name)[fired] = v
    return counts


def simulate_false_finding_rate(
    detector_set: DetectorSet,
    *,
    n_streams: int = 50,
    n_readings: int = 10_000,
    seed: int = 0,
    use_class_scan: bool = True,
) -> FalseFindingRate:
    """Signals per reading of the set on ``n_streams`` independent N(0,1) streams of ``n_readings``.

    Each detector is run over the whole stream by its own class ``scan`` (so
    the restart-after-signal behaviour of the real detector is what is
    measured); with ``use_class_scan=False``, or for a kernel key whose class is
    not registered, the vectorised kernels (restarting the same way) are used.
    """
    items = normalise_set(detector_set)
    seeds = np.random.SeedSequence(seed).spawn(n_streams)
    X = _make_rows(seeds, n_readings, None, 0.0, 0.0)
    per_stream = np.zeros(n_streams, np.int64)
    per_det: dict[str, int] = {}
    for label, key, params in items:
        cls = DETECTORS.get(key)
        if cls is not None and use_class_scan:
            c = np.array([len(cls.scan(X[i], **params)) for i in range(n_streams)], np.int64)
        else:
            kp = _kernel_params(key, params)
            if kp is None:
                raise ValueError(f"detector {key!r} is not registered and has no kernel")
            c = _kernel_count_with_restart(_KERNELS[key][0], kp, X)
        per_det[label] = int(c.sum())
        per_stream += c
    total = int(per_stream.sum())
    readings = n_streams * n_readings
    rate = total / readings
    se = float(np.std(per_stream / n_readings, ddof=1) / math.sqrt(n_streams))
    arl0 = math.inf if total == 0 else 1.0 / rate
    return FalseFindingRate(rate, se, arl0, se / rate**2 if total else math.inf, total, readings, per_det, tuple(int(v) for v in per_stream))


# ------------------------------------------------------------- detection power

DEFAULT_SHIFTS = (0.5, 1.0, 2.0, 3.0)
DEFAULT_DRIFTS = (0.01, 0.05)


def detection_power(
    detector_set: DetectorSet,
    *,
    shifts: Sequence[float] = DEFAULT_SHIFTS,
    drifts: Sequence[float] = DEFAULT_DRIFTS,
    arl0: float | None = None,
    readings_per_day: float | None = None,
    n_streams: int = 1000,
    seed: int = 0,
    max_readings: int = 1 << 16,
) -> dict[str, Any]:
    """Readings to detect (zero-state ARL of the set) for steps and drifts, plus false findings per day.

    Returns a JSON-able dict::

        {"shift": {"0.5": {"mean", "se", "median", "n", "censored"}, ...},
         "drift": {"0.01": {...}, ...},
         "arl0": arl0, "false_per_day": readings_per_day / arl0 or None,
         "n_streams": ..., "seed": ..., "method": ...}

    A step of ``delta`` sigma (both directions are symmetric for these detectors,
    so only upward steps are simulated) is present from the first reading; a drift
    of ``s`` sigma per reading puts the mean at ``s t`` at reading t.  ``arl0`` is
    the set's in-control ARL0 (e.g. from :func:`rules.calibrate.calibrate`); it is
    only copied and turned into false findings per day.
    """
    out: dict[str, Any] = {"shift": {}, "drift": {}}
    for j, d in enumerate(shifts):
        r = simulate_run_lengths(detector_set, shift=float(d), n_streams=n_streams, seed=seed + 1000 + j, max_readings=max_readings, per_detector=False, start_readings=256)
        out["shift"][f"{float(d):g}"] = r.first.to_dict()
    for j, s in enumerate(drifts):
        r = simulate_run_lengths(detector_set, drift=float(s), n_streams=n_streams, seed=seed + 2000 + j, max_readings=max_readings, per_detector=False, start_readings=256)
        out["drift"][f"{float(s):g}"] = r.first.to_dict()
    out["arl0"] = None if arl0 is None else float(arl0)
    out["false_per_day"] = None if (arl0 is None or readings_per_day is None) else float(readings_per_day) / float(arl0)
    out["n_streams"] = int(n_streams)
    out["seed"] = int(seed)
    out["method"] = "seeded simulation, zero-state, first signal of any detector in the set"
    return out


# ------------------------------------------------- windowed tests: rate against alpha

WINDOW_KEYS = ("median_runs", "updown_runs", "longest_median_run", "longest_monotone_run", "mann_kendall")


def _mk_s_all(a: np.ndarray, w: int) -> np.ndarray:
    """Mann-Kendall S of every full window of ``a`` (per-lag cumulative sums, O(n w))."""
    m = a.size - w + 1
    starts = np.arange(m)
    s = np.zeros(m, np.int64)
    for k in range(1, w):
        d = np.sign(a[k:] - a[:-k]).astype(np.int64)
        c = np.concatenate(([0], np.cumsum(d)))
        s += c[starts + (w - k)] - c[starts]
    return s


def _spread(fn: Callable, *cols: np.ndarray) -> np.ndarray:
    """Evaluate a scalar function once per distinct key tuple and spread it over the windows."""
    code = np.stack([c.astype(np.int64) for c in cols], axis=1)
    uniq, inv = np.unique(code, axis=0, return_inverse=True)
    vals = np.array([fn(*(int(v) for v in row)) for row in uniq], dtype=float)
    return vals[np.asarray(inv).ravel()]


def window_pvalues(key: str, params: dict[str, Any], a: np.ndarray) -> np.ndarray:
    """For every full window of ``a`` (by start offset): the smallest ``alpha`` at which the
    detector ``key`` would fire on that window alone.

    For the runs detectors this is the exact tail probability of the window's
    statistic (the detectors fire when a tail probability is <= alpha, per tail);
    for ``mann_kendall`` with ``direction="both"`` it is twice the smaller one-sided
    p (the detector compares each side with alpha/2).  Together with the restart
    rule (after a signal the next window must start ``window`` readings later) this
    reproduces the detector's signals for every alpha at once; the tests check it
    against the class's own ``scan``.  Values are assumed continuous (no ties),
    which holds for simulated normal readings.
    """
    from rules import runs_null as rn

    cls = DETECTORS[key]
    det = cls(**params)
    w = det.window
    a = np.asarray(a, dtype=float)
    if key == "mann_kendall":
        from rules.trend import _pvalues_from_s

        s = _mk_s_all(a, w)
        uniq, inv = np.unique(s, return_inverse=True)
        pu = np.empty(uniq.size)
        pd = np.empty(uniq.size)
        for i, v in enumerate(uniq):
            pu[i], pd[i], _, _ = _pvalues_from_s(int(v), 0, w)
        pu, pd = pu[inv], pd[inv]
        if det.direction == "both":
            return 2.0 * np.minimum(pu, pd)
        return pu if det.direction == "up" else pd
    # the detector's own vectorised window summary (n_pos, n_neg, runs, top_pos, top_neg)
    n_pos, n_neg, runs, top_pos, top_neg = det._summary(a)
    side = det.side
    if key == "median_runs":
        def f(n1: int, n2: int, r: int) -> float:
            if not n1 or not n2:
                return 2.0
            lo, hi, _ = rn.median_runs_tails(n1, n2, r)
            return {"both": min(lo, hi), "grouping": lo, "mixture": hi}[side]
        return _spread(f, n_pos, n_neg, runs)
    if key == "updown_runs":
        def f(n: int, r: int) -> float:
            if n < 3:
                return 2.0
            lo, hi, _ = rn.updown_tails(n, r)
            return {"both": min(lo, hi), "drift": lo, "sawtooth": hi}[side]
        return _spread(f, n_pos + n_neg + 1, runs)
    if key == "longest_median_run":
        def f(n1: int, n2: int, tp: int, tn: int) -> float:
            up = rn.longest_median_run_sf(n1, n2, tp) if n1 and side != "down" else 2.0
            dn = rn.longest_median_run_sf(n2, n1, tn) if n2 and side != "up" else 2.0
            return min(up, dn)
        return _spread(f, n_pos, n_neg, top_pos, top_neg)
    if key == "longest_monotone_run":
        top = np.maximum(top_pos if side != "down" else 0, top_neg if side != "up" else 0)
        def f(n: int, t: int) -> float:
            return 2.0 if n < 3 else rn.longest_monotone_run_sf(n, t + 1)
        return _spread(f, n_pos + n_neg + 1, top)
    raise ValueError(f"{key!r} is not a windowed test")  # pragma: no cover


def dead_time_count(p: np.ndarray, alpha: float, window: int) -> int:
    """Signals of a windowed detector from its window p-values: the first window with
    ``p <= alpha``, then the first such window starting at least ``window`` later, ..."""
    idx = np.flatnonzero(p <= alpha)
    count, nxt, pos = 0, 0, 0
    while True:
        pos = int(np.searchsorted(idx, nxt, side="left"))
        if pos >= idx.size:
            return count
        count += 1
        nxt = int(idx[pos]) + window


@dataclass
class WindowNull:
    """In-control window p-values of one windowed detector on seeded N(0,1) streams.

    ``rate(alpha)`` gives false signals per reading (restarts included) and its
    Poisson standard error ``sqrt(K)/N``; ``alpha_for_rate(r)`` the largest attainable
    alpha whose rate does not exceed ``r`` (the statistics are discrete, so the rate
    is a step function of alpha and the target is met from below).
    """

    key: str
    params: dict[str, Any]
    n_readings: int
    n_streams: int
    seed: int
    pvalues: list[np.ndarray] = field(default_factory=list, repr=False)

    def __post_init__(self) -> None:
        if self.key not in WINDOW_KEYS:
            raise ValueError(f"{self.key!r} is not one of the windowed tests {WINDOW_KEYS}")
        per = max(1, self.n_readings // self.n_streams)
        seeds = np.random.SeedSequence(self.seed).spawn(self.n_streams)
        self.pvalues = [window_pvalues(self.key, self.params, np.random.default_rng(s).standard_normal(per)) for s in seeds]
        self.n_readings = per * self.n_streams
        self.window = DETECTORS[self.key](**self.params).window

    def count(self, alpha: float) -> int:
        return sum(dead_time_count(p, alpha, self.window) for p in self.pvalues)

    def rate(self, alpha: float) -> tuple[float, float]:
        k = self.count(alpha)
        return k / self.n_readings, math.sqrt(max(k, 1)) / self.n_readings

    def candidates(self, alpha_max: float = 0.25) -> np.ndarray:
        allp = np.unique(np.concatenate(self.pvalues))
        return allp[allp <= alpha_max]

    def alpha_for_rate(self, target: float, alpha_max: float = 0.25) -> tuple[float, int]:
        """(alpha, signals): the largest candidate alpha with rate <= target (0, 0 if none)."""
        cand = self.candidates(alpha_max)
        lo, hi = -1, cand.size  # invariant: count(cand[lo]) <= K, count(cand[hi]) > K
        K = target * self.n_readings
        while hi - lo > 1:
            mid = (lo + hi) // 2
            if self.count(float(cand[mid])) <= K:
                lo = mid
            else:
                hi = mid
        if lo < 0:
            return 0.0, 0
        a = float(cand[lo])
        return a, self.count(a)
