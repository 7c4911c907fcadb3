"""Where a study writes its local files before they are logged."""

from __future__ import annotations

from pathlib import Path


def job_dir() -> Path:
    """The Hydra job's output folder (the current folder outside a Hydra app)."""
    from hydra.core.hydra_config import HydraConfig

    if HydraConfig.initialized():
        return Path(HydraConfig.get().runtime.output_dir)
    return Path.cwd()
