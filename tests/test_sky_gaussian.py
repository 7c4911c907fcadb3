"""Gaussian E/B realizations: the fft2 normalization, cosmic-variance chi-square, interpolation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from skymoments.maps import FlatPatch, qu_to_eb
from skymoments.maps.spectra import bin_2d, map_spectra_eb
from skymoments.sky.gaussian import gaussian_eb, gaussian_qu, interp_cl_2d


def _spectra_2d(patch: FlatPatch) -> tuple[np.ndarray, np.ndarray]:
    """A red EE and a flatter, 10x fainter BB: distinct shapes so a swap would show."""
    ell = np.arange(0, 8000, dtype=float)
    ee = np.where(ell > 0, 1e-4 * (np.maximum(ell, 1) / 500.0) ** -1.5, 0.0)
    bb = np.where(ell > 0, 1e-5 * (np.maximum(ell, 1) / 500.0) ** -0.5, 0.0)
    return interp_cl_2d(ell, ee, patch), interp_cl_2d(ell, bb, patch)


def _edges(patch: FlatPatch) -> np.ndarray:
    # Stop below the Nyquist multipole so no self-conjugate (Nyquist) mode enters a bin:
    # then every mode in a bin comes with its mirror -k, which the variances below assume.
    return np.linspace(0.5 * patch.ell_fundamental, 0.98 * patch.ell_nyquist, 17)


def _bin_stats(power2d: np.ndarray, patch: FlatPatch, edges: np.ndarray):
    """Bin means of a 2-D power and the mode counts per bin."""
    _, mean = bin_2d(power2d, patch, edges)
    counts, _ = np.histogram(patch.ell.ravel(), bins=edges)
    return mean, counts


def test_mode_power_matches_the_fft2_normalization():
    # DEVELOPERS.md: <|X_k|^2> = C_ell N / Omega_pix for X = fft2(x) (numpy's unnormalized fft2).
    # Averaged over all modes with C > 0 and all maps, |X_k|^2 / (C N / Omega) is a mean
    # of exponentials (one per independent Hermitian pair) with mean 1 and sd 1, so its
    # standard error is 1 / sqrt(n_pairs); 4.5 of them bound a false alarm to ~1e-5.
    patch = FlatPatch(32, 4.0)
    ee, bb = _spectra_2d(patch)
    n = 64
    eb = gaussian_eb(patch, ee, bb, np.random.default_rng(0), n)
    norm = patch.npix**2 / patch.omega_pix
    for i, cl in enumerate((ee, bb)):
        x = np.fft.fft2(eb[:, i])
        keep = cl > 0
        ratio = (np.abs(x) ** 2)[:, keep] / (cl[keep] * norm)
        n_pairs = n * keep.sum() / 2
        assert abs(ratio.mean() - 1.0) < 4.5 / np.sqrt(n_pairs)


def test_binned_spectra_match_input_within_cosmic_variance():
    # Cosmic variance of a bin average (analytic, Gaussian field): with each mode and its
    # mirror carrying the same |X|^2, Var(C_b) = 2 sum_k C_k^2 / N_b^2 for EE and BB, and
    # sum_k C^E_k C^B_k / N_b^2 for EB; averaged over n maps, divided by n. Summed squared
    # normalized residuals over bins follow chi2(3 * nbins) (scipy.stats.chi2), accepted
    # unless p < 1e-3.
    patch = FlatPatch(64, 3.0)
    ee, bb = _spectra_2d(patch)
    n = 24
    eb = gaussian_eb(patch, ee, bb, np.random.default_rng(1), n)
    edges = _edges(patch)
    meas = map_spectra_eb(eb, patch, edges=edges)
    ee_b, counts = _bin_stats(ee, patch, edges)
    bb_b, _ = _bin_stats(bb, patch, edges)
    ee2_b, _ = _bin_stats(ee**2, patch, edges)
    bb2_b, _ = _bin_stats(bb**2, patch, edges)
    eebb_b, _ = _bin_stats(ee * bb, patch, edges)
    var = {
        "EE": 2 * ee2_b / counts / n,
        "BB": 2 * bb2_b / counts / n,
        "EB": eebb_b / counts / n,
    }
    expect = {"EE": ee_b, "BB": bb_b, "EB": np.zeros_like(ee_b)}
    chi2 = sum(np.sum((meas[k].mean(0) - expect[k]) ** 2 / var[k]) for k in expect)
    dof = 3 * len(counts)
    assert stats.chi2.sf(chi2, dof) > 1e-3, (chi2, dof)
    # ... and a wrong normalization (a factor 2 in power, the classic "real part" slip)
    # is rejected by the same statistic: the test has the power to catch it.
    chi2_wrong = sum(
        np.sum((meas[k].mean(0) - 0.5 * expect[k]) ** 2 / var[k]) for k in ("EE", "BB")
    )
    assert stats.chi2.sf(chi2_wrong, 2 * len(counts)) < 1e-6


def test_maps_are_real_with_zero_mean_and_seeded():
    patch = FlatPatch(32, 3.0)
    ee, bb = _spectra_2d(patch)
    a = gaussian_eb(patch, ee, bb, 5, 3)
    b = gaussian_eb(patch, ee, bb, np.random.default_rng(5), 3)
    assert a.shape == (3, 2, 32, 32) and a.dtype == np.float64
    np.testing.assert_array_equal(a, b)
    # C = 0 at l = 0, so the maps have no mean; round-off of an FFT of O(1e-2 uK) maps.
    assert np.max(np.abs(a.mean(axis=(-2, -1)))) < 1e-12
    assert not np.array_equal(a, gaussian_eb(patch, ee, bb, 6, 3))


def test_per_map_spectra_scale_the_same_white_noise():
    # Linearity of the construction: a map with spectrum c * C is sqrt(c) times the map
    # with spectrum C drawn from the same white noise (exact up to float64 round-off).
    patch = FlatPatch(32, 3.0)
    ee, bb = _spectra_2d(patch)
    scale = np.array([0.5, 1.0, 4.0])
    base = gaussian_eb(patch, ee, bb, 9, 3)
    per_map = gaussian_eb(patch, scale[:, None, None] * ee, scale[:, None, None] * bb, 9, 3)
    np.testing.assert_allclose(
        per_map, np.sqrt(scale)[:, None, None, None] * base, rtol=1e-12, atol=1e-15
    )


def test_gaussian_qu_is_the_eb_realization_rotated():
    # maps.eb reference: Q/U -> E/B must give back the E/B drawn from the same stream
    # (round-off of two FFT round trips). An odd grid has no self-conjugate Nyquist modes,
    # where an even grid's E/B round trip is not the identity (a maps.eb matter).
    patch = FlatPatch(33, 3.0)
    ee, bb = _spectra_2d(patch)
    qu = gaussian_qu(patch, ee, bb, 2, 4)
    eb = gaussian_eb(patch, ee, bb, 2, 4)
    np.testing.assert_allclose(qu_to_eb(qu, patch), eb, atol=1e-12 * np.abs(eb).max())


def test_interp_cl_2d_is_linear_inside_and_power_law_outside():
    patch = FlatPatch(64, 3.0)  # corners reach ell ~ 5091
    ell = np.arange(0, 4001, dtype=float)
    # A linear function is interpolated exactly (numpy.interp is piecewise linear).
    lin = interp_cl_2d(ell, 3.0 + 2.0 * ell, patch)
    inside = patch.ell <= 4000
    np.testing.assert_allclose(lin[inside][1:], (3.0 + 2.0 * patch.ell[inside])[1:], rtol=1e-12)
    assert lin[0, 0] == 0.0
    # A pure power law is continued exactly by the log-log fit beyond the table.
    pl = np.where(ell > 0, np.maximum(ell, 1.0) ** -2.0, 0.0)
    out = interp_cl_2d(ell, pl, patch)
    beyond = patch.ell > 4000
    assert beyond.any()
    np.testing.assert_allclose(out[beyond], patch.ell[beyond] ** -2.0, rtol=1e-9)
    # A table that ends in zeros (tensor spectra) is continued by zeros.
    zeros_top = np.where(ell < 1500, 1.0, 0.0)
    assert np.all(interp_cl_2d(ell, zeros_top, patch)[beyond] == 0.0)


def test_interp_cl_2d_refuses_far_extrapolation_and_bad_tables():
    patch = FlatPatch(64, 3.0)
    ell = np.arange(0, 2001, dtype=float)
    with pytest.raises(ValueError, match="lmax"):
        interp_cl_2d(ell, np.ones_like(ell), patch)
    ell = np.arange(0, 6001, dtype=float)
    with pytest.raises(ValueError, match="negative"):
        interp_cl_2d(ell, -np.ones_like(ell), patch)
    with pytest.raises(ValueError, match="same length"):
        interp_cl_2d(ell, np.ones(10), patch)
    with pytest.raises(ValueError, match="increasing"):
        interp_cl_2d(ell[::-1], np.ones_like(ell), patch)


def test_bad_inputs_raise():
    patch = FlatPatch(32, 3.0)
    ee, bb = _spectra_2d(patch)
    with pytest.raises(ValueError, match="cl_ee_2d has shape"):
        gaussian_eb(patch, ee[:16], bb, 0, 2)
    with pytest.raises(ValueError, match="non-negative"):
        gaussian_eb(patch, -ee, bb, 0, 2)
    with pytest.raises(ValueError, match="per-map spectra"):
        gaussian_eb(patch, np.stack([ee] * 3), bb, 0, 2)
    with pytest.raises(ValueError, match="positive integer"):
        gaussian_eb(patch, ee, bb, 0, 0)
    with pytest.raises(ValueError, match="rng"):
        gaussian_eb(patch, ee, bb, "seed", 2)
