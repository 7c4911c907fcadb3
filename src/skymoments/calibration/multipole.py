"""Per-multipole figures of a posterior mean X against the truth Y (common practice).

* cross-correlation ``r_ell = C^XY / sqrt(C^XX C^YY)``;
* transfer function ``T_ell = C^XY / C^YY``;
* residual spectrum ``C^RR`` of ``R = X - Y``, compared with the signal ``C^YY``.

The binned spectra are averaged over the validation maps first and the ratios are formed
from the averages (a ratio of per-map estimates would be biased by each map's noise).

Effective signal-to-noise (``eval/snr_gain_C``). For an estimate X of the truth Y,

    SNR(X) = sum_b C_b^YY / sum_b C_b^RR,   R = X - Y,

over the multipole bins b (each bin weighs equally, so large scales count as much as the
many small-scale modes; the pixel MSE would be dominated by the latter). The gain is
``SNR(posterior mean) / SNR(raw data)``, where the raw data's own estimate of E/B is
``qu_to_eb(data_qu)``, i.e. no filtering at all: a gain above 1 means the posterior mean is
closer to the truth, scale by scale, than the data are.
"""

from __future__ import annotations

import numpy as np

from skymoments.calibration.metrics import COMPONENTS
from skymoments.maps.eb import qu_to_eb
from skymoments.maps.geometry import FlatPatch
from skymoments.maps.spectra import bin_2d, cross_power_2d


def _spectra(x: np.ndarray, y: np.ndarray, patch: FlatPatch, edges) -> dict[str, np.ndarray]:
    """Map-averaged binned XX, YY, XY and residual spectra, keys like ``XY_E`` (nbins,).

    One FFT per input: the residual's modes are ``X_k - Y_k`` by linearity. Averaging the
    2-D power over maps before binning equals binning then averaging (both are linear).
    """
    fx = np.fft.fft2(x)
    fy = np.fft.fft2(y)
    out: dict[str, np.ndarray] = {}
    lead = tuple(range(x.ndim - 3))  # the map axes, averaged over
    for i, c in enumerate(COMPONENTS):
        a, b = fx[..., i, :, :], fy[..., i, :, :]
        for key, p2 in (
            ("XX", cross_power_2d(a, a, patch)),
            ("YY", cross_power_2d(b, b, patch)),
            ("XY", cross_power_2d(a, b, patch)),
            ("RR", cross_power_2d(a - b, a - b, patch)),
        ):
            ell, out[f"{key}_{c}"] = bin_2d(np.mean(p2, axis=lead), patch, edges)
    out["ell"] = ell
    return out


def snr(signal_cl: np.ndarray, residual_cl: np.ndarray) -> float:
    """``sum_b C_b^YY / sum_b C_b^RR`` over the finite bins (see the module docstring)."""
    ok = np.isfinite(signal_cl) & np.isfinite(residual_cl)
    den = float(np.sum(residual_cl[ok]))
    return float(np.sum(signal_cl[ok]) / den) if den > 0 else float("inf")


def multipole_figures(
    mean_eb,
    truth_eb,
    patch: FlatPatch,
    *,
    data_qu=None,
    edges: np.ndarray | None = None,
) -> tuple[dict[str, float], dict[str, np.ndarray]]:
    """r_ell, T_ell, residual spectra and the SNR gain of a posterior mean.

    Parameters
    ----------
    mean_eb : ndarray, shape (n, 2, npix, npix), microkelvin
        Posterior mean X (E, B).
    truth_eb : ndarray, same shape, microkelvin
        Truth Y.
    patch : FlatPatch
    data_qu : ndarray, shape (n, 2, npix, npix), microkelvin, optional
        The data; when given, ``eval/snr_gain_C`` is computed against ``qu_to_eb(data_qu)``.
    edges : ndarray, optional
        Multipole bin edges (default ``patch.default_bin_edges()``).

    Returns
    -------
    metrics : dict
        ``eval/snr_C`` and, with data, ``eval/snr_data_C`` and ``eval/snr_gain_C``.
    arrays : dict
        ``ell`` (nbins,); per component ``r_ell_C``, ``T_ell_C``, ``cl_signal_C``,
        ``cl_mean_C``, ``cl_residual_C`` and, with data, ``cl_residual_data_C`` (uK^2).
    """
    x = np.asarray(mean_eb, dtype=np.float64)
    y = np.asarray(truth_eb, dtype=np.float64)
    if x.shape != y.shape:
        raise ValueError(f"mean_eb {x.shape} and truth_eb {y.shape} must have the same shape")
    patch.check_maps(x, "mean_eb")
    patch.check_maps(y, "truth_eb")
    sp = _spectra(x, y, patch, edges)
    arrays: dict[str, np.ndarray] = {"ell": sp["ell"]}
    metrics: dict[str, float] = {}
    sd = None
    if data_qu is not None:
        d = np.asarray(data_qu, dtype=np.float64)
        if d.shape != y.shape:
            raise ValueError(f"data_qu {d.shape} must have the shape of truth_eb {y.shape}")
        sd = _spectra(qu_to_eb(d, patch), y, patch, edges)
    for c in COMPONENTS:
        xx, yy, xy, rr = (sp[f"{k}_{c}"] for k in ("XX", "YY", "XY", "RR"))
        with np.errstate(invalid="ignore", divide="ignore"):
            arrays[f"r_ell_{c}"] = xy / np.sqrt(xx * yy)
            arrays[f"T_ell_{c}"] = xy / yy
        arrays[f"cl_signal_{c}"] = yy
        arrays[f"cl_mean_{c}"] = xx
        arrays[f"cl_residual_{c}"] = rr
        metrics[f"eval/snr_{c}"] = snr(yy, rr)
        if sd is not None:
            arrays[f"cl_residual_data_{c}"] = sd[f"RR_{c}"]
            metrics[f"eval/snr_data_{c}"] = snr(yy, sd[f"RR_{c}"])
            metrics[f"eval/snr_gain_{c}"] = metrics[f"eval/snr_{c}"] / metrics[f"eval/snr_data_{c}"]
    return metrics, arrays
