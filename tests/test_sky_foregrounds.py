"""Foreground models: the dust-like power law, the non-Gaussian filaments, the image bank."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from skymoments.maps import FlatPatch, qu_to_eb
from skymoments.maps.spectra import bin_2d, eb_spectra
from skymoments.maps.symmetry import N_SYMMETRIES, apply_symmetry_qu
from skymoments.sky.foregrounds import (
    FOREGROUNDS,
    Filaments,
    GaussianPowerLaw,
    ImageBank,
    _filament_energy,
    _straight_energy,
    make_foreground,
)
from skymoments.sky.gaussian import gaussian_qu


def _edges(patch: FlatPatch, nbins: int = 20) -> np.ndarray:
    # From 1.5 fundamentals (skip the sparsely sampled first ring) to below Nyquist, so
    # that every mode in a bin has its mirror in the bin (no self-conjugate modes).
    return np.linspace(1.5 * patch.ell_fundamental, 0.98 * patch.ell_nyquist, nbins + 1)


# ---------------------------------------------------------------- gaussian power law


def test_gaussian_power_law_slope_and_amplitude_match_the_dust_like_law():
    # Planck Intermediate Results XXX (A&A 586, A133, 2016): C_ell^EE, BB ~ ell^-2.42 and
    # BB/EE = 0.5. Fit the measured EE with the exactly binned model
    # A * <(ell/80)^alpha>_bin by weighted least squares in log C, weights from the
    # cosmic variance of each bin (Var C_b = 2 sum_k C_k^2 / N_b^2 / n, the mode and its
    # mirror being one draw). The fitted alpha must lie within 3 of its standard errors
    # of -2.42 (a 0.3% false-alarm rate), and A within 3 errors of amplitude^2 (the
    # documented meaning: D_ell^EE at ell_pivot = amplitude_uk^2).
    patch = FlatPatch(128, 3.0)
    fg = GaussianPowerLaw(amplitude_uk=2.0)
    n = 16
    qu = fg.draw(patch, np.random.default_rng(0), n)
    edges = _edges(patch)
    meas = eb_spectra(qu, patch, edges=edges)
    ee2d, bb2d = fg.power_2d(patch)
    counts, _ = np.histogram(patch.ell.ravel(), bins=edges)
    _, ee_b = bin_2d(ee2d, patch, edges)
    _, ee2_b = bin_2d(ee2d**2, patch, edges)
    rel_err = np.sqrt(2 * ee2_b / counts / n) / ee_b
    ell = patch.ell.ravel()
    idx = np.digitize(ell, edges) - 1
    ok = (idx >= 0) & (idx < len(counts))

    def model(_, log_d80, alpha):
        # D_80 = A: C = 2 pi A / (80 * 81) (ell / 80)^alpha averaged over each bin's modes.
        c = 2 * np.pi * np.exp(log_d80) / (80 * 81) * (ell[ok] / 80.0) ** alpha
        return np.log(np.bincount(idx[ok], weights=c) / counts)

    y = np.log(meas["EE"].mean(0))
    popt, pcov = optimize.curve_fit(
        model, np.arange(len(y)), y, p0=(0.0, -2.0), sigma=rel_err, absolute_sigma=True
    )
    err = np.sqrt(np.diag(pcov))
    assert abs(popt[1] - (-2.42)) < 3 * err[1], (popt, err)
    assert abs(popt[0] - np.log(2.0**2)) < 3 * err[0], (popt, err)

    # BB / EE = 0.5 (EE/BB = 2): ratio of the summed binned powers. Each sum has relative
    # variance sum_b Var_b / (sum_b C_b)^2; the ratio's is the sum of the two.
    s_e = np.sum(counts * meas["EE"].mean(0))
    s_b = np.sum(counts * meas["BB"].mean(0))
    var_rel = np.sum(counts**2 * 2 * ee2_b / counts / n) / np.sum(counts * ee_b) ** 2
    ratio = s_b / s_e
    assert abs(ratio - 0.5) < 4 * 0.5 * np.sqrt(2 * var_rel)


def test_gaussian_power_law_qu_rms_is_the_analytic_one():
    # Analytic pixel variance sum_k C^QQ_k / (N Omega_pix) against the sample variance of
    # 64 maps (chi-square-like spread; the maps' variance estimates are independent, so
    # 4.5 standard errors of their mean bound a false alarm to ~1e-5).
    patch = FlatPatch(64, 3.0)
    fg = GaussianPowerLaw(amplitude_uk=3.0)
    qu = fg.draw(patch, np.random.default_rng(1), 64)
    per_map = (qu**2).mean(axis=(1, 2, 3))
    assert abs(per_map.mean() - fg.qu_rms(patch) ** 2) < 4.5 * per_map.std() / 8
    s = fg.spectra(np.array([0.0, 80.0, 160.0]))
    assert s["ee"][0] == 0.0
    # D_80 = amplitude^2 by definition, and the power law halves... x 2^-2.42 per octave.
    assert 80 * 81 * s["ee"][1] / (2 * np.pi) == pytest.approx(9.0, rel=1e-12)
    assert s["ee"][2] / s["ee"][1] == pytest.approx(2.0**-2.42, rel=1e-12)
    assert s["bb"][1] / s["ee"][1] == pytest.approx(0.5, rel=1e-12)


# ---------------------------------------------------------------- filaments


def _gaussian_surrogate(qu: np.ndarray, patch: FlatPatch, rng) -> np.ndarray:
    """Gaussian Q/U maps with the filament maps' mean 2-D EE and BB power."""
    ebf = np.fft.fft2(qu_to_eb(qu, patch))
    power = np.mean(np.abs(ebf) ** 2, axis=0) * patch.omega_pix / patch.npix**2
    return gaussian_qu(patch, power[0], power[1], rng, len(qu))


