"""Read and check the one training image of a study from a user's file (shape (2, n, n), uK).

The file is read by :mod:`skymoments.maps.reader`, the reader ``skymoments predict`` uses,
so a file gives the same microkelvin, patch-frame Q/U in both commands:

* ``.npy`` holding the (2, n, n) array (patch frame, uK);
* ``.npz`` with the array under ``key`` (optional when the file holds one array);
* a flat FITS image (a (2, n, n) cube, Q and U extensions, or two 2-D image HDUs), with
  ``BUNIT``, the ``CDELT`` axis signs and ``POLCCONV`` honoured (absent: the patch frame);
* a HEALPix FITS map (``PIXTYPE = 'HEALPIX'``): Q and U read as COSMO uK and a gnomonic
  patch centred at ``(lon_deg, lat_deg)`` with the geometry ``patch`` cut with
  :func:`skymoments.maps.healpix.cut_patch`.

Every route ends in :func:`check_image_values` (shape, real finite values, not constant)
and, when the patch geometry is given, in a check that the image has the patch's size (and
pixel side, when the file states one), so each refusal is one line naming the file and what
to change. ``sky.training_image`` (the study's image) and ``synthesis`` (whose
``check_image`` adds the wavelet bank's own limits) both read it from here.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.reader import (
    PIXEL_RTOL,
    check_values,
    detect_kind,
    read_array_file,
    read_healpix_file,
    read_image_file,
)

__all__ = ["check_image_values", "load_training_image"]


def check_image_values(image) -> np.ndarray:
    """Validate a training image's array and return it as float64, shape (C, n, n).

    Raises
    ------
    ValueError
        Wrong shape (not (2, n, n), (1, n, n) or (n, n), square), not real numbers,
        NaN/inf, or a constant channel.
    """
    arr = np.asarray(image)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[0] not in (1, 2) or arr.shape[1] != arr.shape[2]:
        raise ValueError(
            f"training image has shape {arr.shape}; expected (2, n, n) for Q/U (or E/B), "
            "or (n, n) for a scalar map, square"
        )
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise ValueError(f"training image must be real numbers, got dtype {arr.dtype}")
    arr = arr.astype(np.float64)
    if not np.all(np.isfinite(arr)):
        bad = int(arr.size - np.count_nonzero(np.isfinite(arr)))
        raise ValueError(
            f"training image contains {bad} NaN or infinite pixels; fill or inpaint them first"
        )
    std = arr.std(axis=(1, 2))
    scale = max(float(np.abs(arr).max()), 1e-300)
    if np.any(std <= 1e-12 * scale) or np.any(std == 0):
        raise ValueError(
            "training image is constant in channel(s) "
            f"{[int(i) for i in np.nonzero(std <= 1e-12 * scale)[0]]}: there is nothing to "
            "synthesize; check that the right map or field was read"
        )
    return arr


def _squeeze_one(arr: np.ndarray, where: str) -> np.ndarray:
    if arr.ndim == 4 and arr.shape[0] == 1:
        return arr[0]
    if arr.ndim == 4:
        raise ValueError(
            f"{where} holds {arr.shape[0]} images of shape {arr.shape[1:]}; the synthesis "
            "takes ONE training image (2, n, n): save the one you want on its own"
        )
    return arr


def load_training_image(
    path,
    key: str | None = None,
    lon_deg: float | None = None,
    lat_deg: float | None = None,
    patch: FlatPatch | None = None,
) -> np.ndarray:
    """Read and check a training image (see the module docstring for the formats).

    Parameters
    ----------
    path : path-like
    key : str, optional
        Array name inside an ``.npz``.
    lon_deg, lat_deg : float, optional
        Patch centre for a HEALPix map, degrees.
    patch : FlatPatch, optional
        Patch geometry: the cut of a HEALPix map, and the size (and pixel side) a flat
        image must have.

    Returns
    -------
    ndarray, shape (2, n, n) (or (1, n, n) for a scalar map), float64, microkelvin

    Raises
    ------
    ValueError
        One line naming the file: missing, empty, truncated or not the format its suffix
        says; unknown suffix; missing key or centre; bad shape, NaN/inf, constant, beyond any
        sky; a size or pixel side different from ``patch``.
    """
    p = Path(path).expanduser()
    if not p.is_file():
        raise ValueError(f"training image {p} does not exist; check synthesis.image")
    try:
        kind = detect_kind(p, "training image")
    except ValueError as exc:
        if "suffix" in str(exc):
            raise ValueError(
                f"unknown training image format {p.suffix!r} for {p}; use .npy, .npz or FITS "
                "(synthesis.image)"
            ) from exc
        raise
    file_pixel, pixel_source = None, ""
    if kind == "array":
        arr, where, file_pixel, pixel_source = read_array_file(
            p, key=key, key_option="synthesis.image_key"
        )
        arr = _squeeze_one(arr, where)
    elif kind == "image":
        flat = read_image_file(p)
        arr, where = _squeeze_one(flat.data, flat.where), flat.where
        file_pixel, pixel_source = flat.pixel_arcmin, flat.pixel_source
    else:
        where = str(p)
        if lon_deg is None or lat_deg is None or patch is None:
            raise ValueError(
                f"{p} is a HEALPix map: give the patch centre synthesis.lon_deg and "
                "synthesis.lat_deg (degrees); the patch size comes from patch.npix and "
                "patch.pixel_arcmin"
            )
        from skymoments.maps.healpix import cut_patch

        sky = read_healpix_file(p)
        check_values(sky.maps, where)
        arr = np.asarray(cut_patch(sky.maps, float(lon_deg), float(lat_deg), patch), dtype=float)
    try:
        img = check_image_values(arr)
        check_values(img, where)
    except ValueError as exc:
        raise ValueError(f"{where}: {exc}") from exc
    if patch is not None:
        _check_geometry(img, where, patch, file_pixel, pixel_source)
    return img


def _check_geometry(img, where: str, patch: FlatPatch, pixel, source: str) -> None:
    n = img.shape[-1]
    if n != patch.npix:
        raise ValueError(
            f"{where} is {n}x{n} pixels but the patch is {patch.npix}x{patch.npix} "
            f"(patch.npix={patch.npix}); choose a patch group of {n} pixels (patch.npix={n}) "
            f"or cut the image to {patch.npix}x{patch.npix}"
        )
    if pixel is not None and not np.isclose(pixel, patch.pixel_arcmin, rtol=PIXEL_RTOL, atol=0):
        raise ValueError(
            f"{where} has {pixel:g} arcmin pixels ({source}) but patch.pixel_arcmin="
            f"{patch.pixel_arcmin:g}; set patch.pixel_arcmin={pixel:g} or resample the image"
        )
