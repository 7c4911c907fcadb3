"""Gaussian random E/B (and Q/U) maps with given power spectra on a flat periodic patch.

Normalization (DEVELOPERS.md; numpy's fft2 is unnormalized forward): a map ``x`` of
``N = npix**2`` pixels with spectrum ``C_ell`` has ``<|X_k|^2> = C_ell N / Omega_pix`` for
``X = fft2(x)``. We draw real white noise ``w`` with unit variance per pixel, so that
``W = fft2(w)`` has ``<|W_k|^2> = sum_x <w_x^2> = N`` for every k (Parseval), and set

    X_k = W_k * sqrt(C(|l_k|) / Omega_pix)   =>   <|X_k|^2> = N C / Omega_pix.

``W`` is Hermitian (``W_{-k} = conj(W_k)``) because ``w`` is real, and ``C(|l|)`` is even in
``l``, so ``X`` is Hermitian too and ``x = ifft2(X)`` is real: no real part is taken
that would halve the power, and the self-conjugate (Nyquist) modes get the right
variance as well. Distinct Hermitian pairs of ``W`` are independent Gaussians, so ``x`` is
a stationary Gaussian field with exactly the requested 2-D spectrum.
"""

from __future__ import annotations

import numpy as np

from skymoments.maps.eb import eb_to_qu
from skymoments.maps.geometry import FlatPatch
from skymoments.sky.seeds import as_generator

__all__ = ["gaussian_eb", "gaussian_field", "gaussian_qu", "interp_cl_2d"]

# Extrapolating a tabulated spectrum further than this factor above its last multipole
# is guesswork: ask for a larger lmax instead.
_MAX_EXTRAPOLATION = 2.0


def interp_cl_2d(ell: np.ndarray, cl: np.ndarray, patch: FlatPatch) -> np.ndarray:
    """A tabulated ``C_ell`` evaluated on the patch's 2-D multipole grid.

    Linear interpolation in ``ell``. Where the grid reaches beyond the table (the patch
    corners reach ``sqrt(2)`` times the Nyquist multipole), the spectrum is continued as
    the power law fitted in log-log to the top 10% of the table, or as zero when the table
    ends in zeros (e.g. tensor spectra beyond their computed range).

    Parameters
    ----------
    ell : ndarray, shape (nell,)
        Increasing multipoles.
    cl : ndarray, shape (nell,), uK^2
        Non-negative spectrum.
    patch : FlatPatch

    Returns
    -------
    ndarray, shape (npix, npix), uK^2
        ``C(|l|)`` in ``fft2`` layout, 0 at ``l = 0``.
    """
    ell = np.asarray(ell, dtype=float)
    cl = np.asarray(cl, dtype=float)
    if ell.ndim != 1 or cl.shape != ell.shape or len(ell) < 2:
        raise ValueError(
            f"ell and cl must be 1-D arrays of the same length >= 2, got {ell.shape} and {cl.shape}"
        )
    if not (np.all(np.isfinite(cl)) and np.all(np.isfinite(ell))):
        raise ValueError("ell and cl must be finite")
    if np.any(np.diff(ell) <= 0):
        raise ValueError("ell must be strictly increasing")
    if np.any(cl < 0):
        raise ValueError(f"cl has negative values (min {cl.min():.3g}); a power spectrum is >= 0")
    grid = patch.ell
    lmax_needed = float(grid.max())
    out = np.interp(grid, ell, cl)
    beyond = grid > ell[-1]
    if np.any(beyond):
        if lmax_needed > _MAX_EXTRAPOLATION * ell[-1]:
            raise ValueError(
                f"the spectrum stops at ell = {ell[-1]:.0f} but this patch needs ell up to "
                f"{lmax_needed:.0f}; compute it to a larger lmax (e.g. sky.cmb.lmax="
                f"{int(np.ceil(lmax_needed))})"
            )
        top = ell >= 0.9 * ell[-1]
        if np.all(cl[top] > 0) and np.count_nonzero(top) >= 2:
            slope, intercept = np.polyfit(np.log(ell[top]), np.log(cl[top]), 1)
            out[beyond] = np.exp(intercept + slope * np.log(grid[beyond]))
        else:
            out[beyond] = 0.0
    out[0, 0] = 0.0
    return out


