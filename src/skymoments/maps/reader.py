"""The one reader of users' maps: Q/U arrays, flat FITS images and HEALPix FITS maps.

``skymoments synthesize`` (its training image) and ``skymoments predict`` (its input) both
read files through this module, so one file gives the same numbers in both. Every reader
returns microkelvin and states what it did (``notes``).

Kinds of file (:func:`detect_kind`)
-----------------------------------
``array``
    ``.npy`` holding one array, or ``.npz`` holding named arrays; microkelvin, Q/U already
    in the patch frame of ``maps.eb`` (what ``skymoments simulate`` writes). A ``.npz`` may
    carry its pixel side as a scalar ``pixel_arcmin``.
``image``
    A flat FITS image: Q and U as two image extensions named ``Q`` and ``U`` (each
    ``(n, n)`` or ``(m, n, n)``), or one image HDU shaped ``(2, n, n)`` or ``(m, 2, n, n)``,
    or, lacking both, exactly two unnamed 2-D image HDUs taken as Q then U. Header cards
    (image HDU first, then the primary HDU):

    - ``BUNIT``: ``K``, ``mK`` or ``uK`` (optionally ``_CMB``) converted to uK; absent
      means uK; anything else is refused.
    - ``CDELT1``/``CDELT2`` (in ``CUNIT1``/``CUNIT2``, ``deg`` when absent) or ``PIXARCM``
      (arcmin): the pixel side, square pixels only. FITS world coordinates grow with the
      array index along an axis when its ``CDELT`` is positive (Greisen & Calabretta 2002,
      A&A 395, 1061, eq. 3 with a diagonal ``PC`` matrix). We lay patches out with columns
      towards east and rows towards north, so a negative ``CDELT1`` (longitude decreasing
      with the column index: the usual RA-to-the-left sky image) or ``CDELT2`` reverses
      that axis on reading.
    - ``POLCCONV``: the frame of Q/U (:data:`FLAT_CONVENTIONS`); absent means the caller's
      default (``patch`` unless configured).
``healpix``
    A HEALPix FITS binary table (``PIXTYPE = 'HEALPIX'`` or an ``NSIDE`` card) read by
    :func:`skymoments.maps.fits_io.read_healpix_map`: Q/U in COSMO, RING, uK.

Q/U frames of a flat image (:data:`FLAT_CONVENTIONS`), x along columns (east), y along
rows (north): ``patch`` is the frame of ``maps.eb`` (angle from +x towards +y); ``COSMO``
and ``IAU`` are the flat-sky forms of the HEALPix conventions, the angle measured from
south (-y) towards east, and from north (+y) towards east. A polarization angle ``psi``
gives ``Q + iU ~ exp(2 i psi)``, so (``maps.healpix`` docstring, at the centre of a cut)
``(Q, U)_patch = -(Q, U)_COSMO`` and, IAU being COSMO with U negated (HEALPix
documentation, "polarization conventions"), ``(Q, U)_patch = (-Q, U)_IAU``. These hold
exactly on a flat sky; on a gnomonic image they hold at its centre (meridians converge
elsewhere): cut HEALPix maps through ``maps.healpix`` for the exact frame.

Q/U in the ``patch`` frame are referred to the array's own axes, so when exactly one axis
is reversed on reading the angle ``psi`` becomes ``pi - psi``: U changes sign (a patch
flip, ``maps.symmetry``). In COSMO or IAU they are referred to north and east, which a
reversal does not change: only the pixels move.

Damaged files are named as such: an empty file, a ``.npy``/``.npz``/FITS cut short, or a
text file renamed ``.fits`` is refused with a message saying so.
"""

from __future__ import annotations

import os
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from skymoments.maps.fits_io import check_fits_file, read_healpix_map, unit_to_uk

__all__ = [
    "FITS_SUFFIXES",
    "FLAT_CONVENTIONS",
    "MAX_ABS_QU_UK",
    "PIXEL_RTOL",
    "FlatMaps",
    "SkyMaps",
    "detect_kind",
    "flat_convention",
    "check_values",
    "is_fits",
    "qu_batch",
    "read_array_file",
    "read_healpix_file",
    "read_image_file",
    "to_patch_frame",
]