@pytest.fixture(scope="module")
def filament_maps():
    patch = FlatPatch(64, 3.0)
    fg = Filaments(amplitude_uk=3.0)
    return patch, fg, fg.draw(patch, np.random.default_rng(2), 24)


def test_filaments_shape_and_seeding(filament_maps):
    patch, fg, qu = filament_maps
    assert qu.shape == (24, 2, 64, 64) and qu.dtype == np.float64
    assert np.all(np.isfinite(qu))
    again = fg.draw(patch, np.random.default_rng(2), 24)
    np.testing.assert_array_equal(qu, again)
    np.testing.assert_array_equal(fg.draw(patch, 7, 2), fg.draw(patch, 7, 2))
    assert not np.array_equal(fg.draw(patch, 7, 2), fg.draw(patch, 8, 2))


def test_filaments_are_strongly_non_gaussian(filament_maps):
    # Against a Gaussian field with the same mean 2-D spectrum: the skewness of |P| (a
    # Gaussian field gives the Rayleigh value, 0.63) and the excess kurtosis of Q and U
    # (0 for a Gaussian) per map (scipy.stats). A one-sided Mann-Whitney U test of the
    # 24 filament maps against 24 surrogates must reject equality at p < 1e-6 (total
    # separation of 24 vs 24 gives p ~ 1.5e-9 in scipy's normal approximation).
    patch, _, qu = filament_maps
    gauss = _gaussian_surrogate(qu, patch, np.random.default_rng(3))

    def per_map(x):
        p = np.hypot(x[:, 0], x[:, 1]).reshape(len(x), -1)
        return {
            "skew|P|": stats.skew(p, axis=1),
            "kurt Q": stats.kurtosis(x[:, 0].reshape(len(x), -1), axis=1),
            "kurt U": stats.kurtosis(x[:, 1].reshape(len(x), -1), axis=1),
        }

    fil, gau = per_map(qu), per_map(gauss)
    for key in fil:
        res = stats.mannwhitneyu(fil[key], gau[key], alternative="greater")
        assert res.pvalue < 1e-6, (key, fil[key].mean(), gau[key].mean())


