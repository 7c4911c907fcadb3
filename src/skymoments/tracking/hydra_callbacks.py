"""Hydra callback that gives a ``-m`` sweep one MLflow parent run.

Add to the primary config::

    hydra:
      callbacks:
        sweep_tracking:
          _target_: skymoments.tracking.hydra_callbacks.SweepTracking

``on_multirun_start`` creates the parent run in the store of ``cfg.tracking`` and leaves its id
for the jobs (see :mod:`skymoments.tracking.sweep`); each job's
:func:`~skymoments.tracking.tracked_run` then opens a child run. ``on_multirun_end`` tags the
parent with its children's count and failures and marks it FINISHED. If the sweep itself
dies (an exception escapes the launcher), an ``atexit`` hook marks the parent FAILED, or
KILLED when SIGTERM or SIGINT stopped a job (tag ``skymoments.stopped_by``), so it is never
left RUNNING. While the sweep runs, the parent keeps a heartbeat like every run
(:mod:`skymoments.tracking.liveness`), so a sweep whose process was SIGKILLed shows as LOST
and ``skymoments settle`` can mark it.
"""

from __future__ import annotations

import atexit
import logging
import uuid
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, OmegaConf

from skymoments.tracking.flatten import MAX_TAG_LENGTH, cap_value
from skymoments.tracking.liveness import (
    HEARTBEAT_PERIOD_TAG,
    HEARTBEAT_TAG,
    STOPPED_BY_TAG,
    Heartbeat,
    heartbeat_period_s,
    now_ms,
    stop_received,
)
from skymoments.tracking.settings import settings_from
from skymoments.tracking.store import client_for, ensure_experiment, with_retries
from skymoments.tracking.sweep import (
    ParentRecord,
    absolute_sweep_dir,
    clear_parent_env,
    read_parent,
    write_parent,
)

try:
    from hydra.experimental.callback import Callback
except ImportError:  # pragma: no cover - hydra is a dependency
    Callback = object  # type: ignore[misc,assignment]

__all__ = ["SweepTracking"]

log = logging.getLogger(__name__)
TAG = "skymoments."


def _launch_dir(config: DictConfig) -> Path:
    cwd = OmegaConf.select(config, "hydra.runtime.cwd")
    return Path(str(cwd)).absolute() if cwd else Path.cwd()


