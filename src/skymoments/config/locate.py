"""Where the Hydra config tree lives, for an editable checkout and for an installed wheel."""

from __future__ import annotations

import os
from pathlib import Path


def conf_dir() -> Path:
    """Absolute path of the ``conf/`` tree.

    Order: ``$SKYMOMENTS_CONF``; ``skymoments/conf`` inside the installed package (the
    wheel ships the top-level ``conf/`` there); the repository's ``conf/`` for a source
    or editable checkout.
    """
    env = os.environ.get("SKYMOMENTS_CONF")
    if env:
        path = Path(env).expanduser().resolve()
        if not (path / "config.yaml").is_file():
            raise ValueError(
                f"SKYMOMENTS_CONF={env} has no config.yaml; point it at a conf/ folder"
            )
        return path
    here = Path(__file__).resolve().parent.parent
    for candidate in (here / "conf", here.parent.parent / "conf"):
        if (candidate / "config.yaml").is_file():
            return candidate
    raise FileNotFoundError(
        "skymoments could not find its conf/ folder; reinstall the package or set SKYMOMENTS_CONF"
    )
