"""Reading the maps a prediction is made on, with every check that needs no model.

Three kinds of input (``predict.format``, or ``auto`` from the file):

``array``
    ``.npy`` holding one Q/U patch ``(2, n, n)`` or a batch ``(m, 2, n, n)``; or ``.npz``
    holding one under ``predict.key`` (default: ``data_qu`` when present, else the only
    array). Microkelvin, Q/U in the patch frame of ``maps.eb`` (what training used). A
    ``.npz`` may carry its pixel size as a scalar ``pixel_arcmin`` (``skymoments simulate``
    writes it); a ``.npy`` carries none, so ``predict.pixel_arcmin`` must give it.
``image``
    A flat FITS Q/U image read by :func:`skymoments.maps.reader.read_image_file` (layout,
    ``BUNIT``, ``CDELT`` signs, ``POLCCONV``: that module's docstring). The pixel size comes
    from ``PIXARCM`` or ``CDELT1``/``CDELT2``; without either the file is refused unless
    ``predict.pixel_arcmin`` is given; given both ways, they must agree. ``POLCCONV`` absent
    means ``predict.convention``.
``healpix``
    A HEALPix FITS binary table (``PIXTYPE = 'HEALPIX'``) with Q and U columns
    (``predict.healpix.fields``), read by :func:`skymoments.maps.reader.read_healpix_file`
    (``POLCCONV`` COSMO/IAU handled, units converted), full sky, plus a list of patch centres
    ``predict.centres`` (``[[lon, lat], ...]`` in degrees, in the map's own coordinates, or
    a text file of two columns).

Q/U frames (:data:`CONVENTIONS`): ``patch``, ``COSMO``, ``IAU``, as defined in
:mod:`skymoments.maps.reader`. Every value is checked: NaN/inf, and |Q|, |U| above
:data:`skymoments.maps.reader.MAX_ABS_QU_UK` (no sky is that bright), before any compute.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.reader import (
    FLAT_CONVENTIONS,
    PIXEL_RTOL,
    check_values,
    detect_kind,
    flat_convention,
    qu_batch,
    read_array_file,
    read_healpix_file,
    read_image_file,
    to_patch_frame,
)

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
CONVENTIONS = FLAT_CONVENTIONS


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


def detect_format(path: str | os.PathLike) -> str:
    """``array``, ``image`` or ``healpix`` (:func:`skymoments.maps.reader.detect_kind`)."""
    try:
        return detect_kind(path, "input")
    except ValueError as exc:
        if "suffix" in str(exc):
            raise ValueError(f"{exc}, or set predict.format=array|image|healpix") from exc
        raise


def check_finite(data: np.ndarray, where: str) -> None:
    """Refuse NaN/inf and values beyond any sky (:func:`skymoments.maps.reader.check_values`)."""
    check_values(data, where)


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
    arr, name, file_pixel, source = read_array_file(
        p, key=key, preferred="data_qu", key_option="predict.key"
    )
    hint = (
        "a .npy file carries no pixel size"
        if p.suffix.lower() == ".npy"
        else "the .npz has no pixel_arcmin entry"
    )
    data = qu_batch(arr, name)
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
    p = Path(path)
    flat = read_image_file(p, convention=flat_convention(convention, "predict.convention"))
    check_finite(flat.data, flat.where)
    pixel, source = _pixel_size(
        flat.pixel_arcmin,
        flat.pixel_source,
        pixel_arcmin,
        p,
        "no PIXARCM or CDELT1/CDELT2 in the header",
    )
    return MapInput(
        path=p,
        kind="image",
        sha256=sha256_file(p),
        data_qu=flat.data,
        pixel_arcmin=pixel,
        pixel_source=source,
        convention=flat.convention,
        notes=flat.notes,
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

    p = Path(path)
    fields = tuple(fields)
    if len(fields) != 2:
        raise ValueError(
            f"predict.healpix.fields={list(fields)} must name exactly two columns, Q then U"
        )
    sky = read_healpix_file(p, fields=fields, hdu=int(hdu))
    check_values(sky.maps, str(p), skip=hp.UNSEEN)
    return MapInput(
        path=p,
        kind="healpix",
        sha256=sha256_file(p),
        maps_qu=sky.maps,
        nside=sky.nside,
        convention=sky.convention,
        coordsys=sky.coordsys,
        notes=sky.notes,
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
    if path is None or not str(path).strip():
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
