"""The two training stages as LightningModules: posterior mean, then posterior variance.

Both regress in scaled units (the input and target :class:`~skymoments.nets.ChannelScaler`
applied inside the step), so the losses are O(1) whatever the map amplitudes.
"""

from __future__ import annotations

import inspect
import math

import lightning.pytorch as pl
import torch
import torch.nn.functional as F
from torch import nn

from skymoments.nets.posterior import Positivity


def _configure(module: pl.LightningModule, params, monitor: str):
    """Finish the partial optimizer and scheduler of a stage.

    A scheduler whose length argument is not set in config gets the stage's own length:
    ``T_max`` = ``max_epochs`` (epoch schedulers such as CosineAnnealingLR), or
    ``total_steps`` = the trainer's estimated optimizer steps (OneCycleLR, stepped per
    batch). ReduceLROnPlateau watches the stage's validation loss.
    """
    optimizer = module.hparams.optimizer(params=params)
    make_scheduler = module.hparams.scheduler
    if make_scheduler is None:
        return optimizer
    func = getattr(make_scheduler, "func", make_scheduler)
    given = getattr(make_scheduler, "keywords", {})
    accepted = inspect.signature(func).parameters
    extra, interval = {}, "epoch"
    if "T_max" in accepted and "T_max" not in given:
        extra["T_max"] = max(int(module.trainer.max_epochs), 1)
    if "total_steps" in accepted and "total_steps" not in given:
        extra["total_steps"] = int(module.trainer.estimated_stepping_batches)
        interval = "step"
    scheduler = make_scheduler(optimizer, **extra)
    return {
        "optimizer": optimizer,
        "lr_scheduler": {"scheduler": scheduler, "interval": interval, "monitor": monitor},
    }


def _log_epoch_loss(module: pl.LightningModule, name: str, loss, batch_size: int) -> None:
    """Log a stage loss as a per-epoch mean (synced over DDP ranks), shown in the bar."""
    module.log(
        name,
        loss,
        on_step=False,
        on_epoch=True,
        sync_dist=True,
        prog_bar=True,
        batch_size=batch_size,
    )


class MeanModule(pl.LightningModule):
    """Stage one: ``f(d) ~ E[target | d]`` by least squares.

    Minimizing the mean squared error between ``f(d)`` and the target over pairs drawn
    from the prior and the simulator gives the posterior mean (Jeffrey & Wandelt 2020,
    arXiv:2011.05991, the first moment-network loss).

    Parameters
    ----------
    net : nn.Module
        Scaled Q/U (n, 2, npix, npix) to scaled E/B (n, 2, npix, npix).
    optimizer : callable
        ``optimizer(params=...)``, e.g. a ``functools.partial`` of ``torch.optim.AdamW``
        (Hydra ``_partial_: true``).
    scheduler : callable or None
        ``scheduler(optimizer, ...)``; see :func:`_configure` for the filled-in lengths.
    input_scaler, target_scaler : nn.Module or None
        Fitted :class:`~skymoments.nets.ChannelScaler`; None means no scaling.
    """

    def __init__(
        self,
        net: nn.Module,
        optimizer,
        scheduler=None,
        input_scaler: nn.Module | None = None,
        target_scaler: nn.Module | None = None,
    ) -> None:
        super().__init__()
        self.save_hyperparameters(logger=False, ignore=["net", "input_scaler", "target_scaler"])
        self.net = net
        self.input_scaler = input_scaler if input_scaler is not None else nn.Identity()
        self.target_scaler = target_scaler if target_scaler is not None else nn.Identity()

    def forward(self, x_scaled: torch.Tensor) -> torch.Tensor:
        return self.net(x_scaled)

    def _step(self, batch, split: str) -> torch.Tensor:
        data, target = batch[0], batch[1]
        x = self.input_scaler(data)
        t = self.target_scaler(target)
        loss = F.mse_loss(self.net(x), t)
        _log_epoch_loss(self, f"{split}/loss_mean", loss, data.shape[0])
        return loss

    def training_step(self, batch, batch_idx):
        return self._step(batch, "train")

    def validation_step(self, batch, batch_idx):
        return self._step(batch, "val")

    def configure_optimizers(self):
        return _configure(self, self.net.parameters(), "val/loss_mean")


VARIANCE_LOSSES = ("gaussian_nll", "squared")

_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


def gaussian_nll(resid2: torch.Tensor, log_var: torch.Tensor) -> torch.Tensor:
    """Mean Gaussian negative log-likelihood ``(r^2 exp(-s) + s + log 2 pi) / 2`` per pixel.

    Minimised over ``s`` by ``exp(s) = E[r^2 | d]``; its gradient ``(1 - r^2 exp(-s)) / 2``
    in ``s`` is large, not vanishing, where the variance is underestimated.
    """
    return torch.mean(0.5 * (resid2 * torch.exp(-log_var) + log_var) + _HALF_LOG_2PI)


