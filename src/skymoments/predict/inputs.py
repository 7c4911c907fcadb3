"""Reading the maps a prediction is made on, with every check that needs no model.

Three kinds of input (``predict.format``, or ``auto`` from the file):

``array``
    ``.npy`` holding one Q/U patch ``(2, n, n)`` or a batch ``(m, 2, n, n)``; or ``.npz``
    holding one under ``predict.key`` (default: ``data_qu`` when present, else the only
    array). Microkelvin, Q/U in the patch frame of ``maps.eb`` (what training used). A
    ``.npz`` may carry its pixel size as a scalar ``pixel_arcmin`` (``skymoments simulate``
    writes it); a ``.npy`` carries none, so ``predict.pixel_arcmin`` must give it.
``image``
    A FITS file with Q and U either as two image extensions named ``Q`` and ``U`` (each
    ``(n, n)`` or ``(m, n, n)``) or as one image HDU shaped ``(2, n, n)`` or ``(m, 2, n, n)``.
    Header keywords read (from the image HDU, then the primary HDU):

    - pixel size: ``PIXARCM`` (arcmin), else ``CDELT1``/``CDELT2`` in ``CUNIT1``/``CUNIT2``
      (``deg`` when absent; ``arcmin``, ``arcsec``, ``rad`` accepted); both axes must agree
      (square pixels). Without either the file is refused unless ``predict.pixel_arcmin`` is
      given; given both ways, they must agree.
    - orientation: rows are taken to run north and columns east. A negative ``CDELT1``
      (columns running west, the usual RA-left layout) or ``CDELT2`` mirrors that axis on
      reading, so outputs are always laid out with columns east and rows north.
    - ``BUNIT``: ``K``, ``mK`` or ``uK`` (optionally ``_CMB``) are converted to uK; absent
      means uK; anything else is refused.
    - ``POLCCONV``: the frame of Q/U, see :data:`CONVENTIONS`; absent means
      ``predict.convention``.
``healpix``
    A HEALPix FITS binary table (``PIXTYPE = 'HEALPIX'``) with Q and U columns
    (``predict.healpix.fields``), read by :func:`skymoments.maps.healpix.read_healpix_map`
    (``POLCCONV`` COSMO/IAU handled, units converted), full sky, plus a list of patch centres
    ``predict.centres`` (``[[lon, lat], ...]`` in degrees, in the map's own coordinates, or
    a text file of two columns).

Q/U frames (:data:`CONVENTIONS`) of a flat image, x along columns (east), y along rows
(north): ``patch`` is the frame of ``maps.eb`` (angle from +x towards +y); ``COSMO`` and
``IAU`` are the flat-sky analogues of the HEALPix conventions, the angle measured from
south (-y) towards east, and from north (+y) towards east. A polarization angle ``psi``
gives ``Q + iU ~ exp(2 i psi)``, so (module docstring of ``maps.healpix``, at the centre of a
cut) ``(Q, U)_patch = -(Q, U)_COSMO`` and, IAU being COSMO with U negated,
``(Q, U)_patch = (-Q, U)_IAU``. These hold exactly on a flat sky; on a gnomonic image they
hold at its centre only (meridians converge elsewhere): cut HEALPix maps through the
``healpix`` input for the exact frame.
"""

from __future__ import annotations

import hashlib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from skymoments.maps.geometry import FlatPatch

__all__ = [
    "CONVENTIONS",
    "FORMATS",
    "MapInput",
    "check_finite",
    "check_patch_geometry",
    "detect_format",
    "parse_centres",
    "read_array_input",
    "read_healpix_input",
    "read_image_input",
    "read_input",
    "sha256_file",
    "to_patch_frame",
]

