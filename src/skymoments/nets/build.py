"""Build a network from a Hydra config node."""

from __future__ import annotations

from collections.abc import Mapping

from hydra.errors import InstantiationException
from hydra.utils import instantiate
from omegaconf import DictConfig, OmegaConf
from torch import nn

# Size keys that must be positive integers in any network node.
POSITIVE_KEYS = ("width", "depth", "n_blocks", "n_layers", "modes", "in_channels", "out_channels")


def check_sizes(cfg_node, key: str = "model.net") -> None:
    """Refuse a size key (:data:`POSITIVE_KEYS`) of a network node that is not a positive integer.

    The one check of network sizes: :func:`build_network` runs it, and so do the config
    checks (``skymoments.config``) before any work.

    Parameters
    ----------
    cfg_node : DictConfig or Mapping
        The network node (``model.mean``, ...).
    key : str
        Dotted config path of the node, used in the message.

    Raises
    ------
    ValueError
        ``<key>.<name> must be a positive integer, got <value>``.
    """
    for name in POSITIVE_KEYS:
        if name in cfg_node:
            value = cfg_node[name]
            if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
                raise ValueError(f"{key}.{name} must be a positive integer, got {value!r}")


def build_network(cfg_node, key: str = "model.net") -> nn.Module:
    """Instantiate a network from a node with ``_target_`` (e.g. ``skymoments.nets.UNet``).

    Parameters
    ----------
    cfg_node : DictConfig or Mapping
        ``{_target_: skymoments.nets.UNet, depth: 3, width: 16, ...}``.
    key : str
        Dotted config path of the node, used in error messages (``model.mean``).

    Returns
    -------
    nn.Module

    Raises
    ------
    ValueError
        A missing ``_target_``, a size key that is not a positive integer, or any
        ValueError from the network's constructor, with the config key named.
    """
    if isinstance(cfg_node, Mapping) and not isinstance(cfg_node, DictConfig):
        cfg_node = OmegaConf.create(dict(cfg_node))
    if not isinstance(cfg_node, DictConfig) or "_target_" not in cfg_node:
        raise ValueError(
            f"{key} must be a config node with a _target_ naming the network class, "
            "e.g. {_target_: skymoments.nets.UNet, depth: 3, width: 16}"
        )
    check_sizes(cfg_node, key)
    try:
        net = instantiate(cfg_node)
    except InstantiationException as err:
        if isinstance(err.__cause__, ValueError | TypeError):
            raise ValueError(f"{key}: {err.__cause__}") from err
        raise ValueError(f"{key}: cannot build {cfg_node._target_!r}: {err}") from err
    if not isinstance(net, nn.Module):
        raise ValueError(f"{key}._target_={cfg_node._target_!r} did not build a torch nn.Module")
    # The node is the network's architecture: a stored model is rebuilt from it
    # (skymoments.nets.archive), never unpickled.
    net.built_from = OmegaConf.to_container(cfg_node, resolve=True)
    return net
