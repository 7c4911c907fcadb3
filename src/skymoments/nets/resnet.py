"""A dilated residual CNN: full resolution throughout, receptive field grown by dilation."""

from __future__ import annotations

import torch
from torch import nn

from skymoments.nets.layers import (
    NORMS,
    PADDINGS,
    ConvNormAct,
    check_bool,
    check_choice,
    check_positive_int,
    conv3x3,
    make_activation,
    make_norm,
    remove_spatial_mean,
)


class _ResidualBlock(nn.Module):
    def __init__(self, width: int, dilation: int, norm: str, padding_mode: str, activation: str):
        super().__init__()
        self.body = nn.Sequential(
            ConvNormAct(width, width, norm, padding_mode, activation, dilation=dilation),
            conv3x3(width, width, padding_mode, dilation=dilation, bias=norm == "none"),
            make_norm(norm, width),
        )
        self.act = make_activation(activation)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.act(x + self.body(x))


class DilatedResNet(nn.Module):
    """Residual CNN with dilated 3x3 convolutions and no resampling.

    Residual blocks (He et al. 2016, arXiv:1512.03385) whose dilation cycles through
    ``dilations`` (the context aggregation of Yu & Koltun 2016, arXiv:1511.07122). The map
    keeps its full resolution, so unlike the U-Net it commutes with every whole-pixel
    shift when ``padding_mode="circular"``. The receptive field is
    ``3 + 4 * sum(dilation over blocks)`` pixels across.

    Parameters
    ----------
    in_channels, out_channels : int
    width : int
        Feature maps in every block (>= 1).
    n_blocks : int
        Residual blocks (>= 1), each two 3x3 convolutions.
    dilations : sequence of int
        Dilation cycle over the blocks, e.g. (1, 2, 4, 8).
    norm, padding_mode, activation : str
        As in :class:`skymoments.nets.UNet`.
    zero_mean : bool
        As in :class:`skymoments.nets.UNet`.
    """

    def __init__(
        self,
        in_channels: int = 2,
        out_channels: int = 2,
        width: int = 32,
        n_blocks: int = 8,
        dilations=(1, 2, 4, 8),
        norm: str = "batch",
        padding_mode: str = "circular",
        activation: str = "gelu",
        zero_mean: bool = False,
    ) -> None:
        super().__init__()
        check_positive_int(in_channels, "in_channels")
        check_positive_int(out_channels, "out_channels")
        check_positive_int(width, "width")
        check_positive_int(n_blocks, "n_blocks")
        self.zero_mean = check_bool(zero_mean, "zero_mean")
        check_choice(norm, NORMS, "norm")
        check_choice(padding_mode, PADDINGS, "padding_mode")
        dilations = [check_positive_int(d, "dilations[i]") for d in dilations]
        if not dilations:
            raise ValueError("dilations must hold at least one positive integer, e.g. [1, 2, 4, 8]")
        self.dilations = [dilations[i % len(dilations)] for i in range(n_blocks)]
        self.stem = ConvNormAct(in_channels, width, norm, padding_mode, activation)
        self.blocks = nn.Sequential(
            *(_ResidualBlock(width, d, norm, padding_mode, activation) for d in self.dilations)
        )
        self.head = nn.Conv2d(width, out_channels, kernel_size=1)

    @property
    def receptive_field(self) -> int:
        """Receptive field side in pixels (stem 3x3 plus two dilated 3x3 per block)."""
        return 3 + 4 * sum(self.dilations)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Map ``x`` of shape (n, in_channels, ny, nx) to (n, out_channels, ny, nx)."""
        x = self.head(self.blocks(self.stem(x)))
        return remove_spatial_mean(x) if self.zero_mean else x
