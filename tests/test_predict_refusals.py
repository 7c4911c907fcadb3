"""`skymoments predict` end to end with a stand-in loader: model lookup, refusals before any
compute, atomic outputs, the prediction run.

The store holds a training run with the patch params (and a registered version pointing at
it) but no pickled model, so these tests never import MLflow's PyTorch flavour: the loader
is replaced by one returning a tiny in-process model, or by one that fails if called.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
import torch
from astropy.io import fits
from mlflow import MlflowClient
from omegaconf import OmegaConf

from _predict_fakes import NPIX, PIXEL, make_qu
from _predict_fakes import tiny_model as _tiny
from skymoments.maps import FlatPatch
from skymoments.nets import PosteriorMoments
from skymoments.predict import pipeline
from skymoments.tracking import tracked_run

CONF = Path(__file__).resolve().parents[1] / "conf"


def tiny_model(seed=0):
    return _tiny(seed, norm="none")


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A local store with a training run (patch params logged) registered as ``tiny`` v1."""
    root = tmp_path_factory.mktemp("store")
    tracking = {"kind": "local", "root": str(root), "experiment": "training"}
    cfg = OmegaConf.create({"tracking": tracking, "patch": {"npix": NPIX, "pixel_arcmin": PIXEL}})
    with tracked_run(cfg, run_name="train") as run:
        run.log_config(cfg)
    bare = OmegaConf.create({"tracking": tracking})
    with tracked_run(bare, run_name="no-geometry") as other:
        other.log_params({"seed": 0})
    client = MlflowClient(run.tracking_uri, registry_uri=run.tracking_uri)
    client.create_registered_model("tiny")
    client.create_model_version("tiny", f"runs:/{run.run_id}/model", run_id=run.run_id)
    client.set_registered_model_alias("tiny", "champion", "1")
    return {
        "tracking": tracking,
        "run_id": run.run_id,
        "bare_run": other.run_id,
        "uri": run.tracking_uri,
    }


def make_cfg(store, tmp_path, **predict):
    node = OmegaConf.load(CONF / "predict" / "default.yaml")
    node = OmegaConf.merge(node, {"out": str(tmp_path / "out"), **predict})
    return OmegaConf.create({"predict": node, "tracking": store["tracking"]})


@pytest.fixture
def fake_loader(monkeypatch):
    model = tiny_model()
    calls = []

    def load(uri, tracking, **kwargs):
        calls.append(uri)
        return model

    monkeypatch.setattr(pipeline, "load_model", load)
    return model, calls


@pytest.fixture
def no_compute(monkeypatch):
    """Fail the test if the weights are loaded, a patch is cut or the network runs."""

    def fail(*args, **kwargs):
        raise AssertionError("compute started before the refusal")

    monkeypatch.setattr(pipeline, "load_model", fail)
    monkeypatch.setattr(pipeline, "cut_patches", fail)
    monkeypatch.setattr(PosteriorMoments, "forward", fail)


def prediction_runs(store):
    client = MlflowClient(store["uri"])
    exp = client.get_experiment_by_name("predictions")
    return [] if exp is None else client.search_runs([exp.experiment_id])


# --- model lookup ------------------------------------------------------------------------


def test_every_reference_form_finds_the_training_run_and_geometry(store):
    from skymoments.predict.source import resolve_model_source

    rid = store["run_id"]
    for ref in (rid, f"runs:/{rid}/model", "models:/tiny/1", "models:/tiny@champion"):
        src = resolve_model_source(ref, store["tracking"])
        assert src.run_id == rid, ref
        # The geometry is the logged config's (tracking.flatten writes floats by repr).
        assert (src.patch.npix, src.patch.pixel_arcmin) == (NPIX, PIXEL)
    assert resolve_model_source("models:/tiny@champion", store["tracking"]).version == "1"
    with pytest.raises(ValueError, match=r"no registered model version models:/tiny/7"):
        resolve_model_source("models:/tiny/7", store["tracking"])
    with pytest.raises(ValueError, match=r"no registered model version models:/tiny@gone"):
        resolve_model_source("models:/tiny@gone", store["tracking"])
    with pytest.raises(ValueError, match=f"no run {'0' * 32}"):
        resolve_model_source("0" * 32, store["tracking"])
    with pytest.raises(ValueError, match="has no param patch.npix, patch.pixel_arcmin"):
        resolve_model_source(store["bare_run"], store["tracking"])
    with pytest.raises(ValueError, match="not understood"):
        resolve_model_source("tiny", store["tracking"])


