"""Streaming run-pattern detectors over a rolling window, and their vectorised scans.

Four detectors, one class each (keys in brackets):

* :class:`MedianRunsDetector` (``median_runs``): runs about the window median;
  too few runs -> "grouping", too many -> "mixture".
* :class:`UpDownRunsDetector` (``updown_runs``): runs up and down; too few -> "drift",
  too many -> "sawtooth".
* :class:`LongestMedianRunDetector` (``longest_median_run``): the longest run on one
  side of the window median -> "shift" (direction "up" above, "down" below).
* :class:`LongestMonotoneRunDetector` (``longest_monotone_run``): the longest monotone
  run -> "drift" (direction of the run).

Each evaluates the full window of the last ``window`` readings only (never a partial
window), at one-sided level ``alpha`` per enabled tail (a tail probability equal to
alpha fires), and restarts after a signal (the window is cleared, so the next window
considered ends ``window`` readings later).  Conventions on ties are those of
:mod:`rules.runs`: readings equal to the window median and zero differences are
dropped.  A signal is statistical evidence of a non-random pattern, not proof of a
cause.

Compiled windows: where ``rules._windows`` is built (``rules/_windows.c``) and the window is at most 512
readings, the window is its ``RunWindow``, which keeps the values and a sorted copy in C and recomputes
the labels and their run summary on every reading (O(w) simple steps, far cheaper than the Python
bookkeeping below).  The Python windows are the reference and the fallback; both give the same numbers.
The batch ``scan`` of the median detectors pushes the whole array through the same compiled window
(``RunWindow.scan``); the numpy kernels below are its fallback, and the tests run both.

Incremental bookkeeping (the Python windows): the window's labels (+1 / -1 / 0) live in a ring buffer and a
:class:`_RunLedger` keeps the counts, the number of runs of the zero-free label
sequence and a histogram of run lengths per sign (with the maximum), updated locally
when a label changes.  For the median detectors a sorted list (bisect) gives the
rolling median; when it moves, only readings lying between the old and new median
change label.  Cost per reading: O(log w) searches plus a list insertion (a memmove)
plus walks over the runs touching the changed labels (O(1) expected for random data;
long only when a long run, i.e. a pattern, is present, or with many tied readings).

Batch ``scan``: the difference-sign detectors use prefix sums over the whole series
(O(1) per window; a sparse table gives the longest run).  The median detectors take the
rolling order statistics from ``scipy.ndimage.rank_filter`` and compare each window
with its median (O(w) per window, in vector operations); windows with ties at the
median go through a slower exact path.  Either way the restart rule is applied
afterwards and the Signal list is identical to the streaming one.
"""

from __future__ import annotations

import threading
from bisect import bisect_left, bisect_right, insort
from contextlib import contextmanager
from math import isfinite
from collections import deque
from typing import Any, ClassVar, Iterator

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy.ndimage import rank_filter

from rules import runs_null as rn
from rules.detector import Signal, StateError, StreamDetector, check_choice, check_float, check_int
from rules.registry import register
from rules.runs import sample_median

_INF = float("inf")

try:  # the compiled windows (rules/_windows.c); the pure-Python ones below are the reference
    from rules._windows import MAX_W as _C_MAX_W, RunWindow as _RunWindow
except ImportError:  # not built (no compiler at install): the Python windows do the same, slower
    _RunWindow, _C_MAX_W = None, 0
# Up to this window the compiled window (O(w) per reading in C, less up to 64) is used; beyond it the
# incremental Python ledger (O(log w) plus local walks) is cheaper.
_COMPILED_MAX_W = min(512, _C_MAX_W)
# (detector key, alpha, side) -> {counts: critical values}; shared by all instances
_FAST_CRIT: dict[tuple[str, float, str], dict[tuple[int, ...], tuple[int, ...]]] = {}


