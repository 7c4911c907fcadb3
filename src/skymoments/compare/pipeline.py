"""One comparison end to end: select, rank, print, write the report, log it.

Where the report is logged
--------------------------
* A sweep: to the sweep's parent run, as ``compare/report.html`` (with
  ``compare/ranking.json``), and the parent is tagged ``skymoments.compare.best_run``.
* An experiment or a filter: to a new run named ``compare`` in that experiment (tag
  ``skymoments.run_kind = compare``, so later comparisons leave it out), with the same two
  artifacts and tags naming what was compared.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from rich.console import Console

from skymoments.compare.core import Comparison, build_comparison
from skymoments.compare.objective import resolve_objective
from skymoments.compare.report import collect_inputs, render_html, write_html
from skymoments.compare.select import RUN_KIND_TAG, select_runs
from skymoments.compare.table import print_comparison
from skymoments.tracking import attach_run, tracked_run

__all__ = ["REPORT_ARTIFACT", "CompareResult", "compare_runs", "log_report"]

REPORT_ARTIFACT = "compare/report.html"
RANKING_ARTIFACT = "compare/ranking.json"


@dataclass(frozen=True)
class CompareResult:
    """What :func:`compare_runs` did.

    Attributes
    ----------
    comparison : Comparison
    report_path : pathlib.Path
        The HTML file written.
    logged_run_id : str or None
        The run the report was logged to (the sweep parent or the new ``compare`` run).
    """

    comparison: Comparison
    report_path: Path
    logged_run_id: str | None


def log_report(comp: Comparison, html_path: str | os.PathLike) -> str:
    """Log the report (and the ranking as JSON) to the sweep parent or a new compare run.

    Returns
    -------
    run_id : str
        The run the report went to.
    """
    sel = comp.selection
    summary = comp.summary()
    best = comp.best.run.run_id if comp.best else ""
    with tempfile.TemporaryDirectory(prefix="skymoments-compare-") as tmp:
        local = Path(tmp) / Path(REPORT_ARTIFACT).name
        local.write_bytes(Path(html_path).read_bytes())
        folder = str(Path(REPORT_ARTIFACT).parent)
        tags = {
            "skymoments.compare.objective": comp.objective.name,
            "skymoments.compare.direction": comp.objective.direction,
            "skymoments.compare.best_run": best,
            "skymoments.compare.n_runs": len(comp.entries),
        }
        if sel.parent is not None:
            target = attach_run(sel.settings, sel.parent.run_id)
            target.log_artifact(local, folder)
            target.log_dict(summary, RANKING_ARTIFACT)
            target.set_tags(tags)
            return sel.parent.run_id
        tags.update({RUN_KIND_TAG: "compare", "skymoments.compare.selection": sel.description})
        with tracked_run(sel.settings, run_name="compare", tags=tags) as run:
            run.log_artifact(local, folder)
            run.log_dict(summary, RANKING_ARTIFACT)
            if comp.best is not None and comp.best.value is not None:
                run.log_metrics({"compare/best_objective": comp.best.value})
            return run.run_id


def compare_runs(
    tracking: Any,
    *,
    experiment: str | None = None,
    sweep: str | None = None,
    filter_string: str | None = None,
    objective: str = "eval/mse_B",
    direction: str = "auto",
    out: str | os.PathLike = "compare.html",
    log: bool = True,
    ignore_params: Sequence[str] = ("tracking.*",),
    max_param_columns: int = 6,
    console: Console | None = None,
) -> CompareResult:
    """Compare tracked runs: print the ranked table, write the HTML report, log it.

    Parameters
    ----------
    tracking : DictConfig, Mapping, str or TrackingSettings
        ``cfg.tracking`` or a store URI / folder.
    experiment, sweep, filter_string : str, optional
        What to compare (see :func:`skymoments.compare.select.select_runs`).
    objective : str
        A metric name or ``calibration_score``.
    direction : str
        ``min``, ``max`` or ``auto``.
    out : path-like
        Where the HTML report goes.
    log : bool
        Log the report to the tracking store (see the module docstring).
    ignore_params : sequence of str
        fnmatch patterns of params never shown.
    max_param_columns : int
        Varying params shown as terminal columns.
    console : rich.console.Console, optional
        Where the table goes (default stdout).

    Returns
    -------
    CompareResult

    Raises
    ------
    ValueError
        Missing store, nothing matched, an unknown objective or direction (each message
        names what was searched and how to fix it).
    """
    obj = resolve_objective(objective, direction)
    selection = select_runs(
        tracking, experiment=experiment, sweep=sweep, filter_string=filter_string
    )
    comp = build_comparison(selection, obj, ignore_params)
    console = console or Console()
    print_comparison(comp, console=console, max_param_columns=max_param_columns)
    inputs = collect_inputs(comp)
    path = write_html(render_html(comp, inputs), out)
    logged = log_report(comp, path) if log else None
    console.print(f"report: {path}")
    if logged:
        where = "sweep parent run" if selection.parent is not None else "compare run"
        console.print(f"logged to {where} {logged} as {REPORT_ARTIFACT}")
    return CompareResult(comp, path, logged)
