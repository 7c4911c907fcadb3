"""A Lightning logger that writes into an already open tracked run.

Lightning's own ``MLFlowLogger`` ends the run it logs to when ``trainer.fit`` returns
(``finalize`` sets it FINISHED), which would close our run between the mean and the variance
stage and mark it FINISHED even if a later stage fails. This logger only writes metrics:
the run's lifecycle stays with :func:`skymoments.tracking.tracked_run`.
"""

from __future__ import annotations

from argparse import Namespace
from typing import Any

from lightning.pytorch.loggers import Logger
from lightning.pytorch.utilities import rank_zero_only

from skymoments.tracking.settings import TrackingSettings

__all__ = ["RunLogger"]


class RunLogger(Logger):
    """Log Lightning metrics into the MLflow run ``run_id``, from rank zero only.

    Parameters
    ----------
    settings : TrackingSettings
        The store that holds the run.
    run_id : str or None
        The run to write into; None makes a logger that drops everything (used on ranks other
        than zero, which do not own a run).
    prefix : str
        Prepended to every metric name (``"stage1/"``); empty by default, since the modules
        already log the contract names (``train/loss_mean``).

    Notes
    -----
    ``log_hyperparams`` records nothing: the run's params are the flattened resolved config
    (:meth:`TrackedRun.log_config`), and MLflow params cannot be rewritten, so a second,
    different source of params would collide. Modules should call
    ``save_hyperparameters(logger=False)``.
    Non-finite values are skipped with a warning, as in :meth:`TrackedRun.log_metrics`.
    """

    def __init__(self, settings: TrackingSettings, run_id: str | None, prefix: str = "") -> None:
        super().__init__()
        self._settings = settings
        self._run_id = run_id
        self._prefix = prefix

    @property
    def name(self) -> str:
        """Logger name (Lightning uses it for checkpoint folders)."""
        return "mlflow"

    @property
    def version(self) -> str:
        """The run id."""
        return self._run_id or "no-run"

    @property
    def run_id(self) -> str | None:
        """The MLflow run this logger writes into."""
        return self._run_id

    @property
    def save_dir(self) -> None:
        """None: checkpoints go under the Trainer's ``default_root_dir``, not a store folder."""
        return None

    @property
    def experiment(self) -> Any:
        """An MlflowClient bound to the run's store (rank zero); Lightning's escape hatch."""
        from skymoments.tracking.store import client_for

        return client_for(self._settings)

    @rank_zero_only
    def log_metrics(self, metrics: dict[str, Any], step: int | None = None) -> None:
        """Write ``metrics`` at ``step`` into the run (skips NaN/inf with a warning)."""
        if self._run_id is None:
            return
        from skymoments.tracking.metrics import write_metrics

        named = {f"{self._prefix}{key}": value for key, value in metrics.items()}
        write_metrics(self._settings, self._run_id, named, step=step, stacklevel=3)

    @rank_zero_only
    def log_hyperparams(
        self, params: dict[str, Any] | Namespace, *args: Any, **kwargs: Any
    ) -> None:
        """Record nothing (see the class notes)."""

    def finalize(self, status: str) -> None:
        """Leave the run open: :func:`tracked_run` sets its final status."""

    def __getstate__(self) -> dict[str, Any]:
        # Picklable for spawned DDP workers: only plain settings and ids travel.
        return {"_settings": self._settings, "_run_id": self._run_id, "_prefix": self._prefix}

    def __setstate__(self, state: dict[str, Any]) -> None:
        Logger.__init__(self)
        self.__dict__.update(state)