def test_filaments_have_ee_over_bb_above_one_and_no_eb(filament_maps):
    # Polarization perpendicular to the filaments makes straight ones pure E, so EE > BB
    # (as for dust, Planck Int. XXX). Per map, log(EE / BB) summed over ell > 300 must be
    # positive by a one-sided t-test (scipy.stats.ttest_1samp) at p < 1e-6; EB / sqrt(EE
    # BB) has zero mean by parity (misalignments are symmetric), accepted unless p < 1e-3.
    patch, _, qu = filament_maps
    edges = _edges(patch)
    spec = eb_spectra(qu, patch, edges=edges)
    sel = spec["ell"] > 300
    ee = spec["EE"][:, sel].sum(1)
    bb = spec["BB"][:, sel].sum(1)
    eb = spec["EB"][:, sel].sum(1)
    assert stats.ttest_1samp(np.log(ee / bb), 0.0, alternative="greater").pvalue < 1e-6
    assert stats.ttest_1samp(eb / np.sqrt(ee * bb), 0.0).pvalue > 1e-3


@pytest.mark.parametrize(("npix", "pixel_arcmin"), [(64, 3.0), (32, 6.0)])
def test_filament_amplitude_is_the_rms_of_q_and_u(npix, pixel_arcmin):
    # Documented meaning of amplitude_uk: E[Q^2] = E[U^2] = amplitude^2, on any patch.
    # Mean over 128 independent maps, error from their scatter; 4.5 standard errors
    # bound a false alarm to ~1e-5 (the per-map means are near Gaussian: ~150 filaments).
    patch = FlatPatch(npix, pixel_arcmin)
    fg = Filaments(amplitude_uk=3.0)
    qu = fg.draw(patch, np.random.default_rng(4), 128)
    for c in (0, 1):
        per_map = (qu[:, c] ** 2).mean(axis=(1, 2))
        assert abs(per_map.mean() - 9.0) < 4.5 * per_map.std() / np.sqrt(128)


def test_filament_energy_quadrature_reduces_to_the_straight_closed_form():
    # Analytic: for a straight segment, sum_x p^2 has a closed form (erf), and the
    # expected Q^2 energy is half of it (random angle). The midpoint rule at spacing s/4
    # of a Gaussian-ridged integrand reproduces it far better than 1e-3 (second order,
    # plus the exponentially small error of a sampled Gaussian).
    for length, s in ((5.0, 0.8), (20.0, 1.5), (40.0, 3.0)):
        num = _filament_energy(length, np.array([0.0]), s)[0]
        assert num == pytest.approx(0.5 * _straight_energy(length, s), rel=1e-3)


def test_filaments_scale_with_the_patch():
    fg = Filaments()
    small, big = FlatPatch(64, 3.0), FlatPatch(128, 3.0)
    assert fg.mean_count(big) == pytest.approx(4 * fg.mean_count(small), rel=1e-12)
    assert fg.mean_count(small) == pytest.approx(fg.n_filaments, rel=1e-12)
    # Coarse pixels: the width is floored at the grid's resolution.
    assert fg.sigma_pix(FlatPatch(32, 12.0)) == pytest.approx(0.75)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"amplitude_uk": -1.0}, "amplitude_uk"),
        ({"n_filaments": 0}, "n_filaments"),
        ({"length_arcmin": (30.0, 10.0)}, "length_arcmin"),
        ({"length_arcmin": 5.0}, "length_arcmin"),
        ({"width_arcmin": 0.0}, "width_arcmin"),
        ({"curvature": -0.1}, "curvature"),
        ({"sigma_ln": -1.0}, "sigma_ln"),
        ({"diffuse_fraction": 1.0}, "diffuse_fraction"),
    ],
)
def test_bad_filament_parameters_raise(kwargs, match):
    with pytest.raises(ValueError, match=match):
        Filaments(**kwargs)


