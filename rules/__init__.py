"""linewatch's statistics: detectors, tests, p-values and calibration.

Pure: numbers in, result objects out.  No files, clocks, network or logging.
"""

from rules.detector import PATTERNS, Signal, StreamDetector
from rules.registry import DETECTORS

# --- run patterns (runs.py, runs_stream.py) ---
# --- shift (cusum.py, ewma.py, zones.py) ---
# --- baseline, trend, change point (baseline.py, trend.py, changepoint.py) ---
from rules.normality import anderson_darling_test, boxcox_normalise  # noqa: E402
from rules.baseline import Baseline, estimate_baseline, fixed_baseline  # noqa: E402
from rules.subgroups import summarise_subgroups  # noqa: E402
from rules.trend import MannKendallDetector, mann_kendall_test, sen_slope  # noqa: E402
from rules.changepoint import pettitt_onset, pettitt_test  # noqa: E402
from rules.capability import capability, capability_from_summary  # noqa: E402

_BASELINE_TREND_NAMES = [
    "anderson_darling_test", "boxcox_normalise", "Baseline", "estimate_baseline", "fixed_baseline",
    "summarise_subgroups", "MannKendallDetector", "mann_kendall_test", "sen_slope",
    "pettitt_onset", "pettitt_test", "capability", "capability_from_summary",
]  # fmt: skip
# --- run lengths and calibration (runlength.py, calibrate.py) ---

__all__ = ["PATTERNS", "Signal", "StreamDetector", "DETECTORS"]
__all__ += _BASELINE_TREND_NAMES
