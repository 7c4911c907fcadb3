"""Writing a prediction: posterior files, a quick-look PNG, HEALPix maps; refusing overwrites.

Files (``<name>`` is ``predict.name``, default ``posterior``), under ``predict.out``:

``<name>.npz`` and ``<name>.fits``
    Posterior mean and std of E/B, shape (m, 2, n, n), uK, written by
    :func:`skymoments.calibration.report.write_posterior` (FITS: image HDUs ``MEAN`` and
    ``STD`` with ``BUNIT = 'uK'``; provenance as JSON in ``PROVJSON`` and as cards). The
    primary header also gets the standard cards of :func:`provenance_cards`.
``<name>.png``
    Quick look: mean E, mean B, std E, std B for the first patches.
``<name>_healpix.fits``
    HEALPix input only: a partial-sky table (``OBJECT = 'PARTIAL'``, explicit ``PIXEL``
    indices, RING) of the pixels the patches cover, float32 columns ``MEAN_E``, ``MEAN_B``,
    ``STD_E``, ``STD_B`` (uK) and ``N_PATCH``, overlaps combined by inverse variance
    (:func:`project_to_healpix`); no ``POLCCONV`` card, as E and B are scalars. Read it with
    ``healpy.read_map(path, field=None, partial=True)``.

Files are written with the mode the user's umask gives a new file, like any other output.

Everything is first written into a hidden staging folder beside the outputs and moved into
place (``os.replace``, atomic per file) only once every file is complete; on any error the
staging folder is removed, so no partial file is ever left under an output name.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from skymoments.maps.geometry import FlatPatch

__all__ = [
    "SkyPosterior",
    "check_outputs",
    "output_paths",
    "project_to_healpix",
    "provenance_cards",
    "quicklook_figure",
    "write_outputs",
]

MAX_CENTRE_CARDS = 999  # CLONnnn / CLATnnn stay within FITS's 8-character keywords


def output_paths(out_dir: str | os.PathLike, name: str, healpix: bool) -> dict[str, Path]:
    """The files a prediction writes, by role (``npz``, ``fits``, ``png``, ``healpix``).

    Parameters
    ----------
    out_dir : path-like
    name : str
        File stem (``predict.name``): letters, digits, ``_ - .``.
    healpix : bool
        Whether the input is a HEALPix map (adds the ``healpix`` file).
    """
    text = str(name)
    if not text or text.startswith(".") or any(not (c.isalnum() or c in "_-.") for c in text):
        raise ValueError(
            f"predict.name={name!r} must be a plain file stem (letters, digits, _ - .), e.g. "
            "posterior"
        )
    root = Path(out_dir)
    paths = {
        "npz": root / f"{text}.npz",
        "fits": root / f"{text}.fits",
        "png": root / f"{text}.png",
    }
    if healpix:
        paths["healpix"] = root / f"{text}_healpix.fits"
    return paths


def check_outputs(paths: Mapping[str, Path], force: bool) -> None:
    """Refuse to run when an output exists and ``force`` is off; refuse a file as folder."""
    for path in paths.values():
        if path.parent.exists() and not path.parent.is_dir():
            raise ValueError(
                f"predict.out={str(path.parent)!r} is a file, not a folder; choose another "
                "predict.out"
            )
        if path.is_dir():
            raise ValueError(f"output {path} is a folder; choose another predict.out or name")
        if path.exists() and not force:
            raise ValueError(
                f"output {path} already exists; pass predict.force=true to replace it, or "
                "choose another predict.out (or predict.name)"
            )


def _card_value(value: Any) -> Any:
    if isinstance(value, bool | int | float | str):
        return value
    if isinstance(value, np.generic):
        return value.item()
    return json.dumps(value, default=str)


def provenance_cards(prov: Mapping[str, Any]) -> list[tuple[str, Any, str]]:
    """Standard 8-character FITS cards for the provenance dict of a prediction.

    Keys used: ``MODELURI``, ``MODELREF``, ``MODELNAM``, ``MODELVER``, ``MODELRUN``,
    ``INPUT``, ``INSHA256``, ``INFORMAT``, ``QUCONV``, ``INNSIDE``, ``COORDSYS``,
    ``PREDRUN``, ``FLAGMARG`` (the out-of-range flag's margin), and per patch
    ``CLONi``/``CLATi`` (centre, deg) for HEALPix cuts. Long strings use FITS's CONTINUE
    convention (astropy).
    """
    spec = (
        ("MODELURI", "model_uri", "MLflow model URI"),
        ("MODELREF", "model_ref", "model reference as given"),
        ("MODELNAM", "model_name", "registered model name"),
        ("MODELVER", "model_version", "registered model version"),
        ("MODELRUN", "model_run_id", "MLflow run the model was trained in"),
        ("INPUT", "input", "input file"),
        ("INSHA256", "input_sha256", "SHA-256 of the input file"),
        ("INFORMAT", "input_format", "array, image or healpix"),
        ("QUCONV", "input_convention", "Q/U convention of the input"),
        ("INNSIDE", "nside", "HEALPix resolution of the input map"),
        ("COORDSYS", "coordsys", "coordinates of the input map and centres"),
        ("PREDRUN", "prediction_run_id", "MLflow run of this prediction"),
        ("FLAGMARG", "out_of_range_margin", "out-of-range flag: patch score > this"),
    )
    cards = []
    for key, name, comment in spec:
        value = prov.get(name)
        if value is None or value == "":
            continue
        cards.append((key, _card_value(value), comment))
    centres = prov.get("centres") or []
    for i, (lon, lat) in enumerate(centres[:MAX_CENTRE_CARDS]):
        cards.append((f"CLON{i}", float(lon), f"centre of patch {i}: longitude [deg]"))
        cards.append((f"CLAT{i}", float(lat), f"centre of patch {i}: latitude [deg]"))
    return cards


def _fitted_cards(cards: list[tuple[str, Any, str]]) -> list[tuple[str, Any, str]]:
    """Drop the comment of a card that would not fit on 80 characters with it."""
    from astropy.io import fits

    out = []
    for key, value, comment in cards:
        bare = fits.Card(key, value).image.rstrip()  # long strings span CONTINUE cards
        if len(bare) + len(" / ") + len(comment) > 80:
            comment = ""
        out.append((key, value, comment))
    return out


def _stamp_fits(path: Path, cards: list[tuple[str, Any, str]]) -> None:
    from astropy.io import fits

    with fits.open(path, mode="update") as hdul:
        for key, value, comment in cards:
            hdul[0].header[key] = (value, comment)
        for hdu in hdul[1:]:
            # Each image says where its maps came from without reading the primary.
            for key, value, comment in cards:
                if key in ("MODELURI", "INSHA256", "QUCONV"):
                    hdu.header[key] = (value, comment)
        hdul.flush()


@dataclass
class SkyPosterior:
    """Posterior maps on the HEALPix pixels the patches cover (partial sky).

    Attributes
    ----------
    nside : int
    pixels : ndarray of int, shape (p,)
        RING indices, increasing.
    maps : ndarray, shape (4, p), microkelvin
        MEAN_E, MEAN_B, STD_E, STD_B.
    counts : ndarray of int, shape (p,)
        How many patches cover each pixel.
    """

    nside: int
    pixels: np.ndarray
    maps: np.ndarray
    counts: np.ndarray

    def full_sky(self) -> np.ndarray:
        """The maps as (4, 12 * nside**2), healpy.UNSEEN outside the patches."""
        import healpy as hp

        out = np.full((4, hp.nside2npix(self.nside)), hp.UNSEEN)
        out[:, self.pixels] = self.maps
        return out


# Floor of a patch variance in the weights, uK^2 (a zero std would take all the weight).
_MIN_VARIANCE = 1e-30


def project_to_healpix(
    mean_eb: np.ndarray,
    std_eb: np.ndarray,
    centres: np.ndarray,
    patch: FlatPatch,
    nside: int,
    interpolation: str = "bilinear",
) -> SkyPosterior:
    """Project patch posteriors onto HEALPix pixels, combining overlaps by inverse variance.

    Each patch is sampled at the HEALPix pixels it covers only
    (:func:`skymoments.maps.healpix.patch_to_pixels`), so the cost grows with the patch
    pixels, not with the sky. Where ``K`` patches cover a pixel, with means ``mu_k`` and
    stds ``s_k`` there (E and B separately), the weights are ``w_k = 1 / s_k^2`` and

    - mean: ``sum_k w_k mu_k / sum_k w_k`` (the inverse-variance weighted mean);
    - std: ``sqrt(K / sum_k w_k)``, the square root of the harmonic mean of the variances.
      Overlapping patches see the same data, so they are not independent estimates and the
      combination is given no smaller an error than its patches (``1 / sqrt(sum w_k)``
      would claim a K-fold gain that the data do not hold).

    Parameters
    ----------
    mean_eb, std_eb : ndarray, shape (k, 2, n, n), microkelvin
    centres : ndarray, shape (k, 2), degrees
        (lon, lat) each patch was cut at.
    patch : FlatPatch
    nside : int
        Output resolution.
    interpolation : {"bilinear", "nearest"}
        See :func:`skymoments.maps.healpix.patch_to_pixels`.

    Returns
    -------
    SkyPosterior
    """
    from skymoments.maps.healpix import patch_to_pixels

    pix_all, val_all = [], []
    for k, (lon, lat) in enumerate(np.asarray(centres, dtype=float)):
        var = np.maximum(std_eb[k] ** 2, _MIN_VARIANCE)
        fields = np.concatenate([mean_eb[k], var])
        pix, vals = patch_to_pixels(
            fields, lon, lat, patch, nside, kind="scalar", interpolation=interpolation
        )
        pix_all.append(pix)
        val_all.append(vals)
    pix = np.concatenate(pix_all) if pix_all else np.zeros(0, dtype=np.int64)
    vals = np.concatenate(val_all, axis=1) if val_all else np.zeros((4, 0))
    pixels, where = np.unique(pix, return_inverse=True)
    p = len(pixels)
    counts = np.bincount(where, minlength=p)
    out = np.empty((4, p))
    for f in range(2):
        w = 1.0 / vals[2 + f]
        wsum = np.bincount(where, weights=w, minlength=p)
        out[f] = np.bincount(where, weights=w * vals[f], minlength=p) / wsum
        out[2 + f] = np.sqrt(counts / wsum)
    return SkyPosterior(int(nside), pixels.astype(np.int64), out, counts.astype(np.int64))


def quicklook_figure(
    mean_eb: np.ndarray,
    std_eb: np.ndarray,
    patch: FlatPatch,
    titles: list[str] | None = None,
    max_rows: int = 4,
):
    """Mean E, mean B, std E, std B of the first ``max_rows`` patches (rows north, up).

    Parameters
    ----------
    mean_eb, std_eb : ndarray, shape (m, 2, n, n), microkelvin
    patch : FlatPatch
    titles : list of str, optional
        Row labels (e.g. the patch centres).
    max_rows : int

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    rows = max(1, min(int(max_rows), len(mean_eb)))
    side = np.degrees(patch.side_rad)
    extent = (-side / 2, side / 2, -side / 2, side / 2)
    fig = Figure(figsize=(10.0, 2.5 * rows + 0.3))
    axes = fig.subplots(rows, 4, squeeze=False)
    panels = (
        ("mean E", lambda k: mean_eb[k, 0], "RdBu_r", True),
        ("mean B", lambda k: mean_eb[k, 1], "RdBu_r", True),
        ("std E", lambda k: std_eb[k, 0], "viridis", False),
        ("std B", lambda k: std_eb[k, 1], "viridis", False),
    )
    for r in range(rows):
        # E and B share one colour scale per row (means, and stds), so that a faint B map
        # does not look as strong as E; the titles state the rms of each.
        mean_lim = float(np.max(np.abs(mean_eb[r]))) or 1.0
        std_lo, std_hi = float(np.min(std_eb[r])), float(np.max(std_eb[r]))
        for c, (label, get, cmap, symmetric) in enumerate(panels):
            ax = axes[r, c]
            img = get(r)
            vmin, vmax = (-mean_lim, mean_lim) if symmetric else (std_lo, std_hi)
            im = ax.imshow(img, origin="lower", cmap=cmap, vmin=vmin, vmax=vmax, extent=extent)
            rms = float(np.sqrt(np.mean(img**2)))
            title = f"{label} [uK], rms {rms:.3g}"
            if c == 0 and titles:
                title = f"{titles[r]}\n{title}"
            ax.set_title(title, fontsize=8)
            ax.tick_params(labelsize=6)
            if r == rows - 1:
                ax.set_xlabel("x (east) [deg]", fontsize=7)
            if c == 0:
                ax.set_ylabel("y (north) [deg]", fontsize=7)
            fig.colorbar(im, ax=ax, fraction=0.046, pad=0.02).ax.tick_params(labelsize=6)
    fig.tight_layout()
    return fig


def _umask_mode() -> int:
    """Mode of a new regular file under the process umask (0o666 & ~umask, POSIX open)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def write_outputs(
    paths: Mapping[str, Path],
    mean_eb: np.ndarray,
    std_eb: np.ndarray,
    patch: FlatPatch,
    provenance: Mapping[str, Any],
    *,
    force: bool = False,
    healpix_maps: np.ndarray | None = None,
    titles: list[str] | None = None,
    quicklook_rows: int = 4,
    patch_flag=None,
    patch_score=None,
) -> dict[str, Path]:
    """Write every output of a prediction, atomically (module docstring).

    Parameters
    ----------
    paths : mapping of role to Path
        From :func:`output_paths`; all in one folder.
    mean_eb, std_eb : ndarray, shape (m, 2, n, n), microkelvin
    patch : FlatPatch
    provenance : mapping
        JSON-serializable provenance (model URI and version, run ids, input hash, convention,
        centres, ...); goes into every header.
    force : bool
        Replace existing outputs; otherwise they are refused (checked again just before the
        move, in case a file appeared meanwhile).
    healpix_maps : SkyPosterior, optional
        Needed when ``paths`` has a ``healpix`` entry; written as a partial-sky float32
        table (explicit pixel indices) with columns MEAN_E, MEAN_B, STD_E, STD_B, N_PATCH.
    titles : list of str, optional
        Quick-look row labels.
    quicklook_rows : int
    patch_flag, patch_score : ndarray, shape (m,), optional
        Per-patch out-of-range flag and score of the model's training-input range
        (``PosteriorMoments.out_of_range``): ``patch_flag``/``patch_score`` in the npz, the
        ``OUTOFRANGE`` table in the FITS file.

    Returns
    -------
    dict of role to Path
        The written files.
    """
    from skymoments.calibration.report import write_posterior
    from skymoments.maps.fits_io import write_partial_healpix

    folders = {p.parent for p in paths.values()}
    if len(folders) != 1:
        raise ValueError(f"outputs must share one folder, got {sorted(map(str, folders))}")
    out_dir = folders.pop()
    out_dir.mkdir(parents=True, exist_ok=True)
    check_outputs(paths, force)
    if "healpix" in paths and healpix_maps is None:
        raise ValueError("a HEALPix output needs healpix_maps")
    prov = dict(provenance)
    cards = _fitted_cards(provenance_cards(prov))
    staging = Path(tempfile.mkdtemp(prefix=".predict-", suffix=".staging", dir=out_dir))
    try:
        staged: dict[str, Path] = {}
        stem = staging / paths["npz"].stem
        staged["npz"], staged["fits"] = write_posterior(
            stem, mean_eb, std_eb, patch, prov, patch_flag=patch_flag, patch_score=patch_score
        )
        _stamp_fits(staged["fits"], cards)
        fig = quicklook_figure(mean_eb, std_eb, patch, titles=titles, max_rows=quicklook_rows)
        staged["png"] = staging / paths["png"].name
        fig.savefig(staged["png"], dpi=110, format="png")
        if "healpix" in paths:
            staged["healpix"] = staging / paths["healpix"].name
            sky = healpix_maps
            write_partial_healpix(
                staged["healpix"],
                sky.pixels,
                np.concatenate([sky.maps, sky.counts[None].astype(float)]),
                sky.nside,
                column_names=("MEAN_E", "MEAN_B", "STD_E", "STD_B", "N_PATCH"),
                units="uK",
                extra_header=cards,
            )
        check_outputs(paths, force)
        mode = _umask_mode()
        for role, final in paths.items():
            os.chmod(staged[role], mode)  # temporary files are created private (mode 600)
            os.replace(staged[role], final)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return dict(paths)
