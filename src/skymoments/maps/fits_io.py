"""FITS files of HEALPix maps: reading (units, columns, Q/U convention) and writing.

A HEALPix FITS map is a binary table (``PIXTYPE = 'HEALPIX'``, Gorski et al. 2005, ApJ 622,
759, and the HEALPix FITS conventions), one column per field, RING or NESTED. Two layouts:

- full sky: one value per pixel, ``healpy.UNSEEN`` marks unobserved pixels;
- partial sky (``OBJECT = 'PARTIAL'``, ``INDXSCHM = 'EXPLICIT'``): a ``PIXEL`` column of
  pixel indices beside the value columns, as healpy's ``read_map(partial=True)`` reads it.

Q/U follow ``POLCCONV``: COSMO (angle from ``e_theta``, south, towards ``e_phi``, east) or
IAU (from north towards east), which differ by the sign of U (HEALPix documentation,
"polarization conventions"); a missing keyword means COSMO.
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import healpy as hp
import numpy as np

from skymoments.atomic import atomic_path
from skymoments.maps.healpix import UNSEEN, _check_finite, _healpix_maps, check_nside

POL_CONVENTIONS = ("COSMO", "IAU")


class MapFileExistsError(FileExistsError, ValueError):
    """Raised when writing would replace an existing file without ``overwrite=True``."""


# --- FITS I/O ----------------------------------------------------------------------------

_ALIASES = {"T": {"T", "I", "TEMPERATURE", "INTENSITY"}, "Q": {"Q"}, "U": {"U"}}
_ALIASES["I"] = _ALIASES["T"]
_TO_UK = {"k": 1e6, "mk": 1e3, "uk": 1.0, "muk": 1.0, "microk": 1.0}


def _token(name: str) -> str:
    return re.split(r"[_\-\s.]", name.strip().upper(), maxsplit=1)[0]


def _matches(column: str, wanted: str) -> bool:
    col, want = column.strip().upper(), wanted.strip().upper()
    return col == want or _token(col) in _ALIASES.get(want, {want})


def _is_u(column: str) -> bool:
    return _token(column) == "U"


def _polcconv(value, where: str) -> str:
    if value is None:
        return "COSMO"  # missing keyword means COSMO (HEALPix documentation)
    conv = str(value).strip().upper()
    if conv not in POL_CONVENTIONS:
        raise ValueError(
            f"POLCCONV = {value!r} in {where}: unknown polarization convention; "
            f"accepted values are {', '.join(POL_CONVENTIONS)} (a missing keyword means COSMO)"
        )
    return conv


def _check_convention(convention: str) -> str:
    conv = str(convention).strip().upper()
    if conv not in POL_CONVENTIONS:
        raise ValueError(
            f"convention must be one of {', '.join(POL_CONVENTIONS)}, got {convention!r}"
        )
    return conv


def unit_to_uk(unit, card: str, where: str, fix: str) -> float:
    """Factor taking values in ``unit`` (the value of a FITS BUNIT or TUNIT) to microkelvin.

    ``K``, ``mK`` and ``uK`` (also ``muK``, ``microK``), optionally with a ``_CMB`` or
    ``_thermo`` suffix (thermodynamic temperature, the unit of CMB maps), case-insensitive;
    an empty or missing unit is taken as microkelvin. Anything else is refused, naming the
    ``card`` and ``where`` it was found; ``fix`` says what to do.
    """
    if unit is None or not str(unit).strip():
        return 1.0
    key = str(unit).strip().replace("\u03bc", "u").replace("\u00b5", "u").lower()
    key = re.sub(r"[_\s-]*(cmb|thermo)$", "", key)
    if key not in _TO_UK:
        raise ValueError(
            f"{where} has {card} = {unit!r}, not a CMB temperature unit this reader converts "
            f"(K, mK, uK, optionally _CMB); {fix}"
        )
    return _TO_UK[key]


def _unit_factor(unit: str | None, column: str, path) -> float:
    return unit_to_uk(
        unit, "TUNIT", f"column {column!r} of {path}", "pass units=None to read the raw values"
    )


def check_fits_file(path, what: str = "FITS file"):
    """Open ``path`` with astropy and refuse an empty, truncated or non-FITS file.

    Returns the open ``HDUList`` (the caller closes it). Every HDU's data must lie within
    the file: a file cut short (an interrupted copy or download) is named as truncated
    instead of failing later in a read.
    """
    from astropy.io import fits

    path = Path(path)
    size = path.stat().st_size
    if size == 0:
        raise ValueError(f"{what} {path} is empty (0 bytes); write or copy it again")
    with open(path, "rb") as fh:
        start = fh.read(80)
    # A FITS file begins with the card SIMPLE = T (FITS standard 4.0, section 4.4.1.1);
    # gzip-compressed FITS begins with gzip's magic bytes 1f 8b (RFC 1952).
    if not (start.startswith(b"SIMPLE  =") or start.startswith(b"\x1f\x8b")):
        kind = "text" if all(32 <= c < 127 or c in (9, 10, 13) for c in start) else "binary"
        raise ValueError(
            f"{what} {path} is not a FITS file (it holds {kind} that does not begin with the "
            "SIMPLE card every FITS file starts with); give a FITS file, or a .npy/.npz array"
        )
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # astropy warns of truncation; we say it below
            hdul = fits.open(path, memmap=False, lazy_load_hdus=False)
    except (OSError, TypeError, ValueError, IndexError, KeyError) as exc:
        raise ValueError(
            f"{what} {path} is truncated or corrupt ({size} bytes: {exc}); write or copy it again"
        ) from exc
    gzipped = start.startswith(b"\x1f\x8b")  # its size is not that of the FITS stream
    for i, hdu in enumerate([] if gzipped else hdul):
        info = hdu.fileinfo()
        if info is not None and info["datLoc"] + hdu.size > size:
            hdul.close()
            raise ValueError(
                f"{what} {path} is truncated: HDU {i} needs {info['datLoc'] + hdu.size} bytes "
                f"but the file has {size}; write or copy it again"
            )
    return hdul


def read_healpix_map(
    path,
    fields: Sequence[str | int] = ("Q", "U"),
    convention: str = "COSMO",
    hdu: int = 1,
    units: str | None = "uK",
) -> np.ndarray:
    """Read fields of a HEALPix FITS map.

    Parameters
    ----------
    path : str or Path
    fields : sequence of str or int
        Column names (``"T"``/``"I"``, ``"Q"``, ``"U"`` match e.g. ``I_STOKES``,
        ``Q_POLARISATION``; any other name must match exactly, case-insensitive) or
        0-based column indices.
    convention : {"COSMO", "IAU"}
        Polarization convention of the returned maps. The file's own convention is its
        ``POLCCONV`` keyword (extension header, then primary); a missing keyword means
        COSMO (HEALPix documentation). A file in IAU has its U sign flipped to give COSMO.
    hdu : int
        FITS extension holding the map.
    units : {"uK", None}
        "uK": convert columns whose TUNIT is K, mK or uK (optionally ``_CMB``) to
        microkelvin; a column without TUNIT is taken as microkelvin. None: raw values.

    Returns
    -------
    ndarray, shape (len(fields), npix), float64
        RING ordering (NESTED files are reordered by healpy); healpy.UNSEEN kept as is.
    """

    want_conv = _check_convention(convention)
    if units not in ("uK", None):
        raise ValueError(f"units must be 'uK' or None, got {units!r}")
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"no HEALPix FITS file at {path}")
    if isinstance(fields, str | int):
        fields = (fields,)
    with check_fits_file(path, "HEALPix FITS map") as hdul:
        if not 0 < hdu < len(hdul):
            raise ValueError(f"{path} has extensions 1..{len(hdul) - 1}, asked for hdu={hdu}")
        header, primary = hdul[hdu].header, hdul[0].header
        ncol = int(header.get("TFIELDS", 0))
        columns = [str(header.get(f"TTYPE{i + 1}", f"COLUMN{i + 1}")) for i in range(ncol)]
        tunits = [header.get(f"TUNIT{i + 1}") for i in range(ncol)]
        raw_conv = header.get("POLCCONV", primary.get("POLCCONV"))
    file_conv = _polcconv(raw_conv, str(path))

    index = []
    for f in fields:
        if isinstance(f, int | np.integer):
            if not 0 <= int(f) < ncol:
                raise ValueError(f"column index {f} out of range: {path} has columns {columns}")
            index.append(int(f))
            continue
        hits = [i for i, c in enumerate(columns) if _matches(c, str(f))]
        if not hits:
            raise ValueError(
                f"{path} has no column {f!r}; available columns: {columns}. "
                "Ask for one of them by name or by 0-based index"
            )
        index.append(hits[0])

    maps = np.atleast_2d(
        np.asarray(hp.read_map(str(path), field=tuple(index), hdu=hdu, dtype=np.float64))
    ).astype(float, copy=True)
    bad = hp.mask_bad(maps)
    _check_finite(np.where(bad, 0.0, maps), f"{path}", allow_unseen=True)
    for row, i in enumerate(index):
        scale = _unit_factor(tunits[i], columns[i], path) if units == "uK" else 1.0
        if file_conv != want_conv and _is_u(columns[i]):
            scale = -scale  # IAU and COSMO differ by the sign of U
        maps[row] = np.where(bad[row], UNSEEN, maps[row] * scale)
    return maps


def write_healpix_map(
    path,
    maps,
    column_names: Sequence[str],
    units: str = "uK",
    convention: str = "COSMO",
    overwrite: bool = False,
    extra_header=None,
) -> Path:
    """Write HEALPix maps (RING ordering) to a FITS binary table, atomically.

    Parameters
    ----------
    path : str or Path
    maps : ndarray, shape (k, npix) or (npix,), microkelvin
        COSMO Q/U; healpy.UNSEEN marks unobserved pixels, NaN and inf are refused.
    column_names : sequence of str, length k
        E.g. ``("T", "Q", "U")``; a column whose name starts with ``U`` is U.
    units : str
        TUNIT of every column.
    convention : {"COSMO", "IAU"}
        Convention written to the file (``POLCCONV``); IAU flips the sign of U columns.
    overwrite : bool
        Replace an existing file; otherwise :class:`MapFileExistsError`.
    extra_header : dict or sequence of (key, value[, comment]), optional
        More header cards (not POLCCONV, which ``convention`` sets).

    Returns
    -------
    Path of the written file. The map goes to a temporary file in the same folder that
    then replaces ``path`` (``os.replace``), so a reader never sees a half-written file.
    """
    arr, _, _ = _healpix_maps(maps, "maps", allow_unseen=True)
    conv = _check_convention(convention)
    if isinstance(column_names, str):
        column_names = (column_names,)
    names = [str(c) for c in column_names]
    if len(names) != arr.shape[0] or len(set(n.upper() for n in names)) != len(names):
        raise ValueError(
            f"column_names {names} must give one distinct name per map ({arr.shape[0]} maps)"
        )
    if not isinstance(units, str):
        raise ValueError(f"units must be a string such as 'uK', got {units!r}")
    cards = []
    if extra_header is not None:
        items = extra_header.items() if isinstance(extra_header, Mapping) else extra_header
        for card in items:
            card = tuple(card)
            if str(card[0]).strip().upper() == "POLCCONV":
                raise ValueError("set POLCCONV through convention=, not extra_header")
            cards.append(card)
    cards.append(("POLCCONV", conv, "polarization convention (COSMO or IAU)"))

    path = Path(path)
    if path.exists() and not overwrite:
        raise MapFileExistsError(f"{path} exists; pass overwrite=True to replace it")
    if not path.parent.is_dir():
        raise ValueError(f"folder {path.parent} does not exist; create it first")
    out = arr.copy()
    if conv == "IAU":
        for row, name in enumerate(names):
            if _is_u(name):
                good = ~hp.mask_bad(out[row])
                out[row, good] = -out[row, good]
    with atomic_path(path) as tmp:
        hp.write_map(
            str(tmp),
            list(out) if out.shape[0] > 1 else out[0],
            column_names=names,
            column_units=units,
            extra_header=cards,
            overwrite=True,
            dtype=out.dtype,
        )
    return path


def write_partial_healpix(
    path,
    pixels,
    values,
    nside: int,
    column_names: Sequence[str],
    units: str = "uK",
    overwrite: bool = False,
    extra_header=None,
    dtype=np.float32,
) -> Path:
    """Write maps known on some pixels only as a partial-sky HEALPix FITS table, atomically.

    The table holds a ``PIXEL`` column (RING indices, int64) and one column per map, with
    ``OBJECT = 'PARTIAL'`` and ``INDXSCHM = 'EXPLICIT'`` (HEALPix FITS conventions), so its
    size grows with the pixels written, not with the sky; ``healpy.read_map(path,
    partial=True)`` reads it back. No ``POLCCONV`` card is written: the columns are scalars
    (E, B and their errors), not Q/U.

    Parameters
    ----------
    path : path-like
    pixels : ndarray of int, shape (p,)
        Distinct RING pixel indices, in any order (written sorted).
    values : ndarray, shape (k, p)
        One row per column.
    nside : int
    column_names : sequence of str, length k
    units : str
        TUNIT of every column.
    overwrite : bool
        Replace an existing file; otherwise :class:`MapFileExistsError`.
    extra_header : dict or sequence of (key, value[, comment]), optional
    dtype : numpy dtype of the value columns (float32 by default: posterior maps are
        written for reading, at 7 significant digits).

    Returns
    -------
    Path of the written file (written to a temporary file, then moved into place).
    """
    from astropy.io import fits

    nside = check_nside(nside)
    pix = np.asarray(pixels)
    vals = np.atleast_2d(np.asarray(values, dtype=float))
    if pix.ndim != 1 or not np.issubdtype(pix.dtype, np.integer):
        raise ValueError(f"pixels must be a 1-D integer array, got {pix.dtype} {pix.shape}")
    npix = hp.nside2npix(nside)
    if pix.size and (pix.min() < 0 or pix.max() >= npix):
        raise ValueError(f"pixels must lie in [0, {npix}) for nside {nside}")
    if len(np.unique(pix)) != pix.size:
        raise ValueError("pixels must be distinct")
    if isinstance(column_names, str):
        column_names = (column_names,)
    names = [str(c) for c in column_names]
    if vals.shape != (len(names), pix.size):
        raise ValueError(
            f"values has shape {vals.shape}; expected ({len(names)}, {pix.size}): one row per "
            "column, one value per pixel"
        )
    _check_finite(vals, "values", allow_unseen=False)
    order = np.argsort(pix)
    fmt = {np.dtype(np.float32): "E", np.dtype(np.float64): "D"}[np.dtype(dtype)]
    cols = [fits.Column(name="PIXEL", format="K", array=pix[order].astype(np.int64))]
    cols += [
        fits.Column(name=n, format=fmt, unit=units, array=v[order].astype(dtype))
        for n, v in zip(names, vals, strict=True)
    ]
    table = fits.BinTableHDU.from_columns(cols)
    head = table.header
    head["PIXTYPE"] = ("HEALPIX", "HEALPIX pixelisation")
    head["ORDERING"] = ("RING", "pixel ordering scheme")
    head["NSIDE"] = (nside, "resolution parameter of HEALPIX")
    head["INDXSCHM"] = ("EXPLICIT", "indexing: explicit pixel indices")
    head["OBJECT"] = ("PARTIAL", "sky coverage: partial")
    head["FIRSTPIX"] = (0, "first pixel number (0 based)")
    head["LASTPIX"] = (npix - 1, "last pixel number (0 based)")
    head["OBS_NPIX"] = (int(pix.size), "number of pixels written")
    if extra_header is not None:
        items = extra_header.items() if isinstance(extra_header, Mapping) else extra_header
        for card in items:
            card = tuple(card)
            if str(card[0]).strip().upper() == "POLCCONV":
                raise ValueError("a partial map of scalar columns carries no POLCCONV card")
            head[card[0]] = card[1:] if len(card) > 2 else card[1]
    path = Path(path)
    if path.exists() and not overwrite:
        raise MapFileExistsError(f"{path} exists; pass overwrite=True to replace it")
    if not path.parent.is_dir():
        raise ValueError(f"folder {path.parent} does not exist; create it first")
    with atomic_path(path) as tmp:
        fits.HDUList([fits.PrimaryHDU(), table]).writeto(tmp, overwrite=True)
    return path
