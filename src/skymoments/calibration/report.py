"""One call that judges a posterior: metrics, baselines, figures; and posterior files.

:func:`evaluate_posterior` gathers everything the calibration package measures on a
validation set into an :class:`EvalReport` (metric names: DEVELOPERS.md, Metric names).
The interval reading is Gaussian-marginal (see ``calibration.metrics``); ``REPORT_NOTE``
is the sentence a report shows beside its coverage numbers.

:func:`write_posterior` / :func:`read_posterior` store posterior maps as ``.npz`` and FITS
with units in the header.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from astropy.io import fits

from skymoments.atomic import atomic_path as _atomic
from skymoments.calibration import plots
from skymoments.calibration.metrics import (
    COMPONENTS,
    as_numpy,
    calibration_metrics,
    check_posterior_inputs,
)
from skymoments.calibration.multipole import multipole_figures
from skymoments.calibration.stratify import data_stratified_calibration, stratified_calibration
from skymoments.calibration.wiener import WienerFilter
from skymoments.maps.eb import qu_to_eb
from skymoments.maps.geometry import FlatPatch

REPORT_NOTE = (
    "Intervals are read as Gaussian marginals of (mean, std): the level-p interval of a "
    "pixel is mean +- norm.ppf((1 + p)/2) std. z = (truth - mean)/std; coverage is the "
    "fraction of validation pixels inside the interval, ideal = p. A curve below the "
    "diagonal means over-confident error bars."
)


@dataclass
class EvalReport:
    """The result of :func:`evaluate_posterior`.

    Attributes
    ----------
    metrics : dict of str to float
        Flat metric dict (``calib/*``, ``eval/*``, ``baseline/wiener/*``, ``baseline/exact/*``),
        each key preceded by the ``prefix`` given to ``evaluate_posterior``.
    figures : dict of str to matplotlib Figure
        Artifact path (``maps/grid.png``, ``plots/z_hist.png``, ...) to figure.
    arrays : dict of str to ndarray
        Coverage curves, PIT histograms, spectra, stratified rows, ``std_over_exact``.
    note : str
        How the intervals are read (:data:`REPORT_NOTE`).
    """

    metrics: dict[str, float] = field(default_factory=dict)
    figures: dict = field(default_factory=dict)
    arrays: dict[str, np.ndarray] = field(default_factory=dict)
    note: str = REPORT_NOTE
    prefix: str = ""

    def summary_rows(self) -> list[tuple[str, float, float, str]]:
        """Rows ``(label, E value, B value, ideal)`` of the key metrics, for a terminal table.

        Only metrics that were computed appear (baseline ratios need a baseline).
        """
        p = self.prefix
        spec = [
            ("z mean", "calib/z_mean", "0"),
            ("z std", "calib/z_std", "1"),
            ("coverage 68.27%", "calib/cov68", "0.6827"),
            ("coverage 95.45%", "calib/cov95", "0.9545"),
            ("coverage 99.73%", "calib/cov997", "0.9973"),
            ("KS distance to N(0,1)", "calib/ks", "0"),
            ("max coverage error", "calib/cov_err_max", "0"),
            ("MSE [uK^2]", "eval/mse", "-"),
            ("MSE / Wiener MSE", "eval/mse_ratio_wiener", "< 1"),
            ("Wiener z std", "baseline/wiener/calib/z_std", "1"),
            ("MSE / exact MSE", "eval/mse_ratio_exact", "1"),
            ("variance / exact variance", "eval/var_ratio_exact", "1"),
            ("SNR gain over data", "eval/snr_gain", "> 1"),
        ]
        rows = []
        for label, key, ideal in spec:
            e, b = f"{p}{key}_E", f"{p}{key}_B"
            if e in self.metrics and b in self.metrics:
                rows.append((label, self.metrics[e], self.metrics[b], ideal))
        return rows

    def save(self, folder: str | os.PathLike) -> list[Path]:
        """Write every figure (PNG, at its artifact path) and ``arrays.npz`` under ``folder``.

        Returns the written paths. Each file is written atomically.
        """
        root = Path(folder)
        written = []
        for rel, fig in self.figures.items():
            dest = root / rel
            with _atomic(dest) as tmp:
                fig.savefig(tmp, format="png")
            written.append(dest)
        dest = root / "calibration" / "arrays.npz"
        with _atomic(dest) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, **self.arrays)
        written.append(dest)
        return written


def evaluate_posterior(
    truth_eb,
    data_qu,
    mean_eb,
    std_eb,
    patch: FlatPatch,
    *,
    foreground_qu=None,
    wiener: WienerFilter | None = None,
    exact: WienerFilter | None = None,
    prefix: str = "",
    edges: np.ndarray | None = None,
    n_fg_bins: int = 4,
    make_figures: bool = True,
    grid_index: int = 0,
    flagged=None,
) -> EvalReport:
    """Calibration, accuracy and baselines of a posterior on a validation set.

    Parameters
    ----------
    truth_eb : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        True signal E/B (the training target).
    data_qu : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        The data Q/U the posterior was computed from.
    mean_eb, std_eb : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        Posterior mean and std (``std > 0``).
    patch : FlatPatch
    foreground_qu : ndarray, shape (n, 2, npix, npix), microkelvin, optional
        True foreground of the same maps: enables the stratification by intensity.
    wiener : WienerFilter, optional
        The Gaussian-foreground baseline; gives ``eval/mse_ratio_wiener_C`` and the
        baseline's own metrics under ``baseline/wiener/``.
    exact : WienerFilter, optional
        The exact posterior (all-Gaussian scenario, true spectra): gives
        ``eval/mse_ratio_exact_C``, ``eval/var_ratio_exact_C`` and the std/exact-std map.
    prefix : str
        Prepended to every metric key (e.g. ``"val_highfg/"``).
    edges : ndarray, optional
        Multipole bin edges for the spectra (default ``patch.default_bin_edges()``).
    n_fg_bins : int
        Quantile bins of foreground intensity.
    make_figures : bool
        Build the figures (skip for sweeps that need only numbers).
    grid_index : int
        Which validation map the map grid shows.
    flagged : ndarray of bool, shape (n,), optional
        Per-map out-of-range flag computed from the data (the model's input range):
        gives ``eval/flagged_fraction`` and the calibration of the unflagged and flagged
        maps apart, ``calib/<metric>_inrange_C`` and ``calib/<metric>_outrange_C``.

    Returns
    -------
    EvalReport

    Raises
    ------
    ValueError
        Mismatched shapes, non-finite values, ``std <= 0``, or maps not on ``patch``.
    """
    t, m, s = check_posterior_inputs(truth_eb, mean_eb, std_eb, ("truth_eb", "mean_eb", "std_eb"))
    d = as_numpy(data_qu, "data_qu")
    if d.shape != t.shape:
        raise ValueError(f"data_qu has shape {d.shape}, expected {t.shape} like truth_eb")
    patch.check_maps(d, "data_qu")
    patch.check_maps(t, "truth_eb")
    if not 0 <= grid_index < t.shape[0]:
        raise ValueError(f"grid_index {grid_index} is outside the {t.shape[0]} validation maps")

    rep = EvalReport(prefix=prefix)
    metrics: dict[str, float] = {}
    arrays = rep.arrays

    cal = calibration_metrics(t, m, s)
    metrics.update(cal.metrics)
    arrays.update(cal.arrays)
    ds_metrics, ds_arrays = data_stratified_calibration(t, m, s, d, patch)
    metrics.update(ds_metrics)
    arrays.update(ds_arrays)
    if flagged is not None:
        metrics.update(_flag_split(t, m, s, flagged))
    mp_metrics, mp_arrays = multipole_figures(m, t, patch, data_qu=d, edges=edges)
    metrics.update(mp_metrics)
    arrays.update(mp_arrays)

    w_mean = w_cal = w_arrays = None
    if wiener is not None:
        w_mean, w_std = wiener.posterior(d)
        w_cal = calibration_metrics(t, w_mean, w_std)
        wm, w_arrays = multipole_figures(w_mean, t, patch, data_qu=d, edges=edges)
        metrics.update({f"baseline/wiener/{k}": v for k, v in w_cal.metrics.items()})
        metrics.update({f"baseline/wiener/{k}": v for k, v in wm.items()})
        arrays.update({f"wiener_{k}": v for k, v in w_cal.arrays.items()})
        arrays.update({f"wiener_{k}": v for k, v in w_arrays.items() if k != "ell"})
        for c in COMPONENTS:
            metrics[f"eval/mse_ratio_wiener_{c}"] = (
                cal.metrics[f"eval/mse_{c}"] / w_cal.metrics[f"eval/mse_{c}"]
            )

    if foreground_qu is not None:
        fg = as_numpy(foreground_qu, "foreground_qu")
        st_m, st_a = stratified_calibration(t, m, s, fg, patch, n_bins=n_fg_bins)
        metrics.update(st_m)
        arrays.update(st_a)
        if wiener is not None:
            ws_m, ws_a = stratified_calibration(t, w_mean, w_std, fg, patch, n_bins=n_fg_bins)
            metrics.update({f"baseline/wiener/{k}": v for k, v in ws_m.items()})
            for c in COMPONENTS:
                arrays[f"wiener_z_std_fg_{c}"] = ws_a[f"z_std_fg_{c}"]

    if exact is not None:
        x_mean, x_std = exact.posterior(d)
        x_cal = calibration_metrics(t, x_mean, x_std)
        metrics.update({f"baseline/exact/{k}": v for k, v in x_cal.metrics.items()})
        ratio = np.mean(s / x_std, axis=0)
        arrays["std_over_exact"] = ratio
        for i, c in enumerate(COMPONENTS):
            metrics[f"eval/mse_ratio_exact_{c}"] = (
                cal.metrics[f"eval/mse_{c}"] / x_cal.metrics[f"eval/mse_{c}"]
            )
            metrics[f"eval/var_ratio_exact_{c}"] = float(
                np.mean(s[:, i] ** 2) / np.mean(x_std[:, i] ** 2)
            )

    rep.metrics = {f"{prefix}{k}": float(v) for k, v in metrics.items()}

    if make_figures:
        side_deg = patch.side_rad * 180.0 / np.pi
        data_eb = qu_to_eb(d[grid_index], patch)
        rep.figures["maps/grid.png"] = plots.map_grid(
            t[grid_index],
            data_eb,
            m[grid_index],
            s[grid_index],
            baseline_mean_eb=None if w_mean is None else w_mean[grid_index],
            side_deg=side_deg,
        )
        z_base = None if w_cal is None else w_cal.z
        rep.figures["plots/z_hist.png"] = plots.z_histogram(cal.z, z_baseline=z_base)
        rep.figures["plots/coverage.png"] = plots.coverage_plot(
            cal.arrays["coverage_levels"],
            {c: cal.arrays[f"coverage_{c}"] for c in COMPONENTS},
            None if w_cal is None else {c: w_cal.arrays[f"coverage_{c}"] for c in COMPONENTS},
        )
        rep.figures["plots/pit.png"] = plots.pit_plot(
            cal.arrays["pit_edges"], {c: cal.arrays[f"pit_{c}"] for c in COMPONENTS}
        )
        rep.figures["plots/spectra.png"] = plots.spectra_panel(mp_arrays, w_arrays)
        rep.figures["plots/data_strata.png"] = plots.data_strata_plot(arrays)
        if foreground_qu is not None:
            rep.figures["plots/fg_intensity.png"] = plots.fg_intensity_plot(arrays)
        if exact is not None:
            rep.figures["plots/std_over_exact.png"] = plots.std_over_exact_plot(
                arrays["std_over_exact"], side_deg=side_deg
            )
    return rep


FLAG_SPLIT_KEYS = ("z_mean", "z_std", "cov68", "cov95", "crps", "nll")


def _flag_split(t, m, s, flagged) -> dict[str, float]:
    """Calibration of the unflagged (``inrange``) and flagged (``outrange``) maps apart."""
    flag = np.asarray(flagged, dtype=bool).reshape(-1)
    if flag.shape != (t.shape[0],):
        raise ValueError(f"flagged has {flag.size} values for {t.shape[0]} maps; give one per map")
    out = {"eval/flagged_fraction": float(np.mean(flag)), "eval/flagged_count": float(flag.sum())}
    for name, sel in (("inrange", ~flag), ("outrange", flag)):
        if not np.any(sel):
            continue
        cal = calibration_metrics(t[sel], m[sel], s[sel]).metrics
        for c in COMPONENTS:
            for key in FLAG_SPLIT_KEYS:
                out[f"calib/{key}_{name}_{c}"] = cal[f"calib/{key}_{c}"]
    return out


def _fits_value(v):
    if isinstance(v, bool | int | float | str):
        return v
    if isinstance(v, np.generic):
        return v.item()
    return str(v)


def write_posterior(
    path_stem: str | os.PathLike,
    mean_eb,
    std_eb,
    patch: FlatPatch,
    header: dict | None = None,
    patch_flag=None,
    patch_score=None,
) -> tuple[Path, Path]:
    """Write posterior maps as ``<stem>.npz`` and ``<stem>.fits``, each atomically.

    Parameters
    ----------
    path_stem : path-like
        Path without suffix (e.g. ``out/maps/posterior``).
    mean_eb, std_eb : ndarray or torch.Tensor, shape (2, npix, npix) or (n, 2, npix, npix), uK
    patch : FlatPatch
    header : dict, optional
        Provenance (run id, config name, seed, ...): JSON-serializable values.
    patch_flag, patch_score : ndarray, shape (n,), optional
        Per-map out-of-range flag (True: the data lie outside the model's training range)
        and score; stored as ``patch_flag``/``patch_score`` in the npz and as the ``OUTOFRANGE``
        table HDU (columns ``FLAG``, ``SCORE``) in the FITS file.

    Notes
    -----
    The npz holds ``mean_eb``, ``std_eb``, ``npix``, ``pixel_arcmin``, ``unit`` ("uK"),
    ``channels`` ("E,B") and ``header_json``. The FITS file has an empty primary HDU with
    the provenance (each key as a ``HIERARCH SKYM <key>`` card where it fits on one card,
    and the exact dict as JSON in ``PROVJSON``), then image HDUs ``MEAN`` and ``STD`` with
    ``BUNIT = 'uK'``, the pixel size (``PIXARCM`` in arcmin, ``CDELT1/2`` in deg) and the
    channel order.

    Returns
    -------
    (npz_path, fits_path)
    """
    mean = as_numpy(mean_eb, "mean_eb")
    std = as_numpy(std_eb, "std_eb")
    if mean.shape != std.shape:
        raise ValueError(f"mean_eb {mean.shape} and std_eb {std.shape} must have the same shape")
    patch.check_maps(mean, "mean_eb")
    patch.check_maps(std, "std_eb")
    if mean.ndim not in (3, 4):
        raise ValueError(
            f"posterior maps must be (2, npix, npix) or (n, 2, npix, npix), got {mean.shape}"
        )
    n_bad = int(np.count_nonzero(std <= 0))
    if n_bad:
        raise ValueError(f"std_eb must be > 0 everywhere, but {n_bad} pixels are <= 0")
    extra = {}
    if patch_flag is not None:
        n_maps = 1 if mean.ndim == 3 else mean.shape[0]
        flag = np.asarray(patch_flag, dtype=bool).reshape(-1)
        score = (
            np.full(flag.shape, np.nan)
            if patch_score is None
            else np.asarray(patch_score, dtype=np.float64).reshape(-1)
        )
        if flag.size != n_maps or score.size != n_maps:
            raise ValueError(f"patch_flag/patch_score need one value per map ({n_maps})")
        extra = {"patch_flag": flag, "patch_score": score}
    header = dict(header or {})
    try:
        header_json = json.dumps(header, sort_keys=True, default=str)
    except TypeError as err:
        raise ValueError(f"header must be a dict with string keys: {err}") from err

    stem = Path(path_stem)
    npz_path = stem.with_name(stem.name + ".npz")
    fits_path = stem.with_name(stem.name + ".fits")
    with _atomic(npz_path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(
                fh,
                mean_eb=mean,
                std_eb=std,
                npix=patch.npix,
                pixel_arcmin=patch.pixel_arcmin,
                unit="uK",
                channels="E,B",
                header_json=header_json,
                **extra,
            )

    prim = fits.PrimaryHDU()
    prim.header["ORIGIN"] = "skymoments"
    prim.header["PROVJSON"] = (header_json, "provenance, JSON")
    for key, val in sorted(header.items()):
        card_key = f"HIERARCH SKYM {key}"
        try:
            card = fits.Card(card_key, _fits_value(val))
            if len(card.image) <= 80:  # a single card; the long tail lives in PROVJSON
                prim.header.append(card)
        except (ValueError, TypeError):
            continue
    hdus = [prim]
    for name, arr in (("MEAN", mean), ("STD", std)):
        hdu = fits.ImageHDU(arr.astype(np.float32), name=name)
        h = hdu.header
        h["BUNIT"] = ("uK", "CMB thermodynamic microkelvin")
        h["CHANNELS"] = ("E,B", "order along the channel axis")
        h["NPIX"] = (patch.npix, "pixels per side")
        h["PIXARCM"] = (float(patch.pixel_arcmin), "pixel side [arcmin]")
        h["CDELT1"] = (float(patch.pixel_arcmin) / 60.0, "pixel side along x [deg]")
        h["CDELT2"] = (float(patch.pixel_arcmin) / 60.0, "pixel side along y [deg]")
        h["CUNIT1"] = "deg"
        h["CUNIT2"] = "deg"
        hdus.append(hdu)
    if extra:
        table = fits.BinTableHDU.from_columns(
            [
                fits.Column(name="FLAG", format="L", array=extra["patch_flag"]),
                fits.Column(name="SCORE", format="D", array=extra["patch_score"]),
            ],
            name="OUTOFRANGE",
        )
        table.header["COMMENT"] = "FLAG: data outside the model's training input range"
        hdus.append(table)
    with _atomic(fits_path) as tmp:
        fits.HDUList(hdus).writeto(tmp, overwrite=True)
    return npz_path, fits_path


def read_posterior(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray, FlatPatch, dict]:
    """Read a posterior written by :func:`write_posterior` (``.npz`` or ``.fits``).

    Returns
    -------
    mean_eb, std_eb : ndarray, microkelvin
    patch : FlatPatch
    header : dict
        The provenance dict as written.
    """
    p = Path(path)
    if p.suffix == ".npz":
        with np.load(p, allow_pickle=False) as z:
            if str(z["unit"]) != "uK":
                raise ValueError(f"{p} holds maps in {z['unit']}, expected uK")
            patch = FlatPatch(int(z["npix"]), float(z["pixel_arcmin"]))
            return z["mean_eb"], z["std_eb"], patch, json.loads(str(z["header_json"]))
    if p.suffix in (".fits", ".fit"):
        with fits.open(p) as hdul:
            mean = np.asarray(hdul["MEAN"].data, dtype=np.float64)
            std = np.asarray(hdul["STD"].data, dtype=np.float64)
            h = hdul["MEAN"].header
            if h.get("BUNIT") != "uK":
                raise ValueError(f"{p} MEAN has BUNIT={h.get('BUNIT')!r}, expected 'uK'")
            patch = FlatPatch(int(h["NPIX"]), float(h["PIXARCM"]))
            header = json.loads(hdul[0].header.get("PROVJSON", "{}"))
        return mean, std, patch, header
    raise ValueError(f"unknown posterior file type {p.suffix!r}; use .npz or .fits")