def test_a_missing_store_is_refused_not_created(tmp_path):
    from skymoments.predict.source import resolve_model_source

    tracking = {"kind": "local", "root": str(tmp_path / "nowhere"), "experiment": "x"}
    with pytest.raises(ValueError, match="no tracking store at"):
        resolve_model_source("0" * 32, tracking)
    assert not (tmp_path / "nowhere").exists()


# --- a prediction ------------------------------------------------------------------------


@pytest.mark.slow  # the first prediction imports Lightning (predict_moments) and matplotlib
def test_npy_prediction_matches_the_model_and_is_logged(store, tmp_path, fake_loader):
    model, calls = fake_loader
    qu = make_qu(m=3)
    np.save(tmp_path / "qu.npy", qu)
    cfg = make_cfg(
        store,
        tmp_path,
        model="models:/tiny/1",
        input=str(tmp_path / "qu.npy"),
        pixel_arcmin=PIXEL,
        batch_size=2,
    )
    res = pipeline.run_prediction(cfg)
    assert calls == ["models:/tiny/1"]
    with torch.no_grad():
        mean, var = model(torch.as_tensor(qu, dtype=torch.float32))
    # Same float32 network on the same CPU; only the batch split differs (2 + 1 against 3),
    # which may change the summation order inside a convolution. Recursive summation of k
    # terms errs by at most about k * 2**-24 of the sum of |terms| (Higham, Accuracy and
    # Stability of Numerical Algorithms, 2002, sec. 4.2); k <= 9 * 8 here, so 1e-5 relative
    # to the map's scale bounds it.
    scale = float(np.abs(mean.numpy()).max())
    np.testing.assert_allclose(res.mean_eb, mean.numpy(), rtol=1e-5, atol=1e-5 * scale)
    np.testing.assert_allclose(res.std_eb, np.sqrt(var.numpy()), rtol=1e-5)

    out = tmp_path / "out"
    assert sorted(p.name for p in out.iterdir()) == [
        "posterior.fits",
        "posterior.npz",
        "posterior.png",
    ]
    with np.load(out / "posterior.npz") as z:
        np.testing.assert_array_equal(z["mean_eb"], res.mean_eb)
        assert str(z["unit"]) == "uK" and int(z["npix"]) == NPIX
    with fits.open(out / "posterior.fits") as hdul:
        assert hdul["MEAN"].header["BUNIT"] == "uK" and hdul["STD"].header["BUNIT"] == "uK"
        head = hdul[0].header
        assert head["MODELURI"] == "models:/tiny/1" and head["MODELVER"] == "1"
        assert head["MODELRUN"] == store["run_id"]
        assert head["INSHA256"] == res.input.sha256 and len(head["INSHA256"]) == 64
        assert head["QUCONV"] == "patch" and head["PREDRUN"] == res.prediction_run_id
        assert hdul["MEAN"].header["INSHA256"] == res.input.sha256
        # FITS stores float32; the posterior came out of a float32 network: no loss.
        np.testing.assert_array_equal(hdul["MEAN"].data, res.mean_eb.astype(np.float32))

    runs = [r for r in prediction_runs(store) if r.info.run_id == res.prediction_run_id]
    assert len(runs) == 1 and runs[0].info.status == "FINISHED"
    tags = runs[0].data.tags
    assert tags["skymoments.model_uri"] == "models:/tiny/1"
    assert tags["skymoments.input_sha256"] == res.input.sha256
    assert runs[0].data.params["patch.npix"] == str(NPIX)
    client = MlflowClient(store["uri"])
    names = sorted(a.path for a in client.list_artifacts(res.prediction_run_id, "predict"))
    assert names == ["predict/posterior.fits", "predict/posterior.npz", "predict/posterior.png"]


# --- refusals before compute -------------------------------------------------------------


def _healpix_file(path, names=("T", "Q", "U"), **cards):
    import healpy as hp

    from skymoments.maps.fits_io import write_healpix_map

    maps = np.random.default_rng(3).normal(size=(len(names), hp.nside2npix(16)))
    write_healpix_map(path, maps, column_names=names)
    with fits.open(path, mode="update") as hdul:
        for key, value in cards.items():
            hdul[1].header[key] = value
    return path