class _RunLedger:
    """Labels in {-1, 0, +1} at absolute positions [start, end) (ring of capacity ``cap``).

    Maintained for the label sequence with the zeros removed: ``n_pos``, ``n_neg``, the
    number of runs ``runs``, ``hist[s][L]`` = number of runs of sign s with L members,
    and ``top[s]`` = the longest run of sign s.
    """

    __slots__ = ("cap", "lab", "start", "end", "n_pos", "n_neg", "runs", "hist", "top")

    def __init__(self, cap: int) -> None:
        self.cap = cap
        self.lab = [0] * cap
        self.start = 0
        self.end = 0
        self.n_pos = 0
        self.n_neg = 0
        self.runs = 0
        # indexed by the sign: [unused, +1, -1]
        self.hist = [None, [0] * (cap + 2), [0] * (cap + 2)]
        self.top = [0, 0, 0]

    def __len__(self) -> int:
        return self.end - self.start

    def labels(self) -> list[int]:
        cap, lab = self.cap, self.lab
        return [lab[p % cap] for p in range(self.start, self.end)]

    # -- run-length histogram ------------------------------------------------
    def _inc(self, s: int, length: int) -> None:
        self.hist[s][length] += 1
        self.runs += 1
        if length > self.top[s]:
            self.top[s] = length

    def _dec(self, s: int, length: int) -> None:
        h = self.hist[s]
        h[length] -= 1
        self.runs -= 1
        if length == self.top[s] and h[length] == 0:
            t = length
            while t > 0 and h[t] == 0:
                t -= 1
            self.top[s] = t

    # -- walks ------------------------------------------------------------------
    def _walk(self, q: int, step: int, s: int) -> tuple[int, int]:
        """From position q moving by ``step`` (-1 left, +1 right), skipping zeros: the
        number of labels ``s`` before the first ``-s``; if there are none, the length of
        the ``-s`` run met instead (else 0).  Both stop at the window edge."""
        lab, cap = self.lab, self.cap
        lo, hi = self.start, self.end
        c = 0
        while lo <= q < hi:
            v = lab[q % cap]
            if v == s:
                c += 1
            elif v:
                break
            q += step
        else:
            return c, 0
        if c:
            return c, 0
        while lo <= q < hi:
            v = lab[q % cap]
            if v == -s:
                c += 1
            elif v:
                break
            q += step
        return 0, c

    # -- label changes ----------------------------------------------------------
    def set(self, p: int, b: int) -> None:
        a = self.lab[p % self.cap]
        if a == b:
            return
        if a:
            self._remove(p, a)
        if b:
            self._insert(p, b)

    def _remove(self, p: int, a: int) -> None:
        cl, ll = self._walk(p - 1, -1, a)
        cr, lr = self._walk(p + 1, 1, a)
        self._dec(a, cl + cr + 1)
        self.lab[p % self.cap] = 0
        if a > 0:
            self.n_pos -= 1
        else:
            self.n_neg -= 1
        if cl + cr:
            self._inc(a, cl + cr)
        elif ll and lr:  # p was a run on its own: the opposite runs either side now touch
            self._dec(-a, ll)
            self._dec(-a, lr)
            self._inc(-a, ll + lr)

    def _insert(self, p: int, b: int) -> None:
        cl, ll = self._walk(p - 1, -1, b)
        cr, lr = self._walk(p + 1, 1, b)
        if cl or cr:
            if cl and cr:
                self._dec(b, cl + cr)
            else:
                self._dec(b, cl or cr)
            self._inc(b, cl + cr + 1)
        else:
            if ll and lr:  # p splits a run of the other sign
                self._dec(-b, ll + lr)
                self._inc(-b, ll)
                self._inc(-b, lr)
            self._inc(b, 1)
        self.lab[p % self.cap] = b
        if b > 0:
            self.n_pos += 1
        else:
            self.n_neg += 1

    def push(self, b: int) -> None:
        self.lab[self.end % self.cap] = 0
        self.end += 1
        if b:
            self._insert(self.end - 1, b)

    def pop(self) -> None:
        if self.lab[self.start % self.cap]:
            self._remove(self.start, self.lab[self.start % self.cap])
        self.start += 1


class _RunCounter:
    """Like :class:`_RunLedger` but keeps only the counts and the number of runs (no run
    lengths), so a label change needs only its nearest non-zero neighbours."""

    __slots__ = ("cap", "lab", "start", "end", "n_pos", "n_neg", "runs", "changes", "top")

    def __init__(self, cap: int) -> None:
        self.cap = cap
        self.lab = [0] * cap
        self.start = 0
        self.end = 0
        self.n_pos = 0
        self.n_neg = 0
        self.runs = 0
        self.changes = 0  # neighbouring non-zero labels that differ
        self.top = {1: 0, -1: 0}  # not tracked

    def __len__(self) -> int:
        return self.end - self.start

    def labels(self) -> list[int]:
        cap, lab = self.cap, self.lab
        return [lab[p % cap] for p in range(self.start, self.end)]

    def set(self, p: int, b: int) -> None:
        lab, cap = self.lab, self.cap
        a = lab[p % cap]
        if a == b:
            return
        q, left = p - 1, 0
        while q >= self.start:
            left = lab[q % cap]
            if left:
                break
            q -= 1
        q, right, end = p + 1, 0, self.end
        while q < end:
            right = lab[q % cap]
            if right:
                break
            q += 1
        if a:
            before = (left != 0 and left != a) + (right != 0 and right != a)
        else:
            before = left != 0 and right != 0 and left != right
        if b:
            after = (left != 0 and left != b) + (right != 0 and right != b)
        else:
            after = left != 0 and right != 0 and left != right
        self.changes += after - before
        if a > 0:
            self.n_pos -= 1
        elif a < 0:
            self.n_neg -= 1
        if b > 0:
            self.n_pos += 1
        elif b < 0:
            self.n_neg += 1
        lab[p % cap] = b
        self.runs = self.changes + 1 if self.n_pos or self.n_neg else 0

    def push(self, b: int) -> None:
        self.lab[self.end % self.cap] = 0
        self.end += 1
        if b:
            self.set(self.end - 1, b)

    def pop(self) -> None:
        if self.lab[self.start % self.cap]:
            self.set(self.start, 0)
        self.start += 1


def _latest_longest(labels, sides: tuple[int, ...]) -> tuple[int, int, int]:
    """(length, start offset, sign) of the latest-starting run of maximal length among
    runs whose sign is in ``sides`` (zeros skipped)."""
    best = (0, -1, 0)
    cur_s, cur_len, cur_start = 0, 0, -1
    for i, v in enumerate(labels):
        if v == 0:
            continue
        if v == cur_s:
            cur_len += 1
        else:
            cur_s, cur_len, cur_start = v, 1, i
        if v in sides and cur_len >= best[0]:
            if cur_len > best[0] or cur_start >= best[1]:
                best = (cur_len, cur_start, v)
    return best


# ----------------------------------------------------------------------------------
# shared machinery: windows of values with a rolling median, windows of difference signs
# ----------------------------------------------------------------------------------


class _Summarised:
    """What both Python windows give the detectors, as the compiled ``RunWindow`` does."""

    __slots__ = ()

    def push(self, x: float) -> tuple[int, int, int, int, int] | None:
        """Add ``x``; None while the window is not full, else its summary
        ``(n_pos, n_neg, runs, longest +1 run, longest -1 run)``."""
        self.add(x)
        if not self.full():
            return None
        led = self.ledger
        return led.n_pos, led.n_neg, led.runs, led.top[1], led.top[-1]

    def labels(self) -> list[int]:
        return self.ledger.labels()


