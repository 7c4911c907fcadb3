"""White noise levels and the Gaussian beam against analytic and healpy references."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest
from scipy import stats

from skymoments.maps import FlatPatch
from skymoments.maps.geometry import ARCMIN
from skymoments.maps.spectra import eb_spectra
from skymoments.sky.noise import apply_beam, beam_transfer, noise_power_2d, white_noise_qu


def test_pixel_variance_is_level_over_pixel_size():
    # Analytic: sigma_pix = w / pixel_arcmin. For M iid normal pixels, M s^2 / sigma^2 is
    # chi2(M) (scipy.stats.chi2); two-sided, accepted unless p < 1e-3.
    patch = FlatPatch(32, 2.5)
    w = 4.0
    noise = white_noise_qu(patch, w, np.random.default_rng(0), 8)
    m = noise.size
    ratio = np.sum(noise**2) / (w / patch.pixel_arcmin) ** 2
    p = 2 * min(stats.chi2.cdf(ratio, m), stats.chi2.sf(ratio, m))
    assert p > 1e-3


def test_per_map_levels_and_zero_noise():
    patch = FlatPatch(16, 3.0)
    levels = np.array([0.0, 1.0, 9.0])
    noise = white_noise_qu(patch, levels, np.random.default_rng(1), 3)
    assert noise.shape == (3, 2, 16, 16)
    assert np.all(noise[0] == 0.0)
    # Same stream, scaled: the per-map level only multiplies the unit-level white noise.
    unit = white_noise_qu(patch, 1.0, np.random.default_rng(1), 3)
    np.testing.assert_allclose(noise, levels[:, None, None, None] * unit, rtol=1e-14)


def test_noise_spectrum_is_white_at_the_stated_level():
    # Knox (1995) white-noise spectrum: C_ell = (w arcmin)^2 for each of EE and BB. Every
    # mode's |X|^2 / C is exponential (sd = mean) and a mode and its mirror are one draw,
    # so the mode-weighted mean over the binned modes of n maps has relative standard
    # error 1 / sqrt(n * modes / 2); 4.5 of them bound a false alarm to ~1e-5.
    patch = FlatPatch(32, 3.0)
    w = 2.0
    n = 32
    edges = patch.default_bin_edges()
    spec = eb_spectra(white_noise_qu(patch, w, np.random.default_rng(2), n), patch, edges=edges)
    counts, _ = np.histogram(patch.ell.ravel(), bins=edges)
    expect = (w * ARCMIN) ** 2
    for key in ("EE", "BB"):
        mean = np.sum(counts * spec[key].mean(0)) / counts.sum()
        assert abs(mean / expect - 1.0) < 4.5 / np.sqrt(n * counts.sum() / 2)
    np.testing.assert_allclose(noise_power_2d(patch, w), expect, rtol=1e-15)
    assert noise_power_2d(patch, np.array([1.0, 2.0])).shape == (2, 32, 32)


def test_beam_transfer_matches_healpy_gauss_beam():
    # healpy.gauss_beam gives B_ell = exp(-ell (ell + 1) sigma^2 / 2) at integer ell; the
    # grid's ell are not integers, so compare with healpy linearly interpolated: the error
    # of linear interpolation is below max|B''| / 8 ~ (ell sigma^2)^2 / 8 < 1e-6 here.
    patch = FlatPatch(64, 3.0)
    fwhm = 9.0
    lmax = int(np.ceil(patch.ell.max())) + 1
    ref = hp.gauss_beam(np.deg2rad(fwhm / 60.0), lmax=lmax)
    ours = beam_transfer(patch, fwhm)
    np.testing.assert_allclose(ours, np.interp(patch.ell, np.arange(lmax + 1), ref), atol=1e-6)
    assert ours[0, 0] == 1.0
    np.testing.assert_array_equal(beam_transfer(patch, 0.0), np.ones(patch.shape))


def test_apply_beam_multiplies_each_mode_and_smooths_a_point_like_a_gaussian():
    patch = FlatPatch(64, 1.0)
    fwhm = 6.0
    rng = np.random.default_rng(3)
    qu = rng.standard_normal((2, 2, 64, 64))
    out = apply_beam(qu, patch, fwhm)
    # Convolution theorem: the FFT of the beamed map is B_ell times the FFT of the map.
    np.testing.assert_allclose(
        np.fft.fft2(out), np.fft.fft2(qu) * beam_transfer(patch, fwhm), atol=1e-10
    )
    # A point source becomes a Gaussian of the beam's width. Flat-sky analytic result:
    # the 2-D second moment of the profile is 2 sigma^2; B_ell uses ell (ell + 1) rather
    # than ell^2, a relative difference ~ 1 / ell ~ 1e-3 at the beam scale, and the pixel
    # grid samples the 2.5-pixel sigma well, so 1% is ample.
    point = np.zeros((2, 64, 64))
    point[0, 32, 32] = 1.0
    prof = apply_beam(point, patch, fwhm)[0]
    y, x = np.mgrid[0:64, 0:64] - 32.0
    second = np.sum(prof * (x**2 + y**2)) / np.sum(prof)
    sigma_pix = fwhm / np.sqrt(8 * np.log(2)) / patch.pixel_arcmin
    assert second == pytest.approx(2 * sigma_pix**2, rel=0.01)
    assert np.sum(prof) == pytest.approx(1.0, abs=1e-12)  # B_0 = 1: flux is kept
    np.testing.assert_array_equal(apply_beam(qu, patch, 0.0), qu)


def test_bad_noise_and_beam_inputs_raise():
    patch = FlatPatch(16, 3.0)
    with pytest.raises(ValueError, match="uk_arcmin"):
        white_noise_qu(patch, -1.0, 0, 2)
    with pytest.raises(ValueError, match="length n"):
        white_noise_qu(patch, np.ones(3), 0, 2)
    with pytest.raises(ValueError, match="positive integer"):
        white_noise_qu(patch, 1.0, 0, 0)
    with pytest.raises(ValueError, match="FWHM"):
        beam_transfer(patch, -2.0)
    with pytest.raises(ValueError, match="shape"):
        apply_beam(np.zeros((2, 8, 8)), patch, 1.0)