class SweepTracking(Callback):
    """Create the parent run of a sweep and end it when the sweep ends."""

    def __init__(self) -> None:
        self._record: ParentRecord | None = None
        self._settings = None
        self._atexit = None
        self._heartbeat: Heartbeat | None = None

    def __getstate__(self) -> dict[str, Any]:
        # Launchers that run jobs in other processes (joblib) pickle the callbacks with the
        # job's context; the heartbeat thread stays in the sweep's own process.
        return {**self.__dict__, "_heartbeat": None}

    def on_multirun_start(self, config: DictConfig, **kwargs: Any) -> None:
        """Create the parent run; write its id to ``<sweep dir>/.skymoments-parent-run``."""
        if "tracking" not in config:
            log.warning("SweepTracking: the config has no 'tracking' node; no parent run")
            return
        launch = _launch_dir(config)
        settings = settings_from(config.tracking, base_dir=launch)
        sweep_dir = absolute_sweep_dir(config.hydra.sweep.dir, launch)
        sweep_dir.mkdir(parents=True, exist_ok=True)
        try:
            relative = sweep_dir.relative_to(launch)
        except ValueError:
            relative = sweep_dir
        sweep_id = uuid.uuid4().hex[:12]
        overrides = [str(o) for o in OmegaConf.select(config, "hydra.overrides.task") or []]
        tags = {
            TAG + "run_kind": "sweep",
            TAG + "sweep_id": sweep_id,
            TAG + "sweep_dir": str(sweep_dir),
            TAG + "launch_dir": str(launch),
            TAG + "sweep_overrides": cap_value(" ".join(overrides), MAX_TAG_LENGTH),
            TAG + "sweeper": str(OmegaConf.select(config, "hydra.sweeper._target_") or ""),
            TAG + "launcher": str(OmegaConf.select(config, "hydra.launcher._target_") or ""),
        }
        period_s = heartbeat_period_s()
        tags[HEARTBEAT_TAG] = str(now_ms())
        tags[HEARTBEAT_PERIOD_TAG] = f"{period_s:g}"
        client = client_for(settings)
        experiment_id = ensure_experiment(client, settings, settings.experiment)
        run = with_retries(
            settings,
            "create the sweep's parent run",
            lambda: client.create_run(experiment_id, run_name=f"sweep {relative}", tags=tags),
        )
        record = ParentRecord(
            run_id=run.info.run_id,
            experiment_id=experiment_id,
            tracking_uri=settings.tracking_uri,
            sweep_id=sweep_id,
            sweep_dir=str(sweep_dir),
        )
        write_parent(record)
        self._record, self._settings = record, settings
        self._atexit = self._abandoned
        atexit.register(self._atexit)

        def beat(stamp_ms: int) -> None:
            with_retries(
                settings,
                "record the sweep's heartbeat",
                lambda: client.set_tag(record.run_id, HEARTBEAT_TAG, str(int(stamp_ms))),
            )

        self._heartbeat = Heartbeat(beat, period_s).start()
        log.info(
            "sweep %s: parent MLflow run %s in %s", sweep_id, record.run_id, settings.tracking_uri
        )

    def on_multirun_end(self, config: DictConfig, **kwargs: Any) -> None:
        """Tag the children's count and failures; mark the parent FINISHED."""
        record, settings = self._record, self._settings
        if record is None and "tracking" in config:
            # A fresh callback instance (should not happen in Hydra 1.3): read the file.
            launch = _launch_dir(config)
            record = read_parent(absolute_sweep_dir(config.hydra.sweep.dir, launch))
            settings = settings_from(config.tracking, base_dir=launch)
        if record is None or settings is None:
            return
        self._stop_heartbeat()
        client = client_for(settings)
        experiment_id = record.experiment_id or with_retries(
            settings,
            "read the parent run",
            lambda: client.get_run(record.run_id).info.experiment_id,
        )
        children = with_retries(
            settings,
            "count the sweep's runs",
            lambda: client.search_runs(
                [experiment_id],
                filter_string=f"tags.mlflow.parentRunId = '{record.run_id}'",
                max_results=50000,
            ),
        )
        statuses = [c.info.status for c in children]
        counts = {
            TAG + "n_children": len(statuses),
            TAG + "n_failed_children": sum(s == "FAILED" for s in statuses),
            TAG + "n_finished_children": sum(s == "FINISHED" for s in statuses),
        }
        with_retries(
            settings,
            "tag the sweep's parent run",
            lambda: [client.set_tag(record.run_id, k, str(v)) for k, v in counts.items()],
        )
        with_retries(
            settings,
            "end the sweep's parent run",
            lambda: client.set_terminated(record.run_id, "FINISHED"),
        )
        self._release()
        log.info("sweep %s ended: %s", record.sweep_id, counts)

    def _stop_heartbeat(self) -> None:
        if self._heartbeat is not None:
            self._heartbeat.stop()
            self._heartbeat = None

    def _release(self) -> None:
        self._stop_heartbeat()
        if self._atexit is not None:
            atexit.unregister(self._atexit)
            self._atexit = None
        if self._record is not None:
            clear_parent_env(self._record.run_id)
        self._record = None

    def _abandoned(self) -> None:
        """At interpreter exit with the sweep unfinished: mark the parent FAILED, or KILLED
        when a stop signal ended it."""
        record, settings = self._record, self._settings
        if record is None or settings is None:
            return
        self._stop_heartbeat()
        signal_name = stop_received()
        status = "FAILED" if signal_name is None else "KILLED"
        try:
            client = client_for(settings)
            if client.get_run(record.run_id).info.status == "RUNNING":
                if signal_name is None:
                    client.set_tag(
                        record.run_id, TAG + "error", "sweep ended before on_multirun_end"
                    )
                else:
                    client.set_tag(record.run_id, STOPPED_BY_TAG, signal_name)
                client.set_terminated(record.run_id, status)
        except Exception as exc:  # at exit, a message is all we can give
            log.warning("could not mark sweep parent run %s %s: %s", record.run_id, status, exc)
