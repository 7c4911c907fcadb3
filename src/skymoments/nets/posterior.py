"""The trained posterior-moment model: scalers, mean network, variance network."""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from skymoments.nets.layers import check_choice
from skymoments.nets.scaler import ChannelScaler

POSITIVITY = ("softplus", "logvar")


class Positivity(nn.Module):
    """Map the variance network's raw output to a positive variance.

    Jeffrey & Wandelt (arXiv:2011.05991) regress the variance with a squared loss and do
    not prescribe how to keep it positive; this is our choice, made in config
    (``model.positivity``):

    ``softplus``
        ``g = softplus(raw) + eps``. Grows linearly for large ``raw``, so the gradient of
        the squared variance loss stays bounded for large residuals; a very small variance
        needs a very negative ``raw``. ``eps`` (scaled units, where the prior variance is
        about 1) keeps ``g`` away from zero so that ``z = residual / sqrt(g)`` is finite.
    ``logvar``
        The network predicts ``log g``; ``g = exp(raw)``, with ``raw`` clipped to
        [-30, 30] against overflow. Treats relative errors in ``g`` alike over orders of
        magnitude, which helps where the posterior variance spans many decades (bright
        and faint foreground regions); the loss gradient grows with ``g``, so pair it with
        gradient clipping.

    Both keep the minimiser of the squared variance loss, ``Var[target | d]``, reachable.
    """

    def __init__(self, kind: str = "softplus", eps: float = 1e-6) -> None:
        super().__init__()
        self.kind = check_choice(kind, POSITIVITY, "model.positivity")
        if not eps >= 0:
            raise ValueError(f"positivity eps must be >= 0, got {eps!r}")
        self.eps = float(eps)

    def forward(self, raw: torch.Tensor) -> torch.Tensor:
        if self.kind == "softplus":
            return F.softplus(raw) + self.eps
        return torch.exp(torch.clamp(raw, -30.0, 30.0))

    def extra_repr(self) -> str:
        return f"kind={self.kind!r}, eps={self.eps}"


class PosteriorMoments(nn.Module):
    """Pixel-level posterior mean and variance of E/B maps from Q/U data.

    Self-contained: it holds the input and target scalers (as buffers), both networks and
    the positivity map, and no reference to scenarios or configs, so it pickles, logs
    with MLflow's PyTorch flavour, and reloads to identical outputs.

    Parameters
    ----------
    mean_net, var_net : nn.Module
        Networks from scaled Q/U (n, 2, npix, npix) to scaled E/B (n, 2, npix, npix); the
        variance network's output is raw (before positivity).
    input_scaler, target_scaler : ChannelScaler
        Fitted on training data Q/U and target E/B.
    positivity : {"softplus", "logvar"}
        See :class:`Positivity`.
    eps : float
        Floor of the softplus variance, in scaled units.
    """

    def __init__(
        self,
        mean_net: nn.Module,
        var_net: nn.Module,
        input_scaler: ChannelScaler,
        target_scaler: ChannelScaler,
        positivity: str = "softplus",
        eps: float = 1e-6,
    ) -> None:
        super().__init__()
        self.mean_net = mean_net
        self.var_net = var_net
        self.input_scaler = input_scaler
        self.target_scaler = target_scaler
        self.positivity = Positivity(positivity, eps)

    def scaled_mean(self, x: torch.Tensor) -> torch.Tensor:
        """Posterior mean in scaled target units from scaled data."""
        return self.mean_net(x)

    def scaled_var(self, x: torch.Tensor) -> torch.Tensor:
        """Posterior variance in scaled target units (positive) from scaled data."""
        return self.positivity(self.var_net(x))

    def forward(self, data_qu: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Posterior moments of E/B given Q/U data.

        Parameters
        ----------
        data_qu : Tensor, shape (n, 2, npix, npix), microkelvin

        Returns
        -------
        mean_eb : Tensor, shape (n, 2, npix, npix), microkelvin
        var_eb : Tensor, shape (n, 2, npix, npix), microkelvin^2, positive
        """
        if data_qu.ndim != 4 or data_qu.shape[1] != self.input_scaler.n_channels:
            raise ValueError(
                f"data_qu must be shaped (n, {self.input_scaler.n_channels}, npix, npix), "
                f"got {tuple(data_qu.shape)}"
            )
        x = self.input_scaler(data_qu)
        mean = self.target_scaler.inverse(self.scaled_mean(x))
        var = self.target_scaler.inverse_variance(self.scaled_var(x))
        return mean, var
