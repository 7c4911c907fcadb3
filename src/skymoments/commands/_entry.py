"""Turn a ``task(cfg)`` into a Hydra main that reads the packaged ``conf/``."""

from __future__ import annotations

import functools
from collections.abc import Callable

import hydra
from omegaconf import DictConfig

from skymoments.config import conf_dir


def hydra_task(fn: Callable[[DictConfig], object]) -> Callable[[], object]:
    """Decorate ``fn(cfg)`` so that calling it parses ``sys.argv`` as Hydra overrides.

    The config is composed from ``conf/config.yaml`` (found by :func:`conf_dir`), so the
    installed tool runs from any folder. Working directories are not changed
    (``hydra.job.chdir`` is false): relative paths mean the folder the user ran in.
    """

    @functools.wraps(fn)
    def main() -> object:
        return hydra.main(
            config_path=str(conf_dir()), config_name="config", version_base="1.3"
        )(fn)()

    main.task = fn  # the undecorated task, for tests that compose configs themselves
    return main
