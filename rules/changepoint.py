"""Pettitt's (1979) non-parametric test for a single change point.

Pettitt A.N. (1979) "A non-parametric approach to the change-point problem",
*Applied Statistics* 28(2):126-135::

    U_t = sum_{i<=t} sum_{j>t} sgn(x_i - x_j) = 2 * sum_{i<=t} r_i - t(n + 1),   t = 1..n-1
    K   = max_t |U_t|,    tau-hat = argmax_t |U_t|
    p  ~= 2 exp(-6 K^2 / (n^3 + n^2)),  capped at 1

``r_i`` are ranks (mid-ranks for ties, which keeps the rank form equal to
the sign form).  ``location`` = tau-hat = the number of readings before the
change (so ``x[location]`` is the first reading after it); the first maximum
wins when several t share it.  With this sign convention U is positive when
the level goes *down*; ``direction`` reports ``"up"`` or ``"down"``.  The
p approximation is conservative for small n (Pettitt 1979).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from rules.detector import Signal, StreamDetector, check_float, check_int
from rules.registry import register

__all__ = ["PettittDetector", "PettittResult", "pettitt_onset", "pettitt_test"]


@dataclass(frozen=True)
class PettittResult:
    """``statistic`` is K; ``location`` the number of readings before the change."""

    statistic: float
    location: int
    pvalue: float
    direction: str
    u: np.ndarray
    n: int
    method: str


def _u_series(a: np.ndarray) -> np.ndarray:
    n = a.size
    r = stats.rankdata(a)  # mid-ranks
    t = np.arange(1, n)
    return 2.0 * np.cumsum(r)[:-1] - t * (n + 1.0)


def pettitt_test(x) -> PettittResult:
    """Pettitt's change-point test (formulas in the module docstring).

    >>> r = pettitt_test([3.1, 2.8, 3.4, 3.0, 4.2, 4.6, 3.9, 4.4, 4.1])
    >>> r.location, r.statistic, round(r.pvalue, 5), r.direction
    (4, 20.0, 0.10333, 'up')
    """
    a = np.asarray(x, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"x must be one-dimensional, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ValueError("x contains NaN or infinite values")
    n = a.size
    if n < 3:
        raise ValueError(f"Pettitt's test needs at least 3 values, got {n}")
    u = _u_series(a)
    k_idx = int(np.argmax(np.abs(u)))
    k = float(abs(u[k_idx]))
    p = min(1.0, 2.0 * math.exp(-6.0 * k * k / (n**3 + n**2)))
    return PettittResult(
        statistic=k,
        location=k_idx + 1,
        pvalue=p,
        direction="down" if u[k_idx] > 0 else ("up" if u[k_idx] < 0 else "none"),
        u=u,
        n=n,
        method="Pettitt (1979) rank test; p ~= 2 exp(-6K^2/(n^3+n^2)), capped at 1",
    )


def pettitt_onset(x) -> int | None:
    """Number of readings before the most likely single change (Pettitt's tau-hat), or None when undefined.

    For refining a detector's onset estimate: ``onset = window_start + pettitt_onset(window)``
    is the index of the first reading after the change.  Returns None for
    fewer than 3 values or when every value is equal.

    >>> pettitt_onset([5.0, 5.1, 4.9, 5.0, 6.0, 6.1, 5.9])
    4
    """
    a = np.asarray(x, dtype=float)
    if a.size < 3 or not np.all(np.isfinite(a)) or np.all(a == a[0]):
        return None
    return pettitt_test(a).location


# -- streaming detector ----------------------------------------------------------------------


def _pettitt_p(k: float, n: int) -> float:
    return min(1.0, 2.0 * math.exp(-6.0 * k * k / (n**3 + n**2)))


@register
class PettittDetector(StreamDetector):
    """Rolling-window Pettitt test for a step change in level (``pattern="shift"``).

    Keeps, for each value in the window, its row sum ``c_i = sum_j sgn(x_i - x_j)``
    over the window; an entering or leaving value changes every row sum by one
    sign (O(w) with numpy), and ``U_t = sum_{i<=t} c_i`` because the within-block
    terms cancel.  Fires when Pettitt's approximate two-sided p
    ``2 exp(-6K^2/(w^3 + w^2))`` is <= ``alpha`` (that p is what the signal
    carries; it is conservative for short windows, so calibrate ``alpha`` by run
    length, not by its nominal value).  ``onset_index`` is the first value after
    the estimated change; ``size`` = mean after - mean before, in the units fed;
    ``statistic`` is K.  After a signal the window is cleared.

    >>> det = PettittDetector(window=40, alpha=0.01)
    >>> sigs = [det.update(float(i >= 60)) for i in range(100)]
    >>> [(s.index, s.onset_index, s.direction) for s in sigs if s is not None]
    [(67, 60, 'up')]
    """

    key = "pettitt"
    name = "Pettitt change-point test"
    STATE_VERSION = 1
    PARAMS = ("window", "alpha")

    def __init__(self, window: int = 50, alpha: float = 0.001) -> None:
        self.window = check_int("window", window, 4, 10_000)
        self.alpha = check_float("alpha", alpha, 0.0, 1.0, open_lo=True)
        w = self.window
        k_most = (w // 2) * (w - w // 2)  # complete separation at the middle
        if _pettitt_p(k_most, w) > self.alpha:
            raise ValueError(
                f"window {w} can never reach alpha {self.alpha}: its smallest Pettitt p is {_pettitt_p(k_most, w):.3g}"
            )
        self.min_values = self.window
        self._n = 0
        self._reset()

    def _reset(self) -> None:
        self._vals = np.zeros(self.window)
        self._c = np.zeros(self.window)
        self._count = 0
        self.last: float | None = None

    def _push(self, v: float) -> None:
        vals, c = self._vals, self._c
        if self._count == self.window:
            old = vals[0]
            c[1:] -= np.sign(vals[1:] - old)
            vals[:-1] = vals[1:]
            c[:-1] = c[1:]
            self._count -= 1
        k = self._count
        d = np.sign(vals[:k] - v)
        c[:k] += d
        c[k] = -d.sum()
        vals[k] = v
        self._count = k + 1

    def _signal(self, index: int, values: np.ndarray, u: np.ndarray) -> Signal | None:
        j = int(np.argmax(np.abs(u)))
        k = float(abs(u[j]))
        p = _pettitt_p(k, self.window)
        if p > self.alpha:
            return None
        tau = j + 1
        size = float(values[tau:].mean() - values[:tau].mean())
        return Signal(
            pattern="shift",
            detector=self.name,
            p_value=p,
            index=index,
            onset_index=index - self.window + 1 + tau,
            direction="down" if u[j] > 0 else "up",
            size=size,
            statistic=k,
            detail={"window": self.window, "readings_before_change": tau},
        )

    def update(self, x: float) -> Signal | None:
        v = float(x)
        if not math.isfinite(v):
            raise ValueError(f"value must be finite, got {x!r}")
        index = self._n
        self._n += 1
        self._push(v)
        if self._count < self.window:
            self.last = None
            return None
        u = np.cumsum(self._c[:-1])
        self.last = float(np.abs(u).max())
        if _pettitt_p(self.last, self.window) > self.alpha:
            return None
        sig = self._signal(index, self._vals.copy(), u)
        self._reset()
        return sig

    def _get_state(self) -> dict:
        return {"n_seen": self._n, "values": self._vals[: self._count].tolist()}

    def _set_state(self, state: dict) -> None:
        vals = [float(v) for v in state["values"]]
        if len(vals) > self.window or not all(math.isfinite(v) for v in vals):
            raise ValueError("state values must be finite and at most one window long")
        self._n = check_int("n_seen", state["n_seen"], len(vals))
        self._reset()
        for v in vals:
            self._push(v)
        if self._count == self.window:
            self.last = float(np.abs(np.cumsum(self._c[:-1])).max())

    @classmethod
    def scan(cls, x, **params) -> list[Signal]:
        """Signals identical to streaming: U of every window from mid-ranks, vectorised in blocks."""
        det = cls(**params)
        a = np.asarray(x, dtype=float).ravel()
        bad = np.flatnonzero(~np.isfinite(a))
        if bad.size:
            raise ValueError(f"value must be finite, got {a[bad[0]]!r} at position {int(bad[0])}")
        w = det.window
        if a.size < w:
            return []
        views = np.lib.stride_tricks.sliding_window_view(a, w)
        t = np.arange(1, w)
        kcrit = math.sqrt(-math.log(det.alpha / 2.0) * (w**3 + w**2) / 6.0) if det.alpha < 2 else 0.0
        out: list[Signal] = []
        next_end = w - 1
        block = max(1, 2_000_000 // w)
        for b0 in range(0, views.shape[0], block):
            r = stats.rankdata(views[b0 : b0 + block], axis=1)
            u = 2.0 * np.cumsum(r, axis=1)[:, :-1] - t * (w + 1.0)
            kmax = np.abs(u).max(axis=1)
            for row in np.flatnonzero(kmax >= kcrit * (1 - 1e-9) - 1e-9):
                start = b0 + int(row)
                end = start + w - 1
                if end < next_end:
                    continue
                sig = det._signal(end, views[start].copy(), u[row])
                if sig is not None:
                    out.append(sig)
                    next_end = end + w
        return out
