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


class InputRange(nn.Module):
    """The range of observable statistics of the training inputs, and a per-patch flag.

    A moment network is a fit to the training distribution of the data; on a patch whose
    data look unlike anything it was trained on (brighter or more peaked foregrounds) its
    moments are an extrapolation. The statistics are computed from the data ``d`` alone,
    never from the truth, so the flag is available wherever the posterior is used.

    Statistics of one patch: the polarized intensity ``P = sqrt(Q^2 + U^2)`` of the data,
    smoothed by a periodic Gaussian of each FWHM in ``fwhm_pix`` (0: unsmoothed), and its
    ``quantiles`` over the patch pixels; features are their natural logarithms (intensity
    ranges over decades). Quantiles of the intensity at several scales follow both the
    brightness (high quantiles) and how concentrated it is (high against median, scale by
    scale) while being robust to any single pixel.

    :meth:`fit` records, per feature, the minimum and maximum over the training patches.
    :meth:`score` of a patch is ``max_k (f_k - max_k^train) / (max_k^train - min_k^train)``:
    positive when at least one feature lies above everything seen in training, in units of
    the training spread. Only the upper side is flagged: fainter than the faintest training
    patch is not an extrapolation into brighter foregrounds. :meth:`flag` is
    ``score > margin``: a network's moments degrade gradually beyond the training range,
    not at its edge, so ``margin`` (in the same units; ``train.range_margin``) sets how far
    beyond it a patch must lie to be flagged. On the quickstart the validation maps with
    scores in (0, 0.2] were calibrated like the in-range ones (E z std 0.99 to 1.00), those
    above 0.2 less so (experiments/quickstart/README.md), whence the default 0.2 there.

    Buffers (``fwhm_pix``, ``quantiles``, ``low``, ``high``, ``fitted``, ``margin``) travel
    with the model's state dict; a model stored before ``margin`` existed flags at 0.
    """

    def __init__(
        self, fwhm_pix=(0.0, 3.0, 8.0), quantiles=(0.5, 0.99), margin: float = 0.0
    ) -> None:
        super().__init__()
        self.register_buffer("fwhm_pix", torch.as_tensor(fwhm_pix, dtype=torch.float64))
        self.register_buffer("quantiles", torch.as_tensor(quantiles, dtype=torch.float64))
        n = len(fwhm_pix) * len(quantiles)
        self.register_buffer("low", torch.zeros(n, dtype=torch.float64))
        self.register_buffer("high", torch.zeros(n, dtype=torch.float64))
        self.register_buffer("fitted", torch.tensor(False))
        self.register_buffer("margin", torch.tensor(0.0, dtype=torch.float64))
        self.set_margin(margin)

    def set_margin(self, margin: float) -> InputRange:
        """Flag patches whose :meth:`score` exceeds ``margin`` (>= 0, training spreads)."""
        margin = float(margin)
        if not margin >= 0.0:
            raise ValueError(
                f"the out-of-range margin must be >= 0 (in units of the training spread), "
                f"got {margin}"
            )
        self.margin.fill_(margin)
        return self

    @property
    def n_features(self) -> int:
        return int(self.fwhm_pix.numel() * self.quantiles.numel())

    def feature_names(self) -> list[str]:
        """``log_P_q<quantile>_fwhm<pixels>`` per feature, in the order of :meth:`features`."""
        return [
            f"log_P_q{float(q):g}_fwhm{float(f):g}" for f in self.fwhm_pix for q in self.quantiles
        ]

    @torch.no_grad()
    def features(self, data_qu) -> torch.Tensor:
        """Per-patch features, shape (n, n_features), float64, from Q/U data (n, 2, ny, nx)."""
        x = torch.as_tensor(
            np.asarray(data_qu) if not isinstance(data_qu, torch.Tensor) else data_qu
        )
        x = x.detach().to("cpu", torch.float64)
        if x.ndim != 4 or x.shape[1] != 2:
            raise ValueError(
                f"input-range statistics need Q/U maps (n, 2, ny, nx), got {tuple(x.shape)}"
            )
        if not torch.all(torch.isfinite(x)):
            raise ValueError(
                "input-range statistics got NaN or infinite data; mask or fill them first"
            )
        amp = torch.hypot(x[:, 0], x[:, 1])
        ny, nx = amp.shape[-2:]
        ky = 2.0 * np.pi * torch.fft.fftfreq(ny, dtype=torch.float64)
        kx = 2.0 * np.pi * torch.fft.fftfreq(nx, dtype=torch.float64)
        k2 = ky[:, None] ** 2 + kx[None, :] ** 2
        spec = torch.fft.fft2(amp)
        tiny = torch.finfo(torch.float64).tiny
        cols = []
        for fwhm in self.fwhm_pix.tolist():
            if fwhm > 0:
                sigma = fwhm / np.sqrt(8.0 * np.log(2.0))  # FWHM = sigma sqrt(8 ln 2)
                sm = torch.fft.ifft2(spec * torch.exp(-0.5 * sigma**2 * k2)).real
            else:
                sm = amp
            q = torch.quantile(sm.reshape(len(sm), -1), self.quantiles, dim=1).T
            cols.append(torch.log(torch.clamp(q, min=tiny)))
        return torch.cat(cols, dim=1)

    @torch.no_grad()
    def fit(self, data_qu) -> InputRange:
        """Record the per-feature range over the training patches ``data_qu``."""
        return self.fit_features(self.features(data_qu))

    @torch.no_grad()
    def fit_features(self, f: torch.Tensor) -> InputRange:
        """Record the per-feature range of precomputed :meth:`features` (n, n_features)."""
        if len(f) < 2:
            raise ValueError("the input range needs at least 2 training patches")
        self.low.copy_(f.min(dim=0).values)
        self.high.copy_(f.max(dim=0).values)
        self.fitted.fill_(True)
        return self

    @torch.no_grad()
    def score(self, data_qu) -> np.ndarray:
        """Per-patch out-of-range score, shape (n,) (> 0: outside the training range)."""
        if not bool(self.fitted):
            raise ValueError(
                "this model has no input-range statistics (trained before they were recorded)"
            )
        f = self.features(data_qu)
        spread = torch.clamp(self.high - self.low, min=1e-12)
        return ((f - self.high) / spread).max(dim=1).values.numpy()

    def flag_and_score(self, data_qu) -> tuple[np.ndarray, np.ndarray]:
        """Per-patch ``(flag, score)`` from one feature pass: ``flag`` is ``score > margin``."""
        score = self.score(data_qu)
        return score > float(self.margin), score

    def flag(self, data_qu) -> np.ndarray:
        """Per-patch boolean: True where the data lie beyond the training range + margin."""
        return self.flag_and_score(data_qu)[0]
