"""Sweep context: which Hydra job is running, and the sweep's parent run.

The parent run of a ``-m`` sweep is created by
:class:`skymoments.tracking.hydra_callbacks.SweepTracking` before any job starts. Its id is
left where every job can find it, whichever launcher runs the job:

* a file ``<hydra.sweep.dir>/.skymoments-parent-run`` (JSON), found by jobs in the same
  process (basic launcher), in worker processes (joblib) and on other hosts sharing the sweep
  folder (submitit);
* environment variables ``SKYMOMENTS_PARENT_RUN_ID`` and ``SKYMOMENTS_SWEEP_DIR``, inherited by
  worker processes; used only when the file is missing and the sweep folder matches.
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from skymoments.atomic import write_json

__all__ = [
    "PARENT_FILE",
    "HydraJob",
    "ParentRecord",
    "current_job",
    "read_parent",
    "run_job_safely",
    "write_parent",
]

log = logging.getLogger(__name__)
T = TypeVar("T")

PARENT_FILE = ".skymoments-parent-run"
ENV_PARENT_RUN_ID = "SKYMOMENTS_PARENT_RUN_ID"
ENV_SWEEP_DIR = "SKYMOMENTS_SWEEP_DIR"
ENV_SWEEP_ID = "SKYMOMENTS_SWEEP_ID"
ENV_TRACKING_URI = "SKYMOMENTS_SWEEP_TRACKING_URI"


@dataclass(frozen=True)
class HydraJob:
    """The Hydra job this process is running.

    Attributes
    ----------
    multirun : bool
        True inside a ``-m`` sweep.
    launch_dir : pathlib.Path
        ``hydra.runtime.cwd``.
    output_dir : str or None
        ``hydra.runtime.output_dir``.
    sweep_dir : pathlib.Path or None
        ``hydra.sweep.dir`` made absolute under the launch folder (multirun only).
    job_num : int or None
        ``hydra.job.num`` (multirun only).
    overrides : tuple of str
        ``hydra.overrides.task``: the job's own overrides.
    """

    multirun: bool
    launch_dir: Path
    output_dir: str | None
    sweep_dir: Path | None
    job_num: int | None
    overrides: tuple[str, ...]


@dataclass(frozen=True)
class ParentRecord:
    """What the sweep callback leaves for its jobs."""

    run_id: str
    experiment_id: str
    tracking_uri: str
    sweep_id: str
    sweep_dir: str


def absolute_sweep_dir(sweep_dir: Any, launch_dir: Path) -> Path:
    """``hydra.sweep.dir`` as an absolute path (Hydra takes it under the launch folder)."""
    path = Path(str(sweep_dir)).expanduser()
    return Path(os.path.normpath(path if path.is_absolute() else launch_dir / path))


def current_job() -> HydraJob | None:
    """The running Hydra job, or None outside a Hydra app."""
    try:
        from hydra.core.hydra_config import HydraConfig
        from hydra.types import RunMode
    except ImportError:  # pragma: no cover - hydra is a dependency
        return None
    if not HydraConfig.initialized():
        return None
    hc = HydraConfig.get()
    launch = Path(str(hc.runtime.cwd or os.getcwd())).absolute()
    multirun = hc.mode == RunMode.MULTIRUN
    sweep_dir = absolute_sweep_dir(hc.sweep.dir, launch) if multirun else None
    num = hc.job.get("num") if multirun else None
    return HydraJob(
        multirun=multirun,
        launch_dir=launch,
        output_dir=str(hc.runtime.output_dir) if hc.runtime.get("output_dir") else None,
        sweep_dir=sweep_dir,
        job_num=int(num) if num is not None else None,
        overrides=tuple(str(o) for o in hc.overrides.task),
    )


def write_parent(record: ParentRecord) -> Path:
    """Write ``record`` to ``<sweep_dir>/.skymoments-parent-run`` atomically and export it."""
    folder = Path(record.sweep_dir)
    folder.mkdir(parents=True, exist_ok=True)
    target = write_json(folder / PARENT_FILE, record.__dict__, indent=1)
    os.environ[ENV_PARENT_RUN_ID] = record.run_id
    os.environ[ENV_SWEEP_DIR] = record.sweep_dir
    os.environ[ENV_SWEEP_ID] = record.sweep_id
    os.environ[ENV_TRACKING_URI] = record.tracking_uri
    return target


def clear_parent_env(run_id: str) -> None:
    """Remove the exported parent id, if it is still ``run_id``'s."""
    if os.environ.get(ENV_PARENT_RUN_ID) == run_id:
        for key in (ENV_PARENT_RUN_ID, ENV_SWEEP_DIR, ENV_SWEEP_ID, ENV_TRACKING_URI):
            os.environ.pop(key, None)


def read_parent(sweep_dir: Path) -> ParentRecord | None:
    """The parent record of the sweep in ``sweep_dir``: from its file, else from the env."""
    path = Path(sweep_dir) / PARENT_FILE
    if path.is_file():
        try:
            data = json.loads(path.read_text())
            return ParentRecord(**{k: str(data[k]) for k in ParentRecord.__dataclass_fields__})
        except (ValueError, KeyError, TypeError) as exc:
            log.warning("ignoring unreadable sweep parent file %s: %s", path, exc)
    env_dir = os.environ.get(ENV_SWEEP_DIR)
    run_id = os.environ.get(ENV_PARENT_RUN_ID)
    if run_id and env_dir and Path(env_dir) == Path(sweep_dir):
        return ParentRecord(
            run_id=run_id,
            experiment_id="",
            tracking_uri=os.environ.get(ENV_TRACKING_URI, ""),
            sweep_id=os.environ.get(ENV_SWEEP_ID, ""),
            sweep_dir=env_dir,
        )
    return None


def run_job_safely(
    fn: Callable[..., T], cfg: Any, *args: Any, failed_value: Any = None, **kwargs: Any
) -> T | Any:
    """Run a Hydra task body so that one failed job does not end a sweep.

    In a single run the exception propagates (the command fails, as it should). In a ``-m``
    sweep the exception is logged with its traceback and ``failed_value`` is returned, so that
    the launcher goes on with the other jobs. The job's MLflow run, opened by
    :func:`skymoments.tracking.tracked_run` inside ``fn``, has already been marked FAILED.
    ``KeyboardInterrupt`` always propagates.

    Parameters
    ----------
    fn : callable
        The task body, called as ``fn(cfg, *args, **kwargs)``.
    cfg : DictConfig
        The job's composed config.
    failed_value : object
        Returned for a failed sweep job. With the Optuna sweeper pass ``float("nan")``: Optuna
        records a NaN objective as a failed trial and carries on, whereas ``None`` (not
        float-castable) makes the sweeper raise.

    Returns
    -------
    value : object
        ``fn``'s return value, or ``failed_value`` for a failed sweep job.
    """
    job = current_job()
    if job is None or not job.multirun:
        return fn(cfg, *args, **kwargs)
    try:
        return fn(cfg, *args, **kwargs)
    except Exception:
        log.exception(
            "sweep job #%s (%s) failed; its run is marked FAILED and the sweep goes on",
            job.job_num,
            " ".join(job.overrides) or "no overrides",
        )
        return failed_value
