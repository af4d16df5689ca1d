"""Measurements: accuracy, calibration, label-shift alarm, distances between domains, and plots.

Plotting lives in :mod:`adaptkit.measure.plots` and is imported on demand, so importing this package does not
import matplotlib.
"""
from adaptkit.measure.diagnostics import (
    LabelShiftRecord,
    LabelShiftWarning,
    accuracy,
    coral_between,
    expected_calibration_error,
    label_shift_check,
    mmd2_between,
    proxy_a_distance,
    relative_to_source_halves,
    shift_report,
)

__all__ = [
    "LabelShiftRecord",
    "LabelShiftWarning",
    "accuracy",
    "coral_between",
    "expected_calibration_error",
    "label_shift_check",
    "mmd2_between",
    "proxy_a_distance",
    "relative_to_source_halves",
    "shift_report",
]