def _case(kind, tmp_path):
    """(predict overrides, expected message) of one refusal."""
    if kind == "size":
        np.save(tmp_path / "big.npy", make_qu(npix=32))
        return {"input": str(tmp_path / "big.npy"), "pixel_arcmin": PIXEL}, (
            r"32x32-pixel patches but model .* was trained on 16x16 patches of 60 arcmin"
        )
    if kind == "pixel":
        path = tmp_path / "fine.fits"
        fits.PrimaryHDU(make_qu(m=1)[0]).writeto(path)
        with fits.open(path, mode="update") as hdul:
            hdul[0].header["PIXARCM"] = 30.0
        return {"input": str(path)}, (
            r"30 arcmin pixels \(FITS keyword PIXARCM\) but model .* trained on 60 arcmin"
        )
    if kind == "nan":
        qu = make_qu()
        qu[0, 1, 2, 3] = np.nan
        np.save(tmp_path / "nan.npy", qu)
        return {"input": str(tmp_path / "nan.npy"), "pixel_arcmin": PIXEL}, "NaN or infinite"
    if kind == "column":
        path = _healpix_file(tmp_path / "tq.fits", names=("T", "Q"))
        return {"input": str(path), "centres": [[0, 0]]}, r"no column 'U'; available columns"
    if kind == "polcconv":
        path = _healpix_file(tmp_path / "w.fits", POLCCONV="SOUTH")
        return {"input": str(path), "centres": [[0, 0]]}, "unknown polarization convention"
    if kind == "exists":
        np.save(tmp_path / "qu.npy", make_qu())
        (tmp_path / "out").mkdir()
        (tmp_path / "out" / "posterior.png").write_text("keep me")
        return {"input": str(tmp_path / "qu.npy"), "pixel_arcmin": PIXEL}, (
            r"posterior\.png already exists; pass predict\.force=true"
        )
    raise AssertionError(kind)


@pytest.mark.parametrize("kind", ["size", "pixel", "nan", "column", "polcconv", "exists"])
def test_refusals_come_before_any_compute(store, tmp_path, no_compute, kind):
    overrides, message = _case(kind, tmp_path)
    before = len(prediction_runs(store))
    cfg = make_cfg(store, tmp_path, model=store["run_id"], **overrides)
    with pytest.raises(ValueError, match=message):
        pipeline.run_prediction(cfg)
    out = tmp_path / "out"
    left = sorted(p.name for p in out.iterdir()) if out.exists() else []
    assert left == (["posterior.png"] if kind == "exists" else [])
    if kind == "exists":
        assert (out / "posterior.png").read_text() == "keep me"
    assert len(prediction_runs(store)) == before  # no prediction run was opened


def test_centres_with_a_flat_input_are_refused(store, tmp_path, no_compute):
    np.save(tmp_path / "qu.npy", make_qu())
    cfg = make_cfg(
        store,
        tmp_path,
        model=store["run_id"],
        input=str(tmp_path / "qu.npy"),
        pixel_arcmin=PIXEL,
        centres=[[1, 2]],
    )
    with pytest.raises(ValueError, match="predict.centres is for HEALPix maps"):
        pipeline.run_prediction(cfg)


def test_unset_and_unknown_options_are_refused(store, tmp_path, no_compute):
    cfg = make_cfg(store, tmp_path)
    with pytest.raises(ValueError, match=r"predict\.input, predict\.model"):
        pipeline.run_prediction(cfg)
    cfg = make_cfg(store, tmp_path, model=store["run_id"], input=__file__)
    cfg.predict.foo = 1
    with pytest.raises(ValueError, match=r"unknown predict keys \['foo'\]"):
        pipeline.run_prediction(cfg)


def test_options_are_the_typed_schema_and_their_choices_are_checked(store, tmp_path):
    from skymoments.config.schema import PredictHealpixSchema

    cfg = make_cfg(store, tmp_path, model="m", input="i", healpix={"cut": "exact", "hdu": 2})
    opts = pipeline.PredictOptions.from_config(cfg.predict)
    assert isinstance(opts.healpix, PredictHealpixSchema)
    assert (opts.healpix.cut, opts.healpix.hdu, opts.healpix.fields) == ("exact", 2, ["Q", "U"])
    # A plain mapping reads the same, the schema's defaults filling what it leaves out.
    plain = pipeline.PredictOptions.from_config({"model": "m", "input": "i"})
    assert plain.batch_size == 64 and plain.healpix.overlap == 0.25
    bad = {
        "format": ("zip", r"predict\.format='zip'; choose one of"),
        "batch_size": (0, r"predict\.batch_size must be a positive integer, got 0"),
        "healpix": ({"overlap": 1.0}, r"predict\.healpix\.overlap=1\.0 must be a number in \[0, 1"),
        "model": (" ", r"predict\.model is empty"),
    }
    for key, (value, message) in bad.items():
        with pytest.raises(ValueError, match=message):
            pipeline.PredictOptions.from_config({"model": "m", "input": "i", key: value})


