"""One MLflow run per job: :func:`tracked_run` and the :class:`TrackedRun` handle.

Every call goes through an ``MlflowClient`` bound to the run's own tracking URI, never through
MLflow's process-wide "active run" or global URI, so that several runs in one process (a sweep
under the basic launcher, a test session) cannot leak into each other. The two MLflow calls
that only read the global URI (logging, registering and downloading a model) are wrapped in
:func:`skymoments.tracking.store.mlflow_uris`, which puts the global state back afterwards.
"""

from __future__ import annotations

import contextlib
import logging
import os
import tempfile
import traceback
import warnings
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from mlflow.entities import Param, RunTag
from omegaconf import DictConfig, OmegaConf

from skymoments.tracking.flatten import (
    MAX_TAG_LENGTH,
    cap_value,
    clean_key,
    flatten_config,
    param_value,
)
from skymoments.tracking.liveness import (
    HEARTBEAT_PERIOD_TAG,
    HEARTBEAT_TAG,
    STOPPED_BY_TAG,
    Heartbeat,
    RunStopped,
    heartbeat_period_s,
    now_ms,
    stop_signals,
)
from skymoments.tracking.metrics import write_metrics
from skymoments.tracking.settings import TrackingSettings, launch_dir, settings_from
from skymoments.tracking.store import (
    TrackingUnavailableError,
    client_for,
    ensure_experiment,
    is_connection_error,
    mlflow_uris,
    probe_server,
    require_writable,
    with_retries,
)
from skymoments.tracking.sweep import HydraJob, current_job, read_parent

__all__ = ["TrackedRun", "attach_run", "global_rank", "tracked_run", "write_metrics"]

log = logging.getLogger(__name__)

ENV_RUN_ID = "SKYMOMENTS_RUN_ID"
TAG_PREFIX = "skymoments."
# MLflow's batch limit (mlflow.utils.validation): 100 params or tags per call.
_PARAMS_PER_BATCH = 100


def global_rank() -> int:
    """This process's distributed rank from the launcher's environment (0 when not distributed).

    Checked in Lightning's order (``RANK``, ``LOCAL_RANK``, ``SLURM_PROCID``,
    ``JSM_NAMESPACE_RANK``); a ``LOCAL_RANK`` of 0 on a node with ``NODE_RANK`` above 0 is not
    rank zero either.
    """
    env = os.environ
    if env.get("RANK") is not None:
        return int(env["RANK"])
    if env.get("LOCAL_RANK") is not None:
        local = int(env["LOCAL_RANK"])
        node = int(env.get("NODE_RANK") or 0)
        return local if node == 0 else max(1, local + node)
    for key in ("SLURM_PROCID", "JSM_NAMESPACE_RANK"):
        if env.get(key) is not None:
            return int(env[key])
    return 0


