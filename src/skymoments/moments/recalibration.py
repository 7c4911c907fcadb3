"""One variance scale per component, fitted on the validation maps after both stages.

The variance network learns ``E[r^2 | d]`` on the *training* foregrounds. When those are
syntheses of one image, the frozen mean network's residuals on independent foregrounds
(the validation and test maps, draws the syntheses only approximate) are larger than on
the training ones, and the predicted variance is too small by a factor the training data
cannot reveal. The validation maps can: for the Gaussian predictive ``N(mu, c g)`` the
negative log-likelihood summed over validation pixels,
``sum (r^2 / (c g) + log(c g)) / 2``, is minimised by

    c = mean(r^2 / g) = mean(z^2),

one number per component (the "std scaling" recalibration of a regression model's
predicted variance on held-out data: Kuleshov, Fenner & Ermon 2018, ICML, "Accurate
uncertainties for deep learning using calibrated regression"; Levi et al. 2022, Sensors
22:5540). The validation set already chooses the checkpoints; it chooses ``c`` too, and the
reported figures stay those of the test set, which chose nothing. ``c`` is logged
(``valid/variance_scale_C``): far from 1 says how much the training foregrounds
under-describe the validation ones.
"""

from __future__ import annotations

import numpy as np
import torch

METHODS = ("none", "validation_scale")


def fit_variance_scale(
    target_eb: np.ndarray, mean_eb: np.ndarray, std_eb: np.ndarray
) -> np.ndarray:
    """``c_C = mean over maps and pixels of ((target - mean) / std)^2``, per component.

    Parameters
    ----------
    target_eb, mean_eb, std_eb : ndarray, shape (n, C, npix, npix)
        Validation truths, predicted means and predicted standard deviations (same units).

    Returns
    -------
    ndarray, shape (C,)
        The variance factors, finite and > 0.
    """
    target, mean, std = (np.asarray(a, dtype=np.float64) for a in (target_eb, mean_eb, std_eb))
    if not (target.shape == mean.shape == std.shape) or target.ndim != 4:
        raise ValueError(
            f"target, mean and std must share a shape (n, C, npix, npix), got {target.shape}, "
            f"{mean.shape}, {std.shape}"
        )
    if not np.all(std > 0):
        raise ValueError("the predicted std must be > 0 everywhere to fit a variance scale")
    z2 = ((target - mean) / std) ** 2
    scale = z2.mean(axis=(0, 2, 3))
    if not np.all(np.isfinite(scale)) or not np.all(scale > 0):
        raise ValueError(f"the fitted variance scale is not finite and positive: {scale}")
    return scale


def apply_variance_scale(model, scale: np.ndarray) -> None:
    """Multiply ``model``'s stored per-component variance factor by ``scale``."""
    buf = model.variance_scale
    factor = torch.as_tensor(np.asarray(scale, dtype=np.float64), dtype=buf.dtype)
    with torch.no_grad():
        buf.mul_(factor.view_as(buf))


def recalibrate(cfg, model, target_eb, mean_eb, std_eb):
    """Apply ``train.variance_calibration`` to ``model`` and the validation std.

    Returns ``(std_eb, metrics)``: the validation std after the scale and the fitted
    factors as ``valid/variance_scale_<C>`` (absent for ``none``).
    """
    method = str(cfg.train.get("variance_calibration", "none"))
    if method not in METHODS:
        raise ValueError(
            f"train.variance_calibration={method!r}; choose one of {', '.join(METHODS)}"
        )
    if method == "none":
        return std_eb, {}
    scale = fit_variance_scale(target_eb, mean_eb, std_eb)
    apply_variance_scale(model, scale)
    names = ("E", "B") if len(scale) == 2 else tuple(str(i) for i in range(len(scale)))
    metrics = {f"valid/variance_scale_{c}": float(v) for c, v in zip(names, scale, strict=True)}
    return np.asarray(std_eb) * np.sqrt(scale)[None, :, None, None], metrics
