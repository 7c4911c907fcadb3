"""Apply a tracked posterior-moment model to a user's maps: check everything, then compute.

Order of work, so that every expected refusal comes before any compute (and before the
model's weights are loaded):

1. parse ``cfg.predict`` (:class:`PredictOptions`) and refuse existing outputs without
   ``predict.force``;
2. resolve the model reference in the tracking store and read its training geometry from
   the run params (:func:`~skymoments.predict.source.resolve_model_source`);
3. read the input and check it (NaN/inf, shape, pixel size, units, polarization columns and
   convention) against that geometry (:mod:`skymoments.predict.inputs`);
4. HEALPix input: cut one patch per centre at the model's geometry;
5. load the model and run it (:func:`skymoments.moments.pipeline.predict_moments`);
6. write the outputs atomically (:mod:`skymoments.predict.outputs`) and, when
   ``predict.log_run``, log them as an MLflow run in the same store.
"""

from __future__ import annotations

import datetime as _dt
import os
import sys
import time
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np
from omegaconf import DictConfig, ListConfig, OmegaConf

from skymoments.config.schema import PredictSchema, checked_node
from skymoments.maps.geometry import FlatPatch
from skymoments.predict.inputs import (
    CONVENTIONS,
    FORMATS,
    MapInput,
    check_patch_geometry,
    detect_format,
    parse_centres,
    read_input,
)
from skymoments.predict.outputs import check_outputs, output_paths, project_to_healpix
from skymoments.predict.source import ModelSource, resolve_model_source
from skymoments.tracking import load_model

__all__ = ["PredictOptions", "PredictionResult", "cut_patches", "run_prediction"]

INTERPOLATIONS = ("bilinear", "nearest")
# How patches are cut from a HEALPix map: ``fast`` evaluates one band-limited
# representation at the patch pixels (maps.sky_cuts); ``exact`` is the reference that
# rotates the alms per centre (maps.healpix.cut_patch); ``bilinear`` interpolates pixels.
CUTS = ("fast", "exact", "bilinear")
# A HEALPix map whose pixels are much coarser than the model's holds no power on the scales
# the network was trained to see: refused when the HEALPix pixel side exceeds this many
# patch pixels (a rule of thumb, common practice: resolve a scale with >= 2 samples).
COARSE_MAP_FACTOR = 2.0


@dataclass
class PredictOptions(PredictSchema):
    """The ``predict`` node, typed and checked.

    Its keys, types and defaults are those of :class:`skymoments.config.schema.PredictSchema`
    (registered in Hydra's ConfigStore as ``schema/predict``; each key documented in
    ``conf/predict/default.yaml``), with ``healpix`` a
    :class:`~skymoments.config.schema.PredictHealpixSchema`. Build it with
    :meth:`from_config`.
    """

    @classmethod
    def from_config(cls, node: Any) -> PredictOptions:
        """Build from ``cfg.predict`` (a DictConfig or a mapping); refuse bad values.

        Raises
        ------
        ValueError
            One line naming the key: no node, an unknown key, a value of the wrong type, an
            unset mandatory value (:func:`skymoments.config.schema.checked_node`), or a
            choice or range this command does not accept.
        """
        if node is None:
            raise ValueError(
                "the config has no 'predict' node; add `- predict: default` to the defaults of "
                "conf/predict.yaml (or pass +predict=default)"
            )
        plain = OmegaConf.to_object(checked_node(node, "predict", "predict"))
        opts = cls(**{f.name: getattr(plain, f.name) for f in fields(plain)})
        opts._check()
        return opts

    def _check(self) -> None:
        hp = self.healpix
        for key in ("model", "input"):
            if not str(getattr(self, key)).strip():
                raise ValueError(f"predict.{key} is empty; give predict.{key}=...")
        if self.format not in FORMATS:
            raise ValueError(f"predict.format={self.format!r}; choose one of {FORMATS}")
        if str(self.convention).upper() not in {c.upper() for c in CONVENTIONS}:
            raise ValueError(f"predict.convention={self.convention!r}; choose one of {CONVENTIONS}")
        if hp.interpolation not in INTERPOLATIONS:
            raise ValueError(
                f"predict.healpix.interpolation={hp.interpolation!r}; choose {INTERPOLATIONS}"
            )
        for key, value in (
            ("predict.batch_size", self.batch_size),
            ("predict.quicklook_rows", self.quicklook_rows),
            ("predict.healpix.hdu", hp.hdu),
        ):
            if value < 1:
                raise ValueError(f"{key} must be a positive integer, got {value!r}")
        if hp.cut not in CUTS:
            raise ValueError(f"predict.healpix.cut={hp.cut!r}; choose one of {CUTS}")
        if not 0 <= hp.overlap < 1:
            raise ValueError(f"predict.healpix.overlap={hp.overlap!r} must be a number in [0, 1)")
        if hp.min_abs_lat is not None and not 0 <= hp.min_abs_lat < 90:
            raise ValueError(
                f"predict.healpix.min_abs_lat={hp.min_abs_lat!r} must be a latitude in [0, 90) "
                "degrees or null"
            )


