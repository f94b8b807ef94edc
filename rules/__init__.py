"""linewatch's statistics: detectors, tests, p-values and calibration.

Pure: numbers in, result objects out.  No files, clocks, network or logging.
"""

from rules.detector import PATTERNS, Signal, StreamDetector
from rules.registry import DETECTORS

# --- run patterns (runs.py, runs_stream.py) ---
from rules.runs import (  # noqa: E402
    RunsResult, longest_median_run_test, longest_monotone_run_test, median_runs_test, updown_runs_test,
)
from rules.runs_stream import (  # noqa: E402
    LongestMedianRunDetector, LongestMonotoneRunDetector, MedianRunsDetector, UpDownRunsDetector,
)

_RUNS_NAMES = [
    "RunsResult", "median_runs_test", "updown_runs_test", "longest_median_run_test",
    "longest_monotone_run_test", "MedianRunsDetector", "UpDownRunsDetector",
    "LongestMedianRunDetector", "LongestMonotoneRunDetector",
]  # fmt: skip
# --- shift (cusum.py, ewma.py, zones.py) ---
from rules.cusum import Cusum, cusum_arl, cusum_arl_siegmund, cusum_h_for_arl, cusum_pvalue  # noqa: E402
from rules.ewma import Ewma, ewma_arl, ewma_L_for_arl, ewma_signal_probability  # noqa: E402
from rules.zones import (  # noqa: E402
    Nelson, Shewhart, WesternElectric, nelson_arl, shewhart_arl, western_electric_arl, zone_rules_arl,
)

_SHIFT_NAMES = [
    "Cusum", "cusum_arl", "cusum_arl_siegmund", "cusum_h_for_arl", "cusum_pvalue",
    "Ewma", "ewma_arl", "ewma_L_for_arl", "ewma_signal_probability",
    "Shewhart", "WesternElectric", "Nelson", "shewhart_arl", "western_electric_arl", "nelson_arl",
    "zone_rules_arl",
]  # fmt: skip
# --- baseline, trend, change point (baseline.py, trend.py, changepoint.py) ---
from rules.normality import anderson_darling_test, boxcox_normalise  # noqa: E402
from rules.baseline import Baseline, estimate_baseline, fixed_baseline  # noqa: E402
from rules.subgroups import summarise_subgroups  # noqa: E402
from rules.trend import MannKendallDetector, mann_kendall_test, sen_slope  # noqa: E402
from rules.changepoint import PettittDetector, pettitt_onset, pettitt_test  # noqa: E402
from rules.capability import capability, capability_from_summary  # noqa: E402

_BASELINE_TREND_NAMES = [
    "anderson_darling_test", "boxcox_normalise", "Baseline", "estimate_baseline", "fixed_baseline",
    "summarise_subgroups", "MannKendallDetector", "mann_kendall_test", "sen_slope",
    "PettittDetector", "pettitt_onset", "pettitt_test", "capability", "capability_from_summary",
]  # fmt: skip
# --- run lengths and calibration (runlength.py, calibrate.py) ---
from rules.calibrate import FalseAlarmBudget, budget_to_arl0, calibrate, default_detector_set  # noqa: E402
from rules.runlength import detection_power, simulate_run_lengths  # noqa: E402

_CALIBRATION_NAMES = [
    "FalseAlarmBudget", "budget_to_arl0", "calibrate", "default_detector_set", "detection_power",
    "simulate_run_lengths",
]  # fmt: skip

__all__ = ["PATTERNS", "Signal", "StreamDetector", "DETECTORS"]
__all__ += _BASELINE_TREND_NAMES
__all__ += _RUNS_NAMES
__all__ += _SHIFT_NAMES
__all__ += _CALIBRATION_NAMES