FLAT_CONVENTIONS = ("patch", "COSMO", "IAU")
# Relative tolerance of a pixel-size match. Sizes travel as decimal text (FITS cards, MLflow
# params): a value printed with 7 or more significant digits and converted between units
# (deg <-> arcmin, a factor 60) agrees to ~1e-7, while a genuinely different geometry differs
# by percents; 1e-6 separates the two.
PIXEL_RTOL = 1e-6
# Largest |Q| or |U| accepted, microkelvin (1 K). The brightest polarized emission at CMB
# frequencies, Galactic-plane dust at 353 GHz, reaches of order 1e4-1e5 uK_CMB in polarized
# intensity (Planck 2018 results XII, A&A 641, A12; order of magnitude, from memory), and
# the CMB's own polarization is a few uK: a value above 1 K is no sky but a wrong unit (a
# uK map labelled BUNIT = 'K' reads 1e6 times too large) or a fill value.
MAX_ABS_QU_UK = 1e6
FITS_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fz")
_TO_ARCMIN = {
    "deg": 60.0,
    "degree": 60.0,
    "degrees": 60.0,
    "arcmin": 1.0,
    "arcsec": 1.0 / 60.0,
    "rad": 180.0 * 60.0 / np.pi,
}


@dataclass
class FlatMaps:
    """Flat Q/U maps as read.

    Attributes
    ----------
    data : ndarray, shape (m, 2, n, n), float64, microkelvin
        Q/U in the patch frame of ``maps.eb``, rows north, columns east.
    pixel_arcmin : float or None
        Pixel side stated by the file (None when it states none).
    pixel_source : str
        Which card or entry gave it.
    convention : str
        Q/U frame of the file (``patch``, ``COSMO`` or ``IAU``).
    where : str
        The file (and HDU or array) for messages.
    notes : list of str
        What reading did: unit conversions, mirrored axes, frame changes.
    """

    data: np.ndarray
    pixel_arcmin: float | None = None
    pixel_source: str = ""
    convention: str = "patch"
    where: str = ""
    notes: list[str] = field(default_factory=list)


@dataclass
class SkyMaps:
    """HEALPix Q/U maps as read: ``maps`` (2, npix) COSMO uK RING, and the file's cards."""

    maps: np.ndarray
    nside: int
    convention: str = "COSMO"
    coordsys: str | None = None
    notes: list[str] = field(default_factory=list)


# --- kinds, frames -----------------------------------------------------------------------


def is_fits(path: str | os.PathLike) -> bool:
    """Whether the file name has a FITS suffix."""
    name = Path(path).name.lower()
    return any(name.endswith(s) for s in FITS_SUFFIXES)


def detect_kind(path: str | os.PathLike, option: str = "the input") -> str:
    """``array`` for ``.npy``/``.npz``; ``healpix`` or ``image`` for FITS (by its HDUs).

    A FITS file is HEALPix when a binary-table extension has ``PIXTYPE = 'HEALPIX'`` (the
    HEALPix FITS conventions) or an ``NSIDE`` keyword. ``option`` names the setting that
    gave the path, for messages.
    """
    from astropy.io import fits

    p = Path(path)
    suffix = p.suffix.lower()
    if suffix in (".npy", ".npz"):
        return "array"
    if is_fits(p):
        with check_fits_file(p) as hdul:
            for hdu in hdul[1:]:
                if isinstance(hdu, fits.BinTableHDU):
                    pixtype = str(hdu.header.get("PIXTYPE", "")).strip().upper()
                    if pixtype == "HEALPIX" or "NSIDE" in hdu.header:
                        return "healpix"
        return "image"
    raise ValueError(
        f"{option} {p} has suffix {p.suffix!r}; give a .npy/.npz Q/U array, a FITS image or "
        "a HEALPix FITS map (.fits)"
    )


