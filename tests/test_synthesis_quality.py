"""Synthesis quality on the `filaments` demo foreground, and the metrics' own references."""

from __future__ import annotations

import numpy as np
import pytest

from skymoments.maps.geometry import FlatPatch
from skymoments.synthesis.quality import (
    gaussian_surrogate,
    ks_pixels,
    mf_deviation,
    minkowski_functionals,
    quality_metrics,
    spectrum_deviation,
)


def test_euler_characteristic_of_known_shapes():
    # Analytic references: a filled disk has chi = 1, an annulus chi = 0, two separate
    # disks chi = 2 (Euler characteristic = components - holes).
    n = 48
    yy, xx = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    r1 = np.hypot(yy - 15, xx - 15)
    r2 = np.hypot(yy - 34, xx - 34)
    disk = (r1 < 6).astype(float)
    ring = ((r1 < 9) & (r1 > 5)).astype(float)
    two = ((r1 < 5) | (r2 < 5)).astype(float)
    for field, chi in [(disk, 1), (ring, 0), (two, 2)]:
        mf = minkowski_functionals(field, np.array([0.5]))
        assert mf[2, 0] * n * n == pytest.approx(chi)
        assert mf[0, 0] == pytest.approx(field.mean())
    # A square of side s has boundary length 4 s pixel edges.
    sq = np.zeros((n, n))
    sq[10:20, 5:25] = 1.0
    assert minkowski_functionals(sq, np.array([0.5]))[1, 0] * n * n == pytest.approx(2 * (10 + 20))


def test_gaussian_area_functional_matches_erfc(rng):
    # For a Gaussian field the area fraction above nu sigma is erfc(nu / sqrt 2) / 2
    # (the normal survival function, scipy.stats.norm.sf); white noise of 4 x 64^2
    # pixels gives a binomial scatter < 0.004 (3 sigma), 0.01 is safe.
    from scipy.stats import norm

    x = rng.standard_normal((4, 64, 64))
    nu = np.array([-1.5, -0.5, 0.0, 0.7, 1.8])
    np.testing.assert_allclose(minkowski_functionals(x, nu)[0], norm.sf(nu), atol=0.01)


def test_metrics_are_zero_for_identical_maps(rng):
    patch = FlatPatch(32, 3.0)
    x = rng.standard_normal((3, 2, 32, 32))
    assert spectrum_deviation(x, x, patch)["max_dev"] == pytest.approx(0.0, abs=1e-12)
    assert ks_pixels(x, x)["mean"] == 0.0
    assert mf_deviation(x, x)["mean"] == 0.0


@pytest.fixture(scope="module")
def filament_synthesis():
    """One 64x64 synthesis of 4 maps from one `filaments` draw, and 32 independent draws."""
    from skymoments.sky.foregrounds import make_foreground
    from skymoments.synthesis.synthesize import SynthesisSettings, synthesize

    patch = FlatPatch(64, 3.0)
    fg = make_foreground("filaments")
    rng = np.random.default_rng(2024)
    target = fg.draw(patch, rng, 1)[0]
    truth = fg.draw(patch, rng, 32)
    # The configured defaults (conf/synthesis/default.yaml) except the batch size.
    settings = SynthesisSettings(
        n_images=4, batch=4, n_scales=5, n_orientations=4, max_iter=200, tol=1e-3
    )
    res = synthesize(target, settings, seed=11)
    gauss = gaussian_surrogate(target, 4, np.random.default_rng(99))
    return patch, target, truth, res, gauss


@pytest.mark.slow
def test_synthesized_spectra_match_the_training_image(filament_synthesis):
    patch, target, _, res, _ = filament_synthesis
    dev = spectrum_deviation(res.images, target, patch)
    # Well-sampled bins: those where the binned power of a Gaussian field would scatter by
    # at most 5% over the batch, i.e. M * N_indep >= 400 with N_indep = half the modes in
    # the annulus (Hermitian pairs), relative scatter 1 / sqrt(M * N_indep) (chi^2 with
    # 2 N_indep degrees of freedom). 10% is then a 2-sigma bound even before the
    # synthesis's own per-bin spectrum constraint (wph.py, family P) tightens it.
    edges = patch.default_bin_edges()
    counts = np.histogram(patch.ell.ravel(), bins=edges)[0]
    good = dev["keep"] & (len(res.images) * counts / 2 >= 400)
    assert good.sum() >= 6
    np.testing.assert_array_less(np.abs(dev["ratio_EE"][good] - 1), 0.10)
    np.testing.assert_array_less(np.abs(dev["ratio_BB"][good] - 1), 0.10)
    # EB in units of sqrt(EE BB): a correlation-coefficient error, same 10%.
    np.testing.assert_array_less(np.abs(dev["dev_EB"][good]), 0.10)
    assert np.all(res.loss < 0.05 * res.loss_initial)


@pytest.mark.slow
@pytest.mark.parametrize("reference", ["training_image", "independent_draws"])
def test_synthesis_beats_a_gaussian_surrogate(filament_synthesis, reference):
    # The criterion: pixel-histogram KS distance and Minkowski-functional deviation
    # at least 2x smaller than those of a Gaussian field with the same spectrum, judged
    # against the training image and against independent draws of the true foreground.
    patch, target, truth, res, gauss = filament_synthesis
    ref = target if reference == "training_image" else truth
    m = quality_metrics(res.images, ref, patch, surrogate=gauss)
    assert m["synth/ks_pix"] <= 0.5 * m["synth/gauss_ks_pix"], m
    assert m["synth/mf_dev"] <= 0.5 * m["synth/gauss_mf_dev"], m