class _MedianWindow(_Summarised):
    """The last w values, their rolling median and above/below labels in a ledger."""

    __slots__ = ("w", "vals", "sorted", "median", "ledger")

    def __init__(self, w: int, ledger=None) -> None:
        self.w = w
        self.vals = [0.0] * w
        self.sorted: list[tuple[float, int]] = []
        self.median = 0.0
        self.ledger = (ledger or _RunLedger)(w)

    def add(self, x: float) -> None:
        led, w, sl = self.ledger, self.w, self.sorted
        if led.end - led.start == w:
            p0 = led.start
            del sl[bisect_left(sl, (self.vals[p0 % w], p0))]
            led.pop()
        p = led.end
        self.vals[p % w] = x
        insort(sl, (x, p))
        led.push(0)
        k = len(sl)
        h = k >> 1
        m = sl[h][0] if k & 1 else (sl[h - 1][0] + sl[h][0]) / 2
        old = self.median if k > 1 else m
        self.median = m
        lo, hi = (old, m) if old <= m else (m, old)
        for v, q in sl[bisect_left(sl, (lo, -1)) : bisect_right(sl, (hi, _INF))]:
            led.set(q, (v > m) - (v < m))
        if x < lo or x > hi:
            led.set(p, (x > m) - (x < m))

    def full(self) -> bool:
        led = self.ledger
        return led.end - led.start == self.w

    def values(self) -> list[float]:
        led = self.ledger
        return [self.vals[p % self.w] for p in range(led.start, led.end)]


class _DiffWindow(_Summarised):
    """The last w values as w - 1 difference signs in a ledger."""

    __slots__ = ("w", "vals", "ledger")

    def __init__(self, w: int, ledger=None) -> None:
        self.w = w
        self.vals: deque[float] = deque(maxlen=w)
        self.ledger = (ledger or _RunLedger)(max(1, w - 1))

    @property
    def count(self) -> int:
        return len(self.vals)

    def add(self, x: float) -> None:
        vals = self.vals
        if vals:
            if len(vals) == self.w:
                self.ledger.pop()
            prev = vals[-1]
            self.ledger.push((x > prev) - (x < prev))
        vals.append(x)

    def full(self) -> bool:
        return len(self.vals) == self.w

    def values(self) -> list[float]:
        return list(self.vals)


# ----------------------------------------------------------------------------------
# detector base for the four windowed run detectors
# ----------------------------------------------------------------------------------


class _WindowRunDetector(StreamDetector):
    PARAMS: ClassVar[tuple[str, ...]] = ("window", "alpha", "side")
    SIDES: ClassVar[tuple[str, ...]] = ("both",)
    MIN_WINDOW: ClassVar[int] = 2
    # largest window: the exact longest-run tails get slow beyond (see rules.runs_null)
    MAX_WINDOW: ClassVar[int] = 100_000
    WINDOW_KIND: ClassVar[str] = "median"  # or "diff"

    def __init__(self, window: int = 50, alpha: float = 0.001, side: str = "both") -> None:
        self.window = check_int("window", window, self.MIN_WINDOW, self.MAX_WINDOW)
        self.alpha = check_float("alpha", alpha, 0.0, 0.5, open_lo=True, open_hi=True)
        self.side = check_choice("side", side, self.SIDES)
        self.min_values = self.window
        self._fast = _FAST_CRIT.setdefault((self.key, self.alpha, self.side), {})
        self.n_seen = 0
        self.last: float | None = None
        self._reset()

    def _reset(self) -> None:
        if _RunWindow is not None and self.window <= _COMPILED_MAX_W:
            self._win = _RunWindow(self.window, 0 if self.WINDOW_KIND == "median" else 1)
        else:
            ledger = _RunLedger if self.NEED_TOP else _RunCounter
            kind = _MedianWindow if self.WINDOW_KIND == "median" else _DiffWindow
            self._win = kind(self.window, ledger)
        self._push = self._win.push

    def update(self, x: float) -> Signal | None:
        if type(x) is not float:
            if isinstance(x, bool) or not isinstance(x, (int, float, np.integer, np.floating)):
                raise ValueError(f"value must be a number, got {x!r}")
            x = float(x)
        if not isfinite(x):
            raise ValueError(f"value must be finite, got {x!r}")
        index = self.n_seen
        self.n_seen = index + 1
        got = self._push(x)
        if got is None:
            return None
        sig = self._evaluate(*got, index, self._win.labels)
        if sig is not None:
            self._reset()
        return sig

    def _cached_crit(self, *key: int):
        """Critical values for this (detector, alpha, side) and counts: a dictionary shared
        by all instances with the same settings, filled from the exact tables."""
        got = self._fast.get(key)
        if got is None:
            got = self._fast[key] = self._crit(*key)
        return got

    # subclasses: decide from the window's summary; ``labels`` is a callable giving the
    # window's label list (only called when firing, to locate a run)
    def _evaluate(self, n_pos, n_neg, runs, top_pos, top_neg, index, labels) -> Signal | None:  # pragma: no cover
        raise NotImplementedError

    # -- state ----------------------------------------------------------------------
    def _get_state(self) -> dict[str, Any]:
        return {"n_seen": self.n_seen, "last": self.last, "window_values": self._win.values()}

    def _set_state(self, state: dict[str, Any]) -> None:
        try:
            vals = [float(v) for v in state["window_values"]]
            n_seen = int(state["n_seen"])
            last = state.get("last")
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"bad state for {self.key!r}: {exc}") from exc
        if len(vals) > self.window or n_seen < len(vals):
            raise StateError(f"bad state for {self.key!r}: window holds {len(vals)} values")
        self._reset()
        for v in vals:  # the ledger is a function of the window contents only
            self._win.push(v)
        self.n_seen = n_seen
        self.last = None if last is None else float(last)

    # -- batch ------------------------------------------------------------------------
    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        """Every full window of ``x`` evaluated with numpy, then the restart rule applied:
        identical to feeding ``update`` one value at a time."""
        det = cls(**params)
        a = np.asarray(x, dtype=float)
        if a.ndim != 1:
            raise ValueError(f"x must be one-dimensional, got shape {a.shape}")
        if not np.all(np.isfinite(a)):
            raise ValueError("x contains NaN or infinite values")
        w = det.window
        if a.size < w:
            return []
        summary = det._summary(a)
        fire = det._fires_vec(*summary)
        out: list[Signal] = []
        nxt = 0  # first window (by start offset) allowed after the last restart
        for j in np.flatnonzero(fire):
            if j < nxt:
                continue
            n_pos, n_neg, runs, top_pos, top_neg = (int(arr[j]) for arr in summary)
            row = _row_labels(a, int(j), w, cls.WINDOW_KIND)
            sig = det._evaluate(n_pos, n_neg, runs, top_pos, top_neg, int(j) + w - 1, lambda: row)
            if sig is None:  # pragma: no cover - the vector rule and the scalar rule disagree
                raise AssertionError("vectorised and scalar decisions differ")
            out.append(sig)
            nxt = j + w
        return out

    NEED_RUNS: ClassVar[bool] = True
    NEED_TOP: ClassVar[bool] = True

    def _summary(self, a: np.ndarray):
        if self.WINDOW_KIND == "median":
            if _RunWindow is not None and self.window <= _COMPILED_MAX_W:
                return _median_summary_compiled(a, self.window, self.NEED_RUNS, self.NEED_TOP)
            return _median_summary(a, self.window, self.NEED_RUNS, self.NEED_TOP)
        return _diff_summary(a, self.window, self.NEED_TOP)

    def _fires_vec(self, n_pos, n_neg, runs, top_pos, top_neg) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError


