"""``skymoments evaluate``: re-evaluate a tracked model on another validation scenario.

    skymoments evaluate run_id=<id> sky=gaussian prior.a_fg.value=2

The logic, and what may change, is :mod:`skymoments.study.reevaluate`; this module
prepares the command line and prints the side-by-side summary.
"""

from __future__ import annotations

import sys

from omegaconf import DictConfig

from skymoments.commands._entry import hydra_task

# Exit status of an expected refusal (unknown run, other geometry, a training override).
EXIT_REFUSED = 2


def print_summary(result, tracking_uri: str, experiment_id=None) -> None:
    """The key metrics of the training run and of this evaluation, side by side."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from skymoments.metric_contract import SUMMARY_KEYS
    from skymoments.tracking import view_hint

    def fmt(d: dict, k: str) -> str:
        return f"{d[k]:.4g}" if k in d else "-"

    console = Console()
    title = "evaluate: " + (" ".join(result.overrides) or "the training scenario")
    table = Table(title=title, title_justify="left")
    table.add_column("metric")
    table.add_column("training run", justify="right")
    table.add_column("this evaluation", justify="right")
    for k in SUMMARY_KEYS:
        if k in result.metrics or k in result.parent_metrics:
            table.add_row(k, fmt(result.parent_metrics, k), fmt(result.metrics, k))
    console.print(table)
    console.print(Text.assemble("run id: ", (result.run_id, "bold")))
    console.print(Text.assemble("child of: ", (result.parent_run_id, "bold")))
    hint = view_hint(tracking_uri, experiment_id, result.run_id)
    console.print(Text.assemble("to see it: ", (hint, "bold")), soft_wrap=True)


@hydra_task
def _main(cfg: DictConfig) -> None:
    from hydra.core.hydra_config import HydraConfig

    from skymoments.study.reevaluate import evaluate_run, scenario_overrides
    from skymoments.tracking import TrackingUnavailableError, run_job_safely, settings_from

    def job(cfg: DictConfig) -> None:
        overrides = scenario_overrides(HydraConfig.get().overrides.task)
        result = evaluate_run(cfg, overrides)
        print_summary(result, settings_from(cfg.tracking).tracking_uri)

    try:
        run_job_safely(job, cfg)
    except (ValueError, TrackingUnavailableError) as exc:
        # Expected refusals: the message names the problem and the fix; no traceback.
        print(f"skymoments evaluate: {exc}", file=sys.stderr)
        sys.exit(EXIT_REFUSED)


def main() -> None:
    """Entry point: rewrite ``run_id=`` and scenario overrides (``rewrite_argv``), run."""
    from skymoments.study.reevaluate import rewrite_argv

    sys.argv = [sys.argv[0], *rewrite_argv(sys.argv[1:])]
    _main()
