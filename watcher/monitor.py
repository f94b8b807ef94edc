"""One characteristic's watch: learn the baseline, then run every enabled detector on each reading.

A ``Monitor`` takes readings of one characteristic in arrival order and returns
findings.  Its whole state exports as plain data, so the daemon commits it in
the same transaction as the file offsets that produced it.
"""

from __future__ import annotations

import base64
import json
import math
from array import array
from collections import deque
from typing import Any

import numpy as np

from rules import DETECTORS, StreamDetector
from rules.runs_stream import shared_window_summaries
from watcher.config import CharacteristicConfig
from watcher.detector_set import resolve_detectors
from watcher.messages import finding_message
from watcher.records import Finding

STATE_VERSION = 1


def _pack(values: list[float]) -> str:
    return base64.b64encode(array("d", values).tobytes()).decode()


def _unpack(text: str) -> list[float]:
    a = array("d")
    a.frombytes(base64.b64decode(text))
    return a.tolist()


# one encoder for every save: json.dumps with separators builds a new one per call
_compact_json = json.JSONEncoder(separators=(",", ":")).encode


def _pack_times(times: Any) -> str | list[str | None]:
    """Time stamps as one text, separated by spaces, ``-`` for none: one string encodes far
    faster than a list of hundreds.  A parsed time (ISO 8601 with a ``T``) holds no space
    and is never ``-``; should one hold a space, the list is kept as it is."""
    text = " ".join("-" if t is None else t for t in times)
    if text.count(" ") != max(0, len(times) - 1):
        return list(times)
    return text


def _unpack_times(packed: str | list[str | None]) -> list[str | None]:
    if isinstance(packed, list):  # unpacked (or saved before times were packed)
        return packed
    return [None if t == "-" else t for t in packed.split(" ")] if packed else []


PACKED = "f64"  # a detector state's list of floats, stored packed: {"f64": base64 of the doubles}


def _all_floats(v: list) -> bool:
    # the types of a list as a set: one pass in C instead of a generator over the values
    return set(map(type, v)) == {float}


def _pack_state(st: Any) -> Any:
    """A detector's ``state`` with its lists of floats (its window) packed.

    Writing floats as JSON text (17 significant digits each) was most of the cost of saving
    a characteristic, which the daemon does on every commit; the packed form is exact too."""
    if not isinstance(st, dict):
        return st
    return {k: {PACKED: _pack(v)} if type(v) is list and v and _all_floats(v) else v for k, v in st.items()}


def _pack_detector(data: dict[str, Any]) -> dict[str, Any]:
    """A detector's exported state with its state packed (:func:`_pack_state`)."""
    return {**data, "state": _pack_state(data.get("state"))}


def _unpack_detector(data: dict[str, Any]) -> dict[str, Any]:
    """The inverse of :func:`_pack_detector` (plain lists, as older states hold, pass through)."""
    st = data.get("state")
    if not isinstance(st, dict):
        return data
    plain = {k: _unpack(v[PACKED]) if isinstance(v, dict) and set(v) == {PACKED} else v for k, v in st.items()}
    return {**data, "state": plain}


