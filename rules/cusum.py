"""Two-sided tabular CUSUM (Page 1954) on standardised values, and its run lengths.

Statistic (values z already standardised, in-control N(0, 1); k and h in sigma units)::

    C+_t = max(0, C+_{t-1} + z_t - k),      C-_t = max(0, C-_{t-1} - z_t - k),

with ``C+_0 = C-_0 = 0`` or, with the fast initial response of Lucas & Crosier
(1982, *Technometrics* 24(3):199-205), ``C_0 = headstart`` (they suggest h/2).
The scheme signals on the first t with ``C+_t > h`` or ``C-_t > h`` (strict).

Implementation note: each side is kept in Lindley form, ``C_t = S_t - M_t`` with
``S_t`` the running sum of ``z - k`` since the last restart and
``M_t = min(-headstart, S_1..S_t)``.  This is algebraically the recursion above,
and it lets :meth:`Cusum.scan` use ``cumsum`` / ``minimum.accumulate`` and get
bit-identical values to :meth:`Cusum.update`.  S drifts by about -k per reading
between restarts, so rounding grows like 1e-16 |S| (about 1e-9 after 10^7
readings without a finding): harmless against h.

Run-length functions (documented and stable; the calibration code uses them):

* :func:`cusum_arl` ``(k, h, delta=0.0, *, sides=2, headstart=0.0, method="integral", nodes=64, states=400)``
  zero-state (or head-start) ARL for N(delta, 1) data.  ``method="integral"``:
  Nystrom solution of Page's integral equation with Gauss-Legendre nodes
  (as in Crowder 1987 for the EWMA); ``method="markov"``: Brook & Evans (1972,
  *Biometrika* 59(3):539-549) Markov chain with ``states`` states.
  Two-sided: ``1/ARL = 1/ARL+ + 1/ARL-`` (exact when both sides cannot be
  positive together; a close approximation at the usual k, h).
* :func:`cusum_h_for_arl` ``(k, arl0, *, sides=2, headstart=0.0)`` -- the h giving ARL0.
* :func:`cusum_arl_siegmund` -- Siegmund's (1985) approximation, ``b = h + 1.166``.
* :func:`cusum_pvalue` -- finite-horizon reaching probability (defined there).

Example
-------
>>> round(cusum_arl(0.5, 5.0), 1)          # in-control, two-sided
465.4
>>> round(cusum_arl(0.5, 4.0, delta=1.0), 2)
8.38
>>> round(cusum_h_for_arl(0.5, 370.0), 4)
4.7738
>>> det = Cusum(k=0.5, h=5.0)
>>> sig = None
>>> for z in [0.2, -0.4] + [1.6] * 6:
...     sig = det.update(z) or sig
>>> sig.index, sig.onset_index, sig.direction, round(sig.size, 3)
(6, 2, 'up', 1.6)
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Any

import numpy as np
from scipy import optimize, special, stats

from rules.detector import Signal, StateError, StreamDetector, check_float
from rules.markov import AbsorptionTable, absorbed_within, gauss_legendre
from rules.registry import register

try:  # the compiled recursion (rules/_recursions.c); resume's numpy blocks below do the same
    from rules._recursions import cusum_until as _cusum_until
except ImportError:  # not built (no compiler at install)
    _cusum_until = None

__all__ = [
    "Cusum",
    "cusum_arl",
    "cusum_arl_siegmund",
    "cusum_h_for_arl",
    "cusum_markov_matrix",
    "cusum_pvalue",
]

_norm = stats.norm


# ---------------------------------------------------------------- run lengths


def _one_sided_arl_integral(k: float, h: float, delta: float, headstart: float, nodes: int) -> float:
    """Nystrom solution of L(u) = 1 + L(0) Phi(k-u-d) + int_0^h L(y) phi(y-u+k-d) dy."""
    y, w = gauss_legendre(0.0, h, nodes)
    pts = np.concatenate([[0.0], y])  # unknowns: L(0), L(y_1..y_N)
    # rows: equation at pts[i]; columns: L(0) then the nodes
    A = np.empty((nodes + 1, nodes + 1))
    A[:, 0] = _norm.cdf(k - pts - delta)
    A[:, 1:] = w[None, :] * _norm.pdf(y[None, :] - pts[:, None] + k - delta)
    sol = np.linalg.solve(np.eye(nodes + 1) - A, np.ones(nodes + 1))
    if headstart == 0.0:
        return float(sol[0])
    u = headstart
    return float(1.0 + sol[0] * _norm.cdf(k - u - delta) + np.sum(w * _norm.pdf(y - u + k - delta) * sol[1:]))


def cusum_markov_matrix(k: float, level: float, delta: float = 0.0, states: int = 400) -> tuple[np.ndarray, np.ndarray, float]:
    """Brook & Evans (1972) chain for the upper CUSUM absorbed at ``C >= level``.

    ``states`` transient states of width ``w = 2 level / (2 states - 1)``: state 0 is
    ``[0, w/2]`` (it carries the atom at zero), state j is ``((j-1/2) w, (j+1/2) w]``
    represented by its midpoint ``j w``; absorption is beyond ``(states - 1/2) w = level``.
    Returns ``(Q, exit_prob, w)``.
    """
    m = int(states)
    w = 2.0 * level / (2 * m - 1)
    mid = np.arange(m) * w
    # P(next <= upper edge of j | from i) = Phi((j - i + 1/2) w + k - delta) depends on j - i
    # only (a Toeplitz matrix): 2m - 1 normal probabilities instead of m^2.
    cdf_by_lag = special.ndtr((np.arange(-(m - 1), m) + 0.5) * w + k - delta)  # lag j - i = -(m-1)..m-1
    step = np.empty_like(cdf_by_lag)  # P(next in state j | from i), by lag
    step[0] = cdf_by_lag[0]
    np.subtract(cdf_by_lag[1:], cdf_by_lag[:-1], out=step[1:])
    # Q[i, j] = step[m - 1 - i + j]: row i starts i places further back
    Q = np.lib.stride_tricks.as_strided(step[m - 1 :], shape=(m, m), strides=(-step.itemsize, step.itemsize)).copy()
    Q[:, 0] = cdf_by_lag[m - 1 :: -1]  # into state 0: everything up to its upper edge
    exit_prob = special.ndtr(-(level - mid + k - delta))
    return Q, exit_prob, w


def cusum_arl(
    k: float,
    h: float,
    delta: float = 0.0,
    *,
    sides: int = 2,
    headstart: float = 0.0,
    method: str = "integral",
    nodes: int = 64,
    states: int = 400,
) -> float:
    """Zero-state ARL of the tabular CUSUM for N(delta, 1) data (sigma units).

    ``sides=1`` gives the upper CUSUM alone; ``sides=2`` combines the two sides
    by ``1/ARL = 1/ARL+(delta) + 1/ARL+(-delta)`` (the lower side at shift delta
    behaves as the upper side at -delta).  ``headstart`` starts both sides at that
    value (fast initial response).  ``method``: ``"integral"`` (Nystrom,
    ``nodes`` Gauss-Legendre points, converged to ~1e-8 at 64 for h <= 10) or
    ``"markov"`` (Brook & Evans, ``states`` states; discretisation error O(1/states^2)).
    """
    check_float("k", k, 0.0)
    check_float("h", h, 0.0, open_lo=True)
    check_float("delta", delta)
    check_float("headstart", headstart, 0.0, h, open_hi=True)
    if sides not in (1, 2):
        raise ValueError(f"sides must be 1 or 2, got {sides!r}")
    if method not in ("integral", "markov"):
        raise ValueError(f"method must be 'integral' or 'markov', got {method!r}")

    def one(d: float) -> float:
        if method == "integral":
            return _one_sided_arl_integral(k, h, d, headstart, int(nodes))
        Q, _, w = cusum_markov_matrix(k, h, d, states)
        m = Q.shape[0]
        arl = np.linalg.solve(np.eye(m) - Q, np.ones(m))
        return float(arl[min(int(round(headstart / w)), m - 1)])

    up = one(delta)
    if sides == 1:
        return up
    return 1.0 / (1.0 / up + 1.0 / one(-delta))


def cusum_arl_siegmund(k: float, h: float, delta: float = 0.0, *, sides: int = 2) -> float:
    """Siegmund's (1985) approximation: ARL+ = [exp(-2 D b) + 2 D b - 1] / (2 D^2), b = h + 1.166.

    ``D = delta - k`` for the upper side, ``-delta - k`` for the lower; ``b^2`` when D = 0.
    """

    def one(D: float) -> float:
        b = h + 1.166
        if D == 0.0:
            return b * b
        return (math.exp(-2.0 * D * b) + 2.0 * D * b - 1.0) / (2.0 * D * D)

    up = one(delta - k)
    if sides == 1:
        return up
    return 1.0 / (1.0 / up + 1.0 / one(-delta - k))


def cusum_h_for_arl(k: float, arl0: float, *, sides: int = 2, headstart: float = 0.0) -> float:
    """Decision interval h whose in-control ARL (:func:`cusum_arl`, integral method) equals ``arl0``.

    With ``headstart`` given as a number it is held fixed (it must stay below h).
    """
    check_float("k", k, 0.0)
    check_float("arl0", arl0, 1.0, open_lo=True)
    lo = max(1e-3, headstart + 1e-6)

    def f(h: float) -> float:
        return math.log(cusum_arl(k, h, 0.0, sides=sides, headstart=headstart, nodes=64)) - math.log(arl0)

    hi = lo + 1.0
    while f(hi) < 0.0:
        hi *= 2.0
        if hi > 1e3:
            raise ValueError(f"no h below 1000 reaches ARL0 = {arl0} at k = {k}")
    if f(lo) > 0.0:
        raise ValueError(f"ARL0 = {arl0} is below what the smallest h gives at k = {k}")
    return float(optimize.brentq(f, lo, hi, xtol=1e-10))


def cusum_pvalue(k: float, level: float, n: int, start: float = 0.0, *, states: int = 150) -> float:
    """P(max_{1<=t<=n} C+_t >= level | C+_0 = start) for iid N(0, 1) data.

    This is the p-value a :class:`Cusum` signal carries: the in-control
    probability that one CUSUM side, started fresh (at 0, or at the head start
    if it has not touched zero since the restart), reaches at least the observed
    level within the observed number of readings ``n`` since it last was zero
    (or since the restart).  By symmetry the same holds for the lower side.
    Computed on the Brook & Evans (1972) chain of :func:`cusum_markov_matrix`
    with ``states`` states (finite horizon, summed by repeated squaring);
    discretisation error about 1e-3 relative at the default 150 states.
    """
    if n <= 0:
        return 0.0
    Q, exit_prob, w = cusum_markov_matrix(k, level, 0.0, states)
    v = np.zeros(Q.shape[0])
    v[min(int(round(start / w)), Q.shape[0] - 1)] = 1.0
    return float(min(1.0, max(0.0, absorbed_within(Q, exit_prob, v, int(n)))))


# Signals read their p-value from a table per (k, h): levels h .. h + 4 every 0.1
# and horizons up to 512 readings.  Interpolation adds < 1e-6 relative to the
# chain's own 1e-3 discretisation error (tests/rules/test_cusum.py); outside the
# table, or with an untouched head start, the chain is computed directly.
_TABLE_STEP, _TABLE_COUNT, _TABLE_MAX_N = 0.1, 41, 512


@lru_cache(maxsize=16)
def _pvalue_table(k: float, h: float, states: int = 150) -> AbsorptionTable:
    def build(levels: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        chains = [cusum_markov_matrix(k, level, 0.0, states) for level in levels]
        Q = np.stack([c[0] for c in chains])
        e = np.stack([c[1] for c in chains])
        return e[:, 0], Q[:, 0, :].copy(), Q, e  # a fresh side starts in state 0

    return AbsorptionTable(build, lo=h, step=_TABLE_STEP, count=_TABLE_COUNT, max_steps=_TABLE_MAX_N, first_block=16)


def signal_pvalue(k: float, h: float, level: float, n: int, start: float = 0.0) -> float:
    """:func:`cusum_pvalue` as a :class:`Cusum` signal reports it: read from the
    table of its (k, h) where that reaches, computed directly elsewhere."""
    if start == 0.0:
        p = _pvalue_table(k, h).pvalue(level, n)
        if p is not None:
            return min(1.0, p)
    return cusum_pvalue(k, level, n, start)


# ----------------------------------------------------------------- detector


@register
class Cusum(StreamDetector):
    """Two-sided tabular CUSUM (Page 1954) on standardised values.

    Parameters: ``k`` reference value (>= 0, default 0.5, tuned to a 1-sigma shift),
    ``h`` decision interval (> 0, default 5; ARL0 = 465 at k = 0.5), ``headstart``
    fast initial response (Lucas & Crosier 1982; 0 = off, must be < h).

    On ``C > h`` it returns a ``shift`` signal:

    * ``direction``: ``up`` for the upper side, ``down`` for the lower;
    * ``onset_index``: last index at which that side was zero, plus one
      (the restart counts as a zero);
    * ``size``: Montgomery's estimate of the shift after onset, ``k + C/N``
      (sign by side), N = readings since onset (with a head start that has not
      yet decayed to zero, C still contains it, so the estimate runs high);
    * ``p_value``: :func:`cusum_pvalue` of the observed level C within N readings
      (read from a table per (k, h), see :func:`signal_pvalue`);
    * ``statistic``: C.

    After a signal both sides restart (at 0, or at ``headstart`` with FIR).
    """

    key = "cusum"
    name = "CUSUM"
    STATE_VERSION = 1
    PARAMS = ("k", "h", "headstart")
    needs_reference = True

    def __init__(self, k: float = 0.5, h: float = 5.0, headstart: float = 0.0) -> None:
        self.k = check_float("k", k, 0.0)
        self.h = check_float("h", h, 0.0, open_lo=True)
        self.headstart = check_float("headstart", headstart, 0.0, self.h, open_hi=True)
        # smallest number of readings after a restart that can take a side over h:
        # unbounded readings can do it in one, so 1.
        self.min_values = 1
        self._t = 0
        self._restart()

    def _restart(self) -> None:
        self._sp = 0.0
        self._mp = -self.headstart
        self._sn = 0.0
        self._mn = -self.headstart
        self._zp = self._t - 1  # index of last zero of each side (restart counts)
        self._zn = self._t - 1
        self._fp = False  # has the side touched zero since the restart?
        self._fn = False
        self.last = self.headstart

    @property
    def upper(self) -> float:
        return self._sp - self._mp

    @property
    def lower(self) -> float:
        return self._sn - self._mn

    def update(self, x: float) -> Signal | None:
        x = float(x)
        if not math.isfinite(x):
            raise ValueError(f"value must be finite, got {x!r}")
        t = self._t
        self._t = t + 1
        s = self._sp + (x - self.k)
        self._sp = s
        if s <= self._mp:
            self._mp = s
            self._zp = t
            self._fp = True
        s = self._sn + (-x - self.k)
        self._sn = s
        if s <= self._mn:
            self._mn = s
            self._zn = t
            self._fn = True
        cp = self._sp - self._mp
        cn = self._sn - self._mn
        self.last = cp if cp >= cn else cn
        if cp > self.h or cn > self.h:
            up = cp >= cn
            sig = self._signal(t, cp if up else cn, self._zp if up else self._zn, self._fp if up else self._fn, up)
            self._restart()
            return sig
        return None

    def _signal(self, t: int, level: float, last_zero: int, touched: bool, up: bool) -> Signal:
        n = t - last_zero
        start = 0.0 if touched else self.headstart
        size = self.k + level / n
        return Signal(
            pattern="shift",
            detector=self.name,
            p_value=signal_pvalue(self.k, self.h, level, n, start),
            index=t,
            onset_index=last_zero + 1,
            direction="up" if up else "down",
            size=size if up else -size,
            statistic=level,
            detail={
                "side": "upper" if up else "lower",
                "readings_since_zero": n,
                "k": self.k,
                "h": self.h,
                "headstart": self.headstart,
                "p_value_method": "Brook-Evans chain: P(fresh side reaches C within N readings), N(0,1)",
            },
        )

    # -- state ------------------------------------------------------------
    def _get_state(self) -> dict[str, Any]:
        return {
            "t": self._t,
            "sp": self._sp,
            "mp": self._mp,
            "sn": self._sn,
            "mn": self._mn,
            "zp": self._zp,
            "zn": self._zn,
            "fp": self._fp,
            "fn": self._fn,
        }

    def _set_state(self, state: dict[str, Any]) -> None:
        try:
            self._t = int(state["t"])
            self._sp = float(state["sp"])
            self._mp = float(state["mp"])
            self._sn = float(state["sn"])
            self._mn = float(state["mn"])
            self._zp = int(state["zp"])
            self._zn = int(state["zn"])
            self._fp = bool(state["fp"])
            self._fn = bool(state["fn"])
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"bad cusum state: {exc}") from exc
        cp, cn = self.upper, self.lower
        self.last = cp if cp >= cn else cn

    # -- batch --------------------------------------------------------------
    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        """Signals over ``x`` from a fresh start, identical to streaming ``update``."""
        return cls(**params).resume(x)

    def resume(self, x: Any) -> list[Signal]:
        """Signals over ``x`` continuing from this detector's state, identical to ``update``
        on each value in turn (and the state afterwards is the same).

        Where ``rules._recursions`` is built, ``update``'s own arithmetic runs in C up
        to each signal.  Otherwise vectorised per block with ``cumsum`` and ``minimum.accumulate`` (the Lindley
        form, which adds in the same order as ``update``, so values are bit-identical);
        after a signal the block restarts at the next value.
        """
        det = self
        x = np.ascontiguousarray(x, dtype=float).ravel()
        if not np.all(np.isfinite(x)):
            raise ValueError(f"value must be finite, got {x[~np.isfinite(x)][0]!r}")
        if _cusum_until is not None:
            return self._resume_compiled(x)
        out: list[Signal] = []
        n = x.size
        base = det._t  # index of x[0] in this detector's own count
        pos = 0
        block = 256
        while pos < n:
            seg = x[pos : pos + block]
            m = seg.size
            sp = np.cumsum(np.concatenate(([det._sp], seg - det.k)))[1:]
            mp = np.minimum.accumulate(np.concatenate(([det._mp], sp)))[1:]
            sn = np.cumsum(np.concatenate(([det._sn], -seg - det.k)))[1:]
            mn = np.minimum.accumulate(np.concatenate(([det._mn], sn)))[1:]
            cp = sp - mp
            cn = sn - mn
            hit = np.flatnonzero((cp > det.h) | (cn > det.h))
            stop = int(hit[0]) if hit.size else m - 1
            zp = np.flatnonzero(cp[: stop + 1] == 0.0)
            zn = np.flatnonzero(cn[: stop + 1] == 0.0)
            if zp.size:
                det._zp, det._fp = base + pos + int(zp[-1]), True
            if zn.size:
                det._zn, det._fn = base + pos + int(zn[-1]), True
            det._sp, det._mp, det._sn, det._mn = float(sp[stop]), float(mp[stop]), float(sn[stop]), float(mn[stop])
            det._t = base + pos + stop + 1
            c_up, c_dn = float(cp[stop]), float(cn[stop])
            det.last = c_up if c_up >= c_dn else c_dn
            if hit.size:
                t = base + pos + stop
                up = c_up >= c_dn
                out.append(det._signal(t, c_up if up else c_dn, det._zp if up else det._zn, det._fp if up else det._fn, up))
                det._restart()
                block = 256
            else:
                block = min(block * 2, 1 << 16)
            pos += stop + 1
        return out

    def _resume_compiled(self, x: np.ndarray) -> list[Signal]:
        """:meth:`resume` by the compiled loop: ``update``'s arithmetic, run in C up to each signal."""
        out: list[Signal] = []
        base, pos, n = self._t, 0, x.size
        while pos < n:
            (stop, self._sp, self._mp, self._sn, self._mn, self._zp, self._zn, self._fp, self._fn, self._t) = _cusum_until(
                x, pos, self.k, self.h, self._sp, self._mp, self._sn, self._mn, self._zp, self._zn, self._fp, self._fn,
                self._t)
            cp, cn = self.upper, self.lower
            if stop < 0:
                self.last = cp if cp >= cn else cn
                break
            up = cp >= cn
            out.append(self._signal(base + stop, cp if up else cn, self._zp if up else self._zn,
                                    self._fp if up else self._fn, up))
            self._restart()
            pos = stop + 1
        return out
