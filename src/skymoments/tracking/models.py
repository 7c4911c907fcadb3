"""Loading tracked models back, and naming registered versions."""

from __future__ import annotations

import re
from typing import Any

from skymoments.tracking.settings import settings_from
from skymoments.tracking.store import client_for, mlflow_uris, with_retries

__all__ = ["load_model", "model_uri", "set_model_alias"]

_RUN_ID = re.compile(r"^[0-9a-f]{32}$")


def model_uri(ref: str, default_name: str = "model") -> str:
    """Normalize a model reference to an MLflow model URI.

    Parameters
    ----------
    ref : str
        ``models:/NAME/VERSION``, ``models:/NAME@alias``, ``models:/<model id>``,
        ``runs:/RUN_ID/NAME``, or a bare 32-hex run id (taken as ``runs:/RUN_ID/<default_name>``).
    default_name : str
        Model name within the run for a bare run id.

    Raises
    ------
    ValueError
        ``ref`` is none of these forms.
    """
    text = str(ref).strip()
    if text.startswith(("models:/", "runs:/")):
        if text.rstrip("/") in ("models:", "runs:") or text.endswith(":/"):
            raise ValueError(f"model reference {ref!r} has nothing after the scheme")
        return text
    if _RUN_ID.match(text):
        return f"runs:/{text}/{default_name}"
    raise ValueError(
        f"model reference {ref!r} is not understood; use models:/NAME/VERSION, "
        "models:/NAME@alias, runs:/RUN_ID/model, or a bare 32-character run id"
    )


def load_model(ref: str, tracking: Any, **kwargs: Any) -> Any:
    """Load a model logged with :meth:`TrackedRun.log_model` as a torch module.

    Parameters
    ----------
    ref : str
        See :func:`model_uri`.
    tracking : DictConfig, Mapping or str
        The tracking config (``cfg.tracking`` or the whole config) or a tracking URI.
    **kwargs
        Passed to ``mlflow.pytorch.load_model`` (``map_location="cpu"``, ``dst_path``).

    Returns
    -------
    module : torch.nn.Module
    """
    import mlflow.pytorch

    settings = settings_from(tracking)
    client_for(settings)  # prepares the store, probes a server, gives a clear error if down
    uri = model_uri(ref)

    def load() -> Any:
        with mlflow_uris(settings.tracking_uri):
            return mlflow.pytorch.load_model(uri, **kwargs)

    return with_retries(settings, f"load model {uri}", load)


def set_model_alias(tracking: Any, name: str, version: int | str, alias: str) -> None:
    """Point ``models:/name@alias`` at ``version`` of registered model ``name``."""
    settings = settings_from(tracking)
    client = client_for(settings)
    with_retries(
        settings,
        f"set alias {alias!r} on {name}/{version}",
        lambda: client.set_registered_model_alias(name, alias, str(version)),
    )