class Monitor:
    """Baseline, detectors and recent history of one characteristic.

    ``feed(value, time)`` returns the findings that reading raised (possibly none).
    Index 0 is the first reading this characteristic ever received.
    """

    def __init__(self, cc: CharacteristicConfig, source: str, detectors: dict[str, dict[str, Any]] | None = None,
                 calibrator: Any = None):
        self.cc = cc
        self.source = source
        # Explicit detectors run as given; otherwise a calibrator (watcher.calibration) sets the
        # thresholds when the baseline is learnt, and without one the detectors' own defaults apply.
        self.spec = detectors if detectors is not None else resolve_detectors(cc)
        self.calibrator = None if detectors is not None else calibrator
        self.calibration: Any = None  # watcher.calibration.Calibrated, once calibrated
        self.measured_per_hour: float | None = None
        self._head_text: tuple[tuple, str] | None = None  # see export_state_text
        self._detector_heads: dict[str, tuple[StreamDetector, str]] = {}
        self.count = 0
        self.baseline: Any = None  # a rules.baseline.Baseline once learnt
        self.baseline_values: list[float] = []
        self.k = cc.subgroup or 1
        self.group: list[float] = []
        self.watch_start = 0  # index of the first reading the detectors saw
        self.detectors: dict[str, StreamDetector] = {}
        keep = max([self.cc.window] + [int(p.get("window", 0)) for p in self.spec.values()]) * 4
        self.keep = max(200, min(keep, 2000))
        self.recent_values: deque[float] = deque(maxlen=self.keep)
        self.recent_times: deque[str | None] = deque(maxlen=self.keep)
        self._live = _DequeHistory(self)
        self.last_time: str | None = None
        self.last_value: float | None = None
        self.warnings: list[str] = []
        self.notices: list[str] = []  # news about the baseline, for the log and an alert; taken by the route
        self._lambda: float | None = None
        self.raw_centre: float | None = None
        self.raw_sigma: float | None = None
        if cc.baseline.fixed:
            self._set_baseline(_fixed_baseline(cc.baseline.mean, cc.baseline.sigma))

    # -- the reading path ------------------------------------------------------------------
    def feed(self, value: float, time: str | None = None) -> list[Finding]:
        i = self.count
        self.count += 1
        self.recent_values.append(value)
        self.recent_times.append(time)
        self.last_time, self.last_value = time, value
        out: list[Finding] = []
        spec = self._spec_finding(i, value, time)
        if spec is not None:
            out.append(spec)
        if self.baseline is None:
            self.baseline_values.append(value)
            if len(self.baseline_values) >= self._baseline_size():
                self._learn_baseline(list(self.recent_times)[-len(self.baseline_values):])
            return out
        if not self.detectors:
            return out
        if self.k > 1:  # subgroups: the detectors see each complete subgroup's mean
            self.group.append(value)
            if len(self.group) < self.k:
                return out
            value = sum(self.group) / self.k
            self.group = []
        raw = self._transformed(value)
        b = self.baseline
        z = (raw - b.centre) / b.sigma  # as _standardise, without transforming twice
        for key, det in self.detectors.items():
            sig = det.update(z if det.needs_reference else raw)
            if sig is not None:
                out.append(self._finding(key, sig, i, self.recent_values[-1], time, self._live))
        return out

    def scan_all(self, values: Any, times: list[str | None] | None = None) -> list[Finding]:
        """All findings of a whole series on a fresh monitor, vectorised (the replay path).

        Gives exactly the findings that ``feed`` would give one reading at a time: the
        detectors' ``scan`` equals their streaming loop, and the look-back for onset
        times and sizes is bounded exactly as the live deques are.  The monitor is
        spent afterwards (its detectors did not keep state).
        """
        if self.count:
            raise ValueError("scan_all needs a fresh monitor")
        x = np.asarray(values, dtype=float)
        n = len(x)
        hist = _ArrayHistory(x, times, self.keep)
        ranked: list[tuple[int, int, Finding]] = []
        limits = np.zeros(n, dtype=bool)
        if self.cc.usl is not None:
            limits |= x > self.cc.usl
        if self.cc.lsl is not None:
            limits |= x < self.cc.lsl
        for i in np.flatnonzero(limits).tolist():
            f = self._spec_finding(i, float(x[i]), None if times is None else times[i])
            ranked.append((i, -1, f))
        start = 0
        if self.baseline is None:
            need = self._baseline_size()
            if n >= need:
                self.baseline_values = x[:need].tolist()
                self.count = need
                self._learn_baseline(None if times is None else list(times[:need]))
                start = need
            else:
                start = n
        self.count = n
        if start < n and self.detectors:
            k = self.k
            rest = x[start:]
            if k > 1:  # the mean of each complete subgroup, summed in reading order as feed() sums it
                rest = np.asarray([sum(g) / k for g in rest[: len(rest) // k * k].reshape(-1, k).tolist()])
            fed_raw = np.asarray([self._transformed(v) for v in rest.tolist()]) if self._lambda is not None else rest
            fed_z = (fed_raw - self.baseline.centre) / self.baseline.sigma
            with shared_window_summaries():
                for rank, (key, det) in enumerate(self.detectors.items()):
                    feed = fed_z if det.needs_reference else fed_raw
                    for sig in type(det).scan(feed, **det.params()):
                        i = start + sig.index * k + k - 1
                        hist.now = i
                        f = self._finding(key, sig, i, float(x[i]), None if times is None else times[i], hist)
                        ranked.append((i, rank, f))
        if n:
            self.last_value = float(x[-1])
            self.last_time = None if times is None else times[-1]
        ranked.sort(key=lambda t: (t[0], t[1]))
        self.detectors = {}
        return [f for _, _, f in ranked]

    # -- baseline ----------------------------------------------------------------------------
    def _baseline_size(self) -> int:
        """Readings in the baseline; with subgroups, a whole number of subgroups and at least 20 of them."""
        n = self.cc.baseline.readings
        if self.k > 1:
            n = max(n // self.k, 20) * self.k
        return n

    def _learn_baseline(self, times: list[str | None] | None = None) -> None:
        """Learn the baseline from ``baseline_values`` (``times``: their time stamps, for the reading rate)."""
        from rules.baseline import estimate_baseline

        raw = self.baseline_values
        try:
            b = _subgroup_baseline(raw, self.k) if self.k > 1 else estimate_baseline(raw)
        except ValueError as e:
            # Too little left after screening, say: keep the newer half and go on collecting.
            self.notices.append(f"{self.cc.name}: no baseline yet ({e}); collecting more readings")
            self.baseline_values = raw[len(raw) // 2:]
            return
        self.baseline_values = []
        if times:
            from watcher.calibration import measured_rate

            self.measured_per_hour = measured_rate(times)
        self._set_baseline(b, raw)

    def _set_baseline(self, b: Any, raw: list[float] | None = None) -> None:
        self.baseline = b
        self._lambda = (b.transform or {}).get("boxcox") if b is not None else None
        if b.no_spread:
            self.notices.append(f"{self.cc.name}: the baseline has no spread ({b.no_spread_reason}); "
                                "no detector can run until it is re-learnt. Check the gauge and its resolution.")
        elif b.distribution_free_only:
            self.notices.append(f"{self.cc.name}: the baseline is not normal, even after a Box-Cox transform; "
                                "only the distribution-free detectors run.")
        if raw is not None:  # sizes are told in the unit, so keep the centre and sigma of the raw readings too
            self.raw_centre = sum(raw) / len(raw)
            mr = [abs(a - c) for a, c in zip(raw[1:], raw[:-1])]
            self.raw_sigma = (sum(mr) / len(mr)) / 1.128 if mr else b.sigma
        elif self._lambda is None:
            self.raw_centre, self.raw_sigma = b.centre, b.sigma
        self.watch_start = self.count
        self.warnings = list(b.warnings)
        self._calibrate()
        self.detectors = {}
        if b.no_spread:
            return  # never divide by a zero sigma; check, status and alerts report it
        distribution_free = b.distribution_free_only
        for key, params in self.spec.items():
            cls = DETECTORS[key]
            if distribution_free and cls.needs_reference:
                continue
            self.detectors[key] = cls(**params)

    def rebaseline(self) -> None:
        """Forget the baseline and learn a new one from the next readings."""
        self.baseline = None
        self.detectors = {}
        self.baseline_values, self.group = [], []

    def _transformed(self, x: float) -> float:
        """The reading on the monitored scale: Box-Cox (Box and Cox 1964) where the baseline chose it."""
        lam = self._lambda
        if lam is None:
            return x
        if x <= 0:  # outside the transform's domain: treat as far below any positive reading
            return -1e300
        return math.log(x) if lam == 0 else (x**lam - 1.0) / lam

    def _standardise(self, x: float) -> float:
        b = self.baseline
        return (self._transformed(x) - b.centre) / b.sigma

    # -- findings ----------------------------------------------------------------------------
    def _spec_finding(self, i: int, value: float, time: str | None) -> Finding | None:
        cc = self.cc
        if cc.usl is not None and value > cc.usl:
            direction, limit, name = "up", cc.usl, "upper"
        elif cc.lsl is not None and value < cc.lsl:
            direction, limit, name = "down", cc.lsl, "lower"
        else:
            return None
        size = value - limit
        msg = (
            f"{cc.name} read {value:g}{_u(cc.unit)}, beyond the {name} specification limit {limit:g}{_u(cc.unit)}."
        )
        return Finding(cc.name, "out_of_spec", "specification limit", None, i, time, i, time, direction,
                       size, msg, self.source, value, None, {"limit": limit})

    def _finding(self, key: str, sig: Any, i: int, value: float, time: str | None, history: "_History") -> Finding:
        onset = None if sig.onset_index is None else self.watch_start + sig.onset_index * self.k
        onset_time = None if onset is None else history.time_at(onset)
        size = self._size_since(onset, sig, DETECTORS[key].needs_reference, history)
        detail = dict(sig.detail)
        detail["detector_key"] = key
        if sig.size is not None:
            detail["size_detector_units"] = sig.size
        if size is not None and self.raw_sigma:
            detail["size_sigma"] = size / self.raw_sigma
        if sig.pattern == "drift" and "slope_per_reading" in detail and self._lambda is None:
            detail.update(self._projection(detail["slope_per_reading"], onset, i, time, history))
        f = Finding(
            characteristic=self.cc.name, pattern=sig.pattern, detector=sig.detector,
            p_value=None if sig.p_value is None else float(sig.p_value), index=i, time=time,
            onset_index=onset, onset_time=onset_time, direction=sig.direction, size=size,
            message="", source=self.source, value=value, statistic=sig.statistic, detail=detail,
        )
        return _with_message(f, self.cc)

    def _projection(self, slope: float, onset: int | None, i: int, time: str | None, history: "_History") -> dict:
        """Slope per hour and, where a limit lies ahead, the hours until the fitted line reaches it.

        The rate of readings comes from the timestamps across the window (or ``readings_per_hour``).
        The level now is the mean of the window plus slope x half its span (the fitted line at the
        last reading).  A projection, not a forecast: it assumes the drift goes on at the same rate.
        """
        out: dict[str, Any] = {}
        per_hour = self.cc.readings_per_hour
        t0 = history.time_at(onset) if onset is not None else None
        if t0 is not None and time is not None and i > onset:
            from datetime import datetime

            try:
                hours = (datetime.fromisoformat(time) - datetime.fromisoformat(t0)).total_seconds() / 3600
                if hours > 0:
                    per_hour = (i - onset) / hours
            except (TypeError, ValueError):
                pass
        if not per_hour:
            return out
        out["slope_per_hour"] = slope * per_hour
        vals = history.values_since(onset) if onset is not None else None
        if not vals or slope == 0:
            return out
        level = sum(vals) / len(vals) + slope * (len(vals) - 1) / 2
        limit = self.cc.usl if slope > 0 else self.cc.lsl
        if limit is not None and (limit - level) * slope > 0:
            out["hours_to_limit"] = (limit - level) / (slope * per_hour)
            out["limit"] = limit
        return out

    def _size_since(self, onset: int | None, sig: Any, sigma_units: bool, history: "_History") -> float | None:
        """The change in the characteristic's unit.

        Shift and spike: mean of the readings since onset minus the baseline mean.
        Drift: the change across the detector's window (its own estimate).
        """
        b = self.baseline
        if sig.pattern not in ("shift", "drift", "spike") or b is None:
            return None
        if sig.pattern == "drift":
            # A drift's size is the change the detector measured across its window (e.g. Sen's slope x span).
            if sig.size is None or self._lambda is not None:
                return None
            return sig.size * self.raw_sigma if sigma_units else sig.size
        if onset is not None:
            vals = history.values_since(onset)
            if vals:
                return sum(vals) / len(vals) - self.raw_centre
        if sig.size is not None:
            return sig.size * self.raw_sigma if sigma_units else sig.size
        return None

    # -- state -------------------------------------------------------------------------------------
    def export_state(self) -> dict[str, Any]:
        detectors = {k: _pack_detector(d.export_state()) for k, d in self.detectors.items()}
        return {**self._state_head(), **self._state_tail(), "detectors": detectors}

    def export_state_text(self) -> str:
        """``export_state()`` as compact JSON, for the daemon, which saves every characteristic
        that took readings on every commit: what changes only with the baseline (baseline,
        calibration, raw centre and sigma) and each detector's name and settings are encoded
        once and kept, so only the moving parts are encoded each time."""
        key = (self.baseline, self.calibration, self.watch_start, self.measured_per_hour,
               self.raw_centre, self.raw_sigma)
        kept = self._head_text
        if kept is None or any(a is not b for a, b in zip(kept[0], key)):
            kept = self._head_text = (key, _compact_json(self._state_head())[:-1])
        return f'{kept[1]},"detectors":{self._detectors_text()},{_compact_json(self._state_tail())[1:]}'

    def _detectors_text(self) -> str:
        heads = self._detector_heads
        parts = []
        for k, d in self.detectors.items():
            got = heads.get(k)
            if got is None or got[0] is not d:  # a detector's settings are fixed when it is made
                head = {"detector": d.key, "version": d.STATE_VERSION, "params": d.params()}
                got = heads[k] = (d, f'{_compact_json(k)}:{_compact_json(head)[:-1]},"state":')
            parts.append(got[1] + _compact_json(_pack_state(d._get_state())) + "}")
        return "{" + ",".join(parts) + "}"

    def _state_head(self) -> dict[str, Any]:
        return {
            "version": STATE_VERSION,
            "watch_start": self.watch_start,
            "baseline": None if self.baseline is None else self.baseline.to_dict(),
            "raw_centre": self.raw_centre,
            "raw_sigma": self.raw_sigma,
            "measured_per_hour": self.measured_per_hour,
            "calibration": None if self.calibration is None else self.calibration.summary(),
        }

    def _state_tail(self) -> dict[str, Any]:
        """The moving parts of the state, the detectors' apart."""
        return {
            "count": self.count,
            "baseline_values": _pack(self.baseline_values),
            "group": self.group,
            "recent_values": _pack(list(self.recent_values)),
            "recent_times": _pack_times(self.recent_times),
            "last_time": self.last_time,
            "last_value": self.last_value,
        }

    @classmethod
    def from_state(cls, cc: CharacteristicConfig, source: str, state: dict[str, Any],
                   detectors: dict[str, dict[str, Any]] | None = None, calibrator: Any = None) -> "Monitor":
        from rules.baseline import Baseline

        m = cls(cc, source, detectors, calibrator)
        if state.get("version") != STATE_VERSION:
            raise ValueError(f"monitor state version {state.get('version')!r} is not supported")
        m.count = state["count"]
        m.baseline_values = _unpack(state["baseline_values"])
        m.group = list(state["group"])
        m.recent_values.extend(_unpack(state["recent_values"]))
        m.recent_times.extend(_unpack_times(state["recent_times"]))
        m.last_time, m.last_value = state["last_time"], state["last_value"]
        if state["baseline"] is not None:
            m.baseline = Baseline.from_dict(state["baseline"])
            m._lambda = (m.baseline.transform or {}).get("boxcox")
            m.raw_centre, m.raw_sigma = state["raw_centre"], state["raw_sigma"]
            m.warnings = list(m.baseline.warnings)
            m.watch_start = state["watch_start"]
            m.measured_per_hour = state.get("measured_per_hour")
            m._calibrate()  # the same thresholds as before, unless the config (or its budget) changed
            saved = state["detectors"]
            if set(saved) == set(m.spec) and all(saved[k]["params"] == m._expected_params(k) for k in saved):
                m.detectors = {k: DETECTORS[k].from_state(_unpack_detector(v)) for k, v in saved.items()}
            else:
                # The configuration changed: keep the baseline, start the detectors afresh.
                m._set_baseline(m.baseline)
        return m

    def _calibrate(self) -> None:
        """Thresholds for the budget, now that the baseline (and so the reading rate) is known."""
        if self.calibrator is None:
            return
        self.calibration = self.calibrator.calibrate(self.cc, self.measured_per_hour)
        self.spec = self.calibration.spec
        for w in self.calibration.warnings:
            if w not in self.warnings:
                self.warnings.append(w)

    def _expected_params(self, key: str) -> dict[str, Any]:
        return DETECTORS[key](**self.spec[key]).params()


class _History:
    """What a finding may look back on: the last ``keep`` readings before and including the current one."""

    def time_at(self, index: int) -> str | None:  # pragma: no cover - interface
        raise NotImplementedError

    def values_since(self, index: int) -> list[float] | None:  # pragma: no cover - interface
        raise NotImplementedError


class _DequeHistory(_History):
    """The live monitor's bounded deques."""

    def __init__(self, m: "Monitor"):
        self.m = m

    def time_at(self, index: int) -> str | None:
        back = self.m.count - 1 - index
        return self.m.recent_times[-1 - back] if 0 <= back < len(self.m.recent_times) else None

    def values_since(self, index: int) -> list[float] | None:
        n = self.m.count - index
        return list(self.m.recent_values)[-n:] if 0 < n <= len(self.m.recent_values) else None


class _ArrayHistory(_History):
    """The same view over whole arrays (the vectorised path), bounded exactly like the deques."""

    def __init__(self, values: np.ndarray, times: list[str | None] | None, keep: int):
        self.values, self.times, self.keep, self.now = values, times, keep, 0

    def time_at(self, index: int) -> str | None:
        back = self.now - index
        return self.times[index] if self.times is not None and index >= 0 and 0 <= back < self.keep else None

    def values_since(self, index: int) -> list[float] | None:
        n = self.now + 1 - index
        return self.values[index:self.now + 1].tolist() if index >= 0 and 0 < n <= self.keep else None


def _subgroup_baseline(raw: list[float], k: int) -> Any:
    """Centre = grand mean; sigma of subgroup means = (R-bar / d2(k)) / sqrt(k) (rules.subgroups)."""
    from rules.baseline import fixed_baseline
    from rules.subgroups import consecutive_subgroups, summarise_subgroups

    summary = summarise_subgroups(consecutive_subgroups(raw, k))
    if not summary.sigma_of_means or summary.sigma_of_means <= 0:
        return _no_spread(fixed_baseline(summary.grand_mean, 1.0, note="subgroups"))
    return fixed_baseline(summary.grand_mean, summary.sigma_of_means,
                          note=f"subgroups of {k}: sigma of means from R-bar/d2 ({summary.n_subgroups} subgroups)")


def _no_spread(b: Any) -> Any:
    from dataclasses import replace

    return replace(b, no_spread=True, no_spread_reason="every subgroup has zero range (a stuck gauge?)")


def _fixed_baseline(mean: float, sigma: float) -> Any:
    from rules.baseline import fixed_baseline

    return fixed_baseline(mean, sigma)


def _u(unit: str) -> str:
    return f" {unit}" if unit else ""


def _with_message(f: Finding, cc: CharacteristicConfig) -> Finding:
    from dataclasses import replace

    return replace(f, message=finding_message(f, cc.unit))
