"""Storing tracked models without code, loading them back, naming registered versions.

A model is logged as an MLflow model folder of our own flavour, ``skymoments``:

* ``architecture.json``: what to build, from skymoments' own network classes only
  (:mod:`skymoments.nets.archive`);
* ``weights.pt``: the full ``state_dict`` (parameters and buffers: fitted scalers and any
  statistics the model carries), a ``torch.save`` of tensors only, read back with
  ``torch.load(weights_only=True)``, PyTorch's restricted unpickler, which refuses anything
  that would construct other objects or run code;
* ``MLmodel`` also declares the ``python_function`` flavour with loader module
  ``skymoments.nets.archive``, so ``mlflow.pyfunc.load_model`` serves it too.

Models logged before this format (MLflow's PyTorch flavour, the whole module pickled) are
refused: unpickling a file from a shared store runs whatever code it carries. Whoever
trusts such a model's origin may set ``SKYMOMENTS_UNSAFE_UNPICKLE_MODELS=1`` (or pass
``unsafe_unpickle=True``) to load it anyway; better, re-run the study that made it.
"""

from __future__ import annotations

import json
import os
import re
import tempfile
from pathlib import Path
from typing import Any

import yaml

from skymoments.tracking.settings import quiet_artifact_downloads, settings_from
from skymoments.tracking.store import (
    client_for,
    mlflow_uris,
    reading_uri,
    require_writable,
    with_retries,
)

__all__ = [
    "ENV_UNSAFE_UNPICKLE",
    "FLAVOR",
    "load_model",
    "log_weights_model",
    "model_uri",
    "read_model_folder",
    "set_model_alias",
]

_RUN_ID = re.compile(r"^[0-9a-f]{32}$")
FLAVOR = "skymoments"
LOADER_MODULE = "skymoments.nets.archive"
ENV_UNSAFE_UNPICKLE = "SKYMOMENTS_UNSAFE_UNPICKLE_MODELS"


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


class _WeightsFlavor:
    """The ``flavor`` that ``mlflow.models.Model.log`` calls to write the model folder."""

    __name__ = FLAVOR

    def __init__(self, module: Any, architecture: dict, requirements: list[str]) -> None:
        self.module = module
        self.architecture = architecture
        self.requirements = requirements

    def save_model(self, path: str, mlflow_model: Any, **kwargs: Any) -> None:
        import mlflow.pyfunc
        import torch

        from skymoments.nets.archive import ARCHITECTURE_FILE, WEIGHTS_FILE

        folder = Path(path)
        folder.mkdir(parents=True, exist_ok=True)
        text = json.dumps(self.architecture, indent=1, sort_keys=True)
        (folder / ARCHITECTURE_FILE).write_text(text + "\n")
        state = {k: v.detach().cpu().contiguous() for k, v in self.module.state_dict().items()}
        torch.save(state, folder / WEIGHTS_FILE)
        (folder / "requirements.txt").write_text("\n".join(self.requirements) + "\n")
        mlflow_model.add_flavor(
            FLAVOR,
            architecture=ARCHITECTURE_FILE,
            weights=WEIGHTS_FILE,
            weights_format="torch state_dict of tensors, read with torch.load(weights_only=True)",
            torch_version=str(torch.__version__),
        )
        mlflow.pyfunc.add_to_model(mlflow_model, loader_module=LOADER_MODULE)
        mlflow_model.save(str(folder / "MLmodel"))


def log_weights_model(
    settings: Any,
    run_id: str,
    experiment_id: str,
    module: Any,
    *,
    name: str = "model",
    requirements: list[str] | None = None,
) -> Any:
    """Log ``module`` (a skymoments ``PosteriorMoments``) as architecture plus weights.

    Returns
    -------
    info : mlflow.models.model.ModelInfo
    """
    from mlflow.models import Model

    from skymoments.nets.archive import describe

    architecture = describe(module)
    client = client_for(settings)
    # The logged model is created in the run's experiment explicitly: left to itself,
    # MLflow would put it in the process's "active" experiment (often Default).
    logged = with_retries(
        settings,
        "create the logged model",
        lambda: client.create_logged_model(
            experiment_id=experiment_id, name=name, source_run_id=run_id
        ),
    )
    flavor = _WeightsFlavor(module, architecture, list(requirements or []))

    def save() -> Any:
        with mlflow_uris(settings.tracking_uri):
            return Model.log(
                artifact_path=None,
                name=name,
                flavor=flavor,
                model_id=logged.model_id,
                run_id=run_id,
            )

    return with_retries(settings, "log the model", save)


