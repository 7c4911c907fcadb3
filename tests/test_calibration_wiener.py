"""The per-mode Wiener filter against dense Gaussian conditioning, and its calibration.

References: Gaussian conditioning (Elsner & Wandelt 2013,
arXiv:1210.4931) computed densely with numpy.linalg; the normal distribution
(scipy.stats.norm) for z-scores and coverage; scipy.stats.kstest for PIT uniformity.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from skymoments.calibration.metrics import calibration_metrics
from skymoments.calibration.multipole import multipole_figures
from skymoments.calibration.wiener import (
    WienerFilter,
    estimate_power_2d_from_image,
    realmap_eb_gain,
    white_noise_power_2d,
)
from skymoments.maps.eb import eb_to_qu, qu_to_eb
from skymoments.maps.geometry import FlatPatch
from skymoments.maps.spectra import bin_2d

# --- seeded factories ----------------------------------------------------------------


def spectra(patch: FlatPatch):
    """Signal and foreground 2-D spectra (uK^2) with distinct E and B.

    Signal: a smooth red spectrum, BB = 0.3 EE. Foreground: a power law ell^-2.42 with
    BB/EE = 0.5 (Planck Intermediate Results XXX, arXiv:1409.5738). Values are chosen so
    the binned Wiener weight spans roughly 0.1 to 0.8 on the 32 x 3 arcmin patch.
    """
    ell = np.where(patch.ell > 0, patch.ell, 1.0)
    lref = 4.0 * patch.ell_fundamental
    s_ee = 4e-4 / (1.0 + (ell / lref) ** 2)
    f_ee = 3e-5 * (ell / lref) ** -2.42
    for p in (s_ee, f_ee):
        p[0, 0] = 0.0
    return s_ee, 0.3 * s_ee, f_ee, 0.5 * f_ee


def colour(w, power_ee, power_bb, patch: FlatPatch) -> np.ndarray:
    """Real stationary E/B maps with the given 2-D power, from white noise w (..., 2, n, n).

    White noise has <|W_k|^2> = npix^2; scaling by sqrt(P / Omega_pix) gives
    <|X_k|^2> = P npix^2 / Omega_pix, the fft2 convention of DEVELOPERS.md. P is even
    under l -> -l, so the result is real.
    """
    amp = np.sqrt(np.stack([power_ee, power_bb]) / patch.omega_pix)
    return np.fft.ifft2(np.fft.fft2(w) * amp).real


def gaussian_field(rng, power_ee, power_bb, patch: FlatPatch, n: int) -> np.ndarray:
    """``n`` seeded draws of :func:`colour`, shape (n, 2, npix, npix)."""
    return colour(rng.standard_normal((n, 2, patch.npix, patch.npix)), power_ee, power_bb, patch)


SIGMA_PIX = 3.0  # uK rms of white Q/U noise per pixel


def simulate(rng, patch: FlatPatch, n: int):
    """Signal, foreground and white noise, all Gaussian: (truth_eb, data_qu).

    Signal and foreground are made as real E/B fields turned into Q/U by eb_to_qu; the
    noise is white in Q and U. The truth is the real E/B of the signal, qu_to_eb(signal_qu).
    """
    s_ee, s_bb, f_ee, f_bb = spectra(patch)
    signal_qu = eb_to_qu(gaussian_field(rng, s_ee, s_bb, patch, n), patch)
    fg_qu = eb_to_qu(gaussian_field(rng, f_ee, f_bb, patch, n), patch)
    noise_qu = SIGMA_PIX * rng.standard_normal(signal_qu.shape)
    return qu_to_eb(signal_qu, patch), signal_qu + fg_qu + noise_qu, fg_qu


def exact_filter(patch: FlatPatch, beam: np.ndarray | None = None) -> WienerFilter:
    """The filter with the real-map spectra of the fields `simulate` makes.

    realmap_eb_gain: source "eb" for fields made by eb_to_qu, "qu" for white Q/U noise.
    With a beam, the white noise is referred to the sky (divided by B^2).
    """
    s_ee, s_bb, f_ee, f_bb = spectra(patch)
    g_eb, g_qu = realmap_eb_gain(patch, "eb"), realmap_eb_gain(patch, "qu")
    white = white_noise_power_2d(patch, sigma_pix_uk=SIGMA_PIX)
    if beam is not None:
        white = white / beam**2
    return WienerFilter(
        patch,
        g_eb * s_ee,
        g_eb * s_bb,
        g_eb * f_ee + g_qu * white,
        g_eb * f_bb + g_qu * white,
        beam_2d=beam,
    )


def linear_map(fn, dim_shape) -> np.ndarray:
    """The matrix of a linear map, column j = fn(e_j) flattened."""
    dim = int(np.prod(dim_shape))
    cols = [np.ravel(fn(np.eye(dim)[j].reshape(dim_shape))) for j in range(dim)]
    return np.stack(cols, axis=1)


# --- dense Gaussian conditioning -----------------------------------------------------


@pytest.mark.parametrize("beam_fwhm_pix", [0.0, 1.5])
def test_per_mode_filter_equals_dense_gaussian_posterior(beam_fwhm_pix):
    """Mean and variance equal (S^-1 + N^-1)^-1 N^-1 d and (S^-1 + N^-1)^-1 on 8x8.

    Reference: standard Gaussian conditioning (Elsner & Wandelt 2013, arXiv:1210.4931),
    computed with numpy.linalg on explicitly constructed pixel covariances; an even patch,
    so the Nyquist row/column and the zero mode are exercised. With a beam the data are
    B (s + f) + n and d is the beam-deconvolved real E/B data. Tolerance: float64
    round-off of the inversions (condition numbers here are below 1e8).
    """
    patch = FlatPatch(8, 30.0)
    shape = (2, 8, 8)
    s_ee, s_bb, f_ee, f_bb = spectra(patch)
    sigma = beam_fwhm_pix * patch.pixel_rad / np.sqrt(8 * np.log(2))
    beam = np.exp(-0.5 * patch.ell * (patch.ell + 1) * sigma**2)  # Gaussian beam B_ell

    def smear(x, power):  # the beam (or its inverse) as a Fourier multiplier
        return np.fft.ifft2(np.fft.fft2(x) * beam**power).real

    g_s = linear_map(lambda w: eb_to_qu(colour(w, s_ee, s_bb, patch), patch), shape)  # w -> sig QU
    g_f = linear_map(lambda w: eb_to_qu(colour(w, f_ee, f_bb, patch), patch), shape)  # w -> fg QU
    a = linear_map(lambda qu: qu_to_eb(qu, patch), shape)  # QU -> real EB maps
    b = linear_map(lambda x: smear(x, 1), shape)
    b_inv = linear_map(lambda x: smear(x, -1), shape)
    dim = a.shape[0]
    sky_s, sky_f = b @ g_s, b @ g_f
    cov_d = sky_s @ sky_s.T + sky_f @ sky_f.T + SIGMA_PIX**2 * np.eye(dim)  # data Q/U
    t_map = a @ g_s  # w -> truth
    cov_t = t_map @ t_map.T  # S: truth E/B covariance
    deconv = b_inv @ a  # Q/U data -> beam-deconvolved real E/B
    cov_m = deconv @ (cov_d - sky_s @ sky_s.T) @ deconv.T  # N: contamination, sky units

    rng = np.random.default_rng(11)
    d = rng.standard_normal(dim) * 3.0  # any data vector: the posterior mean is linear
    e = deconv @ d

    # S and N are singular only on the zero mode (qu_to_eb removes it); restrict to its
    # orthogonal complement, where both are invertible.
    evals, evecs = np.linalg.eigh(cov_t + cov_m)
    v = evecs[:, evals > 1e-10 * evals.max()]
    # One null direction per component and per mode the real E/B maps drop.
    assert v.shape[1] == dim - 2 * int(np.sum(realmap_eb_gain(patch) == 0))
    s_r, n_r = v.T @ cov_t @ v, v.T @ cov_m @ v
    post_cov_r = np.linalg.inv(np.linalg.inv(s_r) + np.linalg.inv(n_r))
    dense_mean = v @ post_cov_r @ np.linalg.solve(n_r, v.T @ e)
    dense_cov = v @ post_cov_r @ v.T

    # Second route, independent of the subspace argument: condition on the Q/U data
    # itself, mean = Cov(t, d) Cov(d)^-1 d, cov = S - Cov(t, d) Cov(d)^-1 Cov(d, t).
    cross = t_map @ sky_s.T
    assert_allclose(dense_mean, cross @ np.linalg.solve(cov_d, d), rtol=1e-8, atol=1e-12)
    assert_allclose(
        dense_cov, cov_t - cross @ np.linalg.solve(cov_d, cross.T), rtol=1e-7, atol=1e-14
    )

    wf = exact_filter(patch, beam if beam_fwhm_pix else None)
    mean, std = wf.posterior(d.reshape(shape))
    scale = np.abs(dense_mean).max()
    assert_allclose(mean.ravel(), dense_mean, rtol=0, atol=1e-9 * scale)
    # Stationary posterior: every pixel's variance equals the Parseval sum.
    assert_allclose(std.ravel() ** 2, np.diag(dense_cov), rtol=1e-8)

    # Per-mode variance: the dense covariance is diagonal in Fourier space with entries
    # V_k npix^2 / Omega_pix, and E and B are uncorrelated.
    npx = patch.npix**2
    dft = linear_map(lambda x: np.fft.fft2(x), (8, 8))  # npix^2 x npix^2 DFT matrix
    top = wf.mode_variance.max() * npx / patch.omega_pix
    for i, j in ((0, 0), (1, 1), (0, 1)):
        block = dense_cov[i * npx : (i + 1) * npx, j * npx : (j + 1) * npx]
        fourier = dft @ block @ dft.conj().T
        expect = np.diag(wf.mode_variance[i].ravel() * npx / patch.omega_pix) if i == j else 0
        assert_allclose(fourier, expect, rtol=0, atol=1e-8 * top)


def test_realmap_gain_matches_simulated_power():
    """The gain predicts the mean power of the real E/B maps of simulated fields.

    Reference: numpy Monte Carlo over 4000 white-noise draws (relative error of a mean
    of 4000 exponential-like powers per mode: 1/sqrt(4000) = 1.6 %; 6 sigma = 10 %). On an
    odd patch there is no Nyquist bin (numpy.fft.fftfreq), so the gain is 1 off l = 0.
    """
    rng = np.random.default_rng(3)
    for npix in (8, 9):
        patch = FlatPatch(npix, 3.0)
        w = rng.standard_normal((4000, 2, npix, npix))
        for source, maps in (("qu", w), ("eb", eb_to_qu(w, patch))):
            power = np.mean(np.abs(np.fft.fft2(qu_to_eb(maps, patch))) ** 2, axis=0) / npix**2
            g = realmap_eb_gain(patch, source)
            assert_allclose(power, np.broadcast_to(g, power.shape), rtol=0.1, atol=1e-20)
        if npix % 2:
            assert g[0, 0] == 0.0
            assert_allclose(np.delete(g.ravel(), 0), 1.0, rtol=1e-12)  # float64 round-off


# --- calibration of the exact posterior on simulated Gaussian data -------------------


@pytest.fixture(scope="module")
def gaussian_run():
    patch = FlatPatch(32, 3.0)
    rng = np.random.default_rng(2024)
    truth, data, _ = simulate(rng, patch, 300)
    wf = exact_filter(patch)
    mean, std = wf.posterior(data)
    return patch, wf, truth, data, mean, std


def n_eff(wf: WienerFilter, comp: int) -> float:
    """Effective number of independent modes of the z field per map.

    z is a stationary Gaussian field with mode powers lambda_k proportional to V_k; the
    pixel mean of any even function of z has variance at most var / N_eff with
    N_eff = (sum V)^2 / sum V^2 (Mehler expansion: correlations of even functions are at
    most rho^2, and sum_r rho(r)^2 = sum_k lambda_k^2 / npix^2 by Parseval); for z^2 the
    bound is an equality.
    """
    v = wf.mode_variance[comp]
    return float(v.sum() ** 2 / (v**2).sum())


def test_exact_posterior_z_and_coverage(gaussian_run):
    """z mean 0, z std 1 and coverage 68.27/95.45/99.73 % within sampling error.

    Reference: scipy.stats.norm; the error bars count independent modes, not pixels
    (see n_eff), and we allow 4 sigma.
    """
    _, wf, truth, _, mean, std = gaussian_run
    res = calibration_metrics(truth, mean, std)
    n_maps = truth.shape[0]
    for i, c in enumerate("EB"):
        ne = n_eff(wf, i)
        # The z map of each draw has exactly zero pixel mean: truth and posterior mean have
        # no l = 0 mode (qu_to_eb zeroes it), so only float64 round-off remains.
        assert abs(res.metrics[f"calib/z_mean_{c}"]) < 1e-10
        # var(mean z^2) = 2 / (n N_eff), and z_std = sqrt(mean z^2): sigma = 1/sqrt(2 n N_eff).
        sig = 1.0 / np.sqrt(2.0 * n_maps * ne)
        assert abs(res.metrics[f"calib/z_std_{c}"] - 1.0) < 4 * sig
        for key, nsig in (("cov68", 1), ("cov95", 2), ("cov997", 3)):
            p = stats.norm.cdf(nsig) - stats.norm.cdf(-nsig)
            err = np.sqrt(p * (1 - p) / (n_maps * ne))
            assert abs(res.metrics[f"calib/{key}_{c}"] - p) < 4 * err
        # Every level of the coverage curve is on the diagonal within the same error.
        lv = res.arrays["coverage_levels"]
        err = np.sqrt(lv * (1 - lv) / (n_maps * ne))
        assert np.all(np.abs(res.arrays[f"coverage_{c}"] - lv) < 4 * err)


def test_exact_posterior_pit_is_uniform(gaussian_run):
    """PIT values of one pixel across independent draws are uniform.

    Reference: scipy.stats.kstest against U(0, 1). One pixel per draw keeps the samples
    independent (draws are independent; pixels within a map are not). A 0.1 % level.
    """
    _, _, truth, _, mean, std = gaussian_run
    for i in range(2):
        for pix in ((0, 0), (13, 21)):
            z = (truth[:, i, pix[0], pix[1]] - mean[:, i, pix[0], pix[1]]) / std[:, i, 0, 0]
            assert stats.kstest(stats.norm.cdf(z), "uniform").pvalue > 1e-3


def test_transfer_function_equals_wiener_weight(gaussian_run):
    """T_ell of the Wiener mean equals the binned Wiener weight S/(S+N).

    Reference: analytic, <C^XY> = W S per mode since the contamination is independent of
    the truth, so T_b = sum_b W S / sum_b S. Tolerance: 5 sigma of the estimator, from
    the noise term W m t* and the spread of W within a bin, doubled in variance for
    conjugate partners.
    """
    patch, wf, truth, _, mean, _ = gaussian_run
    _, arrays = multipole_figures(mean, truth, patch)
    n_maps = truth.shape[0]
    for i, c in enumerate("EB"):
        w, s, nn = wf.weight[i], wf.signal_2d[i], wf.noise_2d[i]
        _, ws = bin_2d(w * s, patch)
        _, sb = bin_2d(s, patch)
        expect = ws / sb
        edges = patch.default_bin_edges()
        idx = np.digitize(patch.ell, edges) - 1
        sig = np.empty_like(expect)
        for b in range(len(expect)):
            sel = idx == b
            var = np.sum(w[sel] ** 2 * s[sel] * nn[sel]) + np.sum(
                (w[sel] - expect[b]) ** 2 * s[sel] ** 2
            )
            sig[b] = np.sqrt(2 * var / (n_maps * np.sum(s[sel]) ** 2))
        assert np.all(np.abs(arrays[f"T_ell_{c}"] - expect) < 5 * sig)
        assert expect.max() - expect.min() > 0.3  # the weights really vary over the range


def test_estimated_power_follows_a_power_law():
    """The smooth fit to one image recovers a power-law spectrum.

    Reference: the input C_ell ~ ell^-2.42 (Planck Intermediate Results XXX,
    arXiv:1409.5738). One 64x64 image has ~2000 independent modes; a 3-parameter fit
    in log-log space then pins log C to ~sqrt(3/2000) ~ 4 % over the middle of the
    range and the slope to a few percent; we allow 15 % and 0.15 in the slope (about
    3 sigma of the worst, lowest-ell bins, which hold only a few modes).
    """
    patch = FlatPatch(64, 3.0)
    rng = np.random.default_rng(5)
    ell = np.where(patch.ell > 0, patch.ell, 1.0)
    p_ee = 10.0 * (ell / 1000.0) ** -2.42
    p_ee[0, 0] = 0.0
    qu = eb_to_qu(gaussian_field(rng, p_ee, 0.5 * p_ee, patch, 1), patch)[0]
    ee, bb = estimate_power_2d_from_image(qu, patch, degree=2)
    sel = (patch.ell > 4 * patch.ell_fundamental) & (patch.ell < patch.ell_nyquist)
    assert np.all(np.abs(ee[sel] / p_ee[sel] - 1) < 0.15)
    assert np.all(np.abs(bb[sel] / (0.5 * p_ee[sel]) - 1) < 0.15)
    slope = np.polyfit(np.log(patch.ell[sel]), np.log(ee[sel]), 1)[0]
    assert abs(slope + 2.42) < 0.15
    assert ee[0, 0] == 0.0


def test_bad_spectra_rejected():
    patch = FlatPatch(8, 3.0)
    good = np.ones(patch.shape)
    good[0, 0] = 0
    with pytest.raises(ValueError, match="shape"):
        WienerFilter(patch, np.ones((4, 4)), good, good, good)
    neg = good.copy()
    neg[1, 1] = -1
    with pytest.raises(ValueError, match=">= 0"):
        WienerFilter(patch, good, good, neg, good)
    asym = good.copy()
    asym[1, 2] = 5.0  # its partner (-1, -2) keeps 1: not the power of a real map
    with pytest.raises(ValueError, match="symmetric"):
        WienerFilter(patch, good, asym, good, good)
    with pytest.raises(ValueError, match="NaN"):
        WienerFilter(patch, good, good, good, good).posterior(np.full((2, 8, 8), np.nan))
