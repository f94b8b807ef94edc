"""Which detectors a characteristic runs, with which settings.

A characteristic's ``detectors:`` mapping in the config replaces the default
set; windowed detectors take the characteristic's ``window`` unless their own
settings name one.
"""

from __future__ import annotations

from typing import Any

from rules import DETECTORS
from watcher.config import CharacteristicConfig

# The default set, by detector key; keys not (yet) provided by rules are left out.
DEFAULT_SET: tuple[str, ...] = (
    "median_runs",
    "updown_runs",
    "longest_median_run",
    "mann_kendall",
    "cusum",
    "ewma",
    "shewhart",
)


def resolve_detectors(cc: CharacteristicConfig) -> dict[str, dict[str, Any]]:
    """Detector key -> constructor settings for one characteristic."""
    if cc.detectors is not None:
        chosen = {k: dict(v) for k, v in cc.detectors.items()}
    else:
        chosen = {k: {} for k in DEFAULT_SET if k in DETECTORS}
    for key, params in chosen.items():
        if "window" in DETECTORS[key].PARAMS and "window" not in params:
            params["window"] = cc.window
    return chosen