class TrackedRun:
    """Handle on one MLflow run: log params, metrics, figures, artifacts and models into it.

    Made by :func:`tracked_run` (which owns the run's lifecycle) or :func:`attach_run` (an
    existing run, lifecycle untouched). On a distributed rank other than zero the handle is
    *passive*: every ``log_*`` call does nothing, so the same code runs on all ranks.

    Attributes
    ----------
    run_id, experiment_id : str
    tracking_uri : str
        Absolute tracking URI of the store holding the run.
    settings : TrackingSettings
    parent_run_id : str or None
        The sweep's parent run, for a sweep job.
    """

    def __init__(
        self,
        settings: TrackingSettings,
        run_id: str | None,
        experiment_id: str | None,
        *,
        parent_run_id: str | None = None,
        passive: bool = False,
    ) -> None:
        self.settings = settings
        self.run_id = run_id
        self.experiment_id = experiment_id
        self.parent_run_id = parent_run_id
        self.passive = passive

    # ------------------------------------------------------------------ properties
    @property
    def tracking_uri(self) -> str:
        """Absolute URI of the store."""
        return self.settings.tracking_uri

    @property
    def experiment_name(self) -> str | None:
        """Name of the run's experiment."""
        return self.settings.experiment

    @property
    def register_as(self) -> str | None:
        """``tracking.register_as``: pass it to :meth:`log_model` as ``registered_name``."""
        return self.settings.register_as

    @property
    def artifact_uri(self) -> str | None:
        """Where the run's artifacts live."""
        if self.passive or self.run_id is None:
            return None
        client = self._client()
        return with_retries(
            self.settings, "read the run", lambda: client.get_run(self.run_id).info.artifact_uri
        )

    def __repr__(self) -> str:
        return f"TrackedRun(run_id={self.run_id!r}, tracking_uri={self.tracking_uri!r})"

    def _client(self):
        return client_for(self.settings)

    def _retry(self, what: str, fn):
        return with_retries(self.settings, what, fn)

    # ------------------------------------------------------------------ params and tags
    def log_config(self, cfg: Any) -> dict[str, str]:
        """Log the flattened resolved config as params and the resolved YAML as an artifact.

        Parameters
        ----------
        cfg : DictConfig or Mapping
            The composed config. A top-level ``hydra`` node is left out.

        Returns
        -------
        params : dict of str to str
            The params written (dotted keys, values capped at MLflow's length limit).
        """
        flat = flatten_config(cfg)
        if self.passive:
            return flat
        self.log_params(flat)
        if isinstance(cfg, DictConfig):
            node = cfg
            if "hydra" in cfg:
                node = OmegaConf.masked_copy(cfg, [k for k in cfg.keys() if k != "hydra"])
            text = OmegaConf.to_yaml(node, resolve=True)
        else:
            plain = {k: v for k, v in dict(cfg).items() if k != "hydra"}
            text = OmegaConf.to_yaml(OmegaConf.create(plain), resolve=True)
        self.log_text(text, "config/resolved.yaml")
        return flat

    def log_params(self, params: Mapping[str, Any]) -> None:
        """Log flat params (values turned into strings and capped), 100 per store call."""
        if self.passive:
            return
        entries = [
            Param(clean_key(key), cap_value(param_value(value))) for key, value in params.items()
        ]
        client = self._client()
        for start in range(0, len(entries), _PARAMS_PER_BATCH):
            chunk = entries[start : start + _PARAMS_PER_BATCH]
            self._retry("log params", lambda c=chunk: client.log_batch(self.run_id, params=c))

    def set_tags(self, tags: Mapping[str, Any]) -> None:
        """Set tags (values turned into strings and capped at MLflow's tag length)."""
        if self.passive or not tags:
            return
        entries = [
            RunTag(clean_key(key), cap_value(param_value(value), MAX_TAG_LENGTH))
            for key, value in tags.items()
        ]
        client = self._client()
        for start in range(0, len(entries), _PARAMS_PER_BATCH):
            chunk = entries[start : start + _PARAMS_PER_BATCH]
            self._retry("set tags", lambda c=chunk: client.log_batch(self.run_id, tags=c))

    # ------------------------------------------------------------------ metrics
    def log_metrics(self, metrics: Mapping[str, Any], step: int | None = None) -> dict[str, float]:
        """Log numeric metrics at ``step`` (default 0).

        NaN and infinite values are skipped, with one ``RuntimeWarning`` listing them, so a
        diverged training is visible without crashing the run. A value that is not a number
        raises ValueError.

        Returns
        -------
        logged : dict of str to float
        """
        if self.passive:
            return {}
        return write_metrics(self.settings, self.run_id, metrics, step=step, stacklevel=2)

    # ------------------------------------------------------------------ artifacts
    def log_artifact(self, local_path: str | os.PathLike, artifact_path: str | None = None) -> None:
        """Copy a file (or a whole folder) into the run's artifacts, under ``artifact_path``."""
        if self.passive:
            return
        path = Path(local_path)
        if not path.exists():
            raise ValueError(f"artifact {str(path)!r} does not exist; write the file first")
        client = self._client()
        if path.is_dir():
            self._retry(
                "log artifacts",
                lambda: client.log_artifacts(self.run_id, str(path), artifact_path),
            )
        else:
            self._retry(
                "log an artifact",
                lambda: client.log_artifact(self.run_id, str(path), artifact_path),
            )

    def log_dict(self, data: Any, artifact_file: str) -> None:
        """Store ``data`` as a JSON (``.json``) or YAML (``.yaml``/``.yml``) artifact."""
        if self.passive:
            return
        client = self._client()
        self._retry("log a dict", lambda: client.log_dict(self.run_id, data, artifact_file))

    def log_text(self, text: str, artifact_file: str) -> None:
        """Store ``text`` as the artifact ``artifact_file``."""
        if self.passive:
            return
        client = self._client()
        self._retry("log text", lambda: client.log_text(self.run_id, text, artifact_file))

    def log_figure(self, fig: Any, artifact_file: str, *, dpi: int = 120) -> None:
        """Save a matplotlib figure as an artifact (format from the suffix), then close it.

        Parameters
        ----------
        fig : matplotlib.figure.Figure
        artifact_file : str
            Path inside the run's artifacts, e.g. ``"plots/z_hist.png"``.
        dpi : int
            Resolution of raster formats.
        """
        import matplotlib.pyplot as plt

        try:
            if self.passive:
                return
            if not Path(artifact_file).suffix:
                raise ValueError(
                    f"figure artifact {artifact_file!r} has no file suffix; name it like "
                    "'plots/z_hist.png'"
                )
            with tempfile.TemporaryDirectory() as tmp:
                local = Path(tmp) / Path(artifact_file).name
                fig.savefig(local, dpi=dpi, bbox_inches="tight")
                folder = str(Path(artifact_file).parent)
                self.log_artifact(local, None if folder in ("", ".") else folder)
        finally:
            plt.close(fig)

    # ------------------------------------------------------------------ models
    def log_model(
        self,
        module: Any,
        name: str = "model",
        registered_name: str | None = None,
    ) -> Any:
        """Log a model as its architecture plus its weights, optionally registering it.

        Parameters
        ----------
        module : skymoments.nets.PosteriorMoments
            Its networks built by :func:`skymoments.nets.build_network`; everything needed
            at prediction time is in its ``state_dict`` (scalers and statistics as buffers).
        name : str
            The model's name in the run; ``runs:/<run_id>/<name>`` loads it back.
        registered_name : str, optional
            Register the model as a new version of this registered model
            (``models:/<registered_name>/<version>``); pass ``run.register_as``.

        Returns
        -------
        info : mlflow.models.model.ModelInfo
            ``info.model_uri`` and, when registered, ``info.registered_model_version``.

        Notes
        -----
        Nothing is pickled: the folder holds ``architecture.json`` and ``weights.pt`` (tensors
        only), and loading builds the model from skymoments' own classes
        (:mod:`skymoments.tracking.models`). ``mlflow.pyfunc.load_model`` serves it too.
        """
        if self.passive:
            return None
        import mlflow

        from skymoments.tracking.models import log_weights_model

        info = log_weights_model(
            self.settings,
            self.run_id,
            self.experiment_id,
            module,
            name=name,
            requirements=_torch_requirements(),
        )
        if registered_name:

            def register() -> Any:
                with mlflow_uris(self.tracking_uri):
                    return mlflow.register_model(info.model_uri, registered_name)

            version = self._retry(f"register model {registered_name!r}", register)
            info.registered_model_version = int(version.version)
            self.set_tags({TAG_PREFIX + "registered_model": f"{registered_name}/{version.version}"})
        return info

    # ------------------------------------------------------------------ lightning
    def lightning_logger(self, prefix: str = "") -> Any:
        """A Lightning logger writing metrics into this run, from rank zero only.

        It never ends the run (unlike Lightning's ``MLFlowLogger``): the run's status is set by
        :func:`tracked_run` when the job ends.
        """
        from skymoments.tracking.lightning import RunLogger

        return RunLogger(self.settings, None if self.passive else self.run_id, prefix=prefix)

    # ------------------------------------------------------------------ lifecycle
    def _beat(self, stamp_ms: int) -> None:
        """Record one heartbeat (called from the heartbeat thread)."""
        client = self._client()
        self._retry(
            "record a heartbeat",
            lambda: client.set_tag(self.run_id, HEARTBEAT_TAG, str(int(stamp_ms))),
        )

    def _finish(self, status: str) -> bool:
        """Set the final status, best-effort: a store that went away gives a warning only.

        Returns True when the status was written.
        """
        if self.passive:
            return True
        try:
            if self.settings.is_http:
                probe_server(self.tracking_uri)
            client = self._client()
            self._retry(
                f"mark the run {status}", lambda: client.set_terminated(self.run_id, status)
            )
        except Exception as exc:
            message = (
                f"could not mark MLflow run {self.run_id} {status} in {self.tracking_uri} "
                f"({exc}); the store may show it as RUNNING. Runs finished before are unaffected."
            )
            warnings.warn(message, RuntimeWarning, stacklevel=3)
            log.warning(message)
            return False
        return True


