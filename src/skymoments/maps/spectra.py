"""Binned auto- and cross-power spectra on a flat patch.

Normalization: for a periodic map with FFT ``X_k = fft2(x)``, a Gaussian realization
of ``C_ell`` has ``<|X_k|^2> = C_ell * N / Omega_pix`` with ``N = npix**2`` the pixel count
and ``Omega_pix`` the pixel solid angle (numpy's unnormalized forward fft2). We
invert that, and divide by ``mean(w**2)`` when an apodization window ``w`` is applied
(the standard pseudo-C_ell correction for the lost power; mode coupling is not undone).
"""

from __future__ import annotations

import numpy as np

from skymoments.maps.eb import qu_to_eb_fourier
from skymoments.maps.geometry import FlatPatch


def apodization_window(npix: int, width: float = 0.15, kind: str = "hann") -> np.ndarray:
    """A separable window that tapers to zero at the patch edges.

    Parameters
    ----------
    npix : int
    width : float
        Fraction of the side over which each edge tapers, in (0, 0.5]; ignored for
        ``kind="hann"`` (a full Hann window).
    kind : {"hann", "cosine"}
        ``hann``: full 2-D Hann window; ``cosine``: flat centre with cosine-tapered edges.

    Returns
    -------
    ndarray, shape (npix, npix)
    """
    if kind == "hann":
        w1 = np.hanning(npix + 2)[1:-1]
    elif kind == "cosine":
        if not 0 < width <= 0.5:
            raise ValueError(f"window width must be in (0, 0.5], got {width}")
        x = (np.arange(npix) + 0.5) / npix
        edge = np.minimum(x, 1 - x) / width
        w1 = np.where(edge >= 1, 1.0, 0.5 - 0.5 * np.cos(np.pi * np.clip(edge, 0, 1)))
    else:
        raise ValueError(f"unknown window kind {kind!r}; use 'hann' or 'cosine'")
    return np.outer(w1, w1)


def bin_2d(power2d: np.ndarray, patch: FlatPatch, edges: np.ndarray | None = None):
    """Average a 2-D Fourier-plane quantity in annuli of ``|ell|``.

    Parameters
    ----------
    power2d : ndarray, shape (..., npix, npix), fft2 layout
    patch : FlatPatch
    edges : ndarray, shape (nbins + 1,), optional
        Multipole bin edges; default ``patch.default_bin_edges()``.

    Returns
    -------
    ell_centres : ndarray, shape (nbins,)
        Mean ``|ell|`` of the modes in each bin.
    binned : ndarray, shape (..., nbins)
        Empty bins give NaN.
    """
    edges = patch.default_bin_edges() if edges is None else np.asarray(edges, dtype=float)
    ell = patch.ell.ravel()
    idx = np.digitize(ell, edges) - 1
    nb = len(edges) - 1
    valid = (idx >= 0) & (idx < nb)
    counts = np.bincount(idx[valid], minlength=nb).astype(float)
    flat = np.asarray(power2d).reshape(*np.shape(power2d)[:-2], -1)
    lead = flat.shape[:-1]
    flat2 = flat.reshape(-1, flat.shape[-1])[:, valid]
    out = np.empty((flat2.shape[0], nb))
    for i, row in enumerate(flat2):
        out[i] = np.bincount(idx[valid], weights=row.real, minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        binned = out / counts
        centres = np.bincount(idx[valid], weights=ell[valid], minlength=nb) / counts
    return centres, binned.reshape(*lead, nb)


def cross_power_2d(fa: np.ndarray, fb: np.ndarray, patch: FlatPatch, w2: float = 1.0) -> np.ndarray:
    """Unbinned 2-D power ``Re(A B*) Omega_pix / (N w2)`` from two fft2 arrays, uK^2."""
    n = patch.npix**2
    return (fa * np.conj(fb)).real * patch.omega_pix / (n * w2)


def power_spectrum(
    a: np.ndarray,
    patch: FlatPatch,
    b: np.ndarray | None = None,
    edges: np.ndarray | None = None,
    window: np.ndarray | None = None,
):
    """Binned auto (or cross) power spectrum of scalar patch maps.

    Parameters
    ----------
    a : ndarray, shape (..., npix, npix), microkelvin
    patch : FlatPatch
    b : ndarray, same shape as ``a``, optional
        Second map for a cross spectrum.
    edges : ndarray, optional
        Multipole bin edges.
    window : ndarray, shape (npix, npix), optional
        Apodization applied to both maps before the FFT.

    Returns
    -------
    ell : ndarray, shape (nbins,)
    cl : ndarray, shape (..., nbins), uK^2
    """
    patch.check_maps(a, "a", channels=None)
    if b is not None:
        patch.check_maps(b, "b", channels=None)
    w = 1.0 if window is None else window
    w2 = 1.0 if window is None else float(np.mean(window**2))
    fa = np.fft.fft2(np.asarray(a) * w)
    fb = fa if b is None else np.fft.fft2(np.asarray(b) * w)
    return bin_2d(cross_power_2d(fa, fb, patch, w2), patch, edges)


def eb_spectra(
    qu: np.ndarray,
    patch: FlatPatch,
    edges: np.ndarray | None = None,
    window: np.ndarray | None = None,
    qu_b: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Binned EE, BB and EB spectra of Q/U maps (cross spectra with ``qu_b`` if given).

    Parameters
    ----------
    qu : ndarray, shape (..., 2, npix, npix), microkelvin
    patch : FlatPatch
    edges, window : see :func:`power_spectrum`
    qu_b : ndarray, optional
        Second set of Q/U maps; then ``EE`` is ``E_a x E_b`` and so on.

    Returns
    -------
    dict with ``ell`` (nbins,) and ``EE``, ``BB``, ``EB`` (..., nbins) in uK^2.
    """
    w = 1.0 if window is None else window
    w2 = 1.0 if window is None else float(np.mean(window**2))
    fa = qu_to_eb_fourier(np.asarray(qu) * w, patch)
    fb = fa if qu_b is None else qu_to_eb_fourier(np.asarray(qu_b) * w, patch)
    out: dict[str, np.ndarray] = {}
    for name, i, j in (("EE", 0, 0), ("BB", 1, 1), ("EB", 0, 1)):
        p2 = cross_power_2d(fa[..., i, :, :], fb[..., j, :, :], patch, w2)
        ell, out[name] = bin_2d(p2, patch, edges)
    out["ell"] = ell
    return out


def map_spectra_eb(
    eb: np.ndarray,
    patch: FlatPatch,
    eb_b: np.ndarray | None = None,
    edges: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Binned EE, BB, EB (cross) spectra of real-space E/B maps, shape (..., 2, npix, npix)."""
    fa = np.fft.fft2(np.asarray(eb))
    fb = fa if eb_b is None else np.fft.fft2(np.asarray(eb_b))
    out: dict[str, np.ndarray] = {}
    for name, i, j in (("EE", 0, 0), ("BB", 1, 1), ("EB", 0, 1)):
        ell, out[name] = bin_2d(
            cross_power_2d(fa[..., i, :, :], fb[..., j, :, :], patch), patch, edges
        )
    out["ell"] = ell
    return out
