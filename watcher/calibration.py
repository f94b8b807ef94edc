"""Calibrated detector settings for each characteristic, cached on disk.

The route of a characteristic's thresholds:

1. its false-alarm budget (its own ``false_alarms``, else the config's, else
   one false episode per 10,000 readings) and its reading rate (its
   ``readings_per_hour``, else measured from the time stamps of its baseline
   readings, else unknown) give a target ARL0 in readings; a budget per stretch
   of time with no known rate falls back to the per-readings default, with a
   warning;
2. :func:`rules.calibrate.calibrate` sets every threshold the config did not
   set itself (``h``, ``L``, ``limit``, ``alpha``), with the Gandy & Kvaloy
   adjustment for a baseline estimated from ``baseline.readings`` readings;
3. the result is kept in ``<state>/calibration/<hash>.json`` under the hash of
   everything it depends on (:func:`rules.calibrate.calibration_key`), so a
   restart, a replay and a thousand identical characteristics calibrate once.

The daemon, both replay engines and ``linewatch check`` all go through
:class:`Calibrator`, so they use the same thresholds for the same config.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from statistics import median
from typing import Any, Sequence

from watcher.config import DEFAULT_FALSE_ALARM_READINGS, Budget, CharacteristicConfig
from watcher.detector_set import resolve_detectors

CACHE_FOLDER = "calibration"
# Results by key, shared by every Calibrator of the process: the key covers every input,
# so a replay after a check, or many routes in one test run, calibrate once.
_MEMORY: dict[str, dict[str, Any]] = {}


@dataclass
class Calibrated:
    """What a characteristic runs, and how its thresholds were reached."""

    spec: dict[str, dict[str, Any]]  # detector key -> constructor settings
    arl0: float  # target readings between false findings
    budget: str  # the budget as the config states it
    readings_per_hour: float | None
    rate_origin: str  # "configured", "measured from the baseline's time stamps" or "unknown"
    kept: list[str] = field(default_factory=list)  # detectors whose threshold the config set
    warnings: list[str] = field(default_factory=list)
    report: dict[str, Any] | None = None  # rules.calibrate's report, None where calibration failed
    key: str = ""

    def summary(self) -> dict[str, Any]:
        """Plain data for the monitor's state, ``status`` and ``check``."""
        return {
            "budget": self.budget,
            "arl0": self.arl0,
            "readings_per_hour": self.readings_per_hour,
            "rate_origin": self.rate_origin,
            "false_per_day": None if not self.readings_per_hour else 24.0 * self.readings_per_hour / self.arl0,
            "thresholds": thresholds(self.spec),
            "kept": list(self.kept),
            "warnings": list(self.warnings),
            "key": self.key,
        }


def thresholds(spec: dict[str, dict[str, Any]]) -> dict[str, float]:
    """The calibrated parameter of each detector (h, L, limit or alpha) that has one."""
    from rules.calibrate import THRESHOLDS

    return {k: p[THRESHOLDS[k]] for k, p in spec.items() if k in THRESHOLDS and THRESHOLDS[k] in p}


def measured_rate(times: Sequence[str | None]) -> float | None:
    """Readings per hour from ISO time stamps: 3600 / the median interval between readings.

    The median, not the span, so a break in production does not lower the nominal
    rate (that would tighten the budget per reading for no reason).  None where fewer
    than 10 intervals parse or the median interval is not positive.

    >>> measured_rate([f"2026-01-01T00:00:{s:02d}" for s in range(0, 60, 2)])
    1800.0
    """
    stamps = []
    for t in times:
        if t is None:
            continue
        try:
            stamps.append(datetime.fromisoformat(t).timestamp())
        except (TypeError, ValueError):
            continue
    gaps = [b - a for a, b in zip(stamps, stamps[1:])]
    if len(gaps) < 10:
        return None
    m = median(gaps)
    return 3600.0 / m if m > 0 else None


