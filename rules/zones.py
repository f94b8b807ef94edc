"""Shewhart-type rules on standardised values: one-point limit, Western Electric zone rules, Nelson's tests.

Zones (per side of the centre line, sigma units): C = within 1, B = 1 to 2,
A = 2 to 3.  Boundary convention: "beyond c" is strict (``z > c`` or ``z < -c``);
zone C is ``|z| <= 1``; a value exactly on the centre line (``z == 0``) is on
neither side and breaks a one-side run; equal consecutive values break a trend
or an alternation.

Rules, by their published numbers (Western Electric Co. 1956, *Statistical
Quality Control Handbook*; Nelson L.S. 1984, *J. Quality Technology* 16(4):237-239):

rule                                               WE 1956   Nelson 1984   pattern
-------------------------------------------------  --------  -----------   --------
one point beyond 3 sigma                           1         1             spike
2 of 3 in a row beyond 2 sigma, same side          2         5             shift
4 of 5 in a row beyond 1 sigma, same side          3         6             shift
8 in a row on one side of the centre line          4         -             shift
9 in a row on one side of the centre line          -         2             shift
6 in a row steadily increasing or decreasing       -         3             drift
14 in a row alternating up and down                -         4             sawtooth
15 in a row in zone C (either side; no both-sides  -         7             grouping
   requirement)
8 in a row beyond 1 sigma, on both sides           -         8             mixture

Each finding carries as ``p_value`` the in-control probability, for iid N(0, 1)
values, that one given window of that rule matches (overlap ignored):

* beyond 3: ``2 Phi(-3)`` = 0.0027;
* 2 of 3: ``2 [3 p^2 (1-p) + p^3]``, p = P(Z > 2);  4 of 5: ``2 [5 q^4 (1-q) + q^5]``, q = P(Z > 1);
* n on one side: ``2 * 0.5^n``;  6 trending: ``2 / 6!`` (2 of the 6! orders are monotone);
* 14 alternating: ``2 E_14 / 14!`` with the Euler zigzag number E_14 = 199 360 981
  (André 1879; OEIS A000111);
* 15 in zone C: ``P(|Z| <= 1)^15``;
* 8 beyond 1 on both sides: ``P(|Z| > 1)^8 - 2 P(Z > 1)^8`` (without the both-sides
  requirement, ``mixture_both_sides=False``: ``P(|Z| > 1)^8``).

Start-up and restart convention: windows may be partial (after a (re)start "2 of
3" can fire on the first 2 points); after a signal the detector clears the
history of all its rules, so a new finding needs fresh points.  When several
rules match on the same reading the finding names the one with the smallest
window probability (ties: lower published number); the others are listed in
``detail["also_matched"]``.

Zero-state ARLs of rule sets: :func:`zone_rules_arl` builds the exact Markov
chain over minimal histories (Champ & Woodall 1987, *Technometrics* 29(4):393-399);
:func:`western_electric_arl`, :func:`nelson_arl` and :func:`shewhart_arl` wrap it
(signatures documented and stable; calibration uses them).

Example
-------
>>> round(western_electric_arl((1, 2, 3, 4)), 2)
91.75
>>> det = WesternElectric(rules=(2,))
>>> [det.update(z) for z in (0.3, 2.4)] == [None, None]
True
>>> s = det.update(2.2)
>>> s.detector, s.pattern, s.direction, s.onset_index, round(s.p_value, 6)
('Western Electric rule 2', 'shift', 'up', 1, 0.003058)
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any, Iterable

import numpy as np
from scipy import sparse, special
from scipy.sparse import linalg as splinalg

from rules.detector import Signal, StateError, StreamDetector, check_float
from rules.registry import register

__all__ = [
    "Shewhart",
    "WesternElectric",
    "Nelson",
    "RULE_WINDOW_PROBABILITY",
    "euler_zigzag",
    "shewhart_arl",
    "western_electric_arl",
    "nelson_arl",
    "zone_rules_arl",
]


def _Phi(x: float) -> float:
    return float(special.ndtr(x))


def euler_zigzag(n: int) -> int:
    """Euler zigzag number E_n (alternating permutations of n), by the Seidel-Entringer triangle."""
    row = [1]
    for i in range(1, n + 1):
        new = [0] * (i + 1)
        for j in range(1, i + 1):
            new[j] = new[j - 1] + row[i - j]
        row = new
    return row[-1]


# canonical rule names -> (window length, pattern, description)
_RULES: dict[str, tuple[int, str, str]] = {
    "beyond3": (1, "spike", "one point beyond 3 sigma"),
    "2of3": (3, "shift", "2 of 3 in a row beyond 2 sigma on the same side"),
    "4of5": (5, "shift", "4 of 5 in a row beyond 1 sigma on the same side"),
    "run8": (8, "shift", "8 in a row on one side of the centre line"),
    "run9": (9, "shift", "9 in a row on one side of the centre line"),
    "trend6": (6, "drift", "6 in a row steadily increasing or decreasing"),
    "alt14": (14, "sawtooth", "14 in a row alternating up and down"),
    "zoneC15": (15, "grouping", "15 in a row within 1 sigma of the centre line"),
    "mix8": (8, "mixture", "8 in a row beyond 1 sigma, on both sides of the centre line"),
}
_WE = {1: "beyond3", 2: "2of3", 3: "4of5", 4: "run8"}
_NELSON = {1: "beyond3", 2: "run9", 3: "trend6", 4: "alt14", 5: "2of3", 6: "4of5", 7: "zoneC15", 8: "mix8"}


def _window_probabilities() -> dict[str, float]:
    p = _Phi(-2.0)
    q = _Phi(-1.0)
    out = 2.0 * q
    return {
        "beyond3": 2.0 * _Phi(-3.0),
        "2of3": 2.0 * (3 * p * p * (1 - p) + p**3),
        "4of5": 2.0 * (5 * q**4 * (1 - q) + q**5),
        "run8": 2.0 * 0.5**8,
        "run9": 2.0 * 0.5**9,
        "trend6": 2.0 / math.factorial(6),
        "alt14": 2.0 * euler_zigzag(14) / math.factorial(14),
        "zoneC15": (1.0 - out) ** 15,
        "mix8": out**8 - 2.0 * q**8,
        "mix8_one_side_allowed": out**8,
    }


#: In-control probability that one window of each rule matches (see module docstring).
RULE_WINDOW_PROBABILITY = _window_probabilities()


# ----------------------------------------------------------------- Shewhart


def shewhart_arl(limit: float = 3.0, delta: float = 0.0) -> float:
    """ARL of the one-point rule ``|z| > limit`` for N(delta, 1) data: 1 / P(|Z + delta| > limit)."""
    check_float("limit", limit, 0.0, open_lo=True)
    p = _Phi(-limit - delta) + _Phi(-limit + delta)
    return 1.0 / p


@register
class Shewhart(StreamDetector):
    """One reading beyond ``limit`` sigma (Shewhart 1931): a ``spike``.

    ``p_value`` = ``2 (1 - Phi(|z|))`` for that reading (two-sided normal tail);
    ``size`` = z; ``onset_index`` = ``index``.  No history, so restart is trivial.

    >>> Shewhart().update(3.5).p_value < 0.001
    True
    """

    key = "shewhart"
    name = "Shewhart limit"
    STATE_VERSION = 1
    PARAMS = ("limit",)
    needs_reference = True

    def __init__(self, limit: float = 3.0) -> None:
        self.limit = check_float("limit", limit, 0.0, open_lo=True)
        self.min_values = 1
        self._t = 0
        self.last = 0.0

    def _signal(self, t: int, z: float) -> Signal:
        return Signal(
            pattern="spike",
            detector=self.name,
            p_value=float(2.0 * special.ndtr(-abs(z))),
            index=t,
            onset_index=t,
            direction="up" if z > 0 else "down",
            size=z,
            statistic=z,
            detail={"limit": self.limit, "p_value_method": "two-sided normal tail of this reading"},
        )

    def update(self, x: float) -> Signal | None:
        z = float(x)
        if not math.isfinite(z):
            raise ValueError(f"value must be finite, got {x!r}")
        t = self._t
        self._t = t + 1
        self.last = z
        if z > self.limit or z < -self.limit:
            return self._signal(t, z)
        return None

    def _get_state(self) -> dict[str, Any]:
        return {"t": self._t, "last": self.last}

    def _set_state(self, state: dict[str, Any]) -> None:
        try:
            self._t = int(state["t"])
            self.last = float(state["last"])
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"bad shewhart state: {exc}") from exc

    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        det = cls(**params)
        z = np.asarray(x, dtype=float).ravel()
        if not np.all(np.isfinite(z)):
            raise ValueError(f"value must be finite, got {z[~np.isfinite(z)][0]!r}")
        idx = np.flatnonzero((z > det.limit) | (z < -det.limit))
        return [det._signal(int(i), float(z[i])) for i in idx]


# ------------------------------------------------------------- zone rules

_NEG = -(10**9)  # "no such point" marker for last-index fields


class _ZoneRules(StreamDetector):
    """Shared engine of the Western Electric and Nelson detectors (see module docstring)."""

    STATE_VERSION = 1
    needs_reference = True
    SCHEME = ""
    LABEL = ""
    NUMBERS: dict[int, str] = {}

    def _setup(self, numbers: Any, both_sides: bool) -> None:
        try:
            nums = tuple(sorted({int(n) for n in numbers}))
        except (TypeError, ValueError):
            raise ValueError(f"rule numbers must be whole numbers from {sorted(self.NUMBERS)}, got {numbers!r}") from None
        if not nums or any(n not in self.NUMBERS for n in nums):
            raise ValueError(f"rule numbers must be a non-empty selection of {sorted(self.NUMBERS)}, got {numbers!r}")
        self._nums = nums
        self._names = {self.NUMBERS[n]: n for n in nums}
        self._both = bool(both_sides)
        self._prob = dict(RULE_WINDOW_PROBABILITY)
        if not self._both:
            self._prob["mix8"] = RULE_WINDOW_PROBABILITY["mix8_one_side_allowed"]
        self.min_values = min(_RULES[r][0] if r not in ("2of3", "4of5") else _RULES[r][0] - 1 for r in self._names)
        self._sel = {r: (r in self._names) for r in _RULES}
        self._t = 0
        self._restart()

    def _restart(self) -> None:
        self._buf: deque[float] = deque(maxlen=15)
        self._up = 0  # run on the upper side (points)
        self._dn = 0
        self._aup = 0  # bit 0 = latest point beyond +2 (3 bits kept)
        self._adn = 0
        self._bup = 0  # beyond +1 (5 bits kept)
        self._bdn = 0
        self._prev: float | None = None
        self._inc = 0  # points in the current increasing run
        self._dec = 0
        self._alt = 0  # points in the current alternating run
        self._d = 0  # sign of the latest difference
        self._c = 0  # run within zone C
        self._o = 0  # run beyond 1 sigma
        self._lbu = _NEG  # index of the latest point beyond +1
        self._lbd = _NEG
        self.last = 0.0

    def update(self, x: float) -> Signal | None:
        z = float(x)
        if not math.isfinite(z):
            raise ValueError(f"value must be finite, got {x!r}")
        t = self._t
        self._t = t + 1
        self.last = z
        self._buf.append(z)
        if z > 0.0:
            self._up += 1
            self._dn = 0
        elif z < 0.0:
            self._dn += 1
            self._up = 0
        else:
            self._up = self._dn = 0
        self._aup = ((self._aup << 1) | (z > 2.0)) & 7
        self._adn = ((self._adn << 1) | (z < -2.0)) & 7
        self._bup = ((self._bup << 1) | (z > 1.0)) & 31
        self._bdn = ((self._bdn << 1) | (z < -1.0)) & 31
        p = self._prev
        if p is None:
            self._inc = self._dec = self._alt = 1
            self._d = 0
        else:
            if z > p:
                d = 1
                self._inc += 1
                self._dec = 1
            elif z < p:
                d = -1
                self._dec += 1
                self._inc = 1
            else:
                d = 0
                self._inc = self._dec = 1
            if d == 0:
                self._alt = 1
            elif self._d == -d:
                self._alt += 1
            else:
                self._alt = 2
            self._d = d
        self._prev = z
        if -1.0 <= z <= 1.0:
            self._c += 1
            self._o = 0
        else:
            self._o += 1
            self._c = 0
            if z > 0.0:
                self._lbu = t
            else:
                self._lbd = t
        return self._check(t, z)

    # which selected rules match now, from the state alone (shared by update and scan)
    def _matches(self, t: int, z: float) -> list[tuple[str, int, str | None]]:
        sel = self._sel
        out: list[tuple[str, int, str | None]] = []  # (rule, onset, direction)
        if sel["beyond3"] and (z > 3.0 or z < -3.0):
            out.append(("beyond3", t, "up" if z > 0 else "down"))
        if sel["2of3"]:
            for bits, dr in ((self._aup, "up"), (self._adn, "down")):
                if bits.bit_count() >= 2:
                    out.append(("2of3", t - (bits.bit_length() - 1), dr))
        if sel["4of5"]:
            for bits, dr in ((self._bup, "up"), (self._bdn, "down")):
                if bits.bit_count() >= 4:
                    out.append(("4of5", t - (bits.bit_length() - 1), dr))
        for rule, n in (("run8", 8), ("run9", 9)):
            if sel[rule]:
                if self._up >= n:
                    out.append((rule, t - n + 1, "up"))
                elif self._dn >= n:
                    out.append((rule, t - n + 1, "down"))
        if sel["trend6"]:
            if self._inc >= 6:
                out.append(("trend6", t - 5, "up"))
            elif self._dec >= 6:
                out.append(("trend6", t - 5, "down"))
        if sel["alt14"] and self._alt >= 14:
            out.append(("alt14", t - 13, None))
        if sel["zoneC15"] and self._c >= 15:
            out.append(("zoneC15", t - 14, None))
        if sel["mix8"] and self._o >= 8 and (not self._both or (t - self._lbu < 8 and t - self._lbd < 8)):
            out.append(("mix8", t - 7, None))
        return out

    def _check(self, t: int, z: float) -> Signal | None:
        # cheap pre-test: nothing can match unless some counter is high enough
        # (a zone or mixture rule first matches on a reading beyond 1 sigma)
        if not (
            z > 1.0
            or z < -1.0
            or self._up >= 8
            or self._dn >= 8
            or self._inc >= 6
            or self._dec >= 6
            or self._alt >= 14
            or self._c >= 15
        ):
            return None
        found = self._matches(t, z)
        if not found:
            return None
        found.sort(key=lambda f: (self._prob[f[0]], self._names[f[0]]))
        rule, onset, direction = found[0]
        sig = self._make_signal(t, rule, onset, direction, [f[0] for f in found[1:]])
        self._restart()
        return sig

    def _make_signal(self, t: int, rule: str, onset: int, direction: str | None, others: list[str]) -> Signal:
        window, pattern, text = _RULES[rule]
        num = self._names[rule]
        vals = list(self._buf)[-(t - onset + 1) :]
        if pattern in ("spike",):
            size: float | None = vals[-1]
        elif pattern == "shift":
            size = sum(vals) / len(vals)
        elif pattern == "drift":
            size = (vals[-1] - vals[0]) / (len(vals) - 1)
        elif pattern == "grouping":
            m = sum(vals) / len(vals)
            size = math.sqrt(sum((v - m) ** 2 for v in vals) / (len(vals) - 1))
        elif pattern == "mixture":
            size = sum(abs(v) for v in vals) / len(vals)
        else:
            size = None
        label = f"{self.LABEL} {num}"
        return Signal(
            pattern=pattern,
            detector=label,
            p_value=self._prob[rule],
            index=t,
            onset_index=onset,
            direction=direction,
            size=size,
            statistic=float(len(vals)),
            detail={
                "scheme": self.SCHEME,
                "rule": num,
                "rule_name": label,
                "description": text,
                "window": window,
                "also_matched": [f"{self.LABEL} {self._names[o]}" for o in others],
                "p_value_method": "in-control probability that one window of this rule matches, iid N(0,1)",
            },
        )

    # -- state ------------------------------------------------------------
    _FIELDS = ("_t", "_up", "_dn", "_aup", "_adn", "_bup", "_bdn", "_inc", "_dec", "_alt", "_d", "_c", "_o", "_lbu", "_lbd")

    def _get_state(self) -> dict[str, Any]:
        st: dict[str, Any] = {f[1:]: getattr(self, f) for f in self._FIELDS}
        st["prev"] = self._prev
        st["buf"] = list(self._buf)
        st["last"] = self.last
        return st

    def _set_state(self, state: dict[str, Any]) -> None:
        try:
            for f in self._FIELDS:
                setattr(self, f, int(state[f[1:]]))
            self._prev = None if state["prev"] is None else float(state["prev"])
            self._buf = deque((float(v) for v in state["buf"]), maxlen=15)
            self.last = float(state["last"])
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"bad {self.key} state: {exc}") from exc

    # -- batch --------------------------------------------------------------
    @classmethod
    def scan(cls, x: Any, **params: Any) -> list[Signal]:
        """Signals over ``x`` from a fresh start, identical to streaming ``update``.

        Every rule's match indicator is computed once over the whole array with
        numpy, as if there were no restarts (run lengths by ``maximum.accumulate``,
        window counts by cumulative sums).  No rule looks back more than 15
        readings, so from the 16th reading after a restart on, the restart-free
        indicator is the true one.  The first 15 readings after each restart are
        therefore fed to ``update``; beyond them the next match is looked up in the
        indicator and its finding rebuilt by ``update`` over its last 16 readings
        (a later start only makes rules harder to match, so nothing fires earlier).
        """
        det = cls(**params)
        z = np.asarray(x, dtype=float).ravel()
        if not np.all(np.isfinite(z)):
            raise ValueError(f"value must be finite, got {z[~np.isfinite(z)][0]!r}")
        hits = np.flatnonzero(det._fire_indicator(z))
        out: list[Signal] = []
        n = z.size
        s = -1  # index of the last signal (restart point)
        W = 15
        while s + 1 < n:
            det = cls(**params)
            det._t = s + 1
            sig = None
            for v in z[s + 1 : min(n, s + 1 + W)]:
                sig = det.update(float(v))
                if sig is not None:
                    break
            if sig is not None:
                out.append(sig)
                s = sig.index
                continue
            k = int(np.searchsorted(hits, s + 1 + W))
            if k >= hits.size:
                break
            i = int(hits[k])
            det = cls(**params)
            det._t = i - W
            for v in z[i - W : i + 1]:
                sig = det.update(float(v))
            if sig is None or sig.index != i:  # pragma: no cover - guarded by the argument above
                raise AssertionError("zone-rule scan lost step with streaming evaluation")
            out.append(sig)
            s = i
        return out

    def _fire_indicator(self, z: np.ndarray) -> np.ndarray:
        """Whether any selected rule matches at each reading, from a fresh start and without restarts."""
        m = z.size
        idx = np.arange(m)
        sel = self._sel
        fire = np.zeros(m, dtype=bool)
        if m == 0:
            return fire

        def run(b: np.ndarray) -> np.ndarray:
            # length of the run of True ending at each position
            lastf = np.maximum.accumulate(np.where(~b, idx, -1))
            return idx - lastf

        def window_count(b: np.ndarray, w: int) -> np.ndarray:
            cs = np.concatenate(([0], np.cumsum(b)))
            return cs[idx + 1] - cs[np.maximum(idx + 1 - w, 0)]

        if sel["beyond3"]:
            fire |= (z > 3.0) | (z < -3.0)
        if sel["2of3"]:
            fire |= (window_count(z > 2.0, 3) >= 2) | (window_count(z < -2.0, 3) >= 2)
        if sel["4of5"]:
            fire |= (window_count(z > 1.0, 5) >= 4) | (window_count(z < -1.0, 5) >= 4)
        if sel["run8"] or sel["run9"]:
            up, dn = run(z > 0.0), run(z < 0.0)
            if sel["run8"]:
                fire |= (up >= 8) | (dn >= 8)
            if sel["run9"]:
                fire |= (up >= 9) | (dn >= 9)
        if sel["trend6"] or sel["alt14"]:
            prevz = np.concatenate(([np.nan], z[:-1]))
            gt, lt = z > prevz, z < prevz
            if sel["trend6"]:
                fire |= (run(gt) + 1 >= 6) | (run(lt) + 1 >= 6)
            if sel["alt14"]:
                d = gt.astype(np.int8) - lt.astype(np.int8)
                dprev = np.concatenate(([0], d[:-1]))
                alt = np.where(d != 0, run((d != 0) & (d == -dprev)) + 2, 1)
                fire |= alt >= 14
        inC = (z >= -1.0) & (z <= 1.0)
        if sel["zoneC15"]:
            fire |= run(inC) >= 15
        if sel["mix8"]:
            f8 = run(~inC) >= 8
            if self._both:
                lbu = np.maximum.accumulate(np.where(z > 1.0, idx, _NEG))
                lbd = np.maximum.accumulate(np.where(z < -1.0, idx, _NEG))
                f8 &= (idx - lbu < 8) & (idx - lbd < 8)
            fire |= f8
        return fire


@register
class WesternElectric(_ZoneRules):
    """The four Western Electric (1956) zone rules; ``rules`` selects them by number (default all).

    See the module docstring for definitions, patterns, p-values and conventions.

    >>> det = WesternElectric()
    >>> [s.detector for s in (det.update(0.5) for _ in range(8)) if s]
    ['Western Electric rule 4']
    """

    key = "western_electric"
    name = "Western Electric rules"
    PARAMS = ("rules",)
    SCHEME = "Western Electric 1956"
    LABEL = "Western Electric rule"
    NUMBERS = _WE

    def __init__(self, rules: Iterable[int] = (1, 2, 3, 4)) -> None:
        self._setup(rules, True)
        self.rules = self._nums


@register
class Nelson(_ZoneRules):
    """Nelson's (1984) eight tests; ``tests`` selects them by number (default all).

    ``mixture_both_sides`` (default True) makes test 8 require points on both sides
    of the centre line among its 8, as its wording says.

    >>> det = Nelson(tests=(3,))
    >>> [s.direction for s in (det.update(v) for v in (0.1, 0.2, 0.3, 0.4, 0.5, 0.6)) if s]
    ['up']
    """

    key = "nelson"
    name = "Nelson tests"
    PARAMS = ("tests", "mixture_both_sides")
    SCHEME = "Nelson 1984"
    LABEL = "Nelson test"
    NUMBERS = _NELSON

    def __init__(self, tests: Iterable[int] = (1, 2, 3, 4, 5, 6, 7, 8), mixture_both_sides: bool = True) -> None:
        if not isinstance(mixture_both_sides, bool):
            raise ValueError(f"mixture_both_sides must be True or False, got {mixture_both_sides!r}")
        self._setup(tests, mixture_both_sides)
        self.tests = self._nums
        self.mixture_both_sides = mixture_both_sides


# ------------------------------------------------------- exact zone-rule ARLs

_CHAIN_RULES = ("beyond3", "2of3", "4of5", "run8", "run9", "zoneC15", "mix8")


def zone_rules_arl(rules: Iterable[str], delta: float = 0.0, *, mixture_both_sides: bool = True) -> float:
    """Exact zero-state ARL of a set of zone rules for iid N(delta, 1) values.

    ``rules`` are canonical names among ``beyond3, 2of3, 4of5, run8, run9,
    zoneC15, mix8`` (the trend and alternation tests depend on the values' order,
    not on zones, and have no finite chain).  The chain (Champ & Woodall 1987) has
    one state per minimal history: the last 2 (resp. 4) beyond-2 (beyond-1) flags
    per side, the one-side run, the zone-C run and, for the mixture rule, the run
    beyond 1 with the ages of its latest upper and lower points, each capped where
    it stops mattering.  It starts from the neutral (empty) history, matching the
    detectors' start-up and restart convention, and is solved by ``(I - Q) L = 1``.
    """
    rs = set(rules)
    bad = rs - set(_CHAIN_RULES)
    if bad or not rs:
        raise ValueError(f"zone_rules_arl takes a non-empty set of {_CHAIN_RULES}; got {sorted(rs)}")
    check_float("delta", delta)
    # zone symbols: 8 intervals cut at -3..3; for each: (prob, z-sign, beyond2, beyond1, beyond3)
    cuts = [-np.inf, -3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0, np.inf]
    cdf = special.ndtr(np.array(cuts[1:-1]) - delta)
    probs = np.diff(np.concatenate(([0.0], cdf, [1.0])))
    mids = [-3.5, -2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 3.5]
    symbols = [(float(pr), 1 if m > 0 else -1, abs(m) > 2, abs(m) > 1, abs(m) > 3) for pr, m in zip(probs, mids)]
    run_n = 9 if "run9" in rs else (8 if "run8" in rs else 0)
    use23, use45, useC, useM = "2of3" in rs, "4of5" in rs, "zoneC15" in rs, "mix8" in rs

    def step(state: tuple, sym: tuple) -> tuple | None:
        a_up, a_dn, b_up, b_dn, run, c, o, au, ad = state
        _, s, b2, b1, b3 = sym
        if b3 and "beyond3" in rs:
            return None
        if use23:
            a_up = ((a_up << 1) | (b2 and s > 0)) & 7
            a_dn = ((a_dn << 1) | (b2 and s < 0)) & 7
            if a_up.bit_count() >= 2 or a_dn.bit_count() >= 2:
                return None
            a_up &= 3
            a_dn &= 3
        if use45:
            b_up = ((b_up << 1) | (b1 and s > 0)) & 31
            b_dn = ((b_dn << 1) | (b1 and s < 0)) & 31
            if b_up.bit_count() >= 4 or b_dn.bit_count() >= 4:
                return None
            b_up &= 15
            b_dn &= 15
        if run_n:
            run = (run + 1 if run > 0 else 1) if s > 0 else (run - 1 if run < 0 else -1)
            if abs(run) >= run_n:
                return None
        if useC:
            c = 0 if b1 else c + 1
            if c >= 15:
                return None
        if useM:
            if b1:
                o += 1
                au = 0 if s > 0 else min(au + 1, 8)
                ad = 0 if s < 0 else min(ad + 1, 8)
                if o >= 8 and (not mixture_both_sides or (au < 8 and ad < 8)):
                    return None
                o = min(o, 7)
            else:
                o, au, ad = 0, 8, 8
        return (a_up, a_dn, b_up, b_dn, run, c, o, au, ad)

    start = (0, 0, 0, 0, 0, 0, 0, 8, 8)
    index = {start: 0}
    order = [start]
    rows: list[int] = []
    cols: list[int] = []
    vals: list[float] = []
    i = 0
    while i < len(order):
        st = order[i]
        for sym in symbols:
            nxt = step(st, sym)
            if nxt is None:
                continue
            j = index.get(nxt)
            if j is None:
                j = index[nxt] = len(order)
                order.append(nxt)
            rows.append(i)
            cols.append(j)
            vals.append(sym[0])
        i += 1
    S = len(order)
    Q = sparse.csr_matrix((vals, (rows, cols)), shape=(S, S))
    A = sparse.identity(S, format="csr") - Q
    L = splinalg.spsolve(A.tocsc(), np.ones(S))
    return float(L[0])


def western_electric_arl(rules: Iterable[int] = (1, 2, 3, 4), delta: float = 0.0) -> float:
    """Exact zero-state ARL of the selected Western Electric rules (numbers 1-4); see :func:`zone_rules_arl`."""
    nums = set(int(r) for r in rules)
    if not nums or nums - set(_WE):
        raise ValueError(f"Western Electric rules are numbered 1-4, got {sorted(nums)}")
    return zone_rules_arl([_WE[n] for n in nums], delta)


def nelson_arl(tests: Iterable[int] = (1, 2, 5, 6), delta: float = 0.0, *, mixture_both_sides: bool = True) -> float:
    """Exact zero-state ARL of the selected Nelson tests among 1, 2, 5, 6, 7, 8 (3 and 4 have no zone chain)."""
    nums = set(int(t) for t in tests)
    if not nums or nums - set(_NELSON):
        raise ValueError(f"Nelson tests are numbered 1-8, got {sorted(nums)}")
    if nums & {3, 4}:
        raise ValueError("Nelson tests 3 and 4 depend on the order of values, not on zones; no exact zone chain")
    return zone_rules_arl([_NELSON[n] for n in nums], delta, mixture_both_sides=mixture_both_sides)