@dataclass
class PredictionResult:
    """What :func:`run_prediction` produced.

    Attributes
    ----------
    mean_eb, std_eb : ndarray, shape (m, 2, n, n), microkelvin
        Posterior mean and standard deviation of E/B per patch.
    data_qu : ndarray, shape (m, 2, n, n), microkelvin
        The Q/U patches the model saw (patch frame).
    patch : FlatPatch
        The model's training geometry (that of every patch).
    source : ModelSource
    input : MapInput
    centres : ndarray, shape (m, 2), degrees, or None
    healpix_maps : SkyPosterior or None
        MEAN_E, MEAN_B, STD_E, STD_B on the HEALPix pixels the patches cover, combined
        with inverse-variance weights (:func:`skymoments.predict.outputs.project_to_healpix`).
    paths : dict of role to Path
    provenance : dict
    prediction_run_id : str or None
        The MLflow run the prediction was logged to.
    """

    mean_eb: np.ndarray
    std_eb: np.ndarray
    data_qu: np.ndarray
    patch: FlatPatch
    source: ModelSource
    input: MapInput
    centres: np.ndarray | None = None
    healpix_maps: Any = None
    paths: dict = field(default_factory=dict)
    provenance: dict = field(default_factory=dict)
    prediction_run_id: str | None = None


def cut_patches(
    maps_qu: np.ndarray,
    centres: np.ndarray,
    patch: FlatPatch,
    cut: str = "fast",
    lmax: int | None = None,
    progress=None,
) -> np.ndarray:
    """Cut one Q/U patch per centre from a full-sky COSMO map (:data:`CUTS`).

    Returns
    -------
    ndarray, shape (k, 2, n, n), microkelvin, patch frame
    """
    say = progress or (lambda msg: None)
    if cut == "fast":
        from skymoments.maps.sky_cuts import cut_patches as band_limited_cut
        from skymoments.maps.sky_cuts import sky_harmonics

        say("transforming the map to E/B alms (once)")
        harmonics = sky_harmonics(maps_qu, lmax=lmax)
        say(f"evaluating {len(centres)} patch(es) at lmax {harmonics.lmax}")
        return band_limited_cut(harmonics, centres, patch)
    from skymoments.maps.healpix import cut_patch

    out = []
    for k, (lon, lat) in enumerate(np.asarray(centres, dtype=float)):
        say(f"cutting patch {k + 1}/{len(centres)} ({cut} path)")
        out.append(cut_patch(maps_qu, lon, lat, patch, rotate_alms=cut == "exact", lmax=lmax))
    return np.stack(out)


def _out_dir(opts: PredictOptions, default: str | os.PathLike | None) -> Path:
    if opts.out not in (None, ""):
        return Path(str(opts.out)).expanduser().absolute()
    if default is not None:
        return Path(default).absolute()
    return Path.cwd()


def _check_healpix(inp: MapInput, patch: FlatPatch, opts: PredictOptions) -> int:
    """Checks of a HEALPix cut before any compute; returns the output nside."""
    import healpy as hp

    from skymoments.maps.healpix import check_nside, check_patch_fits

    check_patch_fits(patch)
    nside_out = inp.nside
    if opts.healpix.nside is not None:
        nside_out = check_nside(opts.healpix.nside, "predict.healpix.nside")
    lmax = opts.healpix.lmax
    if lmax is not None and not 2 <= lmax <= 3 * inp.nside - 1:
        raise ValueError(
            f"predict.healpix.lmax={lmax} must lie in [2, {3 * inp.nside - 1}] for an nside "
            f"{inp.nside} map"
        )
    resol = hp.nside2resol(inp.nside, arcmin=True)
    ratio = resol / patch.pixel_arcmin
    if ratio > COARSE_MAP_FACTOR:
        need = inp.nside
        while hp.nside2resol(need, arcmin=True) > COARSE_MAP_FACTOR * patch.pixel_arcmin:
            need *= 2
        raise ValueError(
            f"{inp.path} has NSIDE {inp.nside}: its {resol:.3g} arcmin pixels are {ratio:.2g} "
            f"times the model's {patch.pixel_arcmin:g} arcmin patch pixels (at most "
            f"{COARSE_MAP_FACTOR:g} accepted), so the patches would lack the scales the "
            f"network was trained on; give a map of NSIDE >= {need}"
        )
    return int(nside_out)