FORMATS = ("auto", "array", "image", "healpix")
CONVENTIONS = ("patch", "COSMO", "IAU")
# Relative tolerance of a pixel-size match. Sizes travel as decimal text (FITS cards, MLflow
# params): a value printed with 7 or more significant digits and converted between units
# (deg <-> arcmin, a factor 60) agrees to ~1e-7, while a genuinely different geometry differs
# by percents; 1e-6 separates the two.
PIXEL_RTOL = 1e-6
_FITS_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fz")
_TO_UK = {"k": 1e6, "mk": 1e3, "uk": 1.0, "muk": 1.0, "microk": 1.0}
_TO_ARCMIN = {
    "deg": 60.0,
    "degree": 60.0,
    "degrees": 60.0,
    "arcmin": 1.0,
    "arcsec": 1.0 / 60.0,
    "rad": 180.0 * 60.0 / np.pi,
}


@dataclass
class MapInput:
    """A prediction input, read and checked, ready to be matched to a model.

    Attributes
    ----------
    path : Path
    kind : {"array", "image", "healpix"}
    sha256 : str
        Hex digest of the file's bytes.
    data_qu : ndarray, shape (m, 2, n, n), microkelvin, or None
        Flat inputs: Q/U in the patch frame of ``maps.eb``, rows north, columns east.
    maps_qu : ndarray, shape (2, 12 * nside**2), microkelvin, or None
        HEALPix input: COSMO Q/U, RING ordering.
    nside : int or None
    pixel_arcmin : float or None
        Flat inputs: pixel side, from the file or the config.
    pixel_source : str
        Where the pixel size came from, for messages.
    convention : str
        The Q/U convention of the file as read (``patch``, ``COSMO``, ``IAU``).
    coordsys : str or None
        HEALPix input: the file's ``COORDSYS`` (``G``, ``C``, ``E``), the frame of the
        centres' (lon, lat).
    notes : list of str
        What reading did (mirrored axes, unit conversions), for the provenance.
    """

    path: Path
    kind: str
    sha256: str
    data_qu: np.ndarray | None = None
    maps_qu: np.ndarray | None = None
    nside: int | None = None
    pixel_arcmin: float | None = None
    pixel_source: str = ""
    convention: str = "patch"
    coordsys: str | None = None
    notes: list[str] = field(default_factory=list)


# --- helpers -----------------------------------------------------------------------------


