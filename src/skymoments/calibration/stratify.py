"""Calibration stratified by what the analyst sees, and by the true foreground (a diagnostic).

:func:`data_stratified_calibration` bins by functions of the data alone (the predicted std,
the observed polarized intensity): there a calibrated posterior has z std 1 in every bin.
:func:`stratified_calibration` bins by the true foreground, which the analyst never sees:
a diagnostic whose z std need not be 1 even for the exact posterior.

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


def _bin_index(values: np.ndarray, n_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Quantile edges and equal-count bins by rank (ties, e.g. a uniform std, split by order)."""
    flat = np.ravel(values)
    edges = np.quantile(flat, np.linspace(0.0, 1.0, n_bins + 1))
    rank = np.empty(flat.size, dtype=np.int64)
    rank[np.argsort(flat, kind="stable")] = np.arange(flat.size)
    return edges, (rank * n_bins // flat.size).reshape(np.shape(values))


def data_stratified_calibration(
    truth_eb,
    mean_eb,
    std_eb,
    data_qu,
    patch: FlatPatch,
    *,
    n_std_bins: int = 10,
    n_data_bins: int = 4,
    fwhm_pix: float | None = None,
) -> tuple[dict[str, float], dict[str, np.ndarray]]:
    """Calibration in bins of what the analyst sees: the predicted std and the data.

    A calibrated posterior has ``E[z^2 | d] = 1`` for every function of the data ``d``, so
    the z std is 1 in every bin of a quantity computed from ``d`` alone: the predicted std
    of the component itself (deciles, per component) and the observed polarized intensity
    of the data, smoothed like :func:`foreground_intensity` (quartiles, shared by E and
    B). Bins of the true foreground, by contrast, are not functions of ``d``, so there the
    z std of even the exact posterior need not be 1 (:func:`stratified_calibration` is a
    diagnostic).

    Returns
    -------
    metrics : dict
        ``calib/z_std_stddec{k}_C`` (k = 0 smallest predicted std), ``eval/std_stddec{k}_C``,
        ``calib/z_std_stddec_min_C`` / ``_max_C``, and ``calib/z_std_dbin{k}_C`` (k = 0
        faintest data), ``eval/data_p_dbin{k}`` (median data intensity, uK).
    arrays : dict
        ``std_dec_centres_C``, ``z_std_stddec_C`` (n_std_bins,); ``data_p_edges``
        (n_data_bins + 1,), ``data_p_centres``, ``z_std_dbin_C`` (n_data_bins,).
    """
    t, m, s = check_posterior_inputs(truth_eb, mean_eb, std_eb)
    d = np.asarray(data_qu, dtype=np.float64)
    if d.shape != t.shape:
        raise ValueError(f"data_qu has shape {d.shape}, expected {t.shape} like truth_eb")
    z = (t - m) / s
    metrics: dict[str, float] = {}
    arrays: dict[str, np.ndarray] = {}
    for i, c in enumerate(COMPONENTS):
        _, idx = _bin_index(s[:, i], n_std_bins)
        zs = np.array([np.std(z[:, i][idx == k]) for k in range(n_std_bins)])
        centres = np.array([np.median(s[:, i][idx == k]) for k in range(n_std_bins)])
        arrays[f"z_std_stddec_{c}"] = zs
        arrays[f"std_dec_centres_{c}"] = centres
        for k in range(n_std_bins):
            metrics[f"calib/z_std_stddec{k}_{c}"] = float(zs[k])
            metrics[f"eval/std_stddec{k}_{c}"] = float(centres[k])
        metrics[f"calib/z_std_stddec_min_{c}"] = float(zs.min())
        metrics[f"calib/z_std_stddec_max_{c}"] = float(zs.max())
    inten = foreground_intensity(d, patch, fwhm_pix)
    edges, idx = _bin_index(inten, n_data_bins)
    arrays["data_p_edges"] = edges
    arrays["data_p_centres"] = np.array([np.median(inten[idx == k]) for k in range(n_data_bins)])
    for k in range(n_data_bins):
        metrics[f"eval/data_p_dbin{k}"] = float(arrays["data_p_centres"][k])
    for i, c in enumerate(COMPONENTS):
        zs = np.array([np.std(z[:, i][idx == k]) for k in range(n_data_bins)])
        arrays[f"z_std_dbin_{c}"] = zs
        for k in range(n_data_bins):
            metrics[f"calib/z_std_dbin{k}_{c}"] = float(zs[k])
    return metrics, arrays