def _context_tags() -> dict[str, str]:
    """User, source and git tags as MLflow's fluent API would set them."""
    try:
        from mlflow.tracking.context.registry import resolve_tags

        return {k: str(v) for k, v in resolve_tags({}).items()}
    except Exception as exc:  # context providers are a convenience, never a reason to fail
        log.debug("no MLflow context tags: %s", exc)
        return {}


def _job_tags(job: HydraJob | None) -> dict[str, str]:
    tags = {TAG_PREFIX + "launch_dir": str(job.launch_dir if job else launch_dir())}
    if job is None:
        tags[TAG_PREFIX + "run_kind"] = "single"
        return tags
    tags[TAG_PREFIX + "overrides"] = " ".join(job.overrides)
    if job.output_dir:
        tags[TAG_PREFIX + "output_dir"] = job.output_dir
    if job.multirun:
        tags[TAG_PREFIX + "run_kind"] = "sweep-job"
        tags[TAG_PREFIX + "sweep_dir"] = str(job.sweep_dir)
        if job.job_num is not None:
            tags[TAG_PREFIX + "job_num"] = str(job.job_num)
    else:
        tags[TAG_PREFIX + "run_kind"] = "single"
    return tags


def _tracking_node(cfg: Any) -> Any:
    if isinstance(cfg, (str, os.PathLike, TrackingSettings)):
        return cfg
    if isinstance(cfg, Mapping) or isinstance(cfg, DictConfig):
        if "tracking" in cfg:
            return cfg["tracking"]
        if "kind" in cfg:
            return cfg
    raise ValueError(
        "the config has no 'tracking' node; add `- tracking: local` to the defaults list of "
        "conf/base.yaml (or pass tracking=local on the command line)"
    )


