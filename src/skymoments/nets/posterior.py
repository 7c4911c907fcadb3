"""The trained posterior-moment model: scalers, mean network, variance network."""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from skymoments.nets.layers import check_choice
from skymoments.nets.scaler import ChannelScaler, InputRange

POSITIVITY = ("softplus", "logvar")


class Positivity(nn.Module):
    """Map the variance network's raw output to a positive variance.

    Jeffrey & Wandelt (arXiv:2011.05991) regress the variance and do not prescribe how to
    keep it positive; this is our choice, made in config (``model.positivity``):

    ``softplus``
        ``g = softplus(raw) + eps``. Grows linearly for large ``raw``; a very small variance
        needs a very negative ``raw``. ``eps`` (scaled units, where the prior variance is
        about 1) keeps ``g`` away from zero so that ``z = residual / sqrt(g)`` is finite.
    ``logvar``
        The network predicts ``s = log g``; ``g = exp(s)``. ``s`` is held in the per-channel
        bounds ``[log_var_min, log_var_max]`` (buffers, so they travel with the model; by
        default [-30, 30], set from the problem by :meth:`set_bounds`). The bound is exact
        in the forward pass but passes the gradient through unchanged (a straight-through
        clamp): a pixel pushed against a bound still feels its residuals and can come back.

    Both keep the minimiser of the variance losses, ``Var[target | d]``, reachable inside
    the bounds.
    """

    def __init__(self, kind: str = "softplus", eps: float = 1e-6, n_channels: int = 2) -> None:
        super().__init__()
        self.kind = check_choice(kind, POSITIVITY, "model.positivity")
        if not eps >= 0:
            raise ValueError(f"positivity eps must be >= 0, got {eps!r}")
        self.eps = float(eps)
        self.register_buffer("log_var_min", torch.full((1, n_channels, 1, 1), -30.0))
        self.register_buffer("log_var_max", torch.full((1, n_channels, 1, 1), 30.0))

    @torch.no_grad()
    def set_bounds(self, var_min, var_max) -> Positivity:
        """Hold the variance in ``[var_min, var_max]`` per channel (scaled units, > 0)."""
        lo = torch.as_tensor(var_min, dtype=torch.float64).reshape(-1)
        hi = torch.as_tensor(var_max, dtype=torch.float64).reshape(-1)
        n = self.log_var_min.shape[1]
        if lo.numel() == 1:
            lo = lo.expand(n)
        if hi.numel() == 1:
            hi = hi.expand(n)
        if lo.numel() != n or hi.numel() != n:
            raise ValueError(f"variance bounds need 1 or {n} values per bound")
        if not (torch.all(lo > 0) and torch.all(hi > lo) and torch.all(torch.isfinite(hi))):
            raise ValueError(
                f"variance bounds must satisfy 0 < min < max < inf, got {lo.tolist()}, "
                f"{hi.tolist()}"
            )
        self.log_var_min.copy_(lo.log().float().view(1, n, 1, 1))
        self.log_var_max.copy_(hi.log().float().view(1, n, 1, 1))
        return self

    def log_variance(self, raw: torch.Tensor) -> torch.Tensor:
        """``log g`` of the raw output (for ``logvar``: the bounded ``s``)."""
        if self.kind == "softplus":
            return torch.log(F.softplus(raw) + self.eps)
        lo = getattr(self, "log_var_min", None)
        if lo is None:  # a model pickled before the bounds existed
            return torch.clamp(raw, -30.0, 30.0)
        hi = self.log_var_max
        if raw.ndim != 4 or raw.shape[1] != lo.shape[1]:
            # Not a batch of maps: the loosest bounds of any channel.
            lo, hi = lo.min(), hi.max()
        clamped = torch.maximum(torch.minimum(raw, hi), lo)
        return raw + (clamped - raw).detach()

    def forward(self, raw: torch.Tensor) -> torch.Tensor:
        if self.kind == "softplus":
            return F.softplus(raw) + self.eps
        return torch.exp(self.log_variance(raw))

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
    variance_sees_mean : bool
        Feed the variance network the scaled data and the mean network's output (channels
        concatenated: its ``in_channels`` is then input + target channels). Kept as a
        buffer, so a model rebuilt from its state dict feeds its variance network the same.

    The bounds of the log-variance (``positivity.log_var_min``/``log_var_max``), the
    input-range statistics (``input_range``) and the per-channel ``variance_scale`` (1 until
    :func:`skymoments.moments.recalibration.fit_variance_scale` sets it from validation
    maps) are buffers too.
    """

    def __init__(
        self,
        mean_net: nn.Module,
        var_net: nn.Module,
        input_scaler: ChannelScaler,
        target_scaler: ChannelScaler,
        positivity: str = "softplus",
        eps: float = 1e-6,
        variance_sees_mean: bool = False,
    ) -> None:
        super().__init__()
        self.mean_net = mean_net
        self.var_net = var_net
        self.input_scaler = input_scaler
        self.target_scaler = target_scaler
        self.positivity = Positivity(positivity, eps, target_scaler.n_channels)
        self.register_buffer("variance_sees_mean", torch.tensor(bool(variance_sees_mean)))
        self.input_range = InputRange()
        self.register_buffer("variance_scale", torch.ones(1, target_scaler.n_channels, 1, 1))

    def out_of_range(self, data_qu):
        """Per-patch ``(flag, score)`` from the data alone, or ``(None, None)``.

        ``flag`` (bool, shape (n,)) is True where the Q/U data (uK, (n, 2, npix, npix)) lie
        beyond the range of the training inputs recorded at training time by more than its
        margin (:class:`~skymoments.nets.scaler.InputRange`); ``score`` > 0 says by how much
        they lie outside it. A model saved before the range was recorded gives
        ``(None, None)``.
        """
        rng = getattr(self, "input_range", None)
        if rng is None or not bool(rng.fitted):
            return None, None
        return rng.flag_and_score(data_qu)

    def scaled_mean(self, x: torch.Tensor) -> torch.Tensor:
        """Posterior mean in scaled target units from scaled data."""
        return self.mean_net(x)

    def variance_input(self, x: torch.Tensor, mean: torch.Tensor | None = None) -> torch.Tensor:
        """What the variance network reads: ``x``, or ``x`` and the (detached) scaled mean."""
        if not bool(getattr(self, "variance_sees_mean", False)):
            return x
        if mean is None:
            mean = self.mean_net(x)
        return torch.cat([x, mean.detach()], dim=1)

    def scaled_log_var(self, x: torch.Tensor, mean: torch.Tensor | None = None) -> torch.Tensor:
        """Log posterior variance in scaled target units, inside the positivity bounds."""
        return self.positivity.log_variance(self.var_net(self.variance_input(x, mean)))

    def scaled_var(self, x: torch.Tensor, mean: torch.Tensor | None = None) -> torch.Tensor:
        """Posterior variance in scaled target units (positive) from scaled data.

        The variance network's output times ``variance_scale`` (per channel; 1 unless set).
        """
        raw = self.positivity(self.var_net(self.variance_input(x, mean)))
        scale = getattr(self, "variance_scale", None)
        return raw if scale is None else raw * scale

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
        scaled_mean = self.scaled_mean(x)
        mean = self.target_scaler.inverse(scaled_mean)
        var = self.target_scaler.inverse_variance(self.scaled_var(x, scaled_mean))
        return mean, var