# ----------------------------------------------------------------------------------
# vectorised kernels
# ----------------------------------------------------------------------------------

_CHUNK_ELEMENTS = 1 << 21


def _summarise_zero_free(b: np.ndarray, need_runs: bool, need_top: bool):
    """(runs, longest True run, longest False run) per row of a boolean matrix (no gaps)."""
    m, k = b.shape
    zero = np.zeros(m, dtype=np.int64)
    if k == 0:
        return zero, zero, zero
    runs = 1 + np.count_nonzero(b[:, 1:] != b[:, :-1], axis=1) if need_runs else zero
    if not need_top:
        return runs, zero, zero
    # one pass over the columns (vector operations across all rows at once), keeping
    # the current True / False run lengths; much faster than row-wise accumulations
    dt = np.int16 if k < 32767 else np.int32
    cur_t = np.zeros(m, dtype=dt)
    cur_f = np.zeros(m, dtype=dt)
    top_t = np.zeros(m, dtype=dt)
    top_f = np.zeros(m, dtype=dt)
    for col in np.ascontiguousarray(b.T):
        cur_t += 1
        cur_t *= col
        np.maximum(top_t, cur_t, out=top_t)
        cur_f += 1
        cur_f *= ~col
        np.maximum(top_f, cur_f, out=top_f)
    return runs, top_t, top_f


def _order_stat(a: np.ndarray, w: int, rank: int) -> np.ndarray:
    """The ``rank``-th smallest value (0-based) of every full window.

    ``scipy.ndimage.rank_filter`` returns data values exactly; the window of output
    ``i + w // 2`` starts at ``i`` (default origin)."""
    h = w // 2
    return rank_filter(a, rank, size=w, mode="nearest")[h : h + a.size - w + 1]


def _rolling_median(a: np.ndarray, w: int):
    """(median, clean, position) of every full window.  The median uses the same
    arithmetic as :func:`rules.runs.sample_median`.  ``clean`` marks windows in which
    exactly ``w % 2`` readings equal the median (w // 2 strictly either side): for odd w
    the neighbouring order statistics differ from the median, for even w the median lies
    strictly between the two middle values.  For odd w, ``position`` is the index in
    ``a`` of the median reading (order statistics are taken over ranks with ties broken
    by position, so each is a unique reading); None for even w."""
    h = w // 2
    if w % 2:
        order = np.argsort(a, kind="stable")
        rank = np.empty(a.size, dtype=np.int64)
        rank[order] = np.arange(a.size)
        below, mid, above = (order[_order_stat(rank, w, r)] for r in (h - 1, h, h + 1))
        m = a[mid]
        return m, (a[below] < m) & (m < a[above]), mid
    lo, hi = _order_stat(a, w, h - 1), _order_stat(a, w, h)
    m = (lo + hi) / 2
    return m, (lo < m) & (m < hi), None


