"""Read the one training image of a synthesis from disk.

Accepted inputs (all Q/U in microkelvin, shape (2, n, n), rows = y):

* ``.npy`` holding the (2, n, n) array;
* ``.npz`` with the array under ``key`` (optional when the file holds one array);
* a FITS image: a (2, n, n) cube in one HDU, or two 2-D image HDUs (Q then U);
* a HEALPix FITS map (a binary table with ``PIXTYPE = 'HEALPIX'``): Q and U are read with
  :func:`skymoments.maps.healpix.read_healpix_map` (COSMO convention) and a gnomonic
  patch centred at ``(lon_deg, lat_deg)`` with the geometry ``patch`` is cut with
  :func:`skymoments.maps.healpix.cut_patch`.

Every route ends in :func:`skymoments.synthesis.synthesize.check_image`, so NaNs, a
constant image or a wrong shape are reported the same way.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.synthesis.synthesize import check_image


def _squeeze_one(arr: np.ndarray, where: str) -> np.ndarray:
    if arr.ndim == 4 and arr.shape[0] == 1:
        return arr[0]
    if arr.ndim == 4:
        raise ValueError(
            f"{where} holds {arr.shape[0]} images of shape {arr.shape[1:]}; the synthesis "
            "takes ONE training image (2, n, n): save the one you want on its own"
        )
    return arr


def _is_healpix(hdul) -> bool:
    for h in hdul[1:]:
        if str(h.header.get("PIXTYPE", "")).strip().upper() == "HEALPIX":
            return True
    return False


def load_training_image(
    path,
    key: str | None = None,
    lon_deg: float | None = None,
    lat_deg: float | None = None,
    patch: FlatPatch | None = None,
) -> np.ndarray:
    """Read a training image (see the module docstring for the formats).

    Parameters
    ----------
    path : path-like
    key : str, optional
        Array name inside an ``.npz``.
    lon_deg, lat_deg : float, optional
        Patch centre for a HEALPix map, degrees.
    patch : FlatPatch, optional
        Patch geometry for a HEALPix map.

    Returns
    -------
    ndarray, shape (2, n, n), float64, microkelvin

    Raises
    ------
    ValueError
        Missing file, unknown suffix, missing key or centre, bad shape or content.
    """
    p = Path(path).expanduser()
    if not p.exists():
        raise ValueError(f"training image {p} does not exist; check synthesis.image")
    suffix = "".join(p.suffixes[-2:]).lower() if p.suffix.lower() == ".gz" else p.suffix.lower()
    if suffix == ".npy":
        arr = _squeeze_one(np.load(p, allow_pickle=False), str(p))
    elif suffix == ".npz":
        with np.load(p, allow_pickle=False) as f:
            names = list(f.keys())
            if key is None:
                if len(names) != 1:
                    raise ValueError(
                        f"{p} holds arrays {names}; name the training image with "
                        "synthesis.image_key=NAME"
                    )
                key = names[0]
            if key not in names:
                raise ValueError(f"{p} has no array {key!r}; it holds {names}")
            arr = _squeeze_one(f[key], f"{p}[{key}]")
    elif suffix in (".fits", ".fit", ".fits.gz", ".fts"):
        arr = _read_fits(p, lon_deg, lat_deg, patch)
    else:
        raise ValueError(
            f"unknown training image format {p.suffix!r} for {p}; use .npy, .npz or FITS"
        )
    return check_image(arr)


def _read_fits(p: Path, lon_deg, lat_deg, patch) -> np.ndarray:
    from astropy.io import fits

    with fits.open(p, memmap=False) as hdul:
        if _is_healpix(hdul):
            healpix = True
        else:
            healpix = False
            images = [h.data for h in hdul if h.data is not None and getattr(h, "is_image", False)]
            images = [np.asarray(d, dtype=np.float64) for d in images]
    if healpix:
        if lon_deg is None or lat_deg is None or patch is None:
            raise ValueError(
                f"{p} is a HEALPix map: give the patch centre synthesis.lon_deg and "
                "synthesis.lat_deg (degrees); the patch size comes from patch.npix and "
                "patch.pixel_arcmin"
            )
        from skymoments.maps.healpix import cut_patch, read_healpix_map

        maps = read_healpix_map(p, fields=("Q", "U"), convention="COSMO")
        return np.asarray(cut_patch(maps, float(lon_deg), float(lat_deg), patch), dtype=float)
    cubes = [d for d in images if d.ndim == 3]
    planes = [d for d in images if d.ndim == 2]
    if cubes:
        return _squeeze_one(cubes[0], str(p))
    if len(planes) >= 2:
        return np.stack(planes[:2])
    raise ValueError(
        f"{p} holds no (2, n, n) cube and fewer than two 2-D image HDUs; write Q and U as "
        "a cube or as two image extensions"
    )