def sha256_file(path: str | os.PathLike, chunk: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            digest.update(block)
    return digest.hexdigest()


def _is_fits(path: Path) -> bool:
    name = path.name.lower()
    return any(name.endswith(s) for s in _FITS_SUFFIXES)


def detect_format(path: str | os.PathLike) -> str:
    """``array`` for ``.npy``/``.npz``; ``healpix`` or ``image`` for FITS (by its HDUs).

    A FITS file is HEALPix when a binary-table extension has ``PIXTYPE = 'HEALPIX'`` (the
    HEALPix FITS standard) or an ``NSIDE`` keyword.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix in (".npy", ".npz"):
        return "array"
    if _is_fits(p):
        from astropy.io import fits

        with fits.open(p) as hdul:
            for hdu in hdul[1:]:
                if isinstance(hdu, fits.BinTableHDU):
                    pixtype = str(hdu.header.get("PIXTYPE", "")).strip().upper()
                    if pixtype == "HEALPIX" or "NSIDE" in hdu.header:
                        return "healpix"
        return "image"
    raise ValueError(
        f"input {p} has suffix {p.suffix!r}; give a .npy/.npz Q/U patch, a FITS image or a "
        "HEALPix FITS map (.fits), or set predict.format=array|image|healpix"
    )


def check_finite(data: np.ndarray, where: str) -> None:
    """Refuse NaN or infinite values, saying how many and where."""
    bad = ~np.isfinite(data)
    if bad.any():
        n_bad = int(bad.sum())
        first = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ValueError(
            f"{where} has {n_bad} NaN or infinite values (first at index {first}); fill or "
            "inpaint them before predicting (the network needs every pixel)"
        )


def _as_qu_batch(arr: np.ndarray, where: str) -> np.ndarray:
    arr = np.asarray(arr)
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise ValueError(f"{where} holds {arr.dtype} values; Q/U maps must be real numbers")
    if arr.ndim == 3:
        arr = arr[None]
    if arr.ndim != 4 or arr.shape[1] != 2 or arr.shape[2] != arr.shape[3]:
        raise ValueError(
            f"{where} has shape {arr.shape}; expected one Q/U patch (2, n, n) or a batch "
            "(m, 2, n, n) of square patches, channels (Q, U)"
        )
    if arr.shape[0] == 0:
        raise ValueError(f"{where} holds an empty batch of patches")
    return arr.astype(np.float64)


def _pixel_size(
    from_file: float | None, source: str, from_cfg: Any, path: Path, hint: str
) -> tuple[float, str]:
    """Reconcile the pixel size found in the file with ``predict.pixel_arcmin``."""
    cfg_value = None
    if from_cfg is not None:
        try:
            cfg_value = float(from_cfg)
        except (TypeError, ValueError) as exc:
            raise ValueError(
                f"predict.pixel_arcmin={from_cfg!r} is not a number of arcmin"
            ) from exc
        if not (np.isfinite(cfg_value) and cfg_value > 0):
            raise ValueError(f"predict.pixel_arcmin={from_cfg!r} must be a positive number")
    if from_file is not None and cfg_value is not None:
        if not np.isclose(from_file, cfg_value, rtol=PIXEL_RTOL, atol=0.0):
            raise ValueError(
                f"{path} gives a pixel size of {from_file:g} arcmin ({source}) but "
                f"predict.pixel_arcmin={cfg_value:g}; drop the override or correct the file"
            )
        return from_file, source
    if from_file is not None:
        return from_file, source
    if cfg_value is not None:
        return cfg_value, "predict.pixel_arcmin"
    raise ValueError(
        f"the pixel size of {path} is unknown ({hint}); give it as predict.pixel_arcmin=<arcmin>"
    )


def _check_convention(value: Any, what: str) -> str:
    text = str(value).strip()
    for conv in CONVENTIONS:
        if text.upper() == conv.upper():
            return conv
    raise ValueError(
        f"{what} = {value!r} is not a known polarization convention; accepted values are "
        f"{', '.join(CONVENTIONS)} (see skymoments.predict.inputs)"
    )


def to_patch_frame(qu: np.ndarray, convention: str) -> np.ndarray:
    """Q/U of a flat image in ``convention`` turned into the patch frame of ``maps.eb``.

    Parameters
    ----------
    qu : ndarray, shape (..., 2, n, n), microkelvin
        Rows north, columns east.
    convention : {"patch", "COSMO", "IAU"}

    Returns
    -------
    ndarray, same shape: ``(Q, U)`` unchanged for ``patch``, ``(-Q, -U)`` for COSMO,
    ``(-Q, U)`` for IAU (module docstring).
    """
    conv = _check_convention(convention, "convention")
    out = np.array(qu, dtype=np.float64, copy=True)
    if conv == "COSMO":
        out *= -1.0
    elif conv == "IAU":
        out[..., 0, :, :] *= -1.0
    return out


# --- .npy / .npz -------------------------------------------------------------------------


def read_array_input(
    path: str | os.PathLike, key: str | None = None, pixel_arcmin: Any = None
) -> MapInput:
    """Read a ``.npy``/``.npz`` Q/U patch or batch (module docstring).

    Parameters
    ----------
    path : path-like
    key : str, optional
        Array of an ``.npz``; default ``data_qu``, else the file's only array.
    pixel_arcmin : float, optional
        Pixel size when the file gives none (``predict.pixel_arcmin``).

    Returns
    -------
    MapInput
        ``kind="array"``, ``data_qu`` shaped (m, 2, n, n), uK, patch frame.
    """
    p = Path(path)
    file_pixel = None
    source = ""
    if p.suffix.lower() == ".npy":
        if key is not None:
            raise ValueError(
                f"predict.key={key!r} is for .npz inputs; {p} is a .npy with a single array"
            )
        try:
            arr = np.load(p, allow_pickle=False)
        except ValueError as exc:
            raise ValueError(f"{p} holds Python objects, not a numeric Q/U array: {exc}") from exc
        hint = "a .npy file carries no pixel size"
        name = str(p)
    else:
        with np.load(p, allow_pickle=False) as z:
            files = list(z.files)
            if key is not None:
                if key not in files:
                    raise ValueError(
                        f"{p} has no array {key!r}; its arrays are {files}: set predict.key "
                        "to one of them"
                    )
                chosen = key
            elif "data_qu" in files:
                chosen = "data_qu"
            else:
                big = [f for f in files if np.ndim(z[f]) >= 3]
                if len(big) != 1:
                    raise ValueError(
                        f"{p} has arrays {files} and none is called data_qu; choose one with "
                        "predict.key=<name>"
                    )
                chosen = big[0]
            arr = z[chosen]
            if "pixel_arcmin" in files:
                file_pixel = float(np.asarray(z["pixel_arcmin"]).reshape(-1)[0])
                source = f"key pixel_arcmin of {p.name}"
            npix_file = int(np.asarray(z["npix"]).reshape(-1)[0]) if "npix" in files else None
        hint = "the .npz has no pixel_arcmin entry"
        name = f"{p} [{chosen}]"
        if npix_file is not None and np.ndim(arr) >= 2 and np.shape(arr)[-1] != npix_file:
            raise ValueError(
                f"{name} is {np.shape(arr)[-1]} pixels wide but the file's npix says {npix_file}"
            )
    data = _as_qu_batch(arr, name)
    check_finite(data, name)
    pixel, source = _pixel_size(file_pixel, source, pixel_arcmin, p, hint)
    return MapInput(
        path=p,
        kind="array",
        sha256=sha256_file(p),
        data_qu=data,
        pixel_arcmin=pixel,
        pixel_source=source,
        convention="patch",
    )


# --- FITS images -------------------------------------------------------------------------


def _unit_factor(unit: Any, where: str) -> float:
    if unit is None or not str(unit).strip():
        return 1.0
    text = str(unit).strip().replace("μ", "u").replace("µ", "u").lower()
    text = re.sub(r"[_\s-]*(cmb|thermo)$", "", text)
    if text not in _TO_UK:
        raise ValueError(
            f"{where} has BUNIT = {unit!r}, not a CMB temperature unit this reader converts "
            "(K, mK, uK, optionally _CMB); convert the maps to uK first"
        )
    return _TO_UK[text]


def _header_pixel(headers: list, where: str) -> tuple[float | None, str, tuple[int, int]]:
    """Pixel size in arcmin from PIXARCM or CDELT1/2, and the axis signs (columns, rows)."""

    def get(key):
        for h in headers:
            if key in h:
                return h[key]
        return None

    pixarcm = get("PIXARCM")
    cdelt1, cdelt2 = get("CDELT1"), get("CDELT2")
    signs = (1, 1)
    from_cdelt = None
    if cdelt1 is not None or cdelt2 is not None:
        if cdelt1 is None or cdelt2 is None:
            raise ValueError(
                f"{where} has only one of CDELT1/CDELT2; give both (pixel side per axis) or a "
                "PIXARCM card in arcmin"
            )
        sizes = []
        for axis, value in ((1, cdelt1), (2, cdelt2)):
            unit = str(get(f"CUNIT{axis}") or "deg").strip().lower()
            if unit not in _TO_ARCMIN:
                raise ValueError(
                    f"{where} has CUNIT{axis} = {unit!r}; use deg, arcmin, arcsec or rad"
                )
            value = float(value)
            if not np.isfinite(value) or value == 0:
                raise ValueError(f"{where} has CDELT{axis} = {value!r}; it must be non-zero")
            sizes.append(abs(value) * _TO_ARCMIN[unit])
        if not np.isclose(sizes[0], sizes[1], rtol=PIXEL_RTOL, atol=0.0):
            raise ValueError(
                f"{where} has non-square pixels ({sizes[0]:g} x {sizes[1]:g} arcmin from "
                "CDELT1/CDELT2); resample to square pixels first"
            )
        from_cdelt = sizes[0]
        signs = (1 if float(cdelt1) > 0 else -1, 1 if float(cdelt2) > 0 else -1)
    if pixarcm is not None:
        pix = float(pixarcm)
        if not (np.isfinite(pix) and pix > 0):
            raise ValueError(f"{where} has PIXARCM = {pixarcm!r}; it must be positive arcmin")
        if from_cdelt is not None and not np.isclose(pix, from_cdelt, rtol=PIXEL_RTOL, atol=0):
            raise ValueError(
                f"{where} has PIXARCM = {pix:g} arcmin but CDELT1/2 give {from_cdelt:g} arcmin; "
                "correct one of them"
            )
        return pix, "FITS keyword PIXARCM", signs
    if from_cdelt is not None:
        return from_cdelt, "FITS keywords CDELT1/CDELT2", signs
    return None, "", signs


def read_image_input(
    path: str | os.PathLike, pixel_arcmin: Any = None, convention: str = "patch"
) -> MapInput:
    """Read a flat Q/U FITS image (module docstring for the layout and keywords).

    Parameters
    ----------
    path : path-like
    pixel_arcmin : float, optional
        Pixel size when the header gives none.
    convention : {"patch", "COSMO", "IAU"}
        Q/U frame when the header has no ``POLCCONV``.

    Returns
    -------
    MapInput
        ``kind="image"``, ``data_qu`` (m, 2, n, n) in uK, patch frame, rows north, columns
        east.
    """
    from astropy.io import fits

    p = Path(path)
    default_conv = _check_convention(convention, "predict.convention")
    with fits.open(p) as hdul:
        primary = hdul[0].header
        images = [h for h in hdul if h.is_image and h.data is not None]
        named = {str(h.name).strip().upper(): h for h in images}
        if "Q" in named and "U" in named:
            hq, hu = named["Q"], named["U"]
            q, u = np.asarray(hq.data), np.asarray(hu.data)
            if q.shape != u.shape or q.ndim not in (2, 3):
                raise ValueError(
                    f"{p}: extensions Q {q.shape} and U {u.shape} must both be (n, n) or (m, n, n)"
                )
            arr = np.stack([q, u], axis=-3)
            heads = [hq.header, primary]
            other = [hu.header, primary]
            where = f"{p} [Q, U]"
        else:
            cubes = [h for h in images if h.data.ndim >= 3 and h.data.shape[-3] == 2]
            if not cubes:
                found = [(str(h.name), tuple(h.data.shape)) for h in images]
                raise ValueError(
                    f"{p} holds no Q/U image: expected image extensions named Q and U, or one "
                    f"image HDU shaped (2, n, n) or (m, 2, n, n); found image HDUs {found}"
                )
            hdu = cubes[0]
            arr = np.asarray(hdu.data)
            heads = [hdu.header, primary]
            other = None
            where = f"{p} [{hdu.name}]"
        data = _as_qu_batch(arr, where)
        file_pixel, source, signs = _header_pixel(heads, where)
        if other is not None:
            u_pixel, _, u_signs = _header_pixel(other, f"{p} [U]")
            if (
                u_pixel is not None
                and file_pixel is not None
                and not np.isclose(u_pixel, file_pixel, rtol=PIXEL_RTOL, atol=0)
            ) or (u_pixel is not None and u_signs != signs):
                raise ValueError(f"{p}: the Q and U extensions disagree on the pixel grid")
        raw_conv = next((h["POLCCONV"] for h in heads if "POLCCONV" in h), None)
        unit = next((h["BUNIT"] for h in heads if "BUNIT" in h), None)
        if other is not None:
            u_unit = next((h["BUNIT"] for h in other if "BUNIT" in h), None)
            if (
                u_unit is not None
                and unit is not None
                and _unit_factor(u_unit, f"{p} [U]") != _unit_factor(unit, where)
            ):
                raise ValueError(f"{p}: the Q and U extensions have different BUNIT")
    conv = default_conv if raw_conv is None else _check_convention(raw_conv, f"POLCCONV of {p}")
    notes = []
    factor = _unit_factor(unit, where)
    if factor != 1.0:
        data = data * factor
        notes.append(f"converted from {unit} to uK")
    check_finite(data, where)
    if signs[0] < 0:
        data = data[..., :, ::-1]
        notes.append("columns mirrored (CDELT1 < 0)")
    if signs[1] < 0:
        data = data[..., ::-1, :]
        notes.append("rows mirrored (CDELT2 < 0)")
    if conv == "patch" and signs[0] * signs[1] < 0:
        # Q/U given in the array's own frame: one mirror reverses the angle, U -> -U
        # (a patch flip changes the sign of U; maps.symmetry).
        data = data.copy()
        data[..., 1, :, :] *= -1.0
    data = to_patch_frame(data, conv)
    pixel, source = _pixel_size(
        file_pixel, source, pixel_arcmin, p, "no PIXARCM or CDELT1/CDELT2 in the header"
    )
    return MapInput(
        path=p,
        kind="image",
        sha256=sha256_file(p),
        data_qu=np.ascontiguousarray(data),
        pixel_arcmin=pixel,
        pixel_source=source,
        convention=conv,
        notes=notes,
    )


# --- HEALPix -----------------------------------------------------------------------------


def read_healpix_input(path: str | os.PathLike, fields=("Q", "U"), hdu: int = 1) -> MapInput:
    """Read the Q/U columns of a full-sky HEALPix FITS map.

    Parameters
    ----------
    path : path-like
    fields : pair of str or int
        The Q and U columns (names or 0-based indices), as for ``read_healpix_map``.
    hdu : int
        Extension holding the map.

    Returns
    -------
    MapInput
        ``kind="healpix"``, ``maps_qu`` (2, npix) COSMO uK, RING ordering.

    Raises
    ------
    ValueError
        A missing column, an unknown ``POLCCONV``, an unknown unit, NaN/inf, or
        ``healpy.UNSEEN`` pixels (cutting needs the full sky).
    """
    import healpy as hp
    from astropy.io import fits

    from skymoments.maps.healpix import read_healpix_map

    p = Path(path)
    fields = tuple(fields)
    if len(fields) != 2:
        raise ValueError(
            f"predict.healpix.fields={list(fields)} must name exactly two columns, Q then U"
        )
    maps = read_healpix_map(p, fields=fields, convention="COSMO", hdu=int(hdu), units="uK")
    with fits.open(p) as hdul:
        head, primary = hdul[int(hdu)].header, hdul[0].header
        raw = head.get("POLCCONV", primary.get("POLCCONV"))
        coordsys = head.get("COORDSYS", primary.get("COORDSYS"))
    conv = "COSMO" if raw is None else str(raw).strip().upper()
    n_unseen = int(np.count_nonzero(hp.mask_bad(maps)))
    if n_unseen:
        raise ValueError(
            f"{p} has {n_unseen} UNSEEN (masked) pixels in its Q/U columns; cutting patches "
            "needs a full-sky map, so fill (inpaint) the masked pixels first"
        )
    nside = hp.npix2nside(maps.shape[-1])
    notes = [] if conv == "COSMO" else [f"U sign flipped: file is {conv}, read as COSMO"]
    return MapInput(
        path=p,
        kind="healpix",
        sha256=sha256_file(p),
        maps_qu=maps,
        nside=int(nside),
        convention=conv,
        coordsys=None if coordsys is None else str(coordsys).strip(),
        notes=notes,
    )


def parse_centres(centres: Any) -> np.ndarray:
    """Patch centres as an array (k, 2) of (lon, lat) in degrees.

    Parameters
    ----------
    centres : sequence of (lon, lat), or str path
        ``[[lon, lat], ...]`` in degrees; or the path of a text file with two columns
        (whitespace or comma separated, ``#`` comments).
    """
    if centres is None:
        raise ValueError(
            "a HEALPix input needs patch centres: give predict.centres='[[lon,lat],...]' in "
            "degrees (or the path of a two-column text file)"
        )
    if isinstance(centres, str | os.PathLike):
        p = Path(centres).expanduser()
        if not p.is_file():
            raise ValueError(
                f"predict.centres={str(centres)!r} is neither a list nor an existing file"
            )
        text = p.read_text().replace(",", " ")
        rows = [ln.split("#", 1)[0].split() for ln in text.splitlines()]
        values = [r for r in rows if r]
        try:
            arr = np.array(values, dtype=float)
        except ValueError as exc:
            raise ValueError(f"{p} must hold two numbers (lon lat) per line: {exc}") from exc
    else:
        try:
            from omegaconf import ListConfig, OmegaConf

            if isinstance(centres, ListConfig):
                centres = OmegaConf.to_container(centres)
            arr = np.array(centres, dtype=float)
        except (TypeError, ValueError) as exc:
            raise ValueError(
                f"predict.centres={centres!r} must be a list of [lon, lat] pairs in degrees"
            ) from exc
    if arr.ndim == 1 and arr.size == 2:
        arr = arr[None]
    if arr.ndim != 2 or arr.shape[1] != 2 or arr.shape[0] == 0:
        raise ValueError(
            f"predict.centres has shape {arr.shape}; give a non-empty list of [lon, lat] pairs"
        )
    if not np.all(np.isfinite(arr)) or np.any(np.abs(arr[:, 1]) > 90.0):
        raise ValueError(
            "predict.centres must hold finite (lon, lat) pairs with latitude in [-90, 90] deg"
        )
    return arr


def read_input(
    path: str | os.PathLike,
    fmt: str = "auto",
    *,
    key: str | None = None,
    pixel_arcmin: Any = None,
    convention: str = "patch",
    healpix_fields=("Q", "U"),
    healpix_hdu: int = 1,
) -> MapInput:
    """Read a prediction input of any supported kind (module docstring).

    Parameters
    ----------
    path : path-like
    fmt : {"auto", "array", "image", "healpix"}
    key, pixel_arcmin, convention, healpix_fields, healpix_hdu
        ``predict.key``, ``predict.pixel_arcmin``, ``predict.convention``,
        ``predict.healpix.fields``, ``predict.healpix.hdu``.

    Returns
    -------
    MapInput
    """
    if path is None or not str(path).strip() or str(path) == "???":
        raise ValueError("predict.input is not set; give predict.input=<map file>")
    p = Path(str(path)).expanduser()
    if not p.is_file():
        raise ValueError(f"predict.input={str(path)!r}: no such file")
    if fmt not in FORMATS:
        raise ValueError(f"predict.format={fmt!r}; choose one of {', '.join(FORMATS)}")
    kind = detect_format(p) if fmt == "auto" else fmt
    if kind == "array":
        return read_array_input(p, key=key, pixel_arcmin=pixel_arcmin)
    if kind == "image":
        return read_image_input(p, pixel_arcmin=pixel_arcmin, convention=convention)
    if pixel_arcmin is not None:
        raise ValueError(
            "predict.pixel_arcmin is for flat inputs; a HEALPix map is cut at the model's own "
            "patch geometry, so leave it unset"
        )
    return read_healpix_input(p, fields=healpix_fields, hdu=healpix_hdu)


def check_patch_geometry(inp: MapInput, patch: FlatPatch, model: str = "the model") -> None:
    """Refuse a flat input whose patch size or pixel size differs from the model's.

    Parameters
    ----------
    inp : MapInput
        A flat input (``array`` or ``image``).
    patch : FlatPatch
        The model's training geometry.
    model : str
        How to name the model in messages.
    """
    if inp.data_qu is None:
        return
    n = inp.data_qu.shape[-1]
    if n != patch.npix:
        raise ValueError(
            f"{inp.path} holds {n}x{n}-pixel patches but {model} was trained on "
            f"{patch.npix}x{patch.npix} patches of {patch.pixel_arcmin:g} arcmin; cut or "
            f"resample the input to {patch.npix}x{patch.npix} pixels, or use a model trained "
            f"at {n}x{n}"
        )
    if not np.isclose(inp.pixel_arcmin, patch.pixel_arcmin, rtol=PIXEL_RTOL, atol=0.0):
        raise ValueError(
            f"{inp.path} has {inp.pixel_arcmin:g} arcmin pixels ({inp.pixel_source}) but "
            f"{model} was trained on {patch.pixel_arcmin:g} arcmin pixels; resample the input "
            f"to {patch.pixel_arcmin:g} arcmin, or use a model trained at "
            f"{inp.pixel_arcmin:g} arcmin"
        )
