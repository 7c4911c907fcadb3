"""MLflow tracking for skymoments: run lifecycle, params, artifacts, models, sweeps, queries.

This package knows nothing of the science: it takes configs, numbers, figures, files and
torch modules.

Typical use inside a Hydra task::

    from skymoments.tracking import tracked_run, run_job_safely

    def task(cfg):
        with tracked_run(cfg, run_name="run") as run:
            run.log_config(cfg)
            ...
            run.log_metrics({"eval/mse_E": mse}, step=epoch)
            run.log_model(model, registered_name=run.register_as)

    @hydra.main(...)
    def main(cfg):
        return run_job_safely(task, cfg)
"""

from skymoments.tracking.flatten import cap_value, clean_key, flatten_config
from skymoments.tracking.models import load_model, model_uri, set_model_alias
from skymoments.tracking.query import (
    RunRecord,
    download_artifact,
    find_runs,
    get_run,
    metric_history,
)
from skymoments.tracking.run import TrackedRun, attach_run, global_rank, tracked_run
from skymoments.tracking.settings import (
    TrackingSettings,
    launch_dir,
    resolve_tracking,
    settings_from,
)
from skymoments.tracking.store import TrackingUnavailableError
from skymoments.tracking.summary import print_run_summary, view_hint
from skymoments.tracking.sweep import current_job, run_job_safely

__all__ = [
    "RunLogger",
    "RunRecord",
    "TrackedRun",
    "TrackingSettings",
    "TrackingUnavailableError",
    "attach_run",
    "cap_value",
    "clean_key",
    "current_job",
    "download_artifact",
    "find_runs",
    "flatten_config",
    "get_run",
    "global_rank",
    "launch_dir",
    "load_model",
    "metric_history",
    "model_uri",
    "print_run_summary",
    "resolve_tracking",
    "run_job_safely",
    "set_model_alias",
    "settings_from",
    "tracked_run",
    "view_hint",
]


def __getattr__(name: str):
    # Lightning is imported only when its logger is asked for: a Hydra callback or a query
    # should not pay for importing it.
    if name == "RunLogger":
        from skymoments.tracking.lightning import RunLogger

        return RunLogger
    raise AttributeError(f"module 'skymoments.tracking' has no attribute {name!r}")