# --- atomic outputs ----------------------------------------------------------------------


def test_a_failed_write_leaves_no_partial_files(store, tmp_path, fake_loader, monkeypatch):
    from skymoments.predict import outputs

    qu = make_qu()
    np.save(tmp_path / "qu.npy", qu)
    out = tmp_path / "out"
    out.mkdir()
    (out / "posterior.npz").write_bytes(b"old npz")

    def broken(*args, **kwargs):
        raise RuntimeError("disk full while drawing")

    # The npz and FITS are already staged when the PNG fails.
    monkeypatch.setattr(outputs, "quicklook_figure", broken)
    cfg = make_cfg(
        store,
        tmp_path,
        model=store["run_id"],
        input=str(tmp_path / "qu.npy"),
        pixel_arcmin=PIXEL,
        force=True,
    )
    with pytest.raises(RuntimeError, match="disk full"):
        pipeline.run_prediction(cfg)
    # Nothing new, no staging folder, and the old file untouched.
    assert sorted(p.name for p in out.iterdir()) == ["posterior.npz"]
    assert (out / "posterior.npz").read_bytes() == b"old npz"
    failed = [r for r in prediction_runs(store) if r.info.status == "FAILED"]
    assert failed and "disk full" in failed[-1].data.tags["skymoments.error"]


@pytest.mark.slow  # three predictions, each drawing its quick-look figure
def test_force_replaces_outputs(store, tmp_path, fake_loader):
    np.save(tmp_path / "qu.npy", make_qu())
    args = dict(
        model=store["run_id"], input=str(tmp_path / "qu.npy"), pixel_arcmin=PIXEL, log_run=False
    )
    first = pipeline.run_prediction(make_cfg(store, tmp_path, **args))
    with pytest.raises(ValueError, match="already exists"):
        pipeline.run_prediction(make_cfg(store, tmp_path, **args))
    again = pipeline.run_prediction(make_cfg(store, tmp_path, force=True, **args))
    assert again.prediction_run_id is None and first.paths == again.paths
    # experiment=null logs the prediction next to the model's training run.
    args.update(log_run=True, experiment=None)
    third = pipeline.run_prediction(make_cfg(store, tmp_path, force=True, **args))
    client = MlflowClient(store["uri"])
    run = client.get_run(third.prediction_run_id)
    assert client.get_experiment(run.info.experiment_id).name == "training"


# --- the command -------------------------------------------------------------------------


def test_command_prints_the_refusal_and_exits_2(store, tmp_path, no_compute, capsys):
    from hydra import compose, initialize_config_dir

    from skymoments.commands.predict import main

    np.save(tmp_path / "big.npy", make_qu(npix=32))
    overrides = [
        f"predict.model={store['run_id']}",
        f"predict.input={tmp_path / 'big.npy'}",
        f"predict.pixel_arcmin={PIXEL}",
        f"predict.out={tmp_path / 'out'}",
        f"tracking.root={store['tracking']['root']}",
        "tracking.experiment=training",
    ]
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        cfg = compose("predict", overrides=overrides)
    with pytest.raises(SystemExit) as exit_info:
        main.task(cfg)
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert err.startswith("skymoments predict: ") and "trained on 16x16" in err
    assert "Traceback" not in err


def test_command_refuses_unset_mandatory_values_in_one_line(store, no_compute, capsys):
    from hydra import compose, initialize_config_dir

    from skymoments.commands.predict import main

    before = len(prediction_runs(store))
    overrides = [f"tracking.root={store['tracking']['root']}", "tracking.experiment=training"]
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        cfg = compose("predict", overrides=overrides)
    with pytest.raises(SystemExit) as exit_info:
        main.task(cfg)
    assert exit_info.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert err.startswith("skymoments predict: mandatory config values are not set: ")
    assert "predict.input, predict.model" in err
    assert len(prediction_runs(store)) == before


# --- damaged or impossible input files: one line, exit 2, the store untouched ------------