def _centres(inp: MapInput, patch: FlatPatch, opts: PredictOptions, say) -> np.ndarray:
    """The patch centres: listed, or tiling the mask / latitude cut; outside ones skipped."""
    from skymoments.maps.tiling import inside_region, tile_region

    mask = None
    if opts.healpix.mask not in (None, ""):
        mask = _read_mask(Path(str(opts.healpix.mask)).expanduser())
    if opts.centres is None:
        if mask is None and opts.healpix.min_abs_lat is None:
            return parse_centres(None)  # refuses: no centres and no region
        centres = tile_region(patch, opts.healpix.overlap, mask, opts.healpix.min_abs_lat)
        say(f"{len(centres)} centre(s) tile the region at overlap {opts.healpix.overlap:g}")
        return centres
    centres = parse_centres(opts.centres)
    keep = inside_region(centres, patch, mask, opts.healpix.min_abs_lat)
    if not keep.all():
        skipped = ", ".join(f"({lon:g}, {lat:g})" for lon, lat in centres[~keep])
        if not keep.any():
            raise ValueError(
                f"no patch centre lies with its whole patch in the valid region "
                f"(predict.healpix.mask / min_abs_lat): {skipped}; choose centres inside it"
            )
        n_out = int((~keep).sum())
        say(f"skipping {n_out} centre(s) whose patch leaves the valid region: {skipped}")
    return centres[keep]


def _read_mask(path: Path) -> np.ndarray:
    """A HEALPix mask (first column, RING) as float; > 0.5 means valid."""
    import healpy as hp

    from skymoments.maps.fits_io import check_fits_file

    if not path.is_file():
        raise ValueError(f"predict.healpix.mask={str(path)!r}: no such file")
    check_fits_file(path, "HEALPix mask").close()
    try:
        mask = np.asarray(hp.read_map(str(path), field=0, dtype=np.float64), dtype=float)
    except (OSError, ValueError, TypeError, KeyError) as exc:
        raise ValueError(f"{path} is not a HEALPix mask map: {exc}") from exc
    if not np.isfinite(mask[mask != hp.UNSEEN]).all():
        raise ValueError(f"mask {path} has NaN or infinite values; use 0 (masked) and 1 (valid)")
    return mask


def _provenance(source: ModelSource, inp: MapInput, centres, nside_out) -> dict[str, Any]:
    import skymoments

    prov: dict[str, Any] = {
        "model_ref": source.ref,
        "model_uri": source.uri,
        "model_name": source.name or "",
        "model_version": source.version or "",
        "model_run_id": source.run_id,
        "input": str(inp.path.absolute()),
        "input_sha256": inp.sha256,
        "input_format": inp.kind,
        "input_convention": inp.convention,
        "npix": source.patch.npix,
        "pixel_arcmin": source.patch.pixel_arcmin,
        "eb_convention": "skymoments.maps.eb flat-sky E/B; rows north, columns east",
        "created_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "skymoments_version": getattr(skymoments, "__version__", ""),
    }
    if inp.pixel_source:
        prov["pixel_source"] = inp.pixel_source
    if inp.notes:
        prov["input_notes"] = "; ".join(inp.notes)
    if inp.coordsys:
        prov["coordsys"] = inp.coordsys
    if centres is not None:
        prov["centres"] = [[float(a), float(b)] for a, b in centres]
        prov["nside"] = int(inp.nside)
        prov["nside_out"] = int(nside_out)
    return prov


