"""A U-Net for maps on a periodic patch."""

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
    remove_spatial_mean,
)


class UNet(nn.Module):
    """U-Net (Ronneberger et al. 2015, arXiv:1505.04597) with periodic-consistent resampling.

    Each level has two 3x3 convolutions; the width doubles at each of the ``depth``
    down-sampling steps. Down-sampling is a 2x2 average pool with stride 2 and
    up-sampling a 2x2 transposed convolution with stride 2: neither needs padding, so
    with ``padding_mode="circular"`` the whole network is periodic and commutes with
    whole-pixel shifts by multiples of ``2**depth`` (the grid of the coarsest level).

    Parameters
    ----------
    in_channels, out_channels : int
        Map channels in and out (2 for Q/U in, E/B out).
    depth : int
        Number of down-sampling steps (>= 1); the patch side must be a multiple of
        ``2**depth``.
    width : int
        Feature maps at full resolution (>= 1).
    norm : {"batch", "group", "instance", "none"}
    padding_mode : {"circular", "zeros", "reflect", "replicate"}
        ``circular`` for periodic patches (the default and the right choice for them).
    activation : {"gelu", "relu", "silu", "leaky_relu", "tanh"}
    zero_mean : bool
        Subtract each output map's spatial mean (:func:`skymoments.nets.layers.
        remove_spatial_mean`; for a target with no l = 0 mode).
    """

    def __init__(
        self,
        in_channels: int = 2,
        out_channels: int = 2,
        depth: int = 3,
        width: int = 16,
        norm: str = "batch",
        padding_mode: str = "circular",
        activation: str = "gelu",
        zero_mean: bool = False,
    ) -> None:
        super().__init__()
        check_positive_int(in_channels, "in_channels")
        check_positive_int(out_channels, "out_channels")
        self.depth = check_positive_int(depth, "depth")
        self.zero_mean = check_bool(zero_mean, "zero_mean")
        check_positive_int(width, "width")
        check_choice(norm, NORMS, "norm")
        check_choice(padding_mode, PADDINGS, "padding_mode")
        widths = [width * 2**i for i in range(depth + 1)]

        def block(c_in: int, c_out: int) -> nn.Sequential:
            return nn.Sequential(
                ConvNormAct(c_in, c_out, norm, padding_mode, activation),
                ConvNormAct(c_out, c_out, norm, padding_mode, activation),
            )

        self.encoders = nn.ModuleList([block(in_channels, widths[0])])
        self.encoders.extend(block(widths[i - 1], widths[i]) for i in range(1, depth + 1))
        self.pool = nn.AvgPool2d(2)
        self.ups = nn.ModuleList(
            nn.ConvTranspose2d(widths[i], widths[i - 1], kernel_size=2, stride=2)
            for i in range(depth, 0, -1)
        )
        self.decoders = nn.ModuleList(
            block(2 * widths[i - 1], widths[i - 1]) for i in range(depth, 0, -1)
        )
        self.head = nn.Conv2d(widths[0], out_channels, kernel_size=1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Map ``x`` of shape (n, in_channels, npix, npix) to (n, out_channels, npix, npix)."""
        step = 2**self.depth
        if x.shape[-1] % step or x.shape[-2] % step:
            raise ValueError(
                f"UNet of depth {self.depth} needs a patch side that is a multiple of {step}, "
                f"got {tuple(x.shape[-2:])}; lower model depth or change the patch size"
            )
        skips = []
        for i, enc in enumerate(self.encoders):
            x = enc(x if i == 0 else self.pool(x))
            skips.append(x)
        x = skips.pop()
        for up, dec in zip(self.ups, self.decoders, strict=True):
            x = dec(torch.cat([up(x), skips.pop()], dim=1))
        x = self.head(x)
        return remove_spatial_mean(x) if self.zero_mean else x