def flat_convention(value: Any, what: str) -> str:
    """``value`` as one of :data:`FLAT_CONVENTIONS` (case-insensitive), or ValueError."""
    text = str(value).strip()
    for conv in FLAT_CONVENTIONS:
        if text.upper() == conv.upper():
            return conv
    raise ValueError(
        f"{what} = {value!r} is not a known polarization convention; accepted values are "
        f"{', '.join(FLAT_CONVENTIONS)} (see skymoments.maps.reader)"
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
    conv = flat_convention(convention, "convention")
    out = np.array(qu, dtype=np.float64, copy=True)
    if conv == "COSMO":
        out *= -1.0
    elif conv == "IAU":
        out[..., 0, :, :] *= -1.0
    return out


def check_values(data: np.ndarray, where: str, skip=None) -> None:
    """Refuse NaN, infinite values and |Q|, |U| above :data:`MAX_ABS_QU_UK` (microkelvin).

    ``skip`` (a value such as ``healpy.UNSEEN``) marks pixels that are not checked.
    """
    arr = np.asarray(data)
    seen = np.ones(arr.shape, dtype=bool) if skip is None else arr != skip
    bad = ~np.isfinite(arr) & seen
    if bad.any():
        first = tuple(int(i) for i in np.argwhere(bad)[0])
        raise ValueError(
            f"{where} has {int(bad.sum())} NaN or infinite values (first at index {first}); "
            "fill or inpaint them first (every pixel is needed)"
        )
    big = (np.abs(arr) > MAX_ABS_QU_UK) & seen
    if big.any():
        peak = float(np.max(np.abs(arr[big])))
        raise ValueError(
            f"{where} has {int(big.sum())} values beyond {MAX_ABS_QU_UK:g} uK (up to "
            f"{peak:.3g} uK): no sky polarization is that bright; check the map's unit (BUNIT "
            "or TUNIT) and fill values"
        )


# --- .npy / .npz -------------------------------------------------------------------------


def _damaged(p: Path, exc: Exception) -> ValueError:
    size = p.stat().st_size
    return ValueError(f"{p} is truncated or corrupt ({size} bytes: {exc}); write or copy it again")


def read_array_file(
    path: str | os.PathLike,
    key: str | None = None,
    preferred: str | None = None,
    key_option: str = "key",
) -> tuple[np.ndarray, str, float | None, str]:
    """Read the array of a ``.npy``, or one array of a ``.npz``.

    Parameters
    ----------
    path : path-like
    key : str, optional
        The ``.npz`` array to read; refused for a ``.npy``.
    preferred : str, optional
        Array read from a ``.npz`` when ``key`` is None and the file has it; otherwise the
        file's only array of two or more dimensions.
    key_option : str
        The setting that gives ``key``, for messages.

    Returns
    -------
    array : ndarray (as stored, numeric)
    where : str
        The file and array, for messages.
    pixel_arcmin : float or None
        The ``.npz`` entry ``pixel_arcmin``, if any.
    pixel_source : str
    """
    p = Path(path)
    if p.stat().st_size == 0:
        raise ValueError(f"{p} is empty (0 bytes); write or copy it again")
    pixel, source = None, ""
    if p.suffix.lower() == ".npy":
        if key is not None:
            raise ValueError(f"{key_option}={key!r} is for .npz files; {p} is a .npy")
        try:
            arr = np.load(p, allow_pickle=False)
        except EOFError as exc:
            raise _damaged(p, exc) from exc
        except ValueError as exc:
            if "allow_pickle" in str(exc) or "Object arrays" in str(exc):
                raise ValueError(
                    f"{p} holds Python objects, not a numeric array; save it with numpy.save "
                    "from a float array"
                ) from exc
            raise _damaged(p, exc) from exc
        where = str(p)
    else:
        try:
            with np.load(p, allow_pickle=False) as z:
                files = list(z.files)
                if key is not None:
                    if key not in files:
                        raise ValueError(
                            f"{p} has no array {key!r}; its arrays are {files}: set "
                            f"{key_option} to one of them"
                        )
                    chosen = key
                elif preferred is not None and preferred in files:
                    chosen = preferred
                else:
                    big = [f for f in files if len(z[f].shape) >= 2]
                    if len(big) != 1:
                        raise ValueError(
                            f"{p} holds arrays {files}; name the one to read with {key_option}=NAME"
                        )
                    chosen = big[0]
                arr = z[chosen]
                if "pixel_arcmin" in files:
                    pixel = float(np.asarray(z["pixel_arcmin"]).reshape(-1)[0])
                    source = f"key pixel_arcmin of {p.name}"
                npix = int(np.asarray(z["npix"]).reshape(-1)[0]) if "npix" in files else None
        except (zipfile.BadZipFile, EOFError, OSError) as exc:
            raise _damaged(p, exc) from exc
        where = f"{p} [{chosen}]"
        if npix is not None and arr.ndim >= 2 and arr.shape[-1] != npix:
            raise ValueError(
                f"{where} is {arr.shape[-1]} pixels wide but the file's npix says {npix}"
            )
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise ValueError(f"{where} holds {arr.dtype} values; Q/U maps must be real numbers")
    return arr, where, pixel, source


def qu_batch(arr: np.ndarray, where: str) -> np.ndarray:
    """``arr`` as a float64 batch (m, 2, n, n) of square Q/U maps, or ValueError."""
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
    if arr.shape[0] == 0 or arr.shape[-1] == 0:
        raise ValueError(f"{where} holds no pixels (shape {arr.shape})")
    return arr.astype(np.float64)


# --- flat FITS images --------------------------------------------------------------------


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


def _bunit(unit: Any, where: str) -> float:
    return unit_to_uk(unit, "BUNIT", where, "convert the maps to uK first")


def read_image_file(path: str | os.PathLike, convention: str = "patch") -> FlatMaps:
    """Read a flat Q/U FITS image (module docstring for the layout and cards).

    Parameters
    ----------
    path : path-like
    convention : {"patch", "COSMO", "IAU"}
        Q/U frame when the header has no ``POLCCONV``.

    Returns
    -------
    FlatMaps
        ``data`` (m, 2, n, n) in uK, patch frame, rows north, columns east.
    """
    p = Path(path)
    default_conv = flat_convention(convention, "convention")
    with check_fits_file(p, "FITS image") as hdul:
        primary = hdul[0].header
        images = [h for h in hdul if h.is_image and h.data is not None]
        named = {str(h.name).strip().upper(): h for h in images}
        other = None
        if "Q" in named and "U" in named:
            hq, hu = named["Q"], named["U"]
            q, u = np.asarray(hq.data), np.asarray(hu.data)
            if q.shape != u.shape or q.ndim not in (2, 3):
                raise ValueError(
                    f"{p}: extensions Q {q.shape} and U {u.shape} must both be (n, n) or (m, n, n)"
                )
            arr = np.stack([q, u], axis=-3)
            heads, other = [hq.header, primary], [hu.header, primary]
            where = f"{p} [Q, U]"
        else:
            cubes = [h for h in images if h.data.ndim >= 3 and h.data.shape[-3] == 2]
            planes = [h for h in images if h.data.ndim == 2]
            if cubes:
                hdu = cubes[0]
                arr = np.asarray(hdu.data)
                heads = [hdu.header, primary]
                where = f"{p} [{hdu.name}]"
            elif len(planes) == 2 and len(images) == 2:
                hq, hu = planes
                arr = np.stack([np.asarray(hq.data), np.asarray(hu.data)])
                heads, other = [hq.header, primary], [hu.header, primary]
                where = f"{p} [HDUs {hdul.index_of(hq)}, {hdul.index_of(hu)} as Q, U]"
            else:
                found = [(str(h.name), tuple(h.data.shape)) for h in images]
                raise ValueError(
                    f"{p} holds no Q/U image: expected image extensions named Q and U, one "
                    f"image HDU shaped (2, n, n) or (m, 2, n, n), or two 2-D image HDUs; found "
                    f"image HDUs {found}"
                )
        data = qu_batch(arr, where)
        file_pixel, source, signs = _header_pixel(heads, where)
        raw_conv = next((h["POLCCONV"] for h in heads if "POLCCONV" in h), None)
        unit = next((h["BUNIT"] for h in heads if "BUNIT" in h), None)
        if other is not None:
            u_pixel, _, u_signs = _header_pixel(other, f"{p} [U]")
            if (
                u_pixel is not None
                and file_pixel is not None
                and not np.isclose(u_pixel, file_pixel, rtol=PIXEL_RTOL, atol=0)
            ) or (u_pixel is not None and u_signs != signs):
                raise ValueError(f"{p}: the Q and U images disagree on the pixel grid")
            u_unit = next((h["BUNIT"] for h in other if "BUNIT" in h), None)
            if (
                u_unit is not None
                and unit is not None
                and _bunit(u_unit, f"{p} [U]") != _bunit(unit, where)
            ):
                raise ValueError(f"{p}: the Q and U images have different BUNIT")
    conv = default_conv if raw_conv is None else flat_convention(raw_conv, f"POLCCONV of {p}")
    notes = []
    factor = _bunit(unit, where)
    if factor != 1.0:
        data = data * factor
        notes.append(f"converted from {unit} to uK")
    if signs[0] < 0:
        data = data[..., :, ::-1]
        notes.append("columns mirrored (CDELT1 < 0)")
    if signs[1] < 0:
        data = data[..., ::-1, :]
        notes.append("rows mirrored (CDELT2 < 0)")
    if conv == "patch" and signs[0] * signs[1] < 0:
        data = data.copy()
        data[..., 1, :, :] *= -1.0  # one mirror: psi -> pi - psi (module docstring)
    if conv != "patch":
        notes.append(f"Q/U turned from {conv} to the patch frame")
    data = to_patch_frame(data, conv)
    return FlatMaps(
        data=np.ascontiguousarray(data),
        pixel_arcmin=file_pixel,
        pixel_source=source,
        convention=conv,
        where=where,
        notes=notes,
    )


# --- HEALPix -----------------------------------------------------------------------------


def read_healpix_file(
    path: str | os.PathLike, fields=("Q", "U"), hdu: int = 1, full_sky: bool = True
) -> SkyMaps:
    """Read the Q/U columns of a HEALPix FITS map as COSMO microkelvin.

    Parameters
    ----------
    path : path-like
    fields : pair of str or int
        The Q and U columns (names or 0-based indices), as for ``read_healpix_map``.
    hdu : int
        Extension holding the map.
    full_sky : bool
        Refuse ``healpy.UNSEEN`` pixels (a cut through alms needs the full sky).

    Returns
    -------
    SkyMaps
    """
    import healpy as hp

    p = Path(path)
    fields = tuple(fields)
    if len(fields) != 2:
        raise ValueError(f"fields={list(fields)} must name exactly two columns, Q then U")
    maps = read_healpix_map(p, fields=fields, convention="COSMO", hdu=int(hdu), units="uK")
    with check_fits_file(p, "HEALPix FITS map") as hdul:
        head, primary = hdul[int(hdu)].header, hdul[0].header
        raw = head.get("POLCCONV", primary.get("POLCCONV"))
        coordsys = head.get("COORDSYS", primary.get("COORDSYS"))
    conv = "COSMO" if raw is None else str(raw).strip().upper()
    n_unseen = int(np.count_nonzero(hp.mask_bad(maps)))
    if full_sky and n_unseen:
        raise ValueError(
            f"{p} has {n_unseen} UNSEEN (masked) pixels in its Q/U columns; cutting patches "
            "needs a full-sky map, so fill (inpaint) the masked pixels first"
        )
    notes = [] if conv == "COSMO" else [f"U sign flipped: file is {conv}, read as COSMO"]
    return SkyMaps(
        maps=maps,
        nside=int(hp.npix2nside(maps.shape[-1])),
        convention=conv,
        coordsys=None if coordsys is None else str(coordsys).strip(),
        notes=notes,
    )
