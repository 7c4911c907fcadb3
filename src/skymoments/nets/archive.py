"""A :class:`PosteriorMoments` as data: its architecture (JSON) and its weights (tensors).

A stored model must never be able to run code when it is loaded. So a model is kept as

* an *architecture*: a JSON object naming each network by one of skymoments' own classes
  (:data:`NETWORKS`) with its constructor arguments (plain numbers, strings, booleans and
  lists), the scalers' channel counts and the positivity map;
* a *state dict*: every parameter and buffer (the fitted scalers and anything else the
  model registers as a buffer), read back with ``torch.load(weights_only=True)``, PyTorch's
  restricted unpickler that admits tensors and plain containers only.

:func:`rebuild` constructs the model from the architecture, refusing any class outside
:data:`NETWORKS`, then loads the state dict strictly. The networks' constructor arguments are
the config node :func:`skymoments.nets.build_network` built them from (kept on the network as
``built_from``), so a network made by hand has no architecture to save: build it from a node.

``_load_pyfunc`` lets ``mlflow.pyfunc.load_model`` serve a model saved this way.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from skymoments.nets.posterior import PosteriorMoments
from skymoments.nets.resnet import DilatedResNet
from skymoments.nets.scaler import ChannelScaler
from skymoments.nets.spectral import SpectralNet
from skymoments.nets.unet import UNet

__all__ = [
    "ARCHITECTURE_FILE",
    "ARCHITECTURE_FORMAT",
    "WEIGHTS_FILE",
    "NETWORKS",
    "describe",
    "read_state_dict",
    "rebuild",
]

ARCHITECTURE_FORMAT = "skymoments.posterior_moments/1"
ARCHITECTURE_FILE = "architecture.json"
WEIGHTS_FILE = "weights.pt"
# The only classes a stored architecture may name, by their config `_target_`.
NETWORKS: dict[str, type[nn.Module]] = {
    "skymoments.nets.UNet": UNet,
    "skymoments.nets.DilatedResNet": DilatedResNet,
    "skymoments.nets.SpectralNet": SpectralNet,
}
_ALIASES = {f"{cls.__module__}.{cls.__name__}": name for name, cls in NETWORKS.items()}
_NET_KEYS = ("mean_net", "var_net")
_SCALER_KEYS = ("input_scaler", "target_scaler")


def _plain(value: Any, where: str) -> Any:
    """``value`` if it is JSON data without code: numbers, strings, booleans, None, lists."""
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (int, float)):
        if isinstance(value, float) and not math.isfinite(value):
            raise ValueError(f"{where} is {value!r}; a stored architecture holds finite numbers")
        return value
    if isinstance(value, (list, tuple)):
        return [_plain(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise ValueError(
        f"{where} is a {type(value).__name__}; a stored architecture holds numbers, strings, "
        "booleans and lists only"
    )


def _target_of(name: Any, where: str) -> str:
    key = _ALIASES.get(str(name), str(name))
    if key not in NETWORKS:
        raise ValueError(
            f"{where}._target_={name!r} is not one of skymoments' networks "
            f"({', '.join(sorted(NETWORKS))}); a stored model is built from these only"
        )
    return key


def _network_spec(net: nn.Module, where: str) -> dict[str, Any]:
    node = getattr(net, "built_from", None)
    if not isinstance(node, Mapping) or "_target_" not in node:
        raise ValueError(
            f"{where} ({type(net).__name__}) was not made by skymoments.nets.build_network, so "
            "its architecture is unknown and cannot be saved; build it from a config node "
            "({_target_: skymoments.nets.UNet, ...})"
        )
    target = _target_of(node["_target_"], where)
    if type(net) is not NETWORKS[target]:
        raise ValueError(f"{where} is a {type(net).__name__} but was built from {target}")
    kwargs = {
        str(k): _plain(v, f"{where}.{k}") for k, v in node.items() if not str(k).startswith("_")
    }
    return {"_target_": target, **kwargs}


def describe(model: PosteriorMoments) -> dict[str, Any]:
    """The architecture of ``model`` as a JSON-able dict (see the module docstring).

    Raises
    ------
    ValueError
        ``model`` is not a :class:`PosteriorMoments`, or a network of it was not built by
        :func:`skymoments.nets.build_network` from one of :data:`NETWORKS`.
    """
    if not isinstance(model, PosteriorMoments):
        raise ValueError(
            f"only a skymoments PosteriorMoments can be stored, got a {type(model).__name__}"
        )
    spec: dict[str, Any] = {"format": ARCHITECTURE_FORMAT, "class": "PosteriorMoments"}
    for key in _NET_KEYS:
        spec[key] = _network_spec(getattr(model, key), key)
    for key in _SCALER_KEYS:
        scaler = getattr(model, key)
        spec[key] = {"n_channels": scaler.n_channels, "center": bool(scaler.center)}
    spec["positivity"] = model.positivity.kind
    spec["eps"] = float(model.positivity.eps)
    json.dumps(spec)  # fails here, not at load time, if anything is not JSON
    return spec


def _build_network(node: Any, where: str) -> nn.Module:
    if not isinstance(node, Mapping) or "_target_" not in node:
        raise ValueError(f"{where} in the stored architecture has no _target_")
    cls = NETWORKS[_target_of(node["_target_"], where)]
    kwargs = {}
    for key, value in node.items():
        if key == "_target_":
            continue
        if str(key).startswith("_"):
            raise ValueError(f"{where}.{key} is not a constructor argument; refusing it")
        kwargs[str(key)] = _plain(value, f"{where}.{key}")
    try:
        return cls(**kwargs)
    except TypeError as exc:
        raise ValueError(f"{where}: {cls.__name__} does not take these arguments ({exc})") from exc


def _scaler(node: Any, where: str) -> ChannelScaler:
    if not isinstance(node, Mapping):
        raise ValueError(f"{where} in the stored architecture is not an object")
    n = node.get("n_channels")
    if isinstance(n, bool) or not isinstance(n, int):
        raise ValueError(f"{where}.n_channels must be an integer, got {n!r}")
    return ChannelScaler(n, center=bool(node.get("center", True)))


def _owner(model: nn.Module, key: str) -> tuple[nn.Module, str]:
    *path, name = key.split(".")
    owner = model
    for part in path:
        owner = getattr(owner, part)
    return owner, name


# Buffers a model stored before they existed may lack; their built default is kept.
OPTIONAL_BUFFERS = ("variance_scale", "input_range.margin")


def _load_state(model: nn.Module, state: Mapping[str, torch.Tensor]) -> None:
    """Load ``state`` strictly; a buffer may differ in shape from its freshly built default.

    Parameters must match in name and shape. Buffers are data the model carries (scalers,
    statistics), whose shape can depend on what they were fitted on: they are taken as
    stored.
    """
    own = model.state_dict()
    extra = sorted(set(state) - set(own))
    # Buffers added after a model was stored keep their defaults (``variance_scale``: 1,
    # ``input_range.margin``: 0, the flag of that time).
    missing = sorted(set(own) - set(state) - set(OPTIONAL_BUFFERS))
    buffers = {name for name, _ in model.named_buffers()}
    if extra or missing:
        raise ValueError(
            "the stored weights do not fit the stored architecture"
            + (f"; not in the model: {', '.join(extra[:5])}" if extra else "")
            + (f"; missing: {', '.join(missing[:5])}" if missing else "")
        )
    fitted = {}
    for key, value in state.items():
        if key in buffers and tuple(value.shape) != tuple(own[key].shape):
            owner, name = _owner(model, key)
            owner.register_buffer(name, value.clone())
        else:
            fitted[key] = value
    try:
        model.load_state_dict(fitted, strict=False)
    except RuntimeError as exc:
        raise ValueError(f"the stored weights do not fit the stored architecture: {exc}") from exc


def rebuild(architecture: Mapping[str, Any], state: Mapping[str, torch.Tensor]) -> PosteriorMoments:
    """A :class:`PosteriorMoments` from its stored architecture and state dict, in eval mode.

    Raises
    ------
    ValueError
        The architecture is not one :func:`describe` writes (another format, a class outside
        :data:`NETWORKS`, arguments that are not plain data), or the weights do not fit it.
    """
    if not isinstance(architecture, Mapping):
        raise ValueError("the stored architecture is not a JSON object")
    if architecture.get("format") != ARCHITECTURE_FORMAT:
        raise ValueError(
            f"the stored architecture has format {architecture.get('format')!r}; this version "
            f"of skymoments reads {ARCHITECTURE_FORMAT!r}"
        )
    nets = [_build_network(architecture.get(k), k) for k in _NET_KEYS]
    scalers = [_scaler(architecture.get(k), k) for k in _SCALER_KEYS]
    positivity = architecture.get("positivity", "softplus")
    eps = architecture.get("eps", 1e-6)
    bad_eps = isinstance(eps, bool) or not isinstance(eps, (int, float))
    if not isinstance(positivity, str) or bad_eps:
        raise ValueError("the stored architecture's positivity must be a name and eps a number")
    model = PosteriorMoments(*nets, *scalers, positivity, float(eps))
    _load_state(model, state)
    return model.eval()


def read_state_dict(path: str | Path, map_location: Any = "cpu") -> dict[str, torch.Tensor]:
    """A state dict saved with ``torch.save``, read with PyTorch's restricted unpickler.

    Raises
    ------
    ValueError
        The file holds anything other than a mapping of names to tensors (a pickled object
        that would run code is refused by ``weights_only=True`` before it is built).
    """
    try:
        state = torch.load(path, map_location=map_location, weights_only=True)
    except Exception as exc:
        raise ValueError(
            f"{path} is not a plain state dict of tensors, so it is not loaded (it may hold "
            f"code): {str(exc).splitlines()[0] if str(exc) else type(exc).__name__}"
        ) from exc
    if not isinstance(state, Mapping) or not all(
        isinstance(k, str) and isinstance(v, torch.Tensor) for k, v in state.items()
    ):
        raise ValueError(f"{path} does not hold a mapping of parameter names to tensors")
    return dict(state)


class PosteriorPyfunc:
    """What ``mlflow.pyfunc.load_model`` returns for a stored :class:`PosteriorMoments`.

    ``predict`` takes Q/U maps shaped (n, 2, npix, npix) in uK and returns a dict with the
    posterior ``mean`` and ``std`` of E/B, same shape, uK.
    """

    def __init__(self, model: PosteriorMoments) -> None:
        self.model = model

    def predict(self, model_input: Any, params: Mapping[str, Any] | None = None) -> dict:
        data = np.asarray(model_input, dtype=np.float32)
        with torch.no_grad():
            mean, var = self.model(torch.as_tensor(data))
        return {"mean": mean.double().numpy(), "std": var.double().sqrt().numpy()}


def _load_pyfunc(path: str) -> PosteriorPyfunc:
    """MLflow's pyfunc loader hook: ``path`` is the model folder holding both files."""
    folder = Path(path)
    architecture = json.loads((folder / ARCHITECTURE_FILE).read_text())
    return PosteriorPyfunc(rebuild(architecture, read_state_dict(folder / WEIGHTS_FILE)))
