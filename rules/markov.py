"""Small numerical helpers shared by the CUSUM, EWMA and zone-rule run-length code.

* :func:`gauss_legendre` -- quadrature nodes and weights on ``[a, b]``
  (used by the Nystrom solutions of the ARL integral equations, Crowder 1987).
* :func:`absorbed_within` -- probability that an absorbing chain (or a Nystrom
  discretised kernel) is absorbed within ``n`` steps, summed as
  ``sum_{t<n} Q^t e`` with repeated squaring, so large ``n`` costs
  ``O(m^3 log n)`` and small absorption probabilities keep their relative
  precision (no ``1 - survival`` cancellation).

Example
-------
>>> import numpy as np
>>> Q = np.array([[0.5]]); e = np.array([0.5])   # geometric, p = 0.5 per step
>>> round(float(absorbed_within(Q, e, np.array([1.0]), 3)), 6)  # 1 - 0.5**3
0.875
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np


@lru_cache(maxsize=32)
def _legendre(n: int) -> tuple[np.ndarray, np.ndarray]:
    g, w = np.polynomial.legendre.leggauss(n)
    g.setflags(write=False)
    w.setflags(write=False)
    return g, w


def gauss_legendre(a: float, b: float, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes and weights of the ``n``-point Gauss-Legendre rule on ``[a, b]``."""
    g, w = _legendre(int(n))
    half = 0.5 * (b - a)
    return a + half * (g + 1.0), half * w


_TINY = 1e-150  # entries below this are dropped: products of two stay normal floats (subnormals are very slow)


def _flush(a: np.ndarray) -> np.ndarray:
    a = np.array(a, dtype=float)
    a[np.abs(a) < _TINY] = 0.0
    return a


def _iterate(n: int, m: int) -> bool:
    """Whether n plain steps (m^2 each, plus Python overhead) beat repeated squaring
    (m^3 per product, log2 n products) for an m-state chain: measured crossover
    about 0.8 m steps (m = 47 and 150, numpy matmul on one core)."""
    return n <= max(16, int(0.8 * m))


def absorbed_within_all(Q: np.ndarray, exit_prob: np.ndarray, n: int) -> np.ndarray:
    """The vector ``sum_{t=0}^{n-1} Q^t exit_prob`` (absorption within ``n`` steps from each state)."""
    m = Q.shape[0]
    total = np.zeros(m)
    if n <= 0:
        return total
    A = _flush(Q)
    B = _flush(exit_prob)
    if _iterate(n, m):
        for _ in range(n):  # V_{t+1} = e + Q V_t, V_0 = 0
            total = B + A @ total
            total[np.abs(total) < _TINY] = 0.0
        return total
    P = None  # product of the A's used so far (applied on the left of later blocks)
    while n:
        if n & 1:
            total = total + (B if P is None else P @ B)
            P = A if P is None else _flush(P @ A)
        n >>= 1
        if n:
            B = _flush(B + A @ B)
            A = _flush(A @ A)
    return total


def absorbed_within(Q: np.ndarray, exit_prob: np.ndarray, start: np.ndarray, n: int) -> float:
    """``start . sum_{t=0}^{n-1} Q^t exit_prob``: absorption within ``n`` steps.

    ``Q`` is the transient-to-transient matrix (rows: from, columns: to),
    ``exit_prob[i]`` the one-step absorption probability from state ``i`` and
    ``start`` the initial distribution (a row vector).  ``n = 0`` gives 0.
    """
    if n <= 0:
        return 0.0
    if _iterate(n, Q.shape[0]):
        v = _flush(start)
        Q = _flush(Q)
        occupied = v.copy()  # sum over t < n of start Q^t: one dot product at the end
        for _ in range(n - 1):
            v = v @ Q
            v[np.abs(v) < _TINY] = 0.0
            occupied += v
        return float(occupied @ exit_prob)
    A = _flush(Q)  # Q^(2^j)
    B = _flush(exit_prob)  # sum_{t < 2^j} Q^t e
    v = _flush(start)
    total = 0.0
    while n:
        if n & 1:
            total += float(v @ B)
            v = _flush(v @ A)
        n >>= 1
        if n:
            B = _flush(B + A @ B)
            A = _flush(A @ A)
    return total


