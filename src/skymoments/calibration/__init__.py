"""Posterior calibration: metrics, the Wiener and exact-Gaussian baselines, plots, files.

Depends on ``skymoments.maps`` only; callers pass arrays and 2-D spectra in.
"""

from skymoments.calibration.metrics import (
    COVERAGE_LEVELS,
    CalibrationResult,
    calibration_metrics,
    coverage_curve,
    pit_histogram,
    zscores,
)
from skymoments.calibration.multipole import multipole_figures
from skymoments.calibration.report import (
    REPORT_NOTE,
    EvalReport,
    evaluate_posterior,
    read_posterior,
    write_posterior,
)
from skymoments.calibration.stratify import foreground_intensity, stratified_calibration
from skymoments.calibration.wiener import (
    WienerFilter,
    estimate_power_2d_from_image,
    isotropic_power_2d,
    realmap_eb_gain,
    white_noise_power_2d,
)

__all__ = [
    "COVERAGE_LEVELS",
    "REPORT_NOTE",
    "CalibrationResult",
    "EvalReport",
    "WienerFilter",
    "calibration_metrics",
    "coverage_curve",
    "estimate_power_2d_from_image",
    "evaluate_posterior",
    "foreground_intensity",
    "isotropic_power_2d",
    "multipole_figures",
    "pit_histogram",
    "read_posterior",
    "realmap_eb_gain",
    "stratified_calibration",
    "white_noise_power_2d",
    "write_posterior",
    "zscores",
]
