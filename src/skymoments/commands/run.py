"""``skymoments run``: one tracked study — train both stages, evaluate calibration, log it all.

The steps are :func:`skymoments.study.training.run_study`; this module opens the run.
``train.resume=<run_id>`` continues a stopped run of the same config from its checkpoints
as a new run tagged ``skymoments.resumed_from`` (:mod:`skymoments.tracking.resume`).
"""

from __future__ import annotations

from omegaconf import DictConfig

from skymoments.commands._entry import hydra_task
from skymoments.config import ConfigError, validate


def _resume_point(cfg: DictConfig):
    """The stopped run ``train.resume`` names, checked; None without the key."""
    run_id = cfg.train.get("resume") if "train" in cfg else None
    if run_id is None or str(run_id) == "":
        return None
    from skymoments.moments.resume import check_resumable
    from skymoments.tracking.resume import resume_point

    try:
        point = resume_point(cfg, str(run_id))
        check_resumable(point.job_dir / "checkpoints", f"run {point.run_id}")
    except ValueError as err:
        raise ConfigError(str(err)) from None
    return point


@hydra_task
def main(cfg: DictConfig) -> float | None:
    from skymoments.metric_contract import SUMMARY_KEYS
    from skymoments.study.training import objective, run_study
    from skymoments.tracking import print_run_summary, run_job_safely, tracked_run
    from skymoments.tracking.resume import RESUMED_FROM_TAG, link_runs

    def job(cfg: DictConfig) -> float:
        validate(cfg, command="run")
        point = _resume_point(cfg)
        tags = {RESUMED_FROM_TAG: point.run_id} if point else None
        with tracked_run(cfg, run_name=str(cfg.name), tags=tags) as run:
            if point is not None:
                if not run.passive:
                    link_runs(cfg, point.run_id, run.run_id)
                print(f"resuming run {point.run_id} ({point.status}) from {point.job_dir}")
            run.log_config(cfg)
            metrics = run_study(cfg, run, resume_from=point.job_dir if point else None)
            print_run_summary(run, metrics, keys=SUMMARY_KEYS)
        return objective(cfg, metrics)

    return run_job_safely(job, cfg, failed_value=float("nan"))