def _as_power_2d(power, patch: FlatPatch, name: str) -> np.ndarray:
    arr = np.asarray(power, dtype=float)
    if arr.shape[-2:] != patch.shape or arr.ndim not in (2, 3):
        raise ValueError(
            f"{name} has shape {arr.shape}, expected ({patch.npix}, {patch.npix}) or "
            f"(n, {patch.npix}, {patch.npix}) on the 2-D multipole grid (see interp_cl_2d)"
        )
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be finite and non-negative (it is a power spectrum)")
    return arr


def _check_n(n) -> int:
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
        raise ValueError(f"n (number of maps) must be a positive integer, got {n!r}")
    return int(n)


def gaussian_field(
    patch: FlatPatch, power_2d: np.ndarray, rng, n: int, channels: int | None = None
) -> np.ndarray:
    """Real Gaussian maps whose 2-D power spectrum is ``power_2d`` (see module docstring).

    Parameters
    ----------
    patch : FlatPatch
    power_2d : ndarray, shape (..., npix, npix), uK^2
        ``C(l)`` on the fft2 grid, broadcast against the output; must be even in ``l``.
    rng : numpy.random.Generator or int
    n : int
        Number of maps.
    channels : int, optional
        When given, the output is (n, channels, npix, npix) with independent channels.

    Returns
    -------
    ndarray, shape (n, [channels,] npix, npix), microkelvin
    """
    rng = as_generator(rng)
    n = _check_n(n)
    shape = (
        (n, patch.npix, patch.npix) if channels is None else (n, channels, patch.npix, patch.npix)
    )
    white = rng.standard_normal(shape)
    half = patch.npix // 2 + 1
    # rfft2 keeps the non-negative-x half of the fft2 grid; Hermitian symmetry gives the rest.
    amp = np.sqrt(np.asarray(power_2d, dtype=float)[..., :half] / patch.omega_pix)
    return np.fft.irfft2(np.fft.rfft2(white) * amp, s=patch.shape)


def gaussian_eb(patch: FlatPatch, cl_ee_2d, cl_bb_2d, rng, n: int) -> np.ndarray:
    """Independent Gaussian E and B maps with the given spectra.

    Parameters
    ----------
    patch : FlatPatch
    cl_ee_2d, cl_bb_2d : ndarray, shape (npix, npix) or (n, npix, npix), uK^2
        Spectra on the 2-D multipole grid (:func:`interp_cl_2d`); a leading ``n`` axis
        gives each map its own spectrum.
    rng : numpy.random.Generator or int
    n : int
        Number of maps.

    Returns
    -------
    ndarray, shape (n, 2, npix, npix), microkelvin
        Real-space (E, B) maps.
    """
    n = _check_n(n)
    ee = _as_power_2d(cl_ee_2d, patch, "cl_ee_2d")
    bb = _as_power_2d(cl_bb_2d, patch, "cl_bb_2d")
    for name, arr in (("cl_ee_2d", ee), ("cl_bb_2d", bb)):
        if arr.ndim == 3 and arr.shape[0] != n:
            raise ValueError(f"{name} has {arr.shape[0]} per-map spectra but n = {n} maps")
    power = np.stack(np.broadcast_arrays(ee, bb), axis=-3)  # (2, ...) or (n, 2, ...)
    return gaussian_field(patch, power, rng, n, channels=2)


def gaussian_qu(patch: FlatPatch, cl_ee_2d, cl_bb_2d, rng, n: int) -> np.ndarray:
    """Gaussian Q/U maps with the given E and B spectra (:func:`gaussian_eb` then eb_to_qu).

    Returns
    -------
    ndarray, shape (n, 2, npix, npix), microkelvin
    """
    return eb_to_qu(gaussian_eb(patch, cl_ee_2d, cl_bb_2d, rng, n), patch)
