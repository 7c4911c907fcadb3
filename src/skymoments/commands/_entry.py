"""Turn a ``task(cfg)`` into a Hydra main that reads the packaged ``conf/``."""

from __future__ import annotations

import functools
import logging
import os
import sys
import warnings
from collections.abc import Callable

import hydra
from omegaconf import DictConfig

from skymoments.config import conf_dir
from skymoments.config.composition import one_line_composition_errors
from skymoments.heap import keep_freed_memory
from skymoments.tracking.liveness import RunStopped

# Third-party chatter that buries our own output: Lightning's start-up banners and tips,
# MLflow's note on pickled models (shown only when an old pickled model is loaded on purpose).
QUIET_LOGGERS = {
    "lightning.pytorch.utilities.rank_zero": logging.WARNING,
    "lightning.fabric.utilities.rank_zero": logging.WARNING,
    "lightning.pytorch.accelerators.cuda": logging.WARNING,
    # "Received SIGTERM": our own one line says what happened to the run.
    "lightning.pytorch.trainer.connectors.signal_connector": logging.WARNING,
    "mlflow.pytorch": logging.ERROR,
    "alembic": logging.WARNING,
}
# Warnings raised inside third-party code that a user cannot act on.
QUIET_WARNINGS = (
    r".*isinstance\(treespec, LeafSpec\)` is deprecated.*",
    r".*does not have many workers which may be a bottleneck.*",
    r".*is smaller than the logging interval.*",
)


def quiet_third_party() -> None:
    """Lower the log level of noisy third-party loggers; called at the start of each task."""
    for name, level in QUIET_LOGGERS.items():
        logging.getLogger(name).setLevel(level)
    for pattern in QUIET_WARNINGS:
        warnings.filterwarnings("ignore", message=pattern)


def _expected_errors() -> tuple[type[BaseException], ...]:
    from skymoments.config import ConfigError
    from skymoments.tracking.store import TrackingUnavailableError

    return (ConfigError, TrackingUnavailableError)


EXPECTED_ERRORS = _expected_errors()


def hydra_task(fn: Callable[[DictConfig], object]) -> Callable[[], object]:
    """Decorate ``fn(cfg)`` so that calling it parses ``sys.argv`` as Hydra overrides.

    The config is the command's own primary config, ``conf/<command>.yaml`` for the task
    of ``skymoments.commands.<command>`` (found by :func:`conf_dir`), so a run holds only
    the nodes its command reads and the installed tool runs from any folder. Working
    directories are not changed (``hydra.job.chdir`` is false): relative paths mean the
    folder the user ran in.
    """

    started = [False]

    @functools.wraps(fn)
    def task(cfg: DictConfig) -> object:
        started[0] = True
        quiet_third_party()
        keep_freed_memory()  # in every task's process, launcher workers included
        try:
            return fn(cfg)
        except EXPECTED_ERRORS as err:
            # Bad input and an unreachable server are the user's to fix: say what and how in
            # one line, without a traceback (HYDRA_FULL_ERROR=1 shows it).
            if os.environ.get("HYDRA_FULL_ERROR") == "1":
                raise
            print(f"skymoments: {err}", file=sys.stderr)
            sys.exit(2)
        except RunStopped as stop:
            # SIGTERM or Ctrl-C: the run is already marked KILLED; say so in one line and
            # exit 128 + the signal number, as a shell reports a process a signal ended.
            print(f"skymoments: {stop}", file=sys.stderr)
            sys.exit(stop.exit_code)
        except KeyboardInterrupt:
            print("skymoments: interrupted", file=sys.stderr)
            sys.exit(130)

    config_name = fn.__module__.rsplit(".", 1)[-1]

    @functools.wraps(fn)
    def main() -> object:
        started[0] = False
        with one_line_composition_errors(started):
            return hydra.main(
                config_path=str(conf_dir()), config_name=config_name, version_base="1.3"
            )(task)()

    main.task = fn  # the undecorated task, for tests that compose configs themselves
    return main
