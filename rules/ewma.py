"""EWMA chart (Roberts 1959) on standardised values, with exact or asymptotic limits, and its run lengths.

Statistic (values z standardised, in-control N(0, 1))::

    e_i = lam * z_i + (1 - lam) * e_{i-1},      e_0 = 0,
    sd_i = sqrt(lam / (2 - lam) * (1 - (1 - lam)^(2 i)))      (exact, iid data)
    signal when |e_i| > L * sd_i   (strict),

with ``sd_inf = sqrt(lam / (2 - lam))`` instead of ``sd_i`` for asymptotic limits.
Sources: Roberts S.W. (1959) *Technometrics* 1(3):239-250; the exact variance and
limits as in Lucas & Saccucci (1990) *Technometrics* 32(1):1-12; run lengths by the
integral-equation method of Crowder (1987) *Technometrics* 29(4):401-407, solved
by the Nystrom method on Gauss-Legendre nodes.

Run-length functions (documented and stable; the calibration code uses them):

* :func:`ewma_arl` ``(lam, L, delta=0.0, time_varying=False, *, nodes=None)`` --
  zero-state ARL for N(delta, 1) data.  ``time_varying=False`` is the
  Lucas & Saccucci convention (asymptotic limits).  With exact limits the
  first readings are handled one step at a time (each with its own limit and
  nodes) until ``(1-lam)^(2i) < 1e-10``, after which the asymptotic solution applies.
* :func:`ewma_L_for_arl` ``(lam, arl0, time_varying=False)`` -- the L giving ARL0.
* :func:`ewma_signal_probability` ``(lam, L, n, time_varying=False, delta=0.0)`` --
  P(the chart signals within n readings of a fresh start).

Example
-------
>>> round(ewma_arl(0.1, 2.814), 1)
499.6
>>> round(ewma_arl(0.25, 2.998, delta=0.5), 2)
48.29
>>> det = Ewma(lam=0.1, L=2.7)
>>> sigs = [s for s in (det.update(z) for z in [0.1, -0.3] + [1.2] * 9) if s]
>>> sigs[0].index, sigs[0].onset_index, sigs[0].direction
(8, 2, 'up')
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Any

import numpy as np
from scipy import optimize, signal, special

from rules.detector import Signal, StateError, StreamDetector, check_choice, check_float
from rules.markov import AbsorptionTable, absorbed_within_all, gauss_legendre
from rules.registry import register

try:  # the compiled recursion (rules/_recursions.c); resume's numpy blocks below do the same
    from rules._recursions import ewma_until as _ewma_until
except ImportError:  # not built (no compiler at install)
    _ewma_until = None

__all__ = ["Ewma", "ewma_arl", "ewma_L_for_arl", "ewma_signal_probability", "ewma_sd"]

_SQRT2PI = math.sqrt(2.0 * math.pi)


def _phi(x: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * x * x) / _SQRT2PI

_STABLE = 1e-10  # (1-lam)^(2i) below this: exact limit equals the asymptotic one for our purposes


def ewma_sd(lam: float, i: int | None = None) -> float:
    """Standard deviation of e_i for iid N(0, 1) data; ``i=None`` gives the asymptotic value."""
    c = lam / (2.0 - lam)
    if i is None:
        return math.sqrt(c)
    return math.sqrt(c * (1.0 - (1.0 - lam) ** (2 * i)))


def _n_stable(lam: float, tol: float = _STABLE) -> int:
    """First step i at which (1-lam)^(2i) < tol (1 for lam = 1)."""
    q = (1.0 - lam) ** 2
    if q <= tol:
        return 1
    return max(1, int(math.ceil(math.log(tol) / math.log(q))))


class _Steps:
    """Node sets and kernels of the EWMA chain with limit multiplier L, step by step."""

    def __init__(self, lam: float, L: float, delta: float, time_varying: bool, nodes: int, tol: float = _STABLE) -> None:
        self.lam, self.L, self.delta, self.nodes = lam, L, delta, nodes
        self.tv = time_varying
        self.n0 = _n_stable(lam, tol) if time_varying else 1
        self.H_inf = L * ewma_sd(lam)
        self.inf = gauss_legendre(-self.H_inf, self.H_inf, nodes)

    def limit(self, j: int) -> float:
        return self.L * ewma_sd(self.lam, j) if (self.tv and j < self.n0) else self.H_inf

    def nodes_at(self, j: int) -> tuple[np.ndarray, np.ndarray]:
        if j == 0:
            return np.zeros(1), np.ones(1)
        if self.tv and j < self.n0:
            H = self.limit(j)
            return gauss_legendre(-H, H, self.nodes)
        return self.inf

    def kernel(self, u: np.ndarray, j: int) -> tuple[np.ndarray, np.ndarray]:
        """(K, exit): K[a, b] = w_b f(y_b | u_a) over step-j nodes, exit[a] = P(|e_j| > H_j | u_a)."""
        lam = self.lam
        y, w = self.nodes_at(j)
        H = self.limit(j)
        mu = (1.0 - lam) * u
        K = w[None, :] * _phi((y[None, :] - mu[:, None]) / lam - self.delta) / lam
        ex = special.ndtr((-H - mu) / lam - self.delta) + special.ndtr(-((H - mu) / lam - self.delta))
        return K, ex


def _auto_nodes(lam: float, L: float, per_sd: float, extra: int, lo: int, hi: int) -> int:
    """Gauss-Legendre nodes for a kernel of width lam on [-H, H]: ~per_sd nodes per kernel sd."""
    width = 2.0 * L * ewma_sd(lam) / lam  # interval length in kernel standard deviations
    return int(min(hi, max(lo, math.ceil(per_sd * width) + extra)))


def ewma_arl(lam: float, L: float, delta: float = 0.0, time_varying: bool = False, *, nodes: int | None = None) -> float:
    """Zero-state ARL (e_0 = 0) of the two-sided EWMA chart for N(delta, 1) data.

    Solves A(u) = 1 + int_{-H}^{H} A(y) phi((y - (1-lam) u)/lam - delta) / lam dy,
    H = L sd_inf (Crowder 1987), by Nystrom with ``nodes`` Gauss-Legendre points
    (default: 2 per kernel standard deviation lam across [-H, H] plus 20, at least 100);
    with ``time_varying`` the early steps are recursed backwards with their exact limits.
    """
    check_float("lam", lam, 0.0, 1.0, open_lo=True)
    check_float("L", L, 0.0, open_lo=True)
    check_float("delta", delta)
    if nodes is None:
        nodes = _auto_nodes(lam, L, 2.0, 20, 100, 800)
    st = _Steps(lam, L, delta, bool(time_varying), int(nodes))
    y, _ = st.inf
    K, _ = st.kernel(y, st.n0)
    A = np.linalg.solve(np.eye(y.size) - K, np.ones(y.size))  # A on step >= n0 nodes
    return _backward(st, A, st.n0, arl=True)


def _backward(st: _Steps, V: np.ndarray, top: int, *, arl: bool) -> float:
    """Recurse V (given on the nodes of step ``top`` >= 1) back to step 0 and return V_0(0).

    ``arl``: V_{j-1} = 1 + K_j V_j (expected readings); else V_{j-1} = exit_j + K_j V_j
    (absorption probability).  Steps 2..top are batched into one kernel array.
    """
    lam, d = st.lam, st.delta
    if top >= 2:
        g, wg = gauss_legendre(-1.0, 1.0, st.nodes)
        H = np.array([st.limit(j) for j in range(1, top + 1)])  # H[j-1] = limit at step j
        Ht, Hs = H[1:], H[:-1]  # target step j = 2..top, source step j-1
        y = Ht[:, None] * g[None, :]
        w = Ht[:, None] * wg[None, :]
        mu = (1.0 - lam) * Hs[:, None] * g[None, :]
        K = w[:, None, :] * _phi((y[:, None, :] - mu[:, :, None]) / lam - d) / lam
        if not arl:
            a = (Ht[:, None] - mu) / lam
            b = (-Ht[:, None] - mu) / lam
            ex = special.ndtr(b - d) + special.ndtr(-(a - d))
        for i in range(K.shape[0] - 1, -1, -1):
            V = (1.0 if arl else ex[i]) + K[i] @ V
    K1, ex1 = st.kernel(np.zeros(1), 1)
    V = (1.0 if arl else ex1) + K1 @ V
    return float(V[0])


def ewma_signal_probability(
    lam: float, L: float, n: int, time_varying: bool = False, delta: float = 0.0, *, nodes: int | None = None
) -> float:
    """P(the EWMA chart with multiplier ``L`` signals within ``n`` readings of e_0 = 0).

    Finite-horizon form of Crowder's (1987) integral equation:
    V_{j-1}(u) = P(exit at j | u) + int V_j(y) f(y | u) dy, V_n = 0, answer V_0(0);
    the stretch with constant limits is summed by repeated squaring.  With exact
    limits the steps are taken one by one until ``(1-lam)^(2i) < 1e-7`` (the limit
    is then within 5e-8 relative of the asymptotic one, far below what a p-value needs).
    """
    if n <= 0:
        return 0.0
    if nodes is None:  # ~1.6 nodes per kernel sd: relative error below 1e-6 (checked against 120+ nodes)
        nodes = _auto_nodes(lam, L, 1.6, 10, 16, 240)
    st = _Steps(lam, L, delta, bool(time_varying), int(nodes), tol=1e-7)
    top = min(n, st.n0)
    if n > st.n0:
        y, _ = st.inf
        K, ex = st.kernel(y, st.n0)
        V = absorbed_within_all(K, ex, n - st.n0)
    else:
        V = np.zeros(st.nodes)
    return min(1.0, max(0.0, _backward(st, V, top, arl=False)))


def ewma_L_for_arl(lam: float, arl0: float, time_varying: bool = False) -> float:
    """Limit multiplier L whose in-control :func:`ewma_arl` equals ``arl0``."""
    check_float("lam", lam, 0.0, 1.0, open_lo=True)
    check_float("arl0", arl0, 1.0, open_lo=True)

    def f(L: float) -> float:
        return math.log(ewma_arl(lam, L, 0.0, time_varying)) - math.log(arl0)

    lo, hi = 0.5, 3.0
    while f(hi) < 0.0:
        hi += 1.0
        if hi > 10.0:
            raise ValueError(f"no L below 10 reaches ARL0 = {arl0} at lam = {lam}")
    while f(lo) > 0.0:
        lo /= 2.0
        if lo < 1e-3:
            raise ValueError(f"ARL0 = {arl0} is too small for lam = {lam}")
    return float(optimize.brentq(f, lo, hi, xtol=1e-9))


# Signals of a chart with asymptotic limits read their p-value from a table per
# (lam, L): standardised levels L .. L + 3 every 0.025, horizons up to 512, with the
# node count of the top of the grid.  It agrees with the direct computation to about
# 1e-6 relative (tests/rules/test_ewma.py); outside it, and with exact limits, the
# integral equation is solved directly.
_TABLE_STEP, _TABLE_COUNT, _TABLE_MAX_N = 0.025, 121, 512


@lru_cache(maxsize=16)
def _pvalue_table(lam: float, L: float) -> AbsorptionTable:
    nodes = _auto_nodes(lam, L + _TABLE_STEP * (_TABLE_COUNT - 1), 1.6, 10, 16, 240)

    def build(levels: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        first, v1, Q, e = [], [], [], []
        for r in levels:
            st = _Steps(lam, float(r), 0.0, False, nodes)
            K1, ex1 = st.kernel(np.zeros(1), 1)  # from e_0 = 0
            K, ex = st.kernel(st.inf[0], 1)
            first.append(ex1[0])
            v1.append(K1[0])
            Q.append(K)
            e.append(ex)
        return np.array(first), np.stack(v1), np.stack(Q), np.stack(e)

    return AbsorptionTable(build, lo=L, step=_TABLE_STEP, count=_TABLE_COUNT, max_steps=_TABLE_MAX_N, first_block=16)


def signal_probability(lam: float, L: float, r: float, n: int, time_varying: bool) -> float:
    """:func:`ewma_signal_probability` ``(lam, r, n, time_varying)`` as an :class:`Ewma`
    signal with multiplier ``L`` reports it: from the table of (lam, L) where that
    reaches (asymptotic limits), computed directly elsewhere."""
    if not time_varying:
        p = _pvalue_table(lam, L).pvalue(r, n)
        if p is not None:
            return min(1.0, p)
    return ewma_signal_probability(lam, r, n, time_varying)


@register
class Ewma(StreamDetector):
    """Two-sided EWMA chart (Roberts 1959) on standardised values.

    Parameters: ``lam`` smoothing weight in (0, 1] (default 0.1), ``L`` limit
    multiplier > 0 (default 2.814: ARL0 ~ 500 with asymptotic limits, Lucas &
    Saccucci 1990), ``limits`` ``"exact"`` (time-varying, default) or ``"asymptotic"``.

    On ``|e_i| > L sd_i`` it returns a ``shift`` signal:

    * ``direction``: sign of e_i;
    * ``onset_index``: first reading of the current stretch in which the EWMA has
      stayed strictly on the signalling side of the centre line (the restart,
      e_0 = 0, counts as on the centre line);
    * ``size``: mean of the values fed from onset to the signal (sigma units);
    * ``p_value``: :func:`ewma_signal_probability` at the observed standardised
      level r = |e_i| / sd_i and the readings since restart i: the in-control
      probability that the same chart with multiplier r (same limit type)
      signals within i readings (with asymptotic limits read from a table per
      (lam, L), see :func:`signal_probability`);
    * ``statistic``: e_i.

    After a signal the EWMA restarts at e_0 = 0 (and the exact limits start over).
    """

    key = "ewma"
    name = "EWMA"
    STATE_VERSION = 1
    PARAMS = ("lam", "L", "limits")
    needs_reference = True

    def __init__(self, lam: float = 0.1, L: float = 2.814, limits: str = "exact") -> None:
        self.lam = check_float("lam", lam, 0.0, 1.0, open_lo=True)
        self.L = check_float("L", L, 0.0, open_lo=True)
        self.limits = check_choice("limits", limits, ("exact", "asymptotic"))
        self.min_values = 1
        self._q = 1.0 - self.lam
        self._q2 = self._q * self._q
        self._c = self.lam / (2.0 - self.lam)
        self._w_inf = self.L * math.sqrt(self._c)
        self._exact = self.limits == "exact"
        self._t = 0
        self._restart()

    def _restart(self) -> None:
        self._z = 0.0
        self._f = 1.0  # (1-lam)^(2i)
        self._i = 0
        self._rs = 0  # sign of the current stretch
        self._rstart = self._t
        self._rsum = 0.0
        self.last = 0.0

    def update(self, x: float) -> Signal | None:
        x = float(x)
        if not math.isfinite(x):
            raise ValueError(f"value must be finite, got {x!r}")
        t = self._t
        self._t = t + 1
        z = self.lam * x + self._q * self._z
        self._z = z
        self._i += 1
        self.last = z
        sgn = 1 if z > 0.0 else (-1 if z < 0.0 else 0)
        if sgn == 0 or sgn != self._rs:
            self._rs = sgn
            self._rstart = t
            self._rsum = x
        else:
            self._rsum += x
        if self._exact:
            self._f = self._f * self._q2
            w = self.L * math.sqrt(self._c * (1.0 - self._f))
        else:
            w = self._w_inf
        if z > w or z < -w:
            sig = self._signal(t)
            self._restart()
            return sig
        return None

    def _signal(self, t: int) -> Signal:
        sd = math.sqrt(self._c * (1.0 - self._f)) if self._exact else math.sqrt(self._c)
        r = abs(self._z) / sd
        p = signal_probability(self.lam, self.L, r, self._i, self._exact)
        n_on = t - self._rstart + 1
        return Signal(
            pattern="shift",
            detector=self.name,
            p_value=p,
            index=t,
            onset_index=self._rstart,
            direction="up" if self._z > 0 else "down",
            size=self._rsum / n_on,
            statistic=self._z,
            detail={
                "standardised_level": r,
                "limit": self.L * sd,
                "readings_since_restart": self._i,
                "lam": self.lam,
                "L": self.L,
                "limits": self.limits,
                "p_value_method": "integral equation (Crowder 1987), finite horizon: "
                "P(chart with multiplier r signals within i readings), N(0,1)",
            },
        )

    # -- state ------------------------------------------------------------
    def _get_state(self) -> dict[str, Any]:
        return {
            "t": self._t,
            "z": self._z,
            "f": self._f,
            "i": self._i,
            "rs": self._rs,
            "rstart": self._rstart,
            "rsum": self._rsum,
        }

    def _set_state(self, state: dict[str, Any]) -> None:
        try:
            self._t = int(state["t"])
            self._z = float(state["z"])
            self._f = float(state["f"])
            self._i = int(state["i"])
            self._rs = int(state["rs"])
            self._rstart = int(state["rstart"])
            self._rsum = float(state["rsum"])
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"bad ewma state: {exc}") from exc
        self.last = self._z

    # -- batch --------------------------------------------------------------
    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        """Signals over ``x`` from a fresh start, identical to streaming ``update``."""
        return cls(**params).resume(x)

    def resume(self, x: Any) -> list[Signal]:
        """Signals over ``x`` continuing from this detector's state, identical to ``update``
        on each value in turn (and the state afterwards is the same).

        Where ``rules._recursions`` is built, ``update``'s own arithmetic runs in C up
        to each signal.  Otherwise the EWMA is computed per block by ``scipy.signal.lfilter`` (same arithmetic
        as the recursion), the exact-limit factor by ``cumprod``; after a signal the
        block restarts at the next value.
        """
        det = self
        x = np.ascontiguousarray(x, dtype=float).ravel()
        if not np.all(np.isfinite(x)):
            raise ValueError(f"value must be finite, got {x[~np.isfinite(x)][0]!r}")
        if _ewma_until is not None:
            return self._resume_compiled(x)
        out: list[Signal] = []
        n = x.size
        base = det._t  # index of x[0] in this detector's own count
        pos = 0
        block = 256
        b, a = [det.lam], [1.0, -det._q]
        while pos < n:
            seg = x[pos : pos + block]
            m = seg.size
            z = signal.lfilter(b, a, seg, zi=[det._q * det._z])[0]
            if det._exact:
                f = np.cumprod(np.concatenate(([det._f], np.full(m, det._q2))))[1:]
                w = det.L * np.sqrt(det._c * (1.0 - f))
            else:
                f = None
                w = det._w_inf
            hit = np.flatnonzero((z > w) | (z < -w))
            stop = int(hit[0]) if hit.size else m - 1
            sg = np.sign(z[: stop + 1]).astype(int)
            prev = np.concatenate(([det._rs], sg[:-1]))
            new = np.flatnonzero((sg == 0) | (sg != prev))
            if new.size:
                j0 = int(new[-1])
                det._rstart = base + pos + j0
                det._rsum = float(np.cumsum(seg[j0 : stop + 1])[-1])
            else:
                det._rsum = float(np.cumsum(np.concatenate(([det._rsum], seg[: stop + 1])))[-1])
            det._rs = int(sg[-1])
            det._z = float(z[stop])
            det.last = det._z
            if f is not None:
                det._f = float(f[stop])
            det._i += stop + 1
            det._t = base + pos + stop + 1
            if hit.size:
                out.append(det._signal(base + pos + stop))
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
            (stop, self._z, self._f, self._i, self._rs, self._rstart, self._rsum, self._t) = _ewma_until(
                x, pos, self.lam, self._q, self.L, self._c, self._q2, self._exact, self._w_inf, self._z, self._f,
                self._i, self._rs, self._rstart, self._rsum, self._t)
            if stop < 0:
                self.last = self._z
                break
            out.append(self._signal(base + stop))
            self._restart()
            pos = stop + 1
        return out
