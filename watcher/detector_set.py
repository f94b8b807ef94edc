"""Which detectors a characteristic runs, with which settings.

A characteristic's ``detectors:`` mapping in the config replaces the default
set (:func:`rules.calibrate.default_detector_set`); windowed detectors take the
characteristic's ``window`` unless their own settings name one.  Thresholds
left unset are filled in by :mod:`watcher.calibration`.
"""

from __future__ import annotations

from typing import Any

from rules import DETECTORS
from rules.calibrate import default_detector_set
from watcher.config import CharacteristicConfig


def resolve_detectors(cc: CharacteristicConfig) -> dict[str, dict[str, Any]]:
    """Detector key -> constructor settings for one characteristic."""
    if cc.detectors is not None:
        chosen = {k: dict(v) for k, v in cc.detectors.items()}
    else:
        chosen = {k: {p: v for p, v in params.items() if p != "window"} for k, params in default_detector_set()}
    for key, params in chosen.items():
        if "window" in DETECTORS[key].PARAMS and "window" not in params:
            params["window"] = cc.window
    return chosen