@contextlib.contextmanager
def tracked_run(
    cfg: Any,
    run_name: str = "run",
    tags: Mapping[str, Any] | None = None,
    parent_run_id: str | None = None,
) -> Iterator[TrackedRun]:
    """Open one MLflow run for this job; close it FINISHED, FAILED or KILLED.

    Parameters
    ----------
    cfg : DictConfig
        The composed config; its ``tracking`` node says where the run goes (a bare tracking
        node or a :class:`TrackingSettings` also works).
    run_name : str
        Run name shown in the MLflow UI.
    tags : mapping, optional
        Extra tags.
    parent_run_id : str, optional
        Make the run a child of this existing run (tag ``mlflow.parentRunId``), e.g. a
        re-evaluation of a trained run. It takes the place of a sweep's parent run. The
        parent should be in the same experiment: the MLflow UI nests children only there.

    Yields
    ------
    run : TrackedRun

    Notes
    -----
    * Inside a ``-m`` sweep whose parent run was made by
      :class:`~skymoments.tracking.hydra_callbacks.SweepTracking`, the run is a child of it
      (tag ``mlflow.parentRunId``) and is tagged with the sweep id (``skymoments.sweep_id``),
      the job's overrides (``skymoments.overrides``) and number (``skymoments.job_num``).
    * The final status is set in a ``finally``: FINISHED when the block ends normally, KILLED
      when SIGTERM or SIGINT stopped it (:class:`~skymoments.tracking.liveness.RunStopped`,
      tagged ``skymoments.stopped_by``) or on KeyboardInterrupt, FAILED on any other
      exception (tagged ``skymoments.error``), which then propagates. If the store is gone by
      then, a warning replaces the update.
    * In the main thread SIGTERM and SIGINT raise ``RunStopped`` while the block runs (the
      handlers that were there before are put back afterwards), and a heartbeat thread sets
      the tag ``skymoments.heartbeat`` every ``SKYMOMENTS_HEARTBEAT_S`` seconds (default 30),
      so that a run whose process was SIGKILLed can be told from a live one
      (:mod:`skymoments.tracking.liveness`).
    * On a distributed rank other than zero no run is created; the handle is passive and
      carries the rank-zero run's id when rank zero exported it (``SKYMOMENTS_RUN_ID``).

    Raises
    ------
    TrackingUnavailableError
        The tracking server cannot be reached (raised before the block runs).
    ValueError
        A tracking config that does not resolve.
    """
    settings = settings_from(_tracking_node(cfg))
    if settings.experiment is None:
        raise ValueError(
            "a run needs an experiment: pass the tracking config (cfg.tracking), not a bare URI"
        )
    if global_rank() != 0:
        yield TrackedRun(settings, os.environ.get(ENV_RUN_ID), None, passive=True)
        return

    require_writable(settings)
    client = client_for(settings)
    experiment_id = ensure_experiment(client, settings, settings.experiment)
    job = current_job()
    run_tags = {**_context_tags(), **_job_tags(job)}
    parent_id = None
    if job is not None and job.multirun and job.sweep_dir is not None:
        parent = read_parent(job.sweep_dir)
        if parent is None:
            log.info("sweep job without a parent run (SweepTracking callback not configured)")
        elif parent.tracking_uri and parent.tracking_uri != settings.tracking_uri:
            log.warning(
                "sweep parent run %s lives in %s but this job tracks to %s: not nesting",
                parent.run_id,
                parent.tracking_uri,
                settings.tracking_uri,
            )
        else:
            parent_id = parent.run_id
            run_tags["mlflow.parentRunId"] = parent.run_id
            if parent.sweep_id:
                run_tags[TAG_PREFIX + "sweep_id"] = parent.sweep_id
    if parent_run_id:
        parent_id = str(parent_run_id)
        run_tags["mlflow.parentRunId"] = parent_id
    for key, value in (tags or {}).items():
        run_tags[clean_key(key)] = cap_value(param_value(value), MAX_TAG_LENGTH)

    period_s = heartbeat_period_s()
    run_tags[HEARTBEAT_TAG] = str(now_ms())
    run_tags[HEARTBEAT_PERIOD_TAG] = f"{period_s:g}"
    created = with_retries(
        settings,
        "create the run",
        lambda: client.create_run(experiment_id, run_name=run_name, tags=run_tags),
    )
    run = TrackedRun(settings, created.info.run_id, experiment_id, parent_run_id=parent_id)
    previous_env = os.environ.get(ENV_RUN_ID)
    os.environ[ENV_RUN_ID] = run.run_id
    status = "FAILED"
    stopped: RunStopped | None = None
    with stop_signals() as guard:
        heartbeat = Heartbeat(run._beat, period_s).start()
        try:
            yield run
            status = "FINISHED"
        except RunStopped as exc:
            status, stopped = "KILLED", exc
            _note_stop(run, exc.signal_name)
            raise
        except KeyboardInterrupt:
            status = "KILLED"
            _note_stop(run, "SIGINT")
            raise
        except SystemExit as exc:
            if type(exc).__name__ == "SIGTERMException":
                # Lightning's own SIGTERM exit (a SystemExit with code None), seen where our
                # handler could not be installed (outside the main thread).
                status = "KILLED"
                _note_stop(run, "SIGTERM")
            else:
                status = "FINISHED" if exc.code in (None, 0) else "FAILED"
            raise
        except BaseException as exc:
            _note_failure(run, exc)
            raise
        finally:
            if guard is not None:
                guard.closing = True
            heartbeat.stop()
            if previous_env is None:
                os.environ.pop(ENV_RUN_ID, None)
            else:
                os.environ[ENV_RUN_ID] = previous_env
            marked = run._finish(status)
            if stopped is not None:
                stopped.run_id, stopped.tracking_uri = run.run_id, run.tracking_uri
                stopped.marked = marked