# ---------------------------------------------------------------- image bank


def _bank(m: int = 3, n: int = 16) -> np.ndarray:
    return np.random.default_rng(5).standard_normal((m, 2, n, n))


def test_image_bank_without_symmetries_draws_images_uniformly():
    # Each draw is an exact copy of a bank image; counts over 3 images from 3000 draws
    # follow a uniform multinomial (scipy.stats.chisquare), accepted unless p < 1e-3.
    images = _bank()
    bank = ImageBank(images, symmetries=False)
    out = bank.draw(FlatPatch(16, 3.0), np.random.default_rng(6), 3000)
    which = np.array([np.flatnonzero([np.array_equal(o, im) for im in images]) for o in out])
    assert which.shape == (3000, 1)
    assert stats.chisquare(np.bincount(which[:, 0], minlength=3)).pvalue > 1e-3


def test_image_bank_symmetries_are_uniform_spin2_transforms():
    # With symmetries, each draw is apply_symmetry_qu(image, g) for some image and g, and
    # the 8 elements of D4 appear uniformly (chi-square as above).
    images = _bank(m=2)
    bank = ImageBank(images, symmetries=True)
    out = bank.draw(FlatPatch(16, 3.0), np.random.default_rng(7), 1600)
    table = {(i, g): apply_symmetry_qu(images[i], g) for i in range(2) for g in range(N_SYMMETRIES)}
    found = []
    for o in out:
        hits = [key for key, ref in table.items() if np.array_equal(o, ref)]
        assert len(hits) >= 1
        found.append(hits[0][1])
    assert stats.chisquare(np.bincount(found, minlength=N_SYMMETRIES)).pvalue > 1e-3


def test_image_bank_normalize_and_file(tmp_path):
    images = 5.0 * _bank()
    bank = ImageBank(images, normalize="rms", amplitude_uk=2.0)
    assert np.sqrt(np.mean(bank.images**2)) == pytest.approx(2.0, rel=1e-12)
    assert not bank.images.flags.writeable
    path = tmp_path / "bank.npz"
    np.savez(path, images=images)
    np.testing.assert_array_equal(ImageBank(str(path)).images, images)
    np.savez(tmp_path / "wrong.npz", maps=images)
    with pytest.raises(ValueError, match="'images'"):
        ImageBank(tmp_path / "wrong.npz")


def test_image_bank_bad_input_raises():
    images = _bank()
    with pytest.raises(ValueError, match="patch is 32x32"):
        ImageBank(images).draw(FlatPatch(32, 3.0), 0, 2)
    bad = images.copy()
    bad[1, 0, 3, 3] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        ImageBank(bad)
    with pytest.raises(ValueError, match=r"\(M, 2, n, n\)"):
        ImageBank(images[:, :1])
    with pytest.raises(ValueError, match=r"\(M, 2, n, n\)"):
        ImageBank(images[..., :8])
    with pytest.raises(ValueError, match="normalize"):
        ImageBank(images, normalize="max")
    with pytest.raises(ValueError, match="does not exist"):
        ImageBank("/nonexistent/bank.npz")


# ---------------------------------------------------------------- registry


def test_registry_and_make_foreground():
    assert set(FOREGROUNDS) == {"gaussian", "filaments", "image_bank"}
    fg = make_foreground("gaussian", amplitude_uk=2.0, alpha_ee=-2.0)
    assert isinstance(fg, GaussianPowerLaw) and fg.alpha_ee == -2.0
    assert make_foreground("filaments").name == "filaments"
    with pytest.raises(ValueError, match="filaments, gaussian, image_bank"):
        make_foreground("nebula")
    with pytest.raises(ValueError, match="does not take colour"):
        make_foreground("gaussian", colour="red")
