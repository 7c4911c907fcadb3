"""A Fourier-layer network (Fourier neural operator) for periodic patches."""

from __future__ import annotations

import math

import torch
from torch import nn

from skymoments.nets.layers import (
    check_bool,
    check_positive_int,
    make_activation,
    remove_spatial_mean,
)


class SpectralConv2d(nn.Module):
    """Multiply the lowest Fourier modes of each channel by learned complex weights.

    Spectral convolution of Li et al. 2021, arXiv:2010.08895 (the Fourier layer, eq. 4):
    ``y = irfft2(W(k) rfft2(x)(k))`` with ``W(k)`` a complex ``c_out x c_in`` matrix for
    each kept mode and zero above. Kept modes: ``|k_y| < modes`` (both signs) and
    ``0 <= k_x < modes``; a patch smaller than ``2 * modes`` keeps all its modes. A
    diagonal operator in Fourier space is periodic and commutes with every pixel shift.

    Weights are stored as real tensors with a trailing (re, im) axis so that every
    optimizer and DDP backend handles them.
    """

    def __init__(self, c_in: int, c_out: int, modes: int) -> None:
        super().__init__()
        self.modes = check_positive_int(modes, "modes")
        # Li et al. 2021 initialize uniformly with scale 1 / (c_in c_out).
        scale = 1.0 / (c_in * c_out)
        shape = (c_in, c_out, modes, modes, 2)
        self.w_pos = nn.Parameter(scale * torch.rand(shape))  # k_y = 0 .. modes - 1
        self.w_neg = nn.Parameter(scale * torch.rand(shape))  # k_y = -modes .. -1

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        n_y, n_x = x.shape[-2:]
        m_y = min(self.modes, n_y // 2)
        m_x = min(self.modes, n_x // 2 + 1)
        # FFTs have no half-precision kernels on every device: compute them in float32.
        low = x.dtype in (torch.float16, torch.bfloat16)
        xf = torch.fft.rfft2(x.float() if low else x, norm="ortho")
        out = torch.zeros(
            x.shape[0], self.w_pos.shape[1], n_y, n_x // 2 + 1, dtype=xf.dtype, device=x.device
        )
        w_pos = torch.view_as_complex(self.w_pos[:, :, :m_y, :m_x].contiguous()).to(xf.dtype)
        w_neg = self.w_neg[:, :, self.modes - m_y :, :m_x].contiguous()
        w_neg = torch.view_as_complex(w_neg).to(xf.dtype)
        out[:, :, :m_y, :m_x] = torch.einsum("bixy,ioxy->boxy", xf[:, :, :m_y, :m_x], w_pos)
        out[:, :, n_y - m_y :, :m_x] = torch.einsum(
            "bixy,ioxy->boxy", xf[:, :, n_y - m_y :, :m_x], w_neg
        )
        return torch.fft.irfft2(out, s=(n_y, n_x), norm="ortho").to(x.dtype)


class SpectralNet(nn.Module):
    """Fourier neural operator (Li et al. 2021, arXiv:2010.08895) for periodic maps.

    A 1x1 lift to ``width`` channels, ``n_layers`` Fourier layers
    ``x <- act(SpectralConv(x) + Conv1x1(x))`` (no activation after the last, as in the
    paper), and a two-layer 1x1 projection. Global receptive field from the first layer,
    periodic by construction; for a Gaussian sky the posterior mean is diagonal in Fourier
    space (a Wiener filter), which one Fourier layer can express when ``modes`` covers the
    patch.

    Parameters
    ----------
    in_channels, out_channels : int
    width : int
        Channels inside the Fourier layers (>= 1).
    n_layers : int
        Fourier layers (>= 1).
    modes : int
        Fourier modes kept per axis and sign (>= 1); ``npix // 2`` keeps them all.
    activation : str
        As in :class:`skymoments.nets.UNet`.
    zero_mean : bool
        As in :class:`skymoments.nets.UNet`.
    """

    def __init__(
        self,
        in_channels: int = 2,
        out_channels: int = 2,
        width: int = 24,
        n_layers: int = 4,
        modes: int = 16,
        activation: str = "gelu",
        zero_mean: bool = False,
    ) -> None:
        super().__init__()
        check_positive_int(in_channels, "in_channels")
        check_positive_int(out_channels, "out_channels")
        check_positive_int(width, "width")
        check_positive_int(n_layers, "n_layers")
        self.zero_mean = check_bool(zero_mean, "zero_mean")
        check_positive_int(modes, "modes")
        self.lift = nn.Conv2d(in_channels, width, kernel_size=1)
        self.spectral = nn.ModuleList(SpectralConv2d(width, width, modes) for _ in range(n_layers))
        self.pointwise = nn.ModuleList(
            nn.Conv2d(width, width, kernel_size=1) for _ in range(n_layers)
        )
        self.acts = nn.ModuleList(make_activation(activation) for _ in range(n_layers - 1))
        hidden = max(2 * width, 8)
        self.project = nn.Sequential(
            nn.Conv2d(width, hidden, kernel_size=1),
            make_activation(activation),
            nn.Conv2d(hidden, out_channels, kernel_size=1),
        )
        # Keep the lifted scale O(1) whatever the width (He-like init of the 1x1 lift).
        nn.init.normal_(self.lift.weight, std=math.sqrt(2.0 / in_channels))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Map ``x`` of shape (n, in_channels, ny, nx) to (n, out_channels, ny, nx)."""
        x = self.lift(x)
        for i, (spec, point) in enumerate(zip(self.spectral, self.pointwise, strict=True)):
            x = spec(x) + point(x)
            if i < len(self.acts):
                x = self.acts[i](x)
        x = self.project(x)
        return remove_spatial_mean(x) if self.zero_mean else x