def _median_summary(a: np.ndarray, w: int, need_runs: bool = True, need_top: bool = True):
    """(n_pos, n_neg, runs, top_pos, top_neg) for every full window about its median.

    Clean windows (see :func:`_rolling_median`) have w // 2 readings either side; for odd
    w the one reading equal to the median is known by position and its effect on the
    run count is corrected for (or it is cut out, for run lengths).  Other windows (ties
    at the median) are grouped by how many readings equal the median and compressed to
    rectangles."""
    med, clean, pos = _rolling_median(a, w)
    win = sliding_window_view(a, w)
    nw = win.shape[0]
    h = w // 2
    odd = w % 2 == 1
    out = [np.zeros(nw, dtype=np.int64) for _ in range(5)]
    out[0][clean] = h
    out[1][clean] = h
    step = max(1, _CHUNK_ELEMENTS // w)
    for i0 in range(0, nw, step):
        blk = win[i0 : i0 + step]
        nb = blk.shape[0]
        m = med[i0 : i0 + nb, None]
        gt = blk > m
        c = clean[i0 : i0 + nb]
        rc = np.flatnonzero(c)
        rd = np.flatnonzero(~c)
        res = [np.zeros(nb, dtype=np.int64) for _ in range(3)]
        if rc.size:
            g = gt if rc.size == nb else gt[rc]
            if not odd:
                part = _summarise_zero_free(g, need_runs, need_top)
            elif need_top:
                keep = np.ones(g.shape, dtype=bool)
                keep[np.arange(rc.size), pos[i0 + rc] - (i0 + rc)] = False
                part = _summarise_zero_free(g[keep].reshape(rc.size, w - 1), need_runs, need_top)
            else:
                # labelled "below" (gt is False there) the median reading adds a change
                # next to every neighbour above it; dropped, its neighbours meet instead
                p = pos[i0 + rc]
                mm = med[i0 + rc]
                has_l = p > i0 + rc
                has_r = p < i0 + rc + w - 1
                up_l = has_l & (a[np.maximum(p - 1, 0)] > mm)
                up_r = has_r & (a[np.minimum(p + 1, a.size - 1)] > mm)
                corr = up_l.astype(np.int64) + up_r - (has_l & has_r & (up_l != up_r))
                runs = 1 + np.count_nonzero(g[:, 1:] != g[:, :-1], axis=1) - corr
                part = (runs, res[1][rc], res[2][rc])
            for dst, src in zip(res, part):
                dst[rc] = src
        if rd.size:
            gd = gt[rd]
            ltd = blk[rd] < m[rd]
            n_pos = np.count_nonzero(gd, axis=1)
            n_neg = np.count_nonzero(ltd, axis=1)
            out[0][i0 + rd] = n_pos
            out[1][i0 + rd] = n_neg
            zeros = w - n_pos - n_neg
            for zv in np.unique(zeros):
                sub = np.flatnonzero(zeros == zv)
                g = gd[sub]
                if zv:
                    g = g[g | ltd[sub]].reshape(sub.size, w - int(zv))
                for dst, src in zip(res, _summarise_zero_free(g, need_runs, need_top)):
                    dst[rd[sub]] = src
        out[2][i0 : i0 + nb], out[3][i0 : i0 + nb], out[4][i0 : i0 + nb] = res
    return out


class _SummaryMemo(threading.local):
    table: dict | None = None


_MEMO = _SummaryMemo()


@contextmanager
def shared_window_summaries() -> Iterator[None]:
    """Inside the block, detectors scanning the same series with median windows of the
    same length share one pass of the compiled window (``longest_median_run`` and
    ``median_runs`` of the default set summarise the same windows).  A summary is reused
    only for an equal series (compared value by value), and all are dropped at the end.

    >>> x = np.random.default_rng(1).normal(size=400)
    >>> with shared_window_summaries():
    ...     a = LongestMedianRunDetector.scan(x, window=50, alpha=0.05)
    ...     b = MedianRunsDetector.scan(x, window=50, alpha=0.05)
    >>> (a, b) == (LongestMedianRunDetector.scan(x, window=50, alpha=0.05),
    ...            MedianRunsDetector.scan(x, window=50, alpha=0.05))
    True
    """
    outer = _MEMO.table
    _MEMO.table = {} if outer is None else outer
    try:
        yield
    finally:
        _MEMO.table = outer


def _median_summary_compiled(a: np.ndarray, w: int, need_runs: bool = True, need_top: bool = True):
    """:func:`_median_summary` by the compiled window pushed along ``a`` (in C: O(w) per
    value, much less for windows up to 64); the columns not needed are zeroed, as the numpy
    kernel leaves them."""
    a = np.ascontiguousarray(a, dtype=float)
    memo = _MEMO.table
    kept = None if memo is None else memo.get(w)
    if kept is not None and kept[0].shape == a.shape and np.array_equal(kept[0], a):
        out = kept[1]
    else:
        out = np.empty((a.size, 5), dtype=np.int64)
        _RunWindow(w, 0).scan(a, out)
        if memo is not None:
            memo[w] = (a.copy(), out)
    cols = list(out[w - 1 :].T)  # views: the kept summary itself is never changed
    if not need_runs:
        cols[2] = np.zeros_like(cols[2])
    if not need_top:
        cols[3] = np.zeros_like(cols[3])
        cols[4] = np.zeros_like(cols[4])
    return cols


def _range_max_table(v: np.ndarray, max_span: int) -> np.ndarray:
    """Sparse table: row k holds max(v[i : i + 2**k]) (entries past the end unused), for
    spans up to ``max_span`` (queries never cover more)."""
    levels = [v]
    span = 1
    while 2 * span <= min(v.size, max_span):
        prev = levels[-1]
        nxt = prev.copy()
        nxt[: v.size - span] = np.maximum(prev[: v.size - span], prev[span:])
        levels.append(nxt)
        span *= 2
    return np.array(levels)


def _range_max(table: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """max(v[lo..hi]) inclusive where lo <= hi, else 0."""
    ok = hi >= lo
    length = np.where(ok, hi - lo + 1, 1)
    k = np.minimum(np.frexp(length)[1] - 1, table.shape[0] - 1)  # floor(log2(length)), exact
    lo_c = np.where(ok, lo, 0)
    hi_c = np.where(ok, hi - (1 << k) + 1, 0)
    return np.where(ok, np.maximum(table[k, lo_c], table[k, hi_c]), 0)


def _diff_summary(a: np.ndarray, w: int, need_top: bool = True):
    """(n_pos, n_neg, runs, top_pos, top_neg) of the w - 1 difference signs of every
    full window, from prefix sums over the whole series: O(1) per window, plus an
    O(n log n) sparse table for the longest runs.  Zero differences are skipped."""
    d = np.sign(np.diff(a)).astype(np.int8)
    k = w - 1
    nw = a.size - w + 1
    c_pos = np.concatenate([[0], np.cumsum(d > 0)])
    c_neg = np.concatenate([[0], np.cumsum(d < 0)])
    j = np.arange(nw)
    n_pos = c_pos[j + k] - c_pos[j]
    n_neg = c_neg[j + k] - c_neg[j]
    kept_sign = d[d != 0]
    if kept_sign.size == 0:
        z = np.zeros(nw, dtype=np.int64)
        return n_pos, n_neg, z, z, z.copy()
    c_kept = c_pos + c_neg  # kept differences before each position
    first = c_kept[j]  # window j holds kept differences first .. last - 1
    last = c_kept[j + k]
    empty = last == first
    new_run = np.concatenate([[True], kept_sign[1:] != kept_sign[:-1]])
    rid = np.cumsum(new_run) - 1  # run id of each kept difference
    r_start = np.flatnonzero(new_run)
    r_end = np.concatenate([r_start[1:], [kept_sign.size]]) - 1
    r_len = r_end - r_start + 1
    r_sign = kept_sign[r_start]
    f = np.where(empty, 0, first)
    lst = np.where(empty, 0, last - 1)
    ra, rb = rid[f], rid[lst]
    runs = np.where(empty, 0, rb - ra + 1)
    # the first and last runs are clipped by the window; whole runs lie strictly between
    same = ra == rb
    len_a = np.where(same, lst - f + 1, r_end[ra] - f + 1)
    len_b = np.where(same, 0, lst - r_start[rb] + 1)
    if not need_top:
        z = np.zeros(nw, dtype=np.int64)
        return n_pos, n_neg, runs, z, z.copy()
    tops = []
    for s in (1, -1):
        table = _range_max_table(np.where(r_sign == s, r_len, 0).astype(np.int32), k)
        inner = _range_max(table, ra + 1, rb - 1)
        ends = np.maximum(np.where(r_sign[ra] == s, len_a, 0), np.where(r_sign[rb] == s, len_b, 0))
        tops.append(np.where(empty, 0, np.maximum(inner, ends)))
    return n_pos, n_neg, runs, tops[0], tops[1]


def _row_labels(a: np.ndarray, j: int, w: int, kind: str) -> list[int]:
    seg = a[j : j + w]
    if kind == "median":
        m = sample_median(np.sort(seg))
        return [int(v) for v in np.sign(seg - m)]
    return [int(v) for v in np.sign(np.diff(seg))]


def _summarise(lab: np.ndarray):
    """Per row of labels: (n_pos, n_neg, runs, longest +1 run, longest -1 run), zeros skipped."""
    m, k = lab.shape
    nz = lab != 0
    n_pos = np.count_nonzero(lab > 0, axis=1)
    n_neg = np.count_nonzero(lab < 0, axis=1)
    cols = np.arange(k, dtype=np.int32)
    idx = np.where(nz, cols, -1).astype(np.int32)
    np.maximum.accumulate(idx, axis=1, out=idx)
    f = np.take_along_axis(lab, np.maximum(idx, 0), axis=1)
    f[idx < 0] = 0  # forward-filled labels: sign of the current run
    start = nz.copy()
    start[:, 1:] &= f[:, 1:] != f[:, :-1]
    runs = np.count_nonzero(start, axis=1)
    cs = np.cumsum(nz, axis=1, dtype=np.int32)
    sidx = np.where(start, cols, -1).astype(np.int32)
    np.maximum.accumulate(sidx, axis=1, out=sidx)
    base = np.take_along_axis(cs, np.maximum(sidx, 0), axis=1) - 1
    run_len = np.where(sidx >= 0, cs - base, 0)
    top_pos = np.where(f > 0, run_len, 0).max(axis=1)
    top_neg = np.where(f < 0, run_len, 0).max(axis=1)
    return n_pos, n_neg, runs, top_pos, top_neg


def _lookup(keys_a: np.ndarray, keys_b: np.ndarray | None, fn) -> list[np.ndarray]:
    """Apply a cached scalar function to each distinct key (pair) and spread the results."""
    if keys_b is None:
        uniq, inv = np.unique(keys_a, return_inverse=True)
        vals = [fn(int(u)) for u in uniq]
    else:
        big = int(max(keys_b.max(initial=0), 0)) + 1
        code = keys_a.astype(np.int64) * big + keys_b
        uniq, inv = np.unique(code, return_inverse=True)
        vals = [fn(int(u) // big, int(u) % big) for u in uniq]
    arr = np.array(vals, dtype=np.int64).reshape(len(vals), -1)
    return [arr[inv, c] for c in range(arr.shape[1])]


# ----------------------------------------------------------------------------------
# the four detectors
# ----------------------------------------------------------------------------------


@register
class MedianRunsDetector(_WindowRunDetector):
    """Runs about the median of the last ``window`` readings (Wald & Wolfowitz 1940;
    Swed & Eisenhart 1943); see :func:`rules.runs.median_runs_test` for the formulas.

    Fires "grouping" when P(R <= r) <= alpha (too few runs: readings cluster on one side
    for a while, e.g. a shift or a cycle) and "mixture" when P(R >= r) <= alpha (too many
    runs: alternation, e.g. two streams interleaved).  ``side`` = "both", "grouping" or
    "mixture".  Readings equal to the window median are dropped.  Exact null while both
    counts are <= 200 (always, for windows up to 400), normal approximation beyond.
    Minimum window 8: the smallest window whose most extreme outcome in each tail has
    probability <= 0.05 (2 / C(8, 4) = 0.029).

    >>> det = MedianRunsDetector(window=20, alpha=0.01)
    >>> sigs = [det.update(v) for v in [0, 1] * 10]   # strict alternation: 20 runs
    >>> s = sigs[-1]
    >>> s.pattern, s.statistic, s.index, s.onset_index, round(s.p_value, 6)
    ('mixture', 20.0, 19, 0, 1.1e-05)
    """

    key = "median_runs"
    name = "runs about the median (Wald-Wolfowitz)"
    SIDES = ("both", "grouping", "mixture")
    MIN_WINDOW = 8
    WINDOW_KIND = "median"
    NEED_TOP = False

    def _crit(self, n1: int, n2: int) -> tuple[int, int]:
        r_lo, r_hi = rn.median_runs_critical(n1, n2, self.alpha)
        if self.side == "mixture":
            r_lo = -1
        elif self.side == "grouping":
            r_hi = n1 + n2 + 1
        return r_lo, r_hi

    def _evaluate(self, n_pos, n_neg, runs, top_pos, top_neg, index, labels):
        self.last = float(runs)
        if not n_pos or not n_neg:
            return None
        r_lo, r_hi = self._cached_crit(n_pos, n_neg)
        if r_lo < runs < r_hi:
            return None
        lo, hi, method = rn.median_runs_tails(n_pos, n_neg, runs)
        pattern, p = ("grouping", lo) if runs <= r_lo else ("mixture", hi)
        return Signal(
            pattern=pattern, detector=self.name, p_value=p, index=index,
            onset_index=index - self.window + 1, statistic=float(runs),
            detail={"n_above": n_pos, "n_below": n_neg, "n_dropped": self.window - n_pos - n_neg,
                    "expected": rn.median_runs_moments(n_pos, n_neg)[0], "method": method},
        )

    def _fires_vec(self, n_pos, n_neg, runs, top_pos, top_neg):
        r_lo, r_hi = _lookup(n_pos, n_neg, self._crit)
        ok = (n_pos > 0) & (n_neg > 0)
        return ok & ((runs <= r_lo) | (runs >= r_hi))


@register
class UpDownRunsDetector(_WindowRunDetector):
    """Runs up and down among the last ``window`` readings (Levene & Wolfowitz 1944;
    Edgington 1961); see :func:`rules.runs.updown_runs_test`.

    Fires "drift" when P(R <= r) <= alpha (few, long runs: a steady climb or fall) and
    "sawtooth" when P(R >= r) <= alpha (too many turns: over-adjustment, alternation).
    ``side`` = "both", "drift" or "sawtooth".  Zero differences are dropped and the null
    is that of n = non-zero differences + 1 values (exact up to n = 300).  Minimum window
    9: the smallest n whose most extreme outcome in each tail has probability <= 0.05
    (P(R = n - 1) = 15872 / 9! = 0.044 at n = 9).

    >>> det = UpDownRunsDetector(window=12, alpha=0.02)
    >>> out = [det.update(v) for v in [1, 3, 2, 4, 3, 5, 4, 6, 5, 7, 6, 8]]
    >>> s = out[-1]
    >>> s.pattern, s.statistic, round(s.p_value, 6)
    ('sawtooth', 11.0, 0.011285)
    """

    key = "updown_runs"
    name = "runs up and down"
    SIDES = ("both", "drift", "sawtooth")
    MIN_WINDOW = 9
    WINDOW_KIND = "diff"
    NEED_TOP = False

    def _crit(self, n: int) -> tuple[int, int]:
        r_lo, r_hi = rn.updown_critical(n, self.alpha)
        if self.side == "sawtooth":
            r_lo = -1
        elif self.side == "drift":
            r_hi = n + 1
        return r_lo, r_hi

    def _evaluate(self, n_pos, n_neg, runs, top_pos, top_neg, index, labels):
        self.last = float(runs)
        n = n_pos + n_neg + 1
        if n < 3:
            return None
        r_lo, r_hi = self._cached_crit(n)
        if r_lo < runs < r_hi:
            return None
        lo, hi, method = rn.updown_tails(n, runs)
        pattern, p = ("drift", lo) if runs <= r_lo else ("sawtooth", hi)
        direction = None
        if pattern == "drift":
            direction = "up" if n_pos > n_neg else "down" if n_neg > n_pos else None
        return Signal(
            pattern=pattern, detector=self.name, p_value=p, index=index,
            onset_index=index - self.window + 1, direction=direction, statistic=float(runs),
            detail={"n": n, "n_up": n_pos, "n_down": n_neg, "n_dropped": self.window - n,
                    "expected": rn.updown_moments(n)[0], "method": method},
        )

    def _fires_vec(self, n_pos, n_neg, runs, top_pos, top_neg):
        n = n_pos + n_neg + 1
        r_lo, r_hi = _lookup(n, None, self._crit)
        return (n >= 3) & ((runs <= r_lo) | (runs >= r_hi))


@register
class LongestMedianRunDetector(_WindowRunDetector):
    """Longest run on one side of the median of the last ``window`` readings, judged
    conditionally on the counts above and below (exact; see
    :func:`rules.runs.longest_median_run_test`).  Fires "shift" with direction "up"
    (a long run above) or "down" when P(longest >= L | n1, n2) <= alpha.  ``side`` =
    "both", "up" or "down".  ``onset_index`` is where the triggering run starts (the
    latest run of that length).  Minimum window 10: the smallest even window whose
    longest possible run has probability <= 0.05 ((n2 + 1) / C(10, 5) = 0.024).

    >>> det = LongestMedianRunDetector(window=10, alpha=0.03)
    >>> out = [det.update(v) for v in [1, 2, 1.5, 0.5, 9, 8, 7, 9.5, 8.5, 0.2]]
    >>> s = out[-1]
    >>> s.pattern, s.direction, s.statistic, s.onset_index, round(s.p_value, 6)
    ('shift', 'up', 5.0, 4, 0.02381)
    """

    key = "longest_median_run"
    name = "longest run about the median"
    SIDES = ("both", "up", "down")
    MIN_WINDOW = 10
    MAX_WINDOW = 1000
    WINDOW_KIND = "median"
    NEED_RUNS = False

    def _crit(self, n1: int, n2: int) -> tuple[int, int]:
        big = self.window + 1
        up = rn.longest_median_run_critical(n1, n2, self.alpha) if n1 and self.side != "down" else big
        dn = rn.longest_median_run_critical(n2, n1, self.alpha) if n2 and self.side != "up" else big
        return up, dn

    def _evaluate(self, n_pos, n_neg, runs, top_pos, top_neg, index, labels):
        self.last = float(max(top_pos, top_neg))
        c_up, c_dn = self._cached_crit(n_pos, n_neg)
        fire_up = top_pos >= c_up
        fire_dn = top_neg >= c_dn
        if not (fire_up or fire_dn):
            return None
        p_up = rn.longest_median_run_sf(n_pos, n_neg, top_pos) if fire_up else 2.0
        p_dn = rn.longest_median_run_sf(n_neg, n_pos, top_neg) if fire_dn else 2.0
        s = 1 if p_up <= p_dn else -1
        length, offset, _ = _latest_longest(labels(), (s,))
        start = index - self.window + 1
        return Signal(
            pattern="shift", detector=self.name, p_value=min(p_up, p_dn), index=index,
            onset_index=start + offset, direction="up" if s == 1 else "down",
            statistic=float(length),
            detail={"n_above": n_pos, "n_below": n_neg, "n_dropped": self.window - n_pos - n_neg,
                    "window_start": start},
        )

    def _fires_vec(self, n_pos, n_neg, runs, top_pos, top_neg):
        c_up, c_dn = _lookup(n_pos, n_neg, self._crit)
        return (top_pos >= c_up) | (top_neg >= c_dn)


@register
class LongestMonotoneRunDetector(_WindowRunDetector):
    """Longest strictly monotone run among the last ``window`` readings (exact tail for
    n iid continuous values; see :func:`rules.runs.longest_monotone_run_test`).  Fires
    "drift" (direction of the run) when P(longest >= L) <= alpha, L counted in readings.
    ``side`` = "both" (a run either way; the null is for either direction), "up" or
    "down" (fire only on runs of that direction; the null tail is still the two-way one,
    so the test is conservative).  Zero differences are dropped.  Minimum window 5: the
    smallest n with P(all n monotone) = 2 / n! <= 0.05.

    >>> det = LongestMonotoneRunDetector(window=10, alpha=0.02)
    >>> out = [det.update(v) for v in [0.3, 0.1, 0.4, 0.5, 0.7, 0.9, 1.2, 0.8, 0.6, 1.0]]
    >>> s = out[-1]
    >>> s.pattern, s.direction, s.statistic, s.onset_index, round(s.p_value, 6)
    ('drift', 'up', 6.0, 1, 0.012302)
    """

    key = "longest_monotone_run"
    name = "longest monotone run"
    SIDES = ("both", "up", "down")
    MIN_WINDOW = 5
    MAX_WINDOW = 2000
    WINDOW_KIND = "diff"

    def _crit(self, n: int) -> tuple[int]:
        return (rn.longest_monotone_run_critical(n, self.alpha),)

    def _sides(self) -> tuple[int, ...]:
        return {"both": (1, -1), "up": (1,), "down": (-1,)}[self.side]

    def _evaluate(self, n_pos, n_neg, runs, top_pos, top_neg, index, labels):
        n = n_pos + n_neg + 1
        top = max(top_pos if 1 in self._sides() else 0, top_neg if -1 in self._sides() else 0)
        self.last = float(top + 1)
        if n < 3:
            return None
        (crit,) = self._cached_crit(n)
        if top + 1 < crit:
            return None
        length, offset, s = _latest_longest(labels(), self._sides())
        start = index - self.window + 1
        return Signal(
            pattern="drift", detector=self.name, p_value=rn.longest_monotone_run_sf(n, length + 1),
            index=index, onset_index=start + offset, direction="up" if s == 1 else "down",
            statistic=float(length + 1),
            detail={"n": n, "n_up": n_pos, "n_down": n_neg, "n_dropped": self.window - n,
                    "window_start": start},
        )

    def _fires_vec(self, n_pos, n_neg, runs, top_pos, top_neg):
        n = n_pos + n_neg + 1
        (crit,) = _lookup(n, None, self._crit)
        sides = self._sides()
        top = np.maximum(top_pos if 1 in sides else 0, top_neg if -1 in sides else 0)
        return (n >= 3) & (top + 1 >= crit)
