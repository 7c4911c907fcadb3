"""Which tracked model a prediction uses, and the patch geometry it was trained on.

The ``run`` command logs a model under artifact name ``model`` in a run whose params are the
flattened resolved config, so the training geometry is in the run params ``patch.npix`` and
``patch.pixel_arcmin``. A registered version (``models:/NAME/VERSION``, ``models:/NAME@alias``)
or an MLflow 3 logged model (``models:/m-...``) points back at that run. Everything here reads
the store only: no torch, no weights.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from skymoments.maps.geometry import FlatPatch

__all__ = ["ModelSource", "resolve_model_source"]

_RUN_ID = re.compile(r"^[0-9a-f]{32}$")
_VERSION = re.compile(r"^[0-9]+$")
GEOMETRY_PARAMS = ("patch.npix", "patch.pixel_arcmin")


@dataclass(frozen=True)
class ModelSource:
    """A model reference resolved against the tracking store.

    Attributes
    ----------
    ref : str
        The reference as the user gave it.
    uri : str
        The MLflow model URI that loads it (``runs:/ID/model``, ``models:/NAME/VERSION``, ...).
    run_id : str
        The training run the model was logged from.
    experiment_id : str
        That run's experiment.
    name : str or None
        Registered-model name (None for a run reference).
    version : str or None
        Registered-model version (None for a run reference).
    patch : FlatPatch
        Training patch geometry, from the run params ``patch.npix`` and ``patch.pixel_arcmin``.
    """

    ref: str
    uri: str
    run_id: str
    experiment_id: str
    name: str | None
    version: str | None
    patch: FlatPatch


def _not_found(exc: Exception) -> bool:
    code = getattr(exc, "error_code", "") or ""
    text = str(exc).lower()
    return "RESOURCE_DOES_NOT_EXIST" in code or "not found" in text or "does not exist" in text


def _registered(client, settings, name: str, selector: str) -> tuple[str, str]:
    """(run id, version) of registered model ``name`` at a version number or ``@alias``."""
    from skymoments.tracking.store import with_retries

    try:
        if selector.startswith("@"):
            alias = selector[1:]
            mv = with_retries(
                settings,
                f"read alias {name}@{alias}",
                lambda: client.get_model_version_by_alias(name, alias),
            )
        elif _VERSION.match(selector):
            mv = with_retries(
                settings,
                f"read model version {name}/{selector}",
                lambda: client.get_model_version(name, selector),
            )
        else:
            raise ValueError(
                f"model reference models:/{name}/{selector} names neither a version number nor "
                f"an alias; use models:/{name}/<version> or models:/{name}@<alias>"
            )
    except ValueError:
        raise
    except Exception as exc:
        if _not_found(exc):
            sep = "" if selector.startswith("@") else "/"
            raise ValueError(
                f"no registered model version models:/{name}{sep}{selector} in "
                f"{settings.tracking_uri}; check the name, version or alias "
                "(`mlflow models` / the MLflow UI lists them) and tracking.* overrides"
            ) from exc
        raise
    if not mv.run_id:
        raise ValueError(
            f"registered model {name} version {mv.version} has no source run, so its training "
            "geometry is unknown; register a model logged by `skymoments run`"
        )
    return str(mv.run_id), str(mv.version)


def _logged_model_run(client, settings, model_id: str) -> str:
    from skymoments.tracking.store import with_retries

    try:
        logged = with_retries(
            settings, f"read logged model {model_id}", lambda: client.get_logged_model(model_id)
        )
    except Exception as exc:
        if _not_found(exc):
            raise ValueError(
                f"no logged model {model_id!r} in {settings.tracking_uri}; give "
                "models:/NAME/VERSION, models:/NAME@alias or a run id"
            ) from exc
        raise
    if not logged.source_run_id:
        raise ValueError(
            f"logged model {model_id} has no source run, so its training geometry is unknown"
        )
    return str(logged.source_run_id)


def _split_models_uri(text: str) -> tuple[str, str | None]:
    """``models:/NAME/VERSION`` -> (NAME, VERSION); ``models:/NAME@a`` -> (NAME, "@a");
    ``models:/m-id`` -> (m-id, None)."""
    body = text[len("models:/") :].strip("/")
    if "@" in body and "/" not in body.split("@", 1)[1]:
        name, alias = body.rsplit("@", 1)
        if name and alias:
            return name, "@" + alias
    if "/" in body:
        name, selector = body.rsplit("/", 1)
        if name and selector:
            return name, selector
    if body:
        return body, None
    raise ValueError(f"model reference {text!r} has nothing after models:/")


def geometry_from_params(params: dict[str, str], run_id: str) -> FlatPatch:
    """The training :class:`FlatPatch` from a run's params.

    Raises
    ------
    ValueError
        A geometry param is missing or not a number.
    """
    missing = [k for k in GEOMETRY_PARAMS if k not in params]
    if missing:
        raise ValueError(
            f"run {run_id} has no param {', '.join(missing)}, so the model's training patch "
            "geometry is unknown; use a model logged by `skymoments run` (its params are the "
            "flattened config, with patch.npix and patch.pixel_arcmin)"
        )
    try:
        npix = int(params["patch.npix"])
        pixel = float(params["patch.pixel_arcmin"])
    except ValueError as exc:
        raise ValueError(
            f"run {run_id} has patch.npix={params['patch.npix']!r} and "
            f"patch.pixel_arcmin={params['patch.pixel_arcmin']!r}; they must be numbers"
        ) from exc
    return FlatPatch(npix, pixel)


def resolve_model_source(ref: str, tracking: Any) -> ModelSource:
    """Resolve a model reference to its URI, training run and training geometry.

    Parameters
    ----------
    ref : str
        ``models:/NAME/VERSION``, ``models:/NAME@alias``, ``models:/<logged model id>``,
        ``runs:/RUN_ID/model`` or a bare 32-character run id.
    tracking : DictConfig, Mapping or str
        The tracking config (``cfg.tracking``) or a tracking URI.

    Returns
    -------
    ModelSource

    Raises
    ------
    ValueError
        The reference is malformed, names nothing in the store, or its run lacks the patch
        geometry params.
    """
    from skymoments.tracking import get_run, model_uri, settings_from
    from skymoments.tracking.store import client_for

    if ref is None or not str(ref).strip():
        raise ValueError(
            "predict.model is not set; give predict.model=models:/NAME/VERSION, "
            "models:/NAME@alias or a run id"
        )
    text = str(ref).strip()
    uri = model_uri(text)
    settings = settings_from(tracking)
    db = settings.sqlite_path
    if db is not None and not db.is_file():
        # Opening a missing SQLite store would silently create an empty one.
        raise ValueError(
            f"no tracking store at {db}; point tracking.root (or tracking.uri) at the store "
            "the model was logged to"
        )
    client = client_for(settings)
    name = version = None
    if uri.startswith("runs:/"):
        run_id = uri[len("runs:/") :].split("/", 1)[0]
        if not _RUN_ID.match(run_id):
            raise ValueError(f"model reference {ref!r} does not hold a 32-character run id")
    else:
        head, selector = _split_models_uri(uri)
        if selector is None:
            run_id = _logged_model_run(client, settings, head)
        else:
            name = head
            run_id, version = _registered(client, settings, head, selector)
    try:
        record = get_run(settings, run_id)
    except Exception as exc:
        if _not_found(exc):
            raise ValueError(
                f"no run {run_id} in {settings.tracking_uri}; check the run id and the "
                "tracking.* overrides (tracking.root, tracking.uri)"
            ) from exc
        raise
    patch = geometry_from_params(record.params, run_id)
    return ModelSource(
        ref=text,
        uri=uri,
        run_id=run_id,
        experiment_id=record.experiment_id,
        name=name,
        version=version,
        patch=patch,
    )
