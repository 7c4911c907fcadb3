"""The on-disk synthesis bank: reuse, atomic writes, and training-image readers and checks."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from skymoments.synthesis import bank as bank_mod
from skymoments.synthesis.bank import content_hash, ensure_bank, load_bank
from skymoments.synthesis.sources import load_training_image
from skymoments.synthesis.synthesize import (
    LEGACY_NAMES,
    SynthesisSettings,
    check_image,
    edge_discontinuity,
    prepare_target,
    synthesize,
)
from skymoments.synthesis.wph import LEGACY_FAMILIES

TINY = SynthesisSettings(
    n_images=3, n_scales=2, n_orientations=2, max_iter=4, batch=2, scale_reach=1, tol=0.0
)


def _image(seed=0, n=16):
    """A seeded periodic smooth Q/U image with some non-Gaussianity."""
    rng = np.random.default_rng(seed)
    k = np.hypot(*np.meshgrid(np.fft.fftfreq(n), np.fft.fftfreq(n), indexing="ij"))
    x = np.fft.ifft2(np.fft.fft2(rng.standard_normal((2, n, n))) * np.exp(-((k / 0.15) ** 2))).real
    return x + 0.5 * x**2


def test_bank_is_written_with_metadata_and_reused(tmp_path):
    img = _image()
    path, images, meta = ensure_bank(img, TINY, tmp_path, seed=5)
    assert path.suffix == ".npz" and path.with_suffix(".json").exists()
    with np.load(path) as f:
        assert f["images"].shape == (3, 2, 16, 16)
    assert images.shape == (3, 2, 16, 16)
    assert meta["reused"] is False
    assert meta["source_sha256"] == content_hash(img)
    assert meta["seed"] == 5 and meta["settings"]["n_images"] == 3
    assert len(meta["loss"]) == 3 and meta["version"]
    # Same inputs: the bank is read back, not recomputed.
    calls = []
    orig = bank_mod.synthesize
    bank_mod.synthesize = lambda *a, **k: calls.append(1) or orig(*a, **k)
    try:
        path2, images2, meta2 = ensure_bank(img.copy(), TINY, tmp_path, seed=5)
    finally:
        bank_mod.synthesize = orig
    assert not calls and meta2["reused"] is True and path2 == path
    np.testing.assert_array_equal(images2, images)
    # Another seed, M or image is another bank.
    p3, _, _ = ensure_bank(img, TINY, tmp_path, seed=6)
    assert p3 != path


def test_interrupted_build_leaves_nothing_trusted(tmp_path, monkeypatch):
    img = _image(1)

    def broken(*args, **kwargs):  # the metadata write dies after the images were saved
        raise KeyboardInterrupt("simulated interruption")

    monkeypatch.setattr(bank_mod, "atomic_path", broken)
    with pytest.raises(KeyboardInterrupt):
        ensure_bank(img, TINY, tmp_path, seed=0)
    monkeypatch.undo()
    npz = list(tmp_path.glob("bank-*.npz"))
    assert len(npz) == 1 and not list(tmp_path.glob("*.json"))
    assert not list(tmp_path.glob(".*part*"))  # temporary files were removed
    with pytest.raises(ValueError, match="incomplete"):
        load_bank(npz[0])
    _, _, meta = ensure_bank(img, TINY, tmp_path, seed=0)
    assert meta["reused"] is False  # rebuilt, not trusted
    # A bank whose images no longer match the metadata's checksum is not trusted either.
    np.savez(npz[0], images=np.zeros((3, 2, 16, 16)))
    with pytest.raises(ValueError, match="does not match"):
        load_bank(npz[0])
    _, _, meta = ensure_bank(img, TINY, tmp_path, seed=0)
    assert meta["reused"] is False
    assert json.loads(npz[0].with_suffix(".json").read_text())["images_sha256"]


def test_synthesis_lowers_the_loss_and_is_seeded():
    img = _image(2)
    a = synthesize(img, TINY, seed=3)
    b = synthesize(img, TINY, seed=3)
    np.testing.assert_array_equal(a.images, b.images)
    assert np.all(a.loss < a.loss_initial)
    seen = []
    synthesize(img, TINY, seed=3, progress=seen.append)
    assert seen and {"loss", "iteration", "batch"} <= set(seen[0])


@pytest.mark.parametrize(
    ("image", "match"),
    [
        (np.full((2, 16, 16), 3.0), "constant"),
        (np.where(np.eye(16, dtype=bool), np.nan, 1.0)[None].repeat(2, 0), "NaN"),
        (np.ones((3, 16, 16)), "expected \\(2, n, n\\)"),
        (np.ones((2, 16, 8)), "expected \\(2, n, n\\)"),
    ],
)
def test_bad_images_are_refused(image, match):
    with pytest.raises(ValueError, match=match):
        check_image(image)


def test_bad_scales_are_refused():
    img = _image()
    with pytest.raises(ValueError, match="smaller than 2\\^n_scales"):
        synthesize(img, SynthesisSettings(n_images=1, n_scales=5, n_orientations=2))
    with pytest.raises(ValueError, match="n_orientations \\(orientations"):
        synthesize(img, SynthesisSettings(n_images=1, n_scales=2, n_orientations=40))
    with pytest.raises(ValueError, match="boundary"):
        synthesize(
            img, SynthesisSettings(n_images=1, n_scales=2, n_orientations=2, boundary="wrap")
        )
    with pytest.raises(ValueError, match="n_images"):
        synthesize(img, SynthesisSettings(n_images=0, n_scales=2, n_orientations=2))


def test_non_periodic_image_warns_and_boundary_options():
    img = _image(4, n=32)
    # The periodic field passes the edge test (ratio ~1, see EDGE_RATIO_WARN).
    assert edge_discontinuity(img) < 2.0
    cut = img[:, :16, :16] + np.linspace(0, 5, 16)[None, :, None]  # a gradient: edges jump
    assert edge_discontinuity(cut) > 4.0
    with pytest.warns(UserWarning, match="non-periodic"):
        prepare_target(cut, "periodic")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        mirrored = prepare_target(cut, "mirror")
        apod = prepare_target(cut, "apodize")
    # Q is continuous across the seams; U is not (a reflection flips its sign, so a
    # reflection-symmetric field needs U = 0 on the mirror line; synthesize.py docstring).
    assert mirrored.shape == (2, 32, 32) and edge_discontinuity(mirrored[:1]) < 2.0
    # Reflection changes the sign of U (spin 2: Q + iU -> Q - iU under a reflection).
    np.testing.assert_array_equal(mirrored[1, :16, 16:], -cut[1, :, ::-1])
    np.testing.assert_array_equal(mirrored[0, 16:, :16], cut[0, ::-1, :])
    assert apod.shape == cut.shape
    out = synthesize(
        cut,
        SynthesisSettings(
            n_images=1, n_scales=2, n_orientations=2, scale_reach=1, max_iter=2, boundary="mirror"
        ),
    )
    assert out.images.shape == (1, 2, 16, 16)


def test_training_image_readers(tmp_path):
    from astropy.io import fits

    img = _image()
    np.save(tmp_path / "a.npy", img)
    np.testing.assert_array_equal(load_training_image(tmp_path / "a.npy"), img)
    np.savez(tmp_path / "b.npz", fg=img, other=img[:1])
    np.testing.assert_array_equal(load_training_image(tmp_path / "b.npz", key="fg"), img)
    with pytest.raises(ValueError, match="image_key"):
        load_training_image(tmp_path / "b.npz")
    fits.PrimaryHDU(img).writeto(tmp_path / "c.fits")
    np.testing.assert_allclose(load_training_image(tmp_path / "c.fits"), img)
    hdul = fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(img[0]), fits.ImageHDU(img[1])])
    hdul.writeto(tmp_path / "d.fits")
    np.testing.assert_allclose(load_training_image(tmp_path / "d.fits"), img)
    np.save(tmp_path / "e.npy", np.stack([img, img]))
    with pytest.raises(ValueError, match="ONE training image"):
        load_training_image(tmp_path / "e.npy")
    with pytest.raises(ValueError, match="does not exist"):
        load_training_image(tmp_path / "missing.npy")
    with pytest.raises(ValueError, match="format"):
        (tmp_path / "f.txt").write_text("1")
        load_training_image(tmp_path / "f.txt")


@pytest.mark.slow
def test_healpix_training_image_is_cut_at_the_centre(tmp_path):
    import healpy as hp

    from skymoments.maps.geometry import FlatPatch
    from skymoments.maps.healpix import cut_patch

    nside = 32
    ell = np.arange(3 * nside)
    cl = np.where(ell > 1, 1.0 / (ell + 1.0) ** 2, 0.0)
    maps = hp.synfast([cl, cl, cl, 0 * cl], nside, new=True, pol=True)
    path = tmp_path / "sky.fits"
    hp.write_map(path, maps, column_names=["I_STOKES", "Q_STOKES", "U_STOKES"], dtype=np.float64)
    patch = FlatPatch(16, 30.0)
    with pytest.raises(ValueError, match="lon_deg"):
        load_training_image(path, patch=patch)
    got = load_training_image(path, lon_deg=40.0, lat_deg=-30.0, patch=patch)
    # The reader must hand back exactly the foundation's cut (maps.healpix.cut_patch).
    want = cut_patch(maps[1:], 40.0, -30.0, patch)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)


def _as_v1(meta_path):
    """Rewrite a bank's metadata as a bank of format /1 wrote it (the papers' letters)."""
    meta = json.loads(meta_path.read_text())
    old = {v: k for k, v in LEGACY_NAMES.items()}
    meta["format"] = "skymoments-synthesis-bank/1"
    meta["settings"] = {old.get(k, k): v for k, v in meta["settings"].items()}
    fam = {v: k for k, v in LEGACY_FAMILIES.items()}
    meta["n_moments"] = {fam.get(k, k): v for k, v in meta["n_moments"].items()}
    meta_path.write_text(json.dumps(meta))
    return meta


def test_bank_written_before_the_renames_still_loads(tmp_path):
    path, images, _ = ensure_bank(_image(3), TINY, tmp_path, seed=1)
    v1 = _as_v1(path.with_suffix(".json"))
    assert "scale_reach" not in v1["settings"] and "delta_j" in v1["settings"]
    loaded, meta = load_bank(path)
    np.testing.assert_array_equal(loaded, images)
    assert meta["settings"]["scale_reach"] == 1 and meta["settings"]["n_scales"] == 2
    assert "delta_j" not in meta["settings"] and "J" not in meta["settings"]
    assert "wave_power" in meta["n_moments"] and "S11" not in meta["n_moments"]
    # A format this version does not know is refused with what to do.
    raw = json.loads(path.with_suffix(".json").read_text())
    raw["format"] = "skymoments-synthesis-bank/99"
    path.with_suffix(".json").write_text(json.dumps(raw))
    with pytest.raises(ValueError, match="has format .*bank/99.*rebuild"):
        load_bank(path)


def test_settings_under_former_names_are_refused_with_the_new_name():
    with pytest.raises(ValueError, match="synthesis.delta_j is now synthesis.scale_reach"):
        SynthesisSettings.from_mapping({"n_images": 2, "delta_j": 1})
    with pytest.raises(ValueError, match="synthesis.J is now synthesis.n_scales"):
        SynthesisSettings.from_mapping({"J": 3})
    s = SynthesisSettings.from_mapping({"n_scales": 3, "scale_reach": 1, "image": "x.npy"})
    assert (s.n_scales, s.scale_reach) == (3, 1)
