"""White instrumental noise and a Gaussian beam on a flat patch.

A white-noise level ``w`` in uK-arcmin means a noise power ``C_ell = (w * arcmin)^2``
(arcmin in radians) for each of Q and U (and so for E and B, which are a rotation of
them per mode). With ``C_ell = sigma_pix^2 Omega_pix`` for uncorrelated pixels, the
per-pixel standard deviation is ``sigma_pix = w / pixel_arcmin`` (e.g. Knox 1995,
Phys. Rev. D 52, 4307, for the white-noise spectrum; memory, for the citation).

Beam: a circular Gaussian of full width at half maximum ``fwhm`` has the transfer
function ``B_ell = exp(-ell (ell + 1) sigma^2 / 2)`` with ``sigma = fwhm / sqrt(8 ln 2)``
(the standard harmonic-space Gaussian beam, as in ``healpy.gauss_beam``).
"""

from __future__ import annotations

import numpy as np

from skymoments.maps.geometry import ARCMIN, FlatPatch
from skymoments.sky.seeds import as_generator

__all__ = ["apply_beam", "beam_transfer", "noise_power_2d", "white_noise_qu"]


def _levels(uk_arcmin, n: int | None, name: str = "uk_arcmin") -> np.ndarray:
    arr = np.asarray(uk_arcmin, dtype=float)
    if arr.ndim > 1 or (arr.ndim == 1 and n is not None and arr.shape[0] != n):
        raise ValueError(
            f"{name} must be a number or an array of length n = {n} (one level per map), "
            f"got shape {arr.shape}"
        )
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be finite and >= 0 uK-arcmin, got {uk_arcmin!r}")
    return arr


def white_noise_qu(patch: FlatPatch, uk_arcmin, rng, n: int) -> np.ndarray:
    """White Gaussian noise maps for Q and U.

    Parameters
    ----------
    patch : FlatPatch
    uk_arcmin : float or ndarray, shape (n,), uK-arcmin
        Noise level, one for all maps or one per map.
    rng : numpy.random.Generator or int
    n : int
        Number of maps.

    Returns
    -------
    ndarray, shape (n, 2, npix, npix), microkelvin
        Independent pixels with standard deviation ``uk_arcmin / pixel_arcmin``.
    """
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
        raise ValueError(f"n (number of maps) must be a positive integer, got {n!r}")
    levels = _levels(uk_arcmin, int(n))
    sigma = np.broadcast_to(levels / patch.pixel_arcmin, (int(n),))
    rng = as_generator(rng)
    white = rng.standard_normal((int(n), 2, patch.npix, patch.npix))
    return white * sigma[:, None, None, None]


def beam_sigma_rad(fwhm_arcmin: float) -> float:
    """Gaussian beam standard deviation in radians from its FWHM in arcmin."""
    if not np.isfinite(fwhm_arcmin) or fwhm_arcmin < 0:
        raise ValueError(f"beam FWHM must be >= 0 arcmin, got {fwhm_arcmin!r}")
    return float(fwhm_arcmin) * ARCMIN / np.sqrt(8.0 * np.log(2.0))


def beam_transfer(patch: FlatPatch, fwhm_arcmin: float) -> np.ndarray:
    """Gaussian beam transfer function on the patch's multipole grid.

    Parameters
    ----------
    patch : FlatPatch
    fwhm_arcmin : float
        Full width at half maximum, arcmin; 0 means no beam.

    Returns
    -------
    ndarray, shape (npix, npix)
        ``B_ell = exp(-ell (ell + 1) sigma^2 / 2)``, fft2 layout, 1 at ``l = 0``.
    """
    sigma = beam_sigma_rad(fwhm_arcmin)
    ell = patch.ell
    return np.exp(-0.5 * ell * (ell + 1.0) * sigma**2)


def apply_beam(qu: np.ndarray, patch: FlatPatch, fwhm_arcmin: float) -> np.ndarray:
    """Convolve Q and U maps with a circular Gaussian beam.

    A circular beam commutes with the spin-2 rotation to E/B, so it acts on Q and U
    alike and on E and B with the same ``B_ell``.

    Parameters
    ----------
    qu : ndarray, shape (..., 2, npix, npix), microkelvin
    patch : FlatPatch
    fwhm_arcmin : float
        0 returns a copy of ``qu`` unchanged.

    Returns
    -------
    ndarray, same shape as ``qu``, microkelvin
    """
    qu = np.asarray(qu, dtype=float)
    patch.check_maps(qu, "qu")
    if fwhm_arcmin == 0:
        return qu.copy()
    bl = beam_transfer(patch, fwhm_arcmin)
    half = patch.npix // 2 + 1
    return np.fft.irfft2(np.fft.rfft2(qu) * bl[:, :half], s=patch.shape)


def noise_power_2d(patch: FlatPatch, uk_arcmin) -> np.ndarray:
    """White-noise power on the 2-D multipole grid, for each of Q, U, E and B.

    Parameters
    ----------
    patch : FlatPatch
    uk_arcmin : float or ndarray, shape (n,), uK-arcmin

    Returns
    -------
    ndarray, shape (npix, npix) or (n, npix, npix), uK^2
        ``(uk_arcmin * arcmin)^2`` at every multipole (arcmin in radians).
    """
    levels = _levels(uk_arcmin, None)
    cl = (levels * ARCMIN) ** 2
    return np.broadcast_to(cl[..., None, None], (*levels.shape, *patch.shape)).copy()
