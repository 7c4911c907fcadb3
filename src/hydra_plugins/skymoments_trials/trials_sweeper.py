"""The ``trials`` sweeper: an Optuna study whose trials are Hydra jobs.

Config (``hydra/sweeper=trials``; every key can be overridden, ``hydra.sweeper.n_trials=20``)::

    hydra:
      sweeper:
        params:                      # the search space (skymoments.sweeps.space)
          train.optimizer.lr: {type: float, low: 1.0e-4, high: 1.0e-2, log: true}
          model: choice(unet, dilated_resnet)
        n_trials: 20                 # trials of this sweep
        n_jobs: 2                    # trials launched together (through hydra/launcher)
        direction: minimize          # or maximize
        sampler: tpe                 # or random, or {_target_: optuna.samplers...}
        seed: 0                      # sampler seed: the same trials on a rerun
        storage: null                # sqlite:///search.db to keep (and resume) the study
        study_name: null

Each job's return value is its trial's objective. A job that fails, or returns None or NaN
(``run_job_safely(..., failed_value=float("nan"))``), is recorded as a failed trial and the
search goes on. At the end ``<sweep dir>/search_results.json`` holds the best params and
every trial; when the sweep has a tracked parent run (``SweepTracking``), it is tagged with
the best params and gets that file as an artifact.
"""

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from hydra.core.config_store import ConfigStore
from hydra.plugins.sweeper import Sweeper
from hydra.types import HydraContext, TaskFunction
from omegaconf import DictConfig, OmegaConf

log = logging.getLogger(__name__)


@dataclass
class TrialsSweeperConf:
    """Structured config of the ``trials`` sweeper (see the module docstring)."""

    _target_: str = "hydra_plugins.skymoments_trials.trials_sweeper.TrialsSweeper"
    params: dict[str, Any] | None = None
    n_trials: int = 10
    n_jobs: int = 1
    direction: str = "minimize"
    sampler: Any = "tpe"
    seed: int | None = 0
    storage: str | None = None
    study_name: str | None = None


ConfigStore.instance().store(
    group="hydra/sweeper", name="trials", node=TrialsSweeperConf, provider="skymoments"
)


def _absolute_storage(storage: str | None, launch_dir: Path) -> str | None:
    """A relative ``sqlite:///file.db`` is taken under the launch folder, like the run store."""
    if not storage:
        return None
    prefix = "sqlite:///"
    if storage.startswith(prefix) and not storage[len(prefix) :].startswith("/"):
        return prefix + str((launch_dir / storage[len(prefix) :]).absolute())
    return storage


class TrialsSweeper(Sweeper):
    """Hydra sweeper running an Optuna study; see the module docstring."""

    def __init__(
        self,
        params: Any = None,
        n_trials: int = 10,
        n_jobs: int = 1,
        direction: str = "minimize",
        sampler: Any = "tpe",
        seed: int | None = 0,
        storage: str | None = None,
        study_name: str | None = None,
    ) -> None:
        def plain(node: Any) -> Any:
            return OmegaConf.to_container(node, resolve=True) if OmegaConf.is_config(node) else node

        self.params = plain(params) or {}
        self.n_trials = n_trials
        self.n_jobs = n_jobs
        self.direction = direction
        self.sampler = plain(sampler)
        self.seed = seed
        self.storage = storage
        self.study_name = study_name
        self.config: DictConfig | None = None
        self.hydra_context: HydraContext | None = None
        self.launcher = None

    def setup(
        self, *, hydra_context: HydraContext, task_function: TaskFunction, config: DictConfig
    ) -> None:
        from hydra.core.plugins import Plugins

        self.config = config
        self.hydra_context = hydra_context
        self.launcher = Plugins.instance().instantiate_launcher(
            hydra_context=hydra_context, task_function=task_function, config=config
        )

    def sweep(self, arguments: list[str]) -> dict | None:
        """Run the search; return the best trial's params (None if every trial failed)."""
        from skymoments.sweeps.space import parse_search_space
        from skymoments.sweeps.study import make_study, run_search, write_results
        from skymoments.tracking.sweep import absolute_sweep_dir

        assert self.config is not None and self.launcher is not None
        launch_dir = Path(str(OmegaConf.select(self.config, "hydra.runtime.cwd") or ".")).absolute()
        sweep_dir = absolute_sweep_dir(self.config.hydra.sweep.dir, launch_dir)
        space = parse_search_space(self.params, arguments)
        storage = _absolute_storage(self.storage, launch_dir)
        study = make_study(self.direction, self.sampler, self.seed, storage, self.study_name)
        log.info(
            "trials sweeper: %d trials, %d at a time, %s; searching %s",
            self.n_trials,
            self.n_jobs,
            study.direction.name.lower(),
            ", ".join(f"{k}: {d}" for k, d in space.distributions.items()),
        )

        def launch(batch, first_job):
            self.validate_batch_is_legal(batch)
            return self.launcher.launch(batch, initial_job_idx=first_job)

        result = run_search(study, space, launch, int(self.n_trials), int(self.n_jobs))
        objective = OmegaConf.select(self.config, "objective", default=None)
        path = write_results(
            result, sweep_dir, objective=objective, study_name=study.study_name, storage=storage
        )
        if result.best_params is None:
            log.warning(
                "trials sweeper: no trial completed (%d failed); see %s", result.n_failed, path
            )
        else:
            log.info(
                "trials sweeper: best %s = %.6g at job %s with %s (%d complete, %d failed)",
                objective or "objective",
                result.best_value,
                result.best_job,
                result.best_params,
                result.n_complete,
                result.n_failed,
            )
        _report_to_parent(sweep_dir, result, path, objective)
        return result.best_params


def _report_to_parent(sweep_dir: Path, result, path: Path, objective: str | None) -> None:
    """Tag the sweep's parent run with the best trial and attach the results file."""
    try:
        from skymoments.tracking import attach_run
        from skymoments.tracking.sweep import read_parent

        parent = read_parent(sweep_dir)
        if parent is None or not parent.tracking_uri:
            return
        run = attach_run(parent.tracking_uri, parent.run_id)
        tags = {
            "skymoments.search_objective": str(objective or ""),
            "skymoments.search_direction": result.direction,
            "skymoments.search_n_complete": str(result.n_complete),
            "skymoments.search_n_failed": str(result.n_failed),
        }
        if result.best_params is not None:
            tags["skymoments.search_best_job"] = str(result.best_job)
            tags["skymoments.search_best_params"] = " ".join(
                f"{k}={v}" for k, v in result.best_params.items()
            )
            run.log_metrics({"search/best_value": result.best_value})
        run.set_tags(tags)
        run.log_artifact(path, artifact_path="search")
    except Exception as exc:  # the search's result is on disk whatever the store does
        log.warning("could not report the search to the sweep's parent run: %s", exc)
