"""Many gnomonic patches from one band-limited representation of a HEALPix Q/U map.

:func:`skymoments.maps.healpix.cut_patch` (the reference) recomputes the map's alms, rotates
them to the centre and synthesizes a finer full sky for every patch: a cost of several
full-sky transforms per centre. Here the map is transformed once (:func:`sky_harmonics`:
healpy's ``map2alm`` algorithm with its default 3 Jacobi iterations, run with ducc0), and the
band-limited spin-2 field ``Q + iU = sum_lm a_lm (E, B) 2Y_lm`` is then evaluated only at
the patch pixels, for all centres in one call of ducc0's ``synthesis_general`` (a spherical
harmonic synthesis onto a Clenshaw-Curtis grid followed by a non-uniform FFT to arbitrary
positions, accurate to its ``epsilon``: Reinecke, Belkner & Carron 2023, A&A 678, A165,
reference from memory).
healpy and ducc0 share the alm layout and spin-2 sign convention (checked in the tests:
ducc0's synthesis of healpy's E/B alms reproduces healpy's ``alm2map`` Q/U).

Geometry and frame are those of the reference (``maps.healpix`` docstring): pixel
``[i, j]`` of a patch centred at (lon, lat) is the gnomonic point
``(x, y) = ((j - (n-1)/2) p, (i - (n-1)/2) p)``; the sphere's COSMO ``(Q, U)`` there are
turned into the patch frame by the analytic angle ``g`` between ``e_theta`` (the local
meridian) and the patch axes at that pixel, ``Q_patch + i U_patch = exp(-2 i g) (Q + iU)``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.healpix import (
    _check_lonlat,
    _frame_angle,
    _healpix_maps,
    _pixel_offsets,
    _rotator,
    _spin2_rotate,
    _tangent_frame,
    check_patch_fits,
)

__all__ = [
    "SYNTHESIS_EPSILON",
    "SkyHarmonics",
    "cut_patches",
    "patch_sky_positions",
    "sky_harmonics",
    "sky_locations",
]

# Requested accuracy of ducc0's evaluation at arbitrary positions (relative, in the L2 sense
# over the points). The reference cut is accurate to ~1e-5 of the amplitude (its degree-7
# spline between rings): 1e-9 keeps this cut's own error four decades below that.
SYNTHESIS_EPSILON = 1e-9
# healpy.map2alm's default number of Jacobi iterations (its ``iter=3``).
JACOBI_ITERATIONS = 3


def _threads() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


@dataclass(frozen=True)
class SkyHarmonics:
    """E/B alms of a Q/U map (healpy's layout and sign), band limit and source resolution."""

    alm_eb: np.ndarray  # (2, nalm) complex128
    lmax: int
    nside: int


def sky_harmonics(maps_qu, lmax: int | None = None) -> SkyHarmonics:
    """The map's E/B alms up to ``lmax`` (default ``3 * nside - 1``), computed once.

    Parameters
    ----------
    maps_qu : ndarray, shape (2, npix), microkelvin
        COSMO Q/U, RING ordering, full sky.
    lmax : int, optional
        Band limit, in ``[2, 3 * nside - 1]``.
    """
    arr, nside, _ = _healpix_maps(maps_qu, "maps_qu")
    if arr.shape[0] != 2:
        raise ValueError(f"maps_qu has {arr.shape[0]} fields; expected (2, npix) Q/U")
    if lmax is None:
        lmax = 3 * nside - 1
    if not isinstance(lmax, int | np.integer) or not 2 <= lmax <= 3 * nside - 1:
        raise ValueError(
            f"lmax must be an integer in [2, 3 * nside - 1 = {3 * nside - 1}], got {lmax!r}"
        )
    import ducc0

    # healpy's map2alm (what the reference cut calls): a quadrature with weights 4 pi / npix
    # and JACOBI_ITERATIONS Jacobi steps a += A^T w (m - Y a), here done with ducc0 on the
    # spin-2 fields only and on every core (healpy also transforms the zero temperature).
    geom = ducc0.healpix.Healpix_Base(nside, "RING").sht_info()
    qu = np.ascontiguousarray(arr)
    weight = 4.0 * np.pi / qu.shape[-1]
    kw = {"lmax": int(lmax), "spin": 2, "nthreads": _threads(), **geom}
    alm = ducc0.sht.experimental.adjoint_synthesis(map=qu * weight, **kw)
    for _ in range(JACOBI_ITERATIONS):
        resid = qu - ducc0.sht.experimental.synthesis(alm=alm, **kw)
        alm += ducc0.sht.experimental.adjoint_synthesis(map=resid * weight, **kw)
    return SkyHarmonics(alm, int(lmax), nside)


def patch_sky_positions(centres, patch: FlatPatch) -> tuple[np.ndarray, np.ndarray]:
    """Where each patch pixel lies on the sphere, and its frame angle.

    Parameters
    ----------
    centres : array_like, shape (k, 2)
        (lon, lat) of the patch centres, degrees.
    patch : FlatPatch

    Returns
    -------
    vec : ndarray, shape (k, n, n, 3)
        Unit vectors of the pixel centres in the map's coordinates.
    angle : ndarray, shape (k, n, n)
        Angle ``g`` of the patch frame from ``e_theta`` towards ``e_phi``, radians.
    """
    check_patch_fits(patch)
    cen = np.atleast_2d(np.asarray(centres, dtype=float))
    if cen.ndim != 2 or cen.shape[1] != 2:
        raise ValueError(f"centres has shape {np.shape(centres)}; expected (k, 2) (lon, lat)")
    off = _pixel_offsets(patch)
    x, y = np.meshgrid(off, off, indexing="xy")
    v_rot, tx, ty = _tangent_frame(x, y)
    n = patch.npix
    vec = np.empty((len(cen), n, n, 3))
    angle = np.empty((len(cen), n, n))
    for k, (lon, lat) in enumerate(cen):
        inv = _rotator(*_check_lonlat(lon, lat)).mat.T  # the rotation is orthogonal
        v_s, tx_s, ty_s = (a @ inv.T for a in (v_rot, tx, ty))
        vec[k] = v_s
        angle[k] = _frame_angle(v_s, tx_s, ty_s)
    return vec, angle


def sky_locations(vec: np.ndarray) -> np.ndarray:
    """``(theta, phi)`` in radians, shape (m, 2), of unit vectors ``vec`` (..., 3).

    Colatitude in [0, pi] and longitude in [0, 2 pi): the ``loc`` layout of ducc0's
    ``synthesis_general``.
    """
    flat = np.asarray(vec, dtype=float).reshape(-1, 3)
    theta = np.arccos(np.clip(flat[:, 2], -1.0, 1.0))
    phi = np.mod(np.arctan2(flat[:, 1], flat[:, 0]), 2.0 * np.pi)
    return np.ascontiguousarray(np.stack([theta, phi], axis=1))


def cut_patches(
    harmonics: SkyHarmonics, centres, patch: FlatPatch, epsilon: float = SYNTHESIS_EPSILON
) -> np.ndarray:
    """Q/U patches at every centre, from the band-limited field, in one synthesis.

    Parameters
    ----------
    harmonics : SkyHarmonics
        From :func:`sky_harmonics`.
    centres : array_like, shape (k, 2)
        (lon, lat), degrees.
    patch : FlatPatch
    epsilon : float
        Accuracy asked of ducc0's ``synthesis_general``.

    Returns
    -------
    ndarray, shape (k, 2, n, n), microkelvin
        Q/U in the patch frame of ``maps.eb``, rows north, columns east.
    """
    import ducc0

    vec, angle = patch_sky_positions(centres, patch)
    qu = ducc0.sht.synthesis_general(
        alm=harmonics.alm_eb,
        spin=2,
        lmax=harmonics.lmax,
        loc=sky_locations(vec),
        epsilon=float(epsilon),
        nthreads=_threads(),
    )
    q, u = _spin2_rotate(qu[0], qu[1], -angle.reshape(-1))
    k, n = len(vec), patch.npix
    return np.stack([q.reshape(k, n, n), u.reshape(k, n, n)], axis=1)