def _damaged_case(kind, tmp_path):
    """(input path, expected message) of a file the command must refuse before compute."""
    if kind in ("empty_npy", "empty_fits"):
        path = tmp_path / ("empty.npy" if kind == "empty_npy" else "empty.fits")
        path.write_bytes(b"")
        return path, r"is empty \(0 bytes\)"
    if kind == "truncated_npy":
        np.save(tmp_path / "full.npy", make_qu())
        data = (tmp_path / "full.npy").read_bytes()
        (tmp_path / "cut.npy").write_bytes(data[: len(data) // 2])
        return tmp_path / "cut.npy", r"is truncated or corrupt"
    if kind == "truncated_fits":
        fits.PrimaryHDU(make_qu(m=1)[0]).writeto(tmp_path / "full.fits")
        data = (tmp_path / "full.fits").read_bytes()
        (tmp_path / "cut.fits").write_bytes(data[: 2880 + 1000])
        return tmp_path / "cut.fits", r"is truncated: HDU 0 needs"
    if kind == "truncated_healpix":
        full = _healpix_file(tmp_path / "full_sky.fits")
        data = full.read_bytes()
        (tmp_path / "cut_sky.fits").write_bytes(data[: len(data) // 2])
        return tmp_path / "cut_sky.fits", r"is truncated: HDU 1 needs"
    if kind in ("huge_1e30", "huge_1e300"):
        qu = make_qu()
        qu[1, 0, 5, 5] = 1e30 if kind == "huge_1e30" else 1e300
        np.save(tmp_path / f"{kind}.npy", qu)
        return tmp_path / f"{kind}.npy", r"1 values beyond 1e\+06 uK .*check the map's unit"
    if kind == "huge_healpix":
        path = _healpix_file(tmp_path / "kelvin_as_uk.fits")
        with fits.open(path, mode="update") as hdul:
            for i in (2, 3):
                hdul[1].header[f"TUNIT{i}"] = "K"  # uK values labelled kelvin: 1e6 too large
        return path, r"values beyond 1e\+06 uK"
    raise AssertionError(kind)


DAMAGED = [
    "empty_npy",
    "empty_fits",
    "truncated_npy",
    "truncated_fits",
    "truncated_healpix",
    "huge_1e30",
    "huge_1e300",
    "huge_healpix",
]


@pytest.mark.parametrize("kind", DAMAGED)
def test_damaged_or_impossible_inputs_exit_2_in_one_line(store, tmp_path, no_compute, kind, capsys):
    import contextlib
    import sqlite3

    from hydra import compose, initialize_config_dir

    from skymoments.commands.predict import main

    path, message = _damaged_case(kind, tmp_path)
    client = MlflowClient(store["uri"])
    exps = [e.experiment_id for e in client.search_experiments()]
    before = {r.info.run_id: r.info.status for r in client.search_runs(exps)}
    overrides = [
        f"predict.model={store['run_id']}",
        f"predict.input={path}",
        f"predict.out={tmp_path / 'out'}",
        f"tracking.root={store['tracking']['root']}",
        "tracking.experiment=training",
    ]
    if kind.endswith("healpix"):
        overrides.append("predict.centres=[[0,0]]")
    else:
        overrides.append(f"predict.pixel_arcmin={PIXEL}")
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        cfg = compose("predict", overrides=overrides)
    with pytest.raises(SystemExit) as exit_info:
        main.task(cfg)
    assert exit_info.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert str(path) in err
    assert re.search(message, err), err
    assert "Python objects" not in err
    # No run was opened and every earlier one keeps its status; SQLite's own check passes.
    assert {r.info.run_id: r.info.status for r in client.search_runs(exps)} == before
    db = Path(store["tracking"]["root"]) / "mlflow.db"
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        assert con.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
    assert not (tmp_path / "out").exists()


# --- the sphere: resolution, regions, tiling, what the user sees -------------------------


def _sky_file(path, nside=64, convention="COSMO"):
    from skymoments.maps.fits_io import write_healpix_map
    from skymoments.maps.healpix import synfast_tqu

    ell = np.arange(3 * nside)
    ee = np.where(ell >= 2, 50.0 / (ell + 10.0) ** 2, 0.0)
    tqu = synfast_tqu({"TT": 4 * ee, "EE": ee, "BB": 0.3 * ee, "TE": 0 * ee}, nside, seed=4)
    return write_healpix_map(path, tqu, ("T", "Q", "U"), convention=convention)


def test_a_map_too_coarse_for_the_model_is_refused_with_the_ratio(store, tmp_path, no_compute):
    # nside 16 pixels are sqrt(4 pi / 3072) rad = 220 arcmin (healpy nside2resol), 3.7 times
    # the model's 60 arcmin; nside 32 (110 arcmin, 1.8 times) would pass the factor 2.
    path = _sky_file(tmp_path / "coarse.fits", nside=16)
    cfg = make_cfg(store, tmp_path, model=store["run_id"], input=str(path), centres=[[0, 0]])
    with pytest.raises(ValueError, match=r"NSIDE 16: its 220 arcmin pixels are 3.7 times .*>= 32"):
        pipeline.run_prediction(cfg)


def test_a_region_without_any_valid_centre_is_refused(store, tmp_path, no_compute):
    from skymoments.maps.fits_io import write_healpix_map

    path = _sky_file(tmp_path / "sky.fits")
    mask = write_healpix_map(tmp_path / "mask.fits", np.zeros(12 * 16**2), ("MASK",))
    cfg = make_cfg(
        store, tmp_path, model=store["run_id"], input=str(path), healpix={"mask": str(mask)}
    )
    with pytest.raises(ValueError, match="no 16.00-degree patch fits inside the mask"):
        pipeline.run_prediction(cfg)
    # Listed centres none of which fits the latitude cut: refused, each one named.
    cfg = make_cfg(
        store,
        tmp_path,
        model=store["run_id"],
        input=str(path),
        centres=[[0, 5], [40, -10]],
        healpix={"min_abs_lat": 30.0},
    )
    with pytest.raises(ValueError, match=r"no patch centre .*\(0, 5\), \(40, -10\)"):
        pipeline.run_prediction(cfg)


def test_sphere_prediction_skips_centres_outside_and_reports_each_step(
    store, tmp_path, fake_loader
):
    import os

    import healpy as hp

    path = _sky_file(tmp_path / "iau.fits", convention="IAU")
    lines = []
    cfg = make_cfg(
        store,
        tmp_path,
        model=store["run_id"],
        input=str(path),
        centres=[[0, 50], [0, 10], [100, -45]],
        healpix={"min_abs_lat": 30.0},
    )
    old = os.umask(0o022)
    try:
        res = pipeline.run_prediction(cfg, progress=lines.append)
    finally:
        os.umask(old)
    np.testing.assert_array_equal(res.centres, [[0, 50], [100, -45]])
    text = "\n".join(lines)
    assert "skipping 1 centre(s) whose patch leaves the valid region: (0, 10)" in text
    assert "converted Q/U from IAU to COSMO" in text
    for step in ("transforming the map", "evaluating 2 patch(es)", "forward pass", "projecting"):
        assert step in text
    # Outputs honour the umask like any new file (0o666 & ~0o022), not the private 0o600
    # of temporary files.
    for written in res.paths.values():
        assert (written.stat().st_mode & 0o777) == 0o644, written
    # The HEALPix output is partial sky: the covered pixels only, float32, no POLCCONV.
    from astropy.io import fits

    with fits.open(res.paths["healpix"]) as hdul:
        head = hdul[1].header
        assert head["OBJECT"] == "PARTIAL" and "POLCCONV" not in head
        assert hdul[1].data["MEAN_E"].dtype.kind == "f" and head["TFORM2"] == "E"  # float32
        pixels = hdul[1].data["PIXEL"]
    sky = res.healpix_maps
    np.testing.assert_array_equal(pixels, sky.pixels)
    assert 0 < len(pixels) < 0.1 * hp.nside2npix(64)


def test_tiling_a_latitude_cut_predicts_at_every_tile(store, tmp_path, fake_loader):
    from skymoments.maps.tiling import tile_region

    path = _sky_file(tmp_path / "sky.fits")
    cfg = make_cfg(
        store,
        tmp_path,
        model=store["run_id"],
        input=str(path),
        healpix={"min_abs_lat": 60.0, "overlap": 0.5},
        log_run=False,
    )
    res = pipeline.run_prediction(cfg, progress=lambda line: None)
    want = tile_region(FlatPatch(NPIX, PIXEL), 0.5, min_abs_lat=60.0)
    np.testing.assert_array_equal(res.centres, want)
    assert res.mean_eb.shape == (len(want), 2, NPIX, NPIX)
    assert np.all(res.healpix_maps.counts >= 1) and res.healpix_maps.counts.max() > 1