def read_model_folder(folder: str | os.PathLike, map_location: Any = "cpu") -> Any:
    """Build the model stored in a downloaded model folder, running no code from it.

    Raises
    ------
    ValueError
        The folder holds no ``skymoments`` model (e.g. a pickled model from before), or its
        architecture or weights are refused by :mod:`skymoments.nets.archive`.
    """
    from skymoments.nets.archive import read_state_dict, rebuild

    folder = Path(folder)
    meta_path = folder / "MLmodel"
    try:
        meta = yaml.safe_load(meta_path.read_text()) if meta_path.is_file() else None
    except yaml.YAMLError as exc:
        raise ValueError(f"{meta_path} is not readable YAML ({exc}); the model is damaged") from exc
    flavors = meta.get("flavors") if isinstance(meta, dict) else None
    spec = flavors.get(FLAVOR) if isinstance(flavors, dict) else None
    if not isinstance(spec, dict):
        raise _legacy_error(folder, flavors)
    files = {}
    for key in ("architecture", "weights"):
        rel = str(spec.get(key) or "")
        path = (folder / rel).resolve()
        if not rel or folder.resolve() not in path.parents or not path.is_file():
            raise ValueError(f"the model in {folder} names no {key} file inside its folder")
        files[key] = path
    try:
        architecture = json.loads(files["architecture"].read_text())
    except (ValueError, UnicodeDecodeError) as exc:
        raise ValueError(f"{files['architecture']} is not valid JSON ({exc})") from exc
    state = read_state_dict(files["weights"], map_location=map_location)
    return rebuild(architecture, state)


class _LegacyModelError(ValueError):
    """A model in MLflow's pickled PyTorch format: refused unless explicitly allowed."""


def _legacy_error(folder: Path, flavors: Any) -> ValueError:
    if isinstance(flavors, dict) and "pytorch" in flavors:
        return _LegacyModelError(
            "this model was stored pickled (MLflow's PyTorch flavour, as skymoments logged "
            "models before it stored architecture plus weights); unpickling a file from a "
            "store runs any code it carries, so it is not loaded. Re-run the study to log it "
            f"anew, or, only if you trust where it came from, set {ENV_UNSAFE_UNPICKLE}=1"
        )
    return ValueError(
        f"the model folder {folder} holds no skymoments model (no '{FLAVOR}' flavour in its "
        "MLmodel file); give a model logged by `skymoments run`"
    )


def _unsafe_allowed(flag: bool | None) -> bool:
    if flag is not None:
        return bool(flag)
    return os.environ.get(ENV_UNSAFE_UNPICKLE, "").strip().lower() in ("1", "true", "yes")


def load_model(
    ref: str,
    tracking: Any,
    *,
    map_location: Any = "cpu",
    unsafe_unpickle: bool | None = None,
    dst_path: str | os.PathLike | None = None,
) -> Any:
    """Load a model logged with :meth:`TrackedRun.log_model`, running no code from the store.

    Parameters
    ----------
    ref : str
        See :func:`model_uri`.
    tracking : DictConfig, Mapping or str
        The tracking config (``cfg.tracking`` or the whole config) or a tracking URI.
    map_location : str or torch.device
        Where the weights go (default the CPU).
    unsafe_unpickle : bool, optional
        Load a model stored pickled by an older skymoments (runs code from the store!).
        Default: the ``SKYMOMENTS_UNSAFE_UNPICKLE_MODELS`` environment variable, else no.
    dst_path : path, optional
        Where the model folder is downloaded (default a temporary folder).

    Returns
    -------
    model : skymoments.nets.PosteriorMoments
        In eval mode.

    Raises
    ------
    ValueError
        The reference is malformed, or the stored model is refused (pickled, damaged, or
        naming a class that is not one of skymoments' networks).
    """
    import mlflow.artifacts

    settings = settings_from(tracking)
    client_for(settings)  # prepares the store, probes a server, gives a clear error if down
    uri = model_uri(ref)

    source = reading_uri(settings)

    def fetch(dst: str) -> str:
        with mlflow_uris(source), quiet_artifact_downloads():
            return mlflow.artifacts.download_artifacts(
                artifact_uri=uri, dst_path=dst, tracking_uri=source
            )

    with tempfile.TemporaryDirectory() as tmp:
        folder = with_retries(settings, f"download model {uri}", lambda: fetch(dst_path or tmp))
        try:
            return read_model_folder(folder, map_location=map_location)
        except _LegacyModelError:
            if not _unsafe_allowed(unsafe_unpickle):
                raise
    import mlflow.pytorch

    def load() -> Any:
        with mlflow_uris(source):
            return mlflow.pytorch.load_model(uri, map_location=map_location)

    return with_retries(settings, f"load pickled model {uri}", load)


def set_model_alias(tracking: Any, name: str, version: int | str, alias: str) -> None:
    """Point ``models:/name@alias`` at ``version`` of registered model ``name``."""
    settings = settings_from(tracking)
    require_writable(settings, "set a model alias")
    client = client_for(settings)
    with_retries(
        settings,
        f"set alias {alias!r} on {name}/{version}",
        lambda: client.set_registered_model_alias(name, alias, str(version)),
    )