def _note_stop(run: TrackedRun, signal_name: str) -> None:
    """Tag the run with the signal that stopped it (best-effort)."""
    try:
        run.set_tags({STOPPED_BY_TAG: signal_name})
    except Exception as exc:  # the status update matters more than the tag
        log.warning("could not tag run %s as stopped: %s", run.run_id, exc)


def _note_failure(run: TrackedRun, exc: BaseException) -> None:
    """Tag the run with the error, unless the store itself is what failed."""
    if isinstance(exc, TrackingUnavailableError) or (
        run.settings.is_http and is_connection_error(exc)
    ):
        return
    try:
        summary = "".join(traceback.format_exception_only(type(exc), exc)).strip()
        run.set_tags({TAG_PREFIX + "error": summary})
    except Exception as tag_exc:  # the status update matters more than the tag
        log.warning("could not tag run %s with its error: %s", run.run_id, tag_exc)


def attach_run(tracking: Any, run_id: str) -> TrackedRun:
    """A handle on an existing run (to add artifacts, e.g. a report on a sweep's parent).

    The run's status is left as it is.

    Parameters
    ----------
    tracking : DictConfig, Mapping or str
        The tracking config or a tracking URI.
    run_id : str
    """
    settings = settings_from(tracking)
    require_writable(settings, "add to a run")
    client = client_for(settings)
    info = with_retries(settings, "read the run", lambda: client.get_run(run_id).info)
    return TrackedRun(settings, run_id, info.experiment_id)


def _torch_requirements() -> list[str]:
    import torch

    # A local version label (+cpu, +cu121) is not installable from PyPI: drop it.
    return [f"torch=={torch.__version__.split('+')[0]}", "skymoments"]