class AbsorptionTable:
    """Absorption-within-n probabilities of a family of chains, tabulated once.

    The family is indexed by a smooth parameter ``theta`` (a CUSUM's observed
    level, an EWMA's standardised level).  ``build(thetas)`` returns, for each
    grid value, ``(first, v1, Q, exit_prob)``: the probability of absorption at
    the first step, the sub-probability vector over the transient states after
    it, the transient matrix and the one-step absorption vector.  Then

        p(theta, n) = first + sum_{s=1}^{n-1} v_s . exit_prob,  v_{s+1} = v_s Q,

    the same sum :func:`absorbed_within` takes, run forwards so that one pass
    gives every horizon at once.  Horizons are added in doubling blocks on
    demand, up to ``max_steps``; between grid values ``log p`` is read by
    4-point Lagrange interpolation (error of order step^4; the tests bound it
    against the direct computation).  :meth:`pvalue` returns ``None`` outside
    the grid or beyond ``max_steps``, where the caller computes directly.

    >>> import numpy as np
    >>> def geometric(th):   # absorbed with probability th per step
    ...     return th, (1 - th)[:, None], (1 - th)[:, None, None], th[:, None]
    >>> t = AbsorptionTable(geometric, lo=0.1, step=0.01, count=41, max_steps=64)
    >>> abs(t.pvalue(0.255, 3) / (1 - (1 - 0.255) ** 3) - 1) < 1e-6
    True
    """

    def __init__(self, build, *, lo: float, step: float, count: int, max_steps: int, first_block: int = 32) -> None:
        if count < 4:
            raise ValueError("an interpolation table needs at least 4 grid values")
        self.lo, self.step, self.count, self.max_steps = float(lo), float(step), int(count), int(max_steps)
        self.hi = self.lo + self.step * (self.count - 1)
        first, v, Q, e = build(self.lo + self.step * np.arange(self.count))
        self._Q = _flush(Q)
        self._e = _flush(e)
        self._v = _flush(v)  # v_s for the next horizon to add
        self._cum = np.asarray(first, dtype=float).copy()  # p(theta, built)
        self._cols = [self._cum.copy()]  # column n - 1 holds p(., n)
        self._log: list[list[float] | None] = [None]  # log p(., n) as floats, made on first use
        self._block = int(first_block)

    @property
    def horizon(self) -> int:
        """Largest n tabulated so far."""
        return len(self._cols)

    def _extend(self, n: int) -> None:
        target = min(self.max_steps, max(n, self.horizon + self._block))
        self._block *= 2
        v, Q, e, cum = self._v, self._Q, self._e, self._cum
        for _ in range(target - self.horizon):
            cum = cum + np.einsum("gi,gi->g", v, e)
            self._cols.append(cum)
            v = np.matmul(v[:, None, :], Q)[:, 0, :]
            v[np.abs(v) < _TINY] = 0.0
        self._v, self._cum = v, cum
        self._log.extend([None] * (len(self._cols) - len(self._log)))

    def pvalue(self, theta: float, n: int) -> float | None:
        """Interpolated p(theta, n), or ``None`` where the table does not reach."""
        if n < 1 or n > self.max_steps or not (self.lo <= theta <= self.hi):
            return None
        if n > self.horizon:
            self._extend(n)
        col = self._log[n - 1]
        if col is None:
            col = self._log[n - 1] = np.log(np.maximum(self._cols[n - 1], 1e-300)).tolist()
        x = (theta - self.lo) / self.step
        j = min(max(int(x) - 1, 0), self.count - 4)
        x -= j
        # Lagrange weights through the grid points j .. j+3 (at x = 0, 1, 2, 3)
        a, b, c, d = x, x - 1.0, x - 2.0, x - 3.0
        w0 = -b * c * d / 6.0
        w1 = a * c * d / 2.0
        w2 = -a * b * d / 2.0
        w3 = a * b * c / 6.0
        return math.exp(w0 * col[j] + w1 * col[j + 1] + w2 * col[j + 2] + w3 * col[j + 3])
