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
