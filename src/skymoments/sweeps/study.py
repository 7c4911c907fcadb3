"""The search loop of the ``trials`` sweeper: ask Optuna for a batch, launch it, tell results.

Kept apart from the Hydra plugin class (``hydra_plugins.skymoments_trials``) so that it can be
driven with any ``launch`` function, and read without Hydra's plugin machinery.
"""

from __future__ import annotations

import logging
import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from skymoments.atomic import write_json
from skymoments.sweeps.space import SearchSpace

__all__ = [
    "RESULTS_FILE",
    "SearchResult",
    "make_sampler",
    "make_study",
    "objective_value",
    "run_search",
    "write_results",
]

log = logging.getLogger(__name__)
RESULTS_FILE = "search_results.json"
DIRECTIONS = {
    "min": "minimize",
    "minimize": "minimize",
    "max": "maximize",
    "maximize": "maximize",
}
SAMPLERS = ("tpe", "random")


@dataclass
class SearchResult:
    """What a search found.

    Attributes
    ----------
    best_params : dict or None
        The best completed trial's searched values (None when no trial completed).
    best_value : float or None
        Its objective.
    best_job : int or None
        Its Hydra job number (the sweep subfolder it ran in).
    direction : str
        ``minimize`` or ``maximize``.
    n_complete, n_failed : int
        Trials of this sweep that returned a finite objective, and those that did not.
    trials : list of dict
        One entry per trial of this sweep: ``number``, ``job``, ``params``, ``value``
        (None when failed), ``state``.
    """

    best_params: dict | None
    best_value: float | None
    best_job: int | None
    direction: str
    n_complete: int
    n_failed: int
    trials: list = field(default_factory=list)


def objective_value(job_return: Any) -> float | None:
    """The finite float a job returned, or None for a failed job.

    A job failed when Hydra recorded an exception, or it returned None, NaN, an infinity or
    something that is not a number (``run_job_safely(..., failed_value=float("nan"))`` is how
    a task reports a failed job without stopping the sweep).
    """
    from hydra.core.utils import JobStatus

    if getattr(job_return, "status", None) == JobStatus.FAILED:
        return None
    value = getattr(job_return, "_return_value", job_return)
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        log.warning("a trial returned %r, which is not a number: recorded as failed", value)
        return None
    return number if math.isfinite(number) else None


def make_sampler(sampler: Any, seed: int | None):
    """An Optuna sampler from a name (``tpe``, ``random``) or a ``_target_`` mapping.

    Parameters
    ----------
    sampler : str or mapping
        ``tpe`` (Optuna's default, Bergstra et al. 2011, "Algorithms for hyper-parameter
        optimization", NeurIPS) or ``random``; a mapping with ``_target_`` is instantiated
        by Hydra (any ``optuna.samplers`` class with its own arguments).
    seed : int or None
        Seed of the named samplers, for a reproducible sequence of trials.
    """
    import optuna

    if isinstance(sampler, str) or sampler is None:
        name = str(sampler or "tpe").lower()
        if name == "tpe":
            return optuna.samplers.TPESampler(seed=seed)
        if name == "random":
            return optuna.samplers.RandomSampler(seed=seed)
        raise ValueError(
            f"hydra.sweeper.sampler={sampler!r}; choose one of {SAMPLERS} or give a mapping "
            "with _target_ (e.g. {_target_: optuna.samplers.QMCSampler, seed: 0})"
        )
    from hydra.utils import instantiate

    return instantiate(sampler)


