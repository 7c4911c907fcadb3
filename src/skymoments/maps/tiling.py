"""Patch centres that tile a region of the sphere: a HEALPix mask or a latitude cut.

Centres sit on rings of constant latitude ``0, +-s, +-2s, ...`` (and a pole when a ring
reaches it) with ``s = side * (1 - overlap)``; a ring at latitude ``b`` carries
``ceil(360 cos(b) / s)`` centres equally spaced in longitude (every other ring shifted by
half a step), so neighbouring patches of side ``side`` overlap by about ``overlap`` of
their side along both axes. A centre is kept when its whole patch lies in the region:
every patch pixel in the mask (mask value > 0.5 at the mask pixel holding it) and at
``|latitude| >= min_abs_lat``. A patch reaching outside the region would feed the network
pixels the region excludes; the price is that the region's rim, within half a patch of
its edge, is not covered.
"""

from __future__ import annotations

import healpy as hp
import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.sky_cuts import patch_sky_positions

__all__ = ["inside_region", "ring_centres", "tile_region"]

# Centres tested per batch in inside_region: bounds the memory of the pixel positions
# (batch * npix^2 * 3 float64, 100 MB for 64x64 patches).
_BATCH = 1000


def ring_centres(spacing_deg: float) -> np.ndarray:
    """Centres (lon, lat) in degrees on rings ``spacing_deg`` apart covering the sphere."""
    s = float(spacing_deg)
    if not (np.isfinite(s) and 0 < s <= 90):
        raise ValueError(f"centre spacing must lie in (0, 90] degrees, got {spacing_deg!r}")
    n_rings = int(np.floor(90.0 / s))
    lats = s * np.arange(-n_rings, n_rings + 1)
    out = []
    for j, lat in enumerate(lats):
        count = max(1, int(np.ceil(360.0 * np.cos(np.radians(lat)) / s - 1e-9)))
        lon = (np.arange(count) + 0.5 * (j % 2)) * 360.0 / count
        out.append(np.stack([lon, np.full(count, lat)], axis=1))
    if 90.0 - n_rings * s > 0.5 * s:  # the rings stop short of the poles: add them
        out.append(np.array([[0.0, 90.0], [0.0, -90.0]]))
    return np.concatenate(out)


def inside_region(
    centres, patch: FlatPatch, mask=None, min_abs_lat: float | None = None
) -> np.ndarray:
    """Whether each centre's whole patch lies in the region (module docstring).

    Parameters
    ----------
    centres : array_like, shape (k, 2), degrees
    patch : FlatPatch
    mask : ndarray, shape (12 * nside_m**2,), optional
        HEALPix mask in RING ordering, > 0.5 where valid (healpy.UNSEEN counts as invalid).
    min_abs_lat : float, optional
        Latitude cut in degrees: pixels at ``|lat| < min_abs_lat`` are outside.

    Returns
    -------
    ndarray of bool, shape (k,)
    """
    cen = np.atleast_2d(np.asarray(centres, dtype=float))
    keep = np.ones(len(cen), dtype=bool)
    if mask is None and min_abs_lat is None:
        return keep
    valid = None
    if mask is not None:
        m = np.asarray(mask, dtype=float)
        nside_m = hp.npix2nside(m.size)
        valid = np.isfinite(m) & (m != hp.UNSEEN) & (m > 0.5)
    sin_cut = None if min_abs_lat is None else np.sin(np.radians(float(min_abs_lat)))
    for start in range(0, len(cen), _BATCH):
        vec, _ = patch_sky_positions(cen[start : start + _BATCH], patch)
        ok = np.ones(len(vec), dtype=bool)
        if valid is not None:
            pix = hp.vec2pix(nside_m, vec[..., 0], vec[..., 1], vec[..., 2])
            ok &= valid[pix].all(axis=(1, 2))
        if sin_cut is not None:
            ok &= (np.abs(vec[..., 2]) >= sin_cut).all(axis=(1, 2))
        keep[start : start + _BATCH] = ok
    return keep


def tile_region(
    patch: FlatPatch, overlap: float, mask=None, min_abs_lat: float | None = None
) -> np.ndarray:
    """Centres (k, 2) in degrees whose patches tile the region at the given overlap.

    Parameters
    ----------
    patch : FlatPatch
    overlap : float in [0, 1)
        Fraction of the patch side shared by neighbouring patches.
    mask, min_abs_lat
        The region (:func:`inside_region`); at least one must be given.

    Raises
    ------
    ValueError
        No region given, a bad overlap, or no centre whose patch fits inside the region.
    """
    if mask is None and min_abs_lat is None:
        raise ValueError("tiling needs a region: a mask or a latitude cut")
    ov = float(overlap)
    if not (np.isfinite(ov) and 0 <= ov < 1):
        raise ValueError(f"predict.tiling.overlap={overlap!r} must lie in [0, 1)")
    side_deg = np.degrees(patch.side_rad)
    centres = ring_centres(side_deg * (1.0 - ov))
    keep = inside_region(centres, patch, mask, min_abs_lat)
    if not keep.any():
        region = " and ".join(
            ([] if mask is None else ["the mask"])
            + ([] if min_abs_lat is None else [f"|lat| >= {float(min_abs_lat):g} deg"])
        )
        raise ValueError(
            f"no {side_deg:.2f}-degree patch fits inside {region}: widen the mask or lower the "
            "latitude cut (predict.healpix.mask, predict.healpix.min_abs_lat)"
        )
    return centres[keep]
