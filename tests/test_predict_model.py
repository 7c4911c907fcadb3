"""`skymoments predict` with a real tracked model: logged with MLflow's PyTorch flavour,
registered, loaded back by run id and by registry name, on .npy and HEALPix inputs, and
through the command line."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
import torch
from astropy.io import fits
from omegaconf import OmegaConf

from _predict_fakes import NPIX, PIXEL, make_qu
from _predict_fakes import tiny_model as _tiny
from skymoments.maps import FlatPatch
from skymoments.predict import pipeline
from skymoments.tracking import set_model_alias, tracked_run

# Importing mlflow.pytorch pulls in Lightning (several seconds on the 2-core machine), and
# every test here loads a pickled model: the whole module is slow.
pytestmark = pytest.mark.slow

NAME = "tiny-unet"
CONF = Path(__file__).resolve().parents[1] / "conf"


def tiny_model(seed=0):
    return _tiny(seed, norm="batch")


@pytest.fixture(scope="module")
def logged(tmp_path_factory):
    """A training run with the patch params and the model, registered as ``tiny-unet`` v1."""
    root = tmp_path_factory.mktemp("store")
    tracking = {"kind": "local", "root": str(root), "experiment": "training", "register_as": NAME}
    cfg = OmegaConf.create({"tracking": tracking, "patch": {"npix": NPIX, "pixel_arcmin": PIXEL}})
    model = tiny_model()
    # The training inputs' range and the flag's margin travel with the stored model.
    model.input_range.fit(make_qu(m=8, seed=200)).set_margin(0.2)
    with tracked_run(cfg, run_name="train") as run:
        run.log_config(cfg)
        info = run.log_model(model, name="model", registered_name=run.register_as)
    assert info.registered_model_version == 1
    set_model_alias(cfg, NAME, 1, "champion")
    return {
        "tracking": tracking,
        "run_id": run.run_id,
        "model": model,
        "root": root,
        "uri": run.tracking_uri,
    }


def make_cfg(logged, out, **predict):
    node = OmegaConf.load(CONF / "predict" / "default.yaml")
    node = OmegaConf.merge(node, {"out": str(out), **predict})
    return OmegaConf.create({"predict": node, "tracking": logged["tracking"]})


def direct(model, qu):
    with torch.no_grad():
        mean, var = model(torch.as_tensor(qu, dtype=torch.float32))
    return mean.double().numpy(), var.double().sqrt().numpy()


@pytest.mark.parametrize("ref", ["run", "models:/tiny-unet/1", "models:/tiny-unet@champion"])
def test_npy_prediction_equals_the_model_called_directly(logged, tmp_path, ref):
    ref = logged["run_id"] if ref == "run" else ref
    qu = make_qu(m=3)
    np.save(tmp_path / "qu.npy", qu)
    cfg = make_cfg(
        logged,
        tmp_path / "out",
        model=ref,
        input=str(tmp_path / "qu.npy"),
        pixel_arcmin=PIXEL,
        log_run=False,
    )
    res = pipeline.run_prediction(cfg)
    assert res.source.run_id == logged["run_id"]
    mean, std = direct(logged["model"], qu)
    # The pickle round trip restores the float32 weights bit for bit and the same batch of 3
    # goes through the same CPU kernels; allow float32 round-off anyway (2**-24 = 6e-8
    # relative per operation, a few operations deep: 1e-6).
    scale = float(np.abs(mean).max())
    np.testing.assert_allclose(res.mean_eb, mean, rtol=1e-6, atol=1e-6 * scale)
    np.testing.assert_allclose(res.std_eb, std, rtol=1e-6)
    with fits.open(tmp_path / "out" / "posterior.fits") as hdul:
        for ext in ("MEAN", "STD"):
            assert hdul[ext].header["BUNIT"] == "uK"
            assert hdul[ext].data.shape == (3, 2, NPIX, NPIX)
        head = hdul[0].header
        assert head["MODELRUN"] == logged["run_id"] and head["MODELREF"] == ref
        assert head["INSHA256"] == res.input.sha256 and head["INFORMAT"] == "array"
        assert head["QUCONV"] == "patch"
        if ref.startswith("models:/"):
            assert head["MODELVER"] == "1" and head["MODELNAM"] == NAME
        assert "input_sha256" in head["PROVJSON"]
        assert head["FLAGMARG"] == 0.2
    # The per-patch flag is the stored range's score above the stored margin (numpy
    # reference: the score recomputed from the logged model itself).
    with np.load(tmp_path / "out" / "posterior.npz") as z:
        score = logged["model"].input_range.score(qu)
        np.testing.assert_allclose(z["patch_score"], score)
        np.testing.assert_array_equal(z["patch_flag"], score > 0.2)
    assert res.provenance["out_of_range_margin"] == 0.2
    assert (tmp_path / "out" / "posterior.png").stat().st_size > 0


def _cls(lmax=200):
    # A smooth red spectrum in uK^2 (illustrative, not a CMB fit): C_ell ~ 1/(ell + 10)^2.
    ell = np.arange(lmax + 1)
    ee = 50.0 / (ell + 10.0) ** 2
    ee[:2] = 0.0
    return {"TT": 4 * ee, "EE": ee, "BB": 0.3 * ee, "TE": 0.0 * ee}


def test_healpix_prediction_covers_the_region(logged, tmp_path):
    from skymoments.maps.fits_io import write_healpix_map
    from skymoments.maps.healpix import UNSEEN, cut_patch, patch_to_healpix, synfast_tqu

    nside, nside_out = 64, 256
    tqu = synfast_tqu(_cls(), nside, seed=7)
    path = write_healpix_map(
        tmp_path / "sky.fits", tqu, column_names=("T", "Q", "U"), extra_header=[("COORDSYS", "G")]
    )
    # Two patches that overlap by half their width (16 x 1 deg each).
    centres = [[30.0, -40.0], [38.0, -40.0]]
    cfg = make_cfg(
        logged,
        tmp_path / "out",
        model=f"models:/{NAME}/1",
        input=str(path),
        centres=centres,
        healpix={"nside": nside_out},
    )
    res = pipeline.run_prediction(cfg)
    patch = FlatPatch(NPIX, PIXEL)

    # The patches are those of the reference cut (maps.healpix.cut_patch, tested against
    # healpy) at the model's geometry, to the reference's own accuracy (its degree-7 spline
    # between rings, ~1e-5 of the rms), and the posterior is the model's on them.
    for k, (lon, lat) in enumerate(centres):
        ref = cut_patch(tqu[1:], lon, lat, patch)
        np.testing.assert_allclose(res.data_qu[k], ref, rtol=0, atol=1e-4 * ref.std())
    mean, std = direct(logged["model"], res.data_qu)
    np.testing.assert_allclose(res.mean_eb, mean, rtol=1e-6, atol=1e-6 * np.abs(mean).max())

    out = tmp_path / "out"
    assert sorted(p.name for p in out.iterdir()) == [
        "posterior.fits",
        "posterior.npz",
        "posterior.png",
        "posterior_healpix.fits",
    ]
    # A partial-sky table read back by healpy itself (float32 columns).
    maps = hp.read_map(out / "posterior_healpix.fits", field=(0, 1, 2, 3), partial=True)
    assert maps.dtype == np.float32
    bad = hp.mask_bad(maps)  # UNSEEN in float32 is not exactly float64's UNSEEN
    assert np.all(bad == bad[0])  # every column covers the same pixels
    seen = ~bad[0]
    maps = np.where(seen, maps.astype(np.float64), UNSEEN)
    assert np.all(np.isfinite(maps[:, seen])) and np.all(maps[2:, seen] > 0)
    # Coverage = union of the single patches' back-projections (patch_to_healpix).
    single = [
        patch_to_healpix(
            np.stack([res.mean_eb[k, 0], res.std_eb[k, 0] ** 2]),
            lon,
            lat,
            patch,
            nside_out,
            kind="scalar",
        )
        for k, (lon, lat) in enumerate(centres)
    ]
    cover = [s[0] != UNSEEN for s in single]
    np.testing.assert_array_equal(seen, cover[0] | cover[1])
    # The centres are inside and the antipodes far outside.
    for lon, lat in centres:
        assert seen[hp.ang2pix(nside_out, lon, lat, lonlat=True)]
        assert not seen[hp.ang2pix(nside_out, lon + 180.0, -lat, lonlat=True)]
    # Analytic solid angle of the covered square: the bilinear region spans the pixel
    # centres, half-width a = 7.5 pixels in tangent-plane units; a gnomonic square of
    # half-width a subtends 4 arcsin(a^2 / (1 + a^2)) sr (solid angle of a right
    # rectangular pyramid). Counting pixel centres errs by at most the pixels straddling the
    # edge: about perimeter / pixel side.
    a = 0.5 * (NPIX - 1) * patch.pixel_rad
    expected = 4.0 * np.arcsin(a**2 / (1.0 + a**2)) / hp.nside2pixarea(nside_out)
    straddling = 8.0 * a / hp.nside2resol(nside_out)
    assert abs(cover[0].sum() - expected) <= straddling
    # Overlaps: inverse-variance weighted mean, and the root of the harmonic mean of the
    # variances (outputs.project_to_healpix), written as float32 (relative 6e-8 round-off).
    both = cover[0] & cover[1]
    assert both.sum() > 0.3 * cover[0].sum()
    w0, w1 = 1.0 / single[0][1, both], 1.0 / single[1][1, both]
    want = (w0 * single[0][0, both] + w1 * single[1][0, both]) / (w0 + w1)
    scale = np.abs(want).max()
    np.testing.assert_allclose(maps[0, both], want, rtol=1e-6, atol=1e-6 * scale)
    np.testing.assert_allclose(maps[2, both], np.sqrt(2.0 / (w0 + w1)), rtol=1e-6)
    only0 = cover[0] & ~cover[1]
    np.testing.assert_allclose(maps[0, only0], single[0][0, only0], rtol=1e-6, atol=1e-6 * scale)

    with fits.open(out / "posterior_healpix.fits") as hdul:
        head = hdul[1].header
        assert head["TTYPE1"] == "PIXEL" and head["INDXSCHM"] == "EXPLICIT"
        assert head["TTYPE2"] == "MEAN_E" and head["TUNIT2"] == "uK" and head["TFORM2"] == "E"
        assert "POLCCONV" not in head and head["MODELURI"] == f"models:/{NAME}/1"
        assert (
            head["INSHA256"] == res.input.sha256
            and head["NSIDE"] == nside_out
            and head["INNSIDE"] == nside
        )
        assert (head["CLON1"], head["CLAT1"]) == (38.0, -40.0) and head["COORDSYS"] == "G"
    with fits.open(out / "posterior.fits") as hdul:
        assert hdul[0].header["CLON0"] == 30.0 and hdul[0].header["INFORMAT"] == "healpix"

    # The prediction run, in the same store, carries the model URI and the input hash.
    from mlflow import MlflowClient

    client = MlflowClient(logged["uri"])
    run = client.get_run(res.prediction_run_id)
    assert run.info.status == "FINISHED"
    assert client.get_experiment(run.info.experiment_id).name == "predictions"
    assert run.data.tags["skymoments.model_uri"] == f"models:/{NAME}/1"
    assert run.data.tags["skymoments.input_sha256"] == res.input.sha256
    arts = {a.path for a in client.list_artifacts(res.prediction_run_id, "predict")}
    assert "predict/posterior_healpix.fits" in arts


def _skymoments(*args, cwd):
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=900)


def test_cli_predicts_then_refuses_to_overwrite(logged, tmp_path):
    qu = make_qu(m=2, seed=5)
    np.save(tmp_path / "qu.npy", qu)
    args = [
        "predict",
        f"predict.model=models:/{NAME}@champion",
        f"predict.input={tmp_path / 'qu.npy'}",
        f"predict.pixel_arcmin={PIXEL}",
        f"predict.out={tmp_path / 'pred'}",
        f"tracking.root={logged['root']}",
    ]
    proc = _skymoments(*args, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "wrote" in proc.stdout and "logged as MLflow run" in proc.stdout
    with np.load(tmp_path / "pred" / "posterior.npz") as z:
        mean, _ = direct(logged["model"], qu)
        # Another process, same float32 kernels: float32 round-off as above.
        np.testing.assert_allclose(z["mean_eb"], mean, rtol=1e-6, atol=1e-6 * np.abs(mean).max())
    again = _skymoments(*args, cwd=tmp_path)
    assert again.returncode == 2
    assert again.stderr.strip().startswith("skymoments predict: output ")
    assert "predict.force=true" in again.stderr and "Traceback" not in again.stderr