def make_study(
    direction: str,
    sampler: Any = "tpe",
    seed: int | None = None,
    storage: str | None = None,
    study_name: str | None = None,
):
    """A new Optuna study, or the stored one of that name (so a search can be resumed).

    Parameters
    ----------
    direction : {"min", "max", "minimize", "maximize"}
    sampler, seed : see :func:`make_sampler`
    storage : str, optional
        An Optuna storage URL (``sqlite:////abs/path/optuna.db``); None keeps the study in
        memory (the results file in the sweep folder is then its record).
    study_name : str, optional
        Needed with a storage, to find the study again.
    """
    import optuna

    if str(direction).lower() not in DIRECTIONS:
        raise ValueError(
            f"hydra.sweeper.direction={direction!r}; choose minimize (min) or maximize (max)"
        )
    if storage and not study_name:
        raise ValueError(
            "hydra.sweeper.storage is set but study_name is not: name the study "
            "(hydra.sweeper.study_name=...) so that a later sweep can resume it"
        )
    return optuna.create_study(
        storage=storage or None,
        study_name=study_name,
        direction=DIRECTIONS[str(direction).lower()],
        sampler=make_sampler(sampler, seed),
        load_if_exists=bool(storage),
    )


def run_search(
    study,
    space: SearchSpace,
    launch: Callable[[Sequence[Sequence[str]], int], Sequence[Any]],
    n_trials: int,
    n_jobs: int = 1,
    first_job: int = 0,
) -> SearchResult:
    """Run ``n_trials`` trials, ``n_jobs`` at a time; a failed trial never stops the search.

    Parameters
    ----------
    study : optuna.Study
    space : SearchSpace
    launch : callable
        ``launch(batch_overrides, first_job_number) -> job returns``: Hydra's
        ``Launcher.launch``.
    n_trials : int
        Trials this call runs (a resumed study keeps its earlier ones too).
    n_jobs : int
        Trials asked for at once and launched as one batch, which a parallel launcher
        (joblib, submitit) runs side by side. Within a batch, trials are drawn before any
        of them has reported.
    first_job : int
        Number of the first job (Hydra's ``hydra.job.num``).

    Returns
    -------
    SearchResult
        Best over the completed trials of the whole study.
    """
    from optuna.trial import TrialState

    for name, value in (("n_trials", n_trials), ("n_jobs", n_jobs)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise ValueError(f"hydra.sweeper.{name} must be a positive integer, got {value!r}")
    job = int(first_job)
    records = []
    done = 0
    while done < n_trials:
        size = min(n_jobs, n_trials - done)
        trials = [study.ask(fixed_distributions=dict(space.distributions)) for _ in range(size)]
        batch = [space.overrides(t.params) for t in trials]
        returns = launch(batch, job)
        if len(returns) != len(trials):
            raise RuntimeError(
                f"the launcher returned {len(returns)} results for {len(trials)} trials"
            )
        for trial, ret, overrides in zip(trials, returns, batch, strict=True):
            value = objective_value(ret)
            if value is None:
                study.tell(trial, state=TrialState.FAIL)
                log.warning("trial %d (job %d: %s) failed", trial.number, job, " ".join(overrides))
            else:
                study.tell(trial, value)
            records.append(
                {
                    "number": trial.number,
                    "job": job,
                    "params": dict(trial.params),
                    "overrides": list(overrides),
                    "value": value,
                    "state": "COMPLETE" if value is not None else "FAIL",
                }
            )
            job += 1
        done += size
    return _result(study, records)


def _result(study, records: list) -> SearchResult:
    from optuna.trial import TrialState

    complete = study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
    direction = study.direction.name.lower()
    n_failed = sum(r["state"] == "FAIL" for r in records)
    if not complete:
        return SearchResult(None, None, None, direction, 0, n_failed, records)
    best = study.best_trial
    best_job = next((r["job"] for r in records if r["number"] == best.number), None)
    return SearchResult(
        dict(best.params),
        float(best.value),
        best_job,
        direction,
        sum(r["state"] == "COMPLETE" for r in records),
        n_failed,
        records,
    )


def write_results(result: SearchResult, folder: str | os.PathLike, **extra: Any) -> Path:
    """Write ``<folder>/search_results.json`` atomically; return its path.

    Holds the best params, value and job, the counts, every trial of this sweep, and
    ``extra`` (the objective's name, the study name, ...).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    data = {**extra, **result.__dict__}
    return write_json(folder / RESULTS_FILE, data, indent=1, default=str)
