"""Calibration stratified by the local intensity of the true foreground.

Intensity. ``I = G * |P_fg|`` with ``|P_fg| = sqrt(Q_fg^2 + U_fg^2)`` the polarized
intensity of the true foreground and ``G`` a periodic Gaussian of FWHM ``fwhm_pix`` pixels
(default: one eighth of the patch side, 8 pixels = 24 arcmin on the 64 x 3' quickstart
patch). We smooth the modulus rather than Q and U so that neighbouring filaments of
opposite orientation add up instead of cancelling: ``I`` measures how much foreground
sits near a pixel, which is what should change the posterior there. The scale is a
fraction of the patch so that each map holds several independent regions.

Bins. Quantiles of ``I`` over all validation pixels (equal pixel counts per bin). Per bin
and component: the z std, the mean predicted std, the mean ``|posterior mean|`` and the
mean ``|truth|``. Where the foreground is strong, a good posterior's mean shrinks toward
zero (``|mean| / |truth|`` falls) and its std rises, while the z std stays 1.
"""

from __future__ import annotations

import numpy as np

from skymoments.calibration.metrics import COMPONENTS, check_posterior_inputs
from skymoments.maps.geometry import FlatPatch


def foreground_intensity(
    foreground_qu, patch: FlatPatch, fwhm_pix: float | None = None
) -> np.ndarray:
    """Smoothed polarized intensity of the foreground, shape (n, npix, npix), microkelvin.

    Parameters
    ----------
    foreground_qu : ndarray, shape (n, 2, npix, npix), microkelvin
    patch : FlatPatch
    fwhm_pix : float, optional
        FWHM of the Gaussian in pixels (default ``npix / 8``); 0 disables smoothing.
    """
    fg = np.asarray(foreground_qu, dtype=np.float64)
    patch.check_maps(fg, "foreground_qu")
    fwhm = patch.npix / 8.0 if fwhm_pix is None else float(fwhm_pix)
    if not np.isfinite(fwhm) or fwhm < 0:
        raise ValueError(f"fwhm_pix must be >= 0 pixels, got {fwhm_pix!r}")
    amp = np.hypot(fg[..., 0, :, :], fg[..., 1, :, :])
    if fwhm == 0:
        return amp
    sigma = fwhm / np.sqrt(8.0 * np.log(2.0))  # FWHM = sigma sqrt(8 ln 2)
    k = 2.0 * np.pi * np.fft.fftfreq(patch.npix)  # radians per pixel
    ky, kx = np.meshgrid(k, k, indexing="ij")
    kernel = np.exp(-0.5 * sigma**2 * (kx**2 + ky**2))  # Fourier transform of the Gaussian
    return np.fft.ifft2(np.fft.fft2(amp) * kernel).real


def stratified_calibration(
    truth_eb,
    mean_eb,
    std_eb,
    foreground_qu,
    patch: FlatPatch,
    *,
    n_bins: int = 4,
    fwhm_pix: float | None = None,
) -> tuple[dict[str, float], dict[str, np.ndarray]]:
    """Calibration per quantile bin of the local foreground intensity.

    Parameters
    ----------
    truth_eb, mean_eb, std_eb : ndarray, shape (n, 2, npix, npix), microkelvin
    foreground_qu : ndarray, shape (n, 2, npix, npix), microkelvin
        The true foreground of the same validation maps (Q, U).
    patch : FlatPatch
    n_bins : int
        Number of quantile bins (at least 2).
    fwhm_pix : float, optional
        Smoothing of the intensity, see :func:`foreground_intensity`.

    Returns
    -------
    metrics : dict
        Per bin k (0 = faintest) and component C: ``calib/z_std_fgbin{k}_C``,
        ``eval/std_fgbin{k}_C`` (mean predicted std), ``eval/abs_mean_fgbin{k}_C`` and
        ``eval/abs_truth_fgbin{k}_C``.
    arrays : dict
        ``fg_edges`` (n_bins + 1,) and ``fg_centres`` (n_bins,) in uK, ``fg_counts``
        (n_bins,) pixels per bin; per component
        ``z_std_fg_C``, ``std_fg_C``, ``abs_mean_fg_C``, ``abs_truth_fg_C`` (n_bins,).
    """
    t, m, s = check_posterior_inputs(truth_eb, mean_eb, std_eb)
    fg = np.asarray(foreground_qu, dtype=np.float64)
    if fg.shape != t.shape:
        raise ValueError(
            f"foreground_qu has shape {fg.shape}, expected {t.shape} (the validation maps' "
            "true foreground in Q/U)"
        )
    if n_bins < 2:
        raise ValueError(f"n_bins must be >= 2 for a stratification, got {n_bins}")
    inten = foreground_intensity(fg, patch, fwhm_pix)
    edges = np.quantile(inten, np.linspace(0.0, 1.0, n_bins + 1))
    idx = np.clip(np.searchsorted(edges, inten, side="right") - 1, 0, n_bins - 1)
    z = (t - m) / s
    metrics: dict[str, float] = {}
    arrays: dict[str, np.ndarray] = {
        "fg_edges": edges,
        "fg_centres": np.array([np.median(inten[idx == k]) for k in range(n_bins)]),
        "fg_counts": np.bincount(idx.ravel(), minlength=n_bins),
    }
    for i, c in enumerate(COMPONENTS):
        rows = {"z_std_fg": [], "std_fg": [], "abs_mean_fg": [], "abs_truth_fg": []}
        for k in range(n_bins):
            sel = idx == k
            rows["z_std_fg"].append(float(np.std(z[:, i][sel])))
            rows["std_fg"].append(float(np.mean(s[:, i][sel])))
            rows["abs_mean_fg"].append(float(np.mean(np.abs(m[:, i][sel]))))
            rows["abs_truth_fg"].append(float(np.mean(np.abs(t[:, i][sel]))))
            metrics[f"calib/z_std_fgbin{k}_{c}"] = rows["z_std_fg"][-1]
            metrics[f"eval/std_fgbin{k}_{c}"] = rows["std_fg"][-1]
            metrics[f"eval/abs_mean_fgbin{k}_{c}"] = rows["abs_mean_fg"][-1]
            metrics[f"eval/abs_truth_fgbin{k}_{c}"] = rows["abs_truth_fg"][-1]
        for key, vals in rows.items():
            arrays[f"{key}_{c}"] = np.array(vals)
    return metrics, arrays
