"""Per-channel affine scaling, fitted on training draws and saved with the model."""

from __future__ import annotations

import numpy as np
import torch
from torch import nn

from skymoments.nets.layers import check_positive_int


class ChannelScaler(nn.Module):
    """``y = (x - shift) / scale`` per channel, with ``shift`` and ``scale`` as buffers.

    The buffers live in the ``state_dict``, so a saved model carries the scaling it was
    trained with. Call :meth:`fit` once on training draws before use.

    Parameters
    ----------
    n_channels : int
        Channels of the maps (2 for Q/U or E/B).
    center : bool
        Fit ``shift`` as the channel mean. With ``False`` the shift stays 0 and ``scale`` is
        the root mean square: right for E/B maps, whose ``l = 0`` mode is zero by
        construction, so that a zero network output means a zero map.
    """

    def __init__(self, n_channels: int = 2, center: bool = True) -> None:
        super().__init__()
        check_positive_int(n_channels, "n_channels")
        self.center = bool(center)
        self.register_buffer("shift", torch.zeros(1, n_channels, 1, 1))
        self.register_buffer("scale", torch.ones(1, n_channels, 1, 1))
        self.register_buffer("fitted", torch.tensor(False))

    @property
    def n_channels(self) -> int:
        return int(self.shift.shape[1])

    @torch.no_grad()
    def fit(self, x) -> ChannelScaler:
        """Fit shift and scale on a batch of maps.

        Parameters
        ----------
        x : ndarray or Tensor, shape (n, n_channels, ny, nx), physical units (e.g. uK)

        Returns
        -------
        self
        """
        arr = x.detach().cpu().numpy() if isinstance(x, torch.Tensor) else np.asarray(x)
        if arr.ndim != 4 or arr.shape[1] != self.n_channels:
            raise ValueError(
                f"ChannelScaler.fit needs maps shaped (n, {self.n_channels}, ny, nx), "
                f"got {arr.shape}"
            )
        if not np.all(np.isfinite(arr)):
            raise ValueError("ChannelScaler.fit got NaN or infinite values; check the draws")
        arr = arr.astype(np.float64)
        shift = arr.mean(axis=(0, 2, 3)) if self.center else np.zeros(self.n_channels)
        scale = np.sqrt(np.mean((arr - shift[None, :, None, None]) ** 2, axis=(0, 2, 3)))
        if np.any(scale <= 0):
            raise ValueError(
                f"ChannelScaler.fit found a constant channel (scale {scale.tolist()}); "
                "the training draws carry no signal in it"
            )
        self.shift.copy_(torch.as_tensor(shift).view(1, -1, 1, 1))
        self.scale.copy_(torch.as_tensor(scale).view(1, -1, 1, 1))
        self.fitted.fill_(True)
        return self

    def _check(self) -> None:
        if not bool(self.fitted):
            raise ValueError("ChannelScaler used before fit(); fit it on training draws first")

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Scaled maps ``(x - shift) / scale``, same shape as ``x``."""
        self._check()
        return (x - self.shift) / self.scale

    def inverse(self, y: torch.Tensor) -> torch.Tensor:
        """Physical maps ``y * scale + shift`` from scaled maps."""
        self._check()
        return y * self.scale + self.shift

    def inverse_variance(self, v: torch.Tensor) -> torch.Tensor:
        """Physical variance ``v * scale**2`` from a variance in scaled units."""
        self._check()
        return v * self.scale**2

    def extra_repr(self) -> str:
        return f"n_channels={self.n_channels}, center={self.center}"
