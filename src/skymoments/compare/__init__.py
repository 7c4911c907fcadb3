"""Comparing tracked runs: select them, rank them by an objective, show what varies.

``skymoments compare`` is a thin Hydra command over :func:`compare_runs`::

    from skymoments.compare import compare_runs

    result = compare_runs(cfg.tracking, sweep=parent_run_id, objective="calibration_score",
                          out="compare.html")
    result.comparison.best.run.run_id

The pieces are usable alone: :func:`select_runs` (experiment, sweep or filter),
:func:`resolve_objective` and :func:`rank_runs`, :func:`varying_params`,
:func:`print_comparison` (rich table), :func:`collect_inputs` and :func:`render_html` (the
self-contained report).
"""

from skymoments.compare.core import KEY_METRICS, Comparison, build_comparison
from skymoments.compare.objective import (
    CALIBRATION_SCORE,
    Objective,
    RankedRun,
    calibration_score,
    rank_runs,
    resolve_objective,
)
from skymoments.compare.params import VaryingParam, run_overrides, varying_params
from skymoments.compare.pipeline import REPORT_ARTIFACT, CompareResult, compare_runs, log_report
from skymoments.compare.report import ReportInputs, collect_inputs, render_html, write_html
from skymoments.compare.select import Selection, check_store, select_runs
from skymoments.compare.table import comparison_table, print_comparison, render_text

__all__ = [
    "CALIBRATION_SCORE",
    "KEY_METRICS",
    "REPORT_ARTIFACT",
    "CompareResult",
    "Comparison",
    "Objective",
    "RankedRun",
    "ReportInputs",
    "Selection",
    "VaryingParam",
    "build_comparison",
    "calibration_score",
    "check_store",
    "collect_inputs",
    "compare_runs",
    "comparison_table",
    "log_report",
    "print_comparison",
    "rank_runs",
    "render_html",
    "render_text",
    "resolve_objective",
    "run_overrides",
    "select_runs",
    "varying_params",
    "write_html",
]