def _device(name: str):
    import torch

    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    try:
        device = torch.device(name)
    except (RuntimeError, TypeError) as exc:
        raise ValueError(
            f"predict.device={name!r} is not a torch device (cpu, cuda, auto)"
        ) from exc
    if device.type == "cuda" and not torch.cuda.is_available():
        raise ValueError(
            f"predict.device={name!r} but torch sees no CUDA device here; use predict.device=cpu "
            "(or auto)"
        )
    return device


def _load(source: ModelSource, tracking: Any):
    from skymoments.nets.posterior import PosteriorMoments

    model = load_model(source.uri, tracking, map_location="cpu")
    if not isinstance(model, PosteriorMoments):
        raise ValueError(
            f"{source.uri} is a {type(model).__name__}, not a skymoments PosteriorMoments; "
            "predict needs a model logged by `skymoments run`"
        )
    return model


def _prediction_tracking(cfg: DictConfig, opts: PredictOptions, source: ModelSource) -> Any:
    """The tracking node of the prediction run: same store, experiment ``predict.experiment``."""
    from skymoments.tracking import settings_from
    from skymoments.tracking.store import client_for, with_retries

    node = cfg.tracking
    plain = (
        OmegaConf.to_container(node, resolve=True) if isinstance(node, DictConfig) else dict(node)
    )
    experiment = opts.experiment
    if experiment in (None, ""):
        settings = settings_from(node)
        client = client_for(settings)
        experiment = with_retries(
            settings,
            "read the model's experiment",
            lambda: client.get_experiment(source.experiment_id).name,
        )
    plain["experiment"] = str(experiment)
    plain["register_as"] = None
    return OmegaConf.create(plain)


def _log_prediction(run, opts: PredictOptions, result: PredictionResult) -> None:
    params = {f"predict.{k}": v for k, v in _plain_options(opts).items()}
    params["patch.npix"] = result.patch.npix
    params["patch.pixel_arcmin"] = result.patch.pixel_arcmin
    run.log_params(params)
    metrics = {}
    for i, c in enumerate(("E", "B")):
        metrics[f"predict/mean_rms_{c}"] = float(np.sqrt(np.mean(result.mean_eb[:, i] ** 2)))
        metrics[f"predict/std_median_{c}"] = float(np.median(result.std_eb[:, i]))
    metrics["predict/n_patches"] = float(len(result.mean_eb))
    run.log_metrics(metrics)
    for path in result.paths.values():
        run.log_artifact(str(path), artifact_path="predict")


def _plain_options(opts: PredictOptions) -> dict[str, Any]:
    """The options by their config keys (``healpix.cut``, ...); lists as text."""
    out = {}
    for key, value in asdict(opts).items():
        items = value.items() if key == "healpix" else [(None, value)]
        for sub, item in items:
            if isinstance(item, (ListConfig, list, tuple)):
                item = str(list(item))
            out[key if sub is None else f"{key}.{sub}"] = item
    return out


def _say(message: str) -> None:
    """One progress line on stderr (the summary table goes to stdout)."""
    print(f"predict: {message}", file=sys.stderr, flush=True)