class Calibrator:
    """Calibrates characteristics against one config's default budget, with an optional disk cache.

    ``cache_dir`` None keeps results in memory only (tests, notebooks).
    """

    def __init__(self, default_budget: Budget | None = None, cache_dir: Path | str | None = None):
        self.default_budget = default_budget or Budget(1, readings=DEFAULT_FALSE_ALARM_READINGS)
        self.cache_dir = None if cache_dir is None else Path(cache_dir)
        self._memory = _MEMORY
        self.computed = 0  # calibrations actually run (not found in a cache), for tests and benches

    @classmethod
    def for_config(cls, cfg: Any) -> "Calibrator":
        """The config's budget, cached in its state folder (a replay without a config: the user's cache folder)."""
        if cfg.file == "<defaults>":
            root = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "linewatch"
        else:
            root = Path(cfg.state_dir)
        return cls(cfg.false_alarms, root / CACHE_FOLDER)

    def prepare(self, characteristics: Sequence[CharacteristicConfig]) -> None:
        """Calibrate now, at start-up, every characteristic whose budget needs no measured rate,
        so no reading waits for a calibration later (after the first start they come from the cache)."""
        for cc in characteristics:
            budget = cc.false_alarms or self.default_budget
            if budget.readings is not None or cc.readings_per_hour:
                self.calibrate(cc)

    def calibrate(self, cc: CharacteristicConfig, measured_per_hour: float | None = None) -> Calibrated:
        """The thresholds ``cc`` runs with; ``measured_per_hour``: its rate as measured from its baseline."""
        from rules.calibrate import THRESHOLDS, calibrate, calibration_key

        chosen = resolve_detectors(cc)
        kept = [key for key, p in chosen.items() if key in THRESHOLDS and THRESHOLDS[key] in p]
        done = self._target(cc, measured_per_hour, chosen)
        done.kept = kept
        k = cc.subgroup or 1
        steps = done.arl0 / k  # with subgroups the detectors take one value per subgroup
        baseline_n = None if cc.baseline.fixed else max(cc.baseline.readings // k, 3)
        if not chosen or steps <= 1:
            return done
        items = list(chosen.items())
        key = calibration_key(items, steps, baseline_n, 0, keep=kept)
        done.key = key
        try:
            res = self._lookup(key, "thresholds", lambda: calibrate(items, steps, baseline_n, 0, keep=kept))
        except ValueError as e:
            done.warnings.append(f"{cc.name}: could not calibrate to the budget ({e}); "
                                 "the detectors keep their own default thresholds, so the false-alarm rate is not controlled")
            return done
        done.spec = {k2: dict(p) for k2, p in res["detector_set"]}
        done.report = res["report"]
        done.warnings += [f"{cc.name}: {w}" for w in res["report"]["warnings"]]
        return done

    def _target(self, cc: CharacteristicConfig, measured_per_hour: float | None,
                spec: dict[str, dict[str, Any]]) -> Calibrated:
        """``spec`` as it stands, with the budget as a target ARL0 and where the reading rate came from."""
        budget = cc.false_alarms or self.default_budget
        warnings: list[str] = []
        if cc.readings_per_hour:
            rate, origin = float(cc.readings_per_hour), "configured"
        elif measured_per_hour:
            # Three significant figures: a rate measured a little differently must not recalibrate.
            rate, origin = float(f"{measured_per_hour:.3g}"), "measured from the baseline's time stamps"
        else:
            rate, origin = None, "unknown"
        arl0 = budget.arl0(rate)
        if arl0 is None:
            arl0 = float(DEFAULT_FALSE_ALARM_READINGS)
            warnings.append(f"{cc.name}: the budget '{budget.text()}' needs a reading rate and none is known "
                            f"(set readings_per_hour, or give the readings a time column); "
                            f"using 1 per {DEFAULT_FALSE_ALARM_READINGS:,} readings")
        return Calibrated(dict(spec), arl0, budget.text(), rate, origin, warnings=warnings)

    def detection_power(self, cal: Calibrated, n_streams: int = 1000) -> dict[str, Any] | None:
        """Readings to detect steps and drifts with ``cal``'s detectors (rules.runlength.detection_power),
        cached beside the calibration; None where calibration failed."""
        from rules.runlength import detection_power

        if cal.report is None:
            return None
        per_day = None if not cal.readings_per_hour else 24.0 * cal.readings_per_hour

        def compute() -> dict[str, Any]:
            power = detection_power(list(cal.spec.items()), arl0=cal.arl0, readings_per_day=per_day, n_streams=n_streams)
            return {**power, "key": cal.key}

        return self._lookup(cal.key, f"power-{n_streams}", compute)

    def _lookup(self, key: str, kind: str, compute: Any) -> dict[str, Any]:
        """``compute()``'s result for ``key``: from memory, else the cache file, else computed and
        stored.  A calibration that cannot be done is remembered too (as ``error``), so it costs one try."""
        mem = f"{key}/{kind}"
        path = None if self.cache_dir is None else self.cache_dir / f"{key[:24]}.{kind}.json"
        res = self._memory.get(mem)
        if res is None and path is not None and path.exists():
            try:
                loaded = json.loads(path.read_text())
            except (OSError, ValueError):
                loaded = {}  # unreadable or torn: compute again and overwrite it
            res = loaded if loaded.get("key") == key else None
        if res is None:
            try:
                res = compute()
            except ValueError as e:
                res = {"key": key, "error": str(e)}
            self.computed += 1
            if path is not None:
                _write_atomic(path, json.dumps(res, indent=1, sort_keys=True, default=_finite))
        self._memory[mem] = res
        if "error" in res:
            raise ValueError(res["error"])
        return res


def _finite(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    raise TypeError(f"not JSON-able: {v!r}")


def _write_atomic(path: Path, text: str) -> None:
    """Write via a temporary file and a rename, so a crash never leaves half a cache file."""
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=".json")
        with os.fdopen(fd, "w") as f:
            f.write(text)
        os.replace(tmp, path)
    except OSError:  # a read-only or full state folder costs a recalibration next start, nothing more
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)


class AsConfigured(Calibrator):
    """No calibration: the detectors with the thresholds the config gives, else their class defaults.

    For comparing engines and for experiments; the false-alarm rate is then not controlled.
    """

    def calibrate(self, cc: CharacteristicConfig, measured_per_hour: float | None = None) -> Calibrated:
        done = self._target(cc, measured_per_hour, resolve_detectors(cc))
        done.warnings.append(f"{cc.name}: thresholds as configured, not calibrated to the budget")
        return done