class VarianceModule(pl.LightningModule):
    """Stage two: ``g(d) ~ Var[target | d]`` with the mean network frozen.

    With ``f`` the frozen posterior-mean network and ``r = target - f(d)``, the minimiser
    over ``g`` of either loss is ``E[r^2 | d] = Var[target | d]`` (the second moment of
    Jeffrey & Wandelt 2020, arXiv:2011.05991, who allow any loss with that minimiser):

    ``gaussian_nll`` (default)
        The Gaussian negative log-likelihood of ``r`` in ``s = log g``:
        ``(r^2 exp(-s) + s + log 2 pi) / 2``, a proper scoring rule of the predictive
        N(f, g) (Gneiting & Raftery 2007, JASA 102:359). It punishes an underestimate as
        ``r^2 / g`` (without bound) and an overestimate as ``log g``, and its gradient in
        ``s`` does not vanish as ``g -> 0``; checkpoint choice by its validation value is
        choice by a proper score.
    ``squared``
        ``(r^2 - g)^2``: barely punishes an underestimate, and with ``g = exp(s)`` its
        gradient in ``s`` carries a factor ``g``, so a pixel driven to a tiny variance
        cannot recover. Kept for comparison.

    The mean network is put in eval mode and its parameters get ``requires_grad=False``;
    :meth:`train` keeps it in eval mode whatever Lightning asks, so its batch-norm
    statistics do not move either.

    Parameters
    ----------
    mean_net : nn.Module
        The trained stage-one network (frozen here).
    var_net : nn.Module
        Scaled Q/U (and, with ``sees_mean``, the scaled mean) to the raw variance output.
    positivity : {"softplus", "logvar"} or Positivity
        A module is shared (its bounds are those of the model being trained).
    optimizer, scheduler, input_scaler, target_scaler
        As in :class:`MeanModule`.
    eps : float
        Softplus floor, scaled units (used when ``positivity`` is a name).
    loss : {"gaussian_nll", "squared"}
    sees_mean : bool
        Concatenate the frozen mean network's output to the variance network's input.
    """

    def __init__(
        self,
        mean_net: nn.Module,
        var_net: nn.Module,
        positivity,
        optimizer,
        scheduler=None,
        input_scaler: nn.Module | None = None,
        target_scaler: nn.Module | None = None,
        eps: float = 1e-6,
        loss: str = "gaussian_nll",
        sees_mean: bool = False,
    ) -> None:
        super().__init__()
        self.save_hyperparameters(
            logger=False,
            ignore=["mean_net", "var_net", "input_scaler", "target_scaler", "positivity"],
        )
        if loss not in VARIANCE_LOSSES:
            raise ValueError(
                f"train.variance_loss={loss!r}; choose one of {', '.join(VARIANCE_LOSSES)}"
            )
        self.loss_kind = loss
        self.sees_mean = bool(sees_mean)
        self.mean_net = mean_net
        self.mean_net.requires_grad_(False)
        self.mean_net.eval()
        self.var_net = var_net
        self.positivity = (
            positivity if isinstance(positivity, nn.Module) else Positivity(positivity, eps)
        )
        self.input_scaler = input_scaler if input_scaler is not None else nn.Identity()
        self.target_scaler = target_scaler if target_scaler is not None else nn.Identity()

    def train(self, mode: bool = True):
        super().train(mode)
        self.mean_net.eval()
        return self

    def _raw(self, x: torch.Tensor, mean: torch.Tensor) -> torch.Tensor:
        inp = torch.cat([x, mean], dim=1) if self.sees_mean else x
        return self.var_net(inp)

    def forward(self, x_scaled: torch.Tensor) -> torch.Tensor:
        with torch.no_grad():
            mean = self.mean_net(x_scaled)
        return self.positivity(self._raw(x_scaled, mean))

    def _step(self, batch, split: str) -> torch.Tensor:
        data, target = batch[0], batch[1]
        x = self.input_scaler(data)
        t = self.target_scaler(target)
        with torch.no_grad():
            mean = self.mean_net(x)
            resid2 = (t - mean) ** 2
        raw = self._raw(x, mean)
        if self.loss_kind == "gaussian_nll":
            loss = gaussian_nll(resid2, self.positivity.log_variance(raw))
        else:
            loss = F.mse_loss(self.positivity(raw), resid2)
        _log_epoch_loss(self, f"{split}/loss_var", loss, data.shape[0])
        return loss

    def training_step(self, batch, batch_idx):
        return self._step(batch, "train")

    def validation_step(self, batch, batch_idx):
        return self._step(batch, "val")

    def configure_optimizers(self):
        return _configure(self, self.var_net.parameters(), "val/loss_var")