def run_prediction(
    cfg: DictConfig, default_out: str | os.PathLike | None = None, progress=None
) -> PredictionResult:
    """Check, compute and write one prediction (module docstring for the order of work).

    Parameters
    ----------
    cfg : DictConfig
        The composed config: ``cfg.predict`` and ``cfg.tracking`` are read (``cfg.patch`` is
        not: the geometry is the model's own).
    default_out : path-like, optional
        Output folder when ``predict.out`` is null (the command passes the Hydra job folder).
    progress : callable(str), optional
        Receives one line per long step; default: printed to stderr.

    Returns
    -------
    PredictionResult

    Raises
    ------
    ValueError
        Every expected refusal, before compute: unset or bad options, an existing output
        without ``predict.force``, an unknown model, a geometry that differs from the
        model's training patch, NaN/inf, a missing Q/U column, an unknown convention or unit.
    """
    opts = PredictOptions.from_config(cfg.get("predict"))
    input_path = Path(str(opts.input)).expanduser()
    if not input_path.is_file():
        raise ValueError(f"predict.input={opts.input!r}: no such file")
    kind = detect_format(input_path) if opts.format == "auto" else opts.format
    if kind != "healpix" and opts.centres is not None:
        raise ValueError(
            f"predict.centres is for HEALPix maps, but {input_path} is a flat {kind} input "
            "whose patches are already cut; drop predict.centres"
        )
    if kind == "healpix" and opts.centres is not None:
        parse_centres(opts.centres)  # refuse a malformed list before any lookup
    say = progress if progress is not None else _say
    paths = output_paths(_out_dir(opts, default_out), opts.name, healpix=kind == "healpix")
    check_outputs(paths, opts.force)

    source = resolve_model_source(opts.model, cfg.tracking)
    patch = source.patch
    started = time.perf_counter()
    inp = read_input(
        input_path,
        kind,
        key=opts.key,
        pixel_arcmin=opts.pixel_arcmin,
        convention=opts.convention,
        healpix_fields=opts.healpix.fields,
        healpix_hdu=opts.healpix.hdu,
    )
    label = f"model {source.uri} (run {source.run_id})"
    nside_out = None
    centres = None
    if kind == "healpix":
        nside_out = _check_healpix(inp, patch, opts)
        notes = [f"read {input_path} (NSIDE {inp.nside}) in {time.perf_counter() - started:.1f} s"]
        if inp.convention != "COSMO":
            notes.append(f"converted Q/U from {inp.convention} to COSMO (U sign flipped)")
        centres = _centres(inp, patch, opts, notes.append)
    else:
        check_patch_geometry(inp, patch, model=label)
        # unit conversions, mirrored axes, Q/U frame changes
        notes = [f"{input_path.name}: {note}" for note in inp.notes]
    device = _device(str(opts.device))
    # Every check passed: from here on, one line per long step.
    for note in notes:
        say(note)

    # --- compute, all checks passed ---------------------------------------------------
    if kind == "healpix":
        data = cut_patches(
            inp.maps_qu, centres, patch, opts.healpix.cut, opts.healpix.lmax, progress=say
        )
    else:
        data = inp.data_qu
    from skymoments.moments.pipeline import predict_moments

    say("loading the model")
    model = _load(source, cfg.tracking).to(device)
    say(f"forward pass on {len(data)} patch(es) ({device})")
    mean, std = predict_moments(model, data, batch_size=opts.batch_size, device=device)
    # Per-patch flag from the data alone: beyond the training inputs' recorded range.
    patch_flag, patch_score = model.out_of_range(data)
    hp_maps = None
    if kind == "healpix":
        say(f"projecting {len(mean)} patch(es) back onto HEALPix NSIDE {nside_out}")
        hp_maps = project_to_healpix(
            mean, std, centres, patch, nside_out, opts.healpix.interpolation
        )

    prov = _provenance(source, inp, centres, nside_out)
    if patch_flag is not None:
        margin = float(model.input_range.margin)
        prov["out_of_range_patches"] = int(patch_flag.sum())
        prov["out_of_range_margin"] = margin
        say(
            f"{int(patch_flag.sum())} of {len(patch_flag)} patch(es) beyond the training "
            f"inputs' range by more than {margin:g} of its spread (patch_score > {margin:g})"
        )
    result = PredictionResult(
        mean_eb=mean,
        std_eb=std,
        data_qu=data,
        patch=patch,
        source=source,
        input=inp,
        centres=centres,
        healpix_maps=hp_maps,
        provenance=prov,
    )
    titles = (
        [f"({lon:g}, {lat:g}) deg" for lon, lat in centres]
        if centres is not None
        else [f"patch {k}" for k in range(len(mean))]
    )

    from skymoments.predict.outputs import write_outputs

    def write() -> None:
        result.paths = write_outputs(
            paths,
            mean,
            std,
            patch,
            result.provenance,
            force=opts.force,
            healpix_maps=hp_maps,
            titles=titles,
            quicklook_rows=opts.quicklook_rows,
            patch_flag=patch_flag,
            patch_score=patch_score,
        )

    if not opts.log_run:
        write()
        return result

    from skymoments.tracking import tracked_run

    tags = {
        "skymoments.run_kind": "predict",
        "skymoments.model_uri": source.uri,
        "skymoments.model_ref": source.ref,
        "skymoments.model_run_id": source.run_id,
        "skymoments.model_version": source.version or "",
        "skymoments.input": str(inp.path.absolute()),
        "skymoments.input_sha256": inp.sha256,
    }
    with tracked_run(_prediction_tracking(cfg, opts, source), run_name="predict", tags=tags) as run:
        result.prediction_run_id = run.run_id
        result.provenance["prediction_run_id"] = run.run_id
        write()
        _log_prediction(run, opts, result)
    return result
