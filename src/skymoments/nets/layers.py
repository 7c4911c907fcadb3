"""Shared building blocks: periodic-aware convolutions, normalizations, activations.

Every spatial convolution here takes a ``padding_mode``. ``circular`` wraps the patch
around, which is exact for the periodic flat patches ``skymoments.maps`` works with: the
network then has no edges, and a convolution commutes with whole-pixel translations.
"""

from __future__ import annotations

import torch
from torch import nn

NORMS = ("batch", "group", "instance", "none")
PADDINGS = ("circular", "zeros", "reflect", "replicate")
ACTIVATIONS = {
    "gelu": nn.GELU,
    "relu": nn.ReLU,
    "silu": nn.SiLU,
    "leaky_relu": nn.LeakyReLU,
    "tanh": nn.Tanh,
}


def check_choice(value: str, allowed, name: str) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise a ValueError naming ``name``."""
    if value not in allowed:
        raise ValueError(f"{name}={value!r} is not supported; choose one of {sorted(allowed)}")
    return value


def check_positive_int(value, name: str, minimum: int = 1) -> int:
    """Return ``value`` as an int if it is an integer >= ``minimum``, else raise ValueError."""
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def make_norm(kind: str, channels: int) -> nn.Module:
    """A normalization layer over ``channels`` feature maps.

    ``group`` uses up to 8 groups (the largest divisor of ``channels`` not above 8);
    ``instance`` normalizes each map on its own, which removes its amplitude: avoid it when
    the amplitude carries information (e.g. a prior on r).
    """
    check_choice(kind, NORMS, "norm")
    if kind == "batch":
        return nn.BatchNorm2d(channels)
    if kind == "group":
        groups = max(g for g in range(1, 9) if channels % g == 0)
        return nn.GroupNorm(groups, channels)
    if kind == "instance":
        return nn.GroupNorm(channels, channels)
    return nn.Identity()


def make_activation(kind: str) -> nn.Module:
    """An activation module from its name (see ``ACTIVATIONS``)."""
    check_choice(kind, ACTIVATIONS, "activation")
    return ACTIVATIONS[kind]()


def conv3x3(
    c_in: int, c_out: int, padding_mode: str, dilation: int = 1, bias: bool = True
) -> nn.Conv2d:
    """A 3x3 convolution that keeps the map size, padded by ``padding_mode``."""
    check_choice(padding_mode, PADDINGS, "padding_mode")
    return nn.Conv2d(
        c_in,
        c_out,
        kernel_size=3,
        padding=dilation,
        dilation=dilation,
        padding_mode=padding_mode,
        bias=bias,
    )


class ConvNormAct(nn.Sequential):
    """3x3 convolution, normalization, activation."""

    def __init__(
        self,
        c_in: int,
        c_out: int,
        norm: str,
        padding_mode: str,
        activation: str,
        dilation: int = 1,
    ) -> None:
        # A bias before a normalization layer is redundant (the norm removes the mean).
        super().__init__(
            conv3x3(c_in, c_out, padding_mode, dilation=dilation, bias=norm == "none"),
            make_norm(norm, c_out),
            make_activation(activation),
        )


def check_bool(value, name: str) -> bool:
    """Return ``value`` if it is a bool, else raise a ValueError naming ``name``."""
    if not isinstance(value, bool):
        raise ValueError(f"{name} must be true or false, got {value!r}")
    return value


def remove_spatial_mean(x: torch.Tensor) -> torch.Tensor:
    """``x`` (n, C, ny, nx) minus its mean over the two pixel axes, per map and channel.

    The output layer of a mean network whose target has no l = 0 mode, as E/B of a periodic
    patch have none (``maps/eb.py`` sets it to zero): the posterior mean then has none
    either, and since the constant map is orthogonal to every such truth, removing a
    predicted constant lowers each map's mean squared error by exactly that constant
    squared (``tests/test_nets_zero_mean.py``).
    """
    return x - x.mean(dim=(-2, -1), keepdim=True)
