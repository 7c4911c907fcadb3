"""``skymoments run``: one tracked study — train both stages, evaluate calibration, log it all.

The steps are :func:`skymoments.study.training.run_study`; this module opens the run.
"""

from __future__ import annotations

from omegaconf import DictConfig

from skymoments.commands._entry import hydra_task
from skymoments.config import validate


@hydra_task
def main(cfg: DictConfig) -> float | None:
    from skymoments.metric_contract import SUMMARY_KEYS
    from skymoments.study.training import objective, run_study
    from skymoments.tracking import print_run_summary, run_job_safely, tracked_run

    def job(cfg: DictConfig) -> float:
        validate(cfg, command="run")
        with tracked_run(cfg, run_name=str(cfg.name)) as run:
            run.log_config(cfg)
            metrics = run_study(cfg, run)
            print_run_summary(run, metrics, keys=SUMMARY_KEYS)
        return objective(cfg, metrics)

    return run_job_safely(job, cfg, failed_value=float("nan"))
