"""Turn a ``task(cfg)`` into a Hydra main that reads the packaged ``conf/``."""

from __future__ import annotations

import contextlib
import functools
import logging
import os
import re
import sys
import warnings
from collections.abc import Callable

import hydra
from omegaconf import DictConfig

from skymoments.config import conf_dir
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


# Lines of Hydra's composition messages that describe Hydra itself, not what to fix.
_NOISE = re.compile(r"^(full_key:|object_type=|reference_type=|Config search path|provider=|See )")


def composition_message(err: BaseException) -> str:
    """One line saying what in the command line did not compose, and how to fix it.

    Hydra's own messages spread over several lines (the options, the search path, the
    omegaconf key and type); this keeps what names the problem and adds the fix.
    """
    from hydra.errors import MissingConfigException, OverrideParseException

    text = str(err)
    if isinstance(err, MissingConfigException) and err.options is not None:
        where = re.search(r"Could not (?:find|load) '([^']+)'", text)
        missing = where.group(1) if where else str(err.missing_cfg_file)
        group, _, name = missing.rpartition("/")
        if err.options:
            return (
                f"{group}={name}: there is no {group} config named {name!r}; choose one of "
                f"{', '.join(sorted(err.options))} (e.g. {group}={sorted(err.options)[0]})"
            )
        return f"{missing}: no such config; check the name (configs live in conf/)"
    override = re.search(r"Could not override '([^']+)'", text)
    if override:
        key = override.group(1)
        add = re.search(r"use (\+\S+)", text)
        cause = " ".join(str(err.__cause__ or "").split("\n")[:1]).strip()
        hint = f"fix its spelling, or add a new key with {add.group(1)}" if add else ""
        reason = f"the config has no key {key!r}" if "not in struct" in cause else cause
        return f"could not override {key!r}: {reason}" + (f"; {hint}" if hint else "")
    if isinstance(err, OverrideParseException):
        first = text.splitlines()[0] if text else "it does not parse"
        return (
            f"could not parse the override {err.override!r}: {first}; write each override as "
            "key=value (quote a value holding spaces or brackets), +key=value to add a key"
        )
    lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not _NOISE.match(ln.strip())]
    cause = err.__cause__
    if cause is not None:
        lines += [
            ln.strip()
            for ln in str(cause).splitlines()
            if ln.strip() and not _NOISE.match(ln.strip()) and ln.strip() not in lines
        ]
    return "; ".join(ln.rstrip(".") for ln in lines) or type(err).__name__


@contextlib.contextmanager
def _one_line_composition_errors(started: list[bool]):
    """While Hydra composes (before the task has started), turn its errors into one line on
    stderr and exit 2, the exit of every other refusal of bad input.

    Hydra reports every error through ``hydra._internal.utils.run_and_report``, which prints
    several lines and exits 1; that function is wrapped for the duration of the command.
    Errors once the task has started, and any error under ``HYDRA_FULL_ERROR=1``, are left to
    Hydra as before.
    """
    from hydra._internal import utils as hydra_utils
    from hydra.errors import HydraException
    from omegaconf.errors import OmegaConfBaseException

    original = hydra_utils.run_and_report

    def run_and_report(func):
        def guarded():
            try:
                return func()
            except (HydraException, OmegaConfBaseException, ValueError) as err:
                if started[0] or os.environ.get("HYDRA_FULL_ERROR") == "1":
                    raise
                print(f"skymoments: {composition_message(err)}", file=sys.stderr)
                sys.exit(2)

        return original(guarded)

    hydra_utils.run_and_report = run_and_report
    try:
        yield
    finally:
        hydra_utils.run_and_report = original


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
        with _one_line_composition_errors(started):
            return hydra.main(
                config_path=str(conf_dir()), config_name=config_name, version_base="1.3"
            )(task)()

    main.task = fn  # the undecorated task, for tests that compose configs themselves
    return main
