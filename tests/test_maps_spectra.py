"""Binned flat-patch spectra (maps/spectra.py) against Gaussian realizations of known C_ell.

Realizations are made here, independently of the package: white noise ``w`` of unit
variance per pixel has ``<|fft2(w)_k|^2> = N`` (Parseval, numpy's unnormalized fft2), so
``x = ifft2(fft2(w) * sqrt(C(|l_k|) / Omega_pix))`` has ``<|X_k|^2> = C N / Omega_pix``, the
normalization of numpy's unnormalized forward fft2 (Parseval). The filter is even in k, so
x is real.

Exact statistics: modes k and -k of a real field are one complex Gaussian, so a bin of
``n_b`` modes (self-conjugate ones counted once, as real Gaussians) over which C is
constant gives ``n_b * C_hat_b / C_b ~ chi2(n_b)`` exactly; R realizations add to
``chi2(R n_b)``, and disjoint bins are independent.
"""

import numpy as np
import pytest
from scipy import stats

from skymoments.maps.eb import eb_to_qu
from skymoments.maps.geometry import FlatPatch
from skymoments.maps.spectra import apodization_window, eb_spectra, power_spectrum

P_MIN = 1e-3  # reject at p < 0.001: a wrong normalization or shape fails by many sigma


def mode_bins(patch, edges):
    """Bin index of every mode (-1 outside), the way bin_2d assigns them, and the counts."""
    idx = np.digitize(patch.ell, edges) - 1
    idx = np.where((idx >= 0) & (idx < len(edges) - 1), idx, -1)
    counts = np.bincount(idx[idx >= 0].ravel(), minlength=len(edges) - 1)
    return idx, counts


def step_spectrum(patch, edges, levels):
    """A 2-D spectrum constant over each bin (so the binned statistic is exactly chi2)."""
    idx, _ = mode_bins(patch, edges)
    spec = np.where(idx >= 0, np.asarray(levels)[np.clip(idx, 0, None)], levels[-1])
    spec[0, 0] = 0.0
    return spec


def gaussian_field(spec2d, patch, rng, noise=None):
    """Real map with <|X_k|^2> = spec2d * N / Omega_pix (module docstring)."""
    w = rng.standard_normal(patch.shape) if noise is None else noise
    return np.fft.ifft2(np.fft.fft2(w) * np.sqrt(spec2d / patch.omega_pix)).real


def chi2_pvalues(chat, truth, counts):
    """p-values of the binned estimates ``chat`` (R, nb) of a step spectrum ``truth`` (nb,).

    Returns (p of the total, two-sided; p of the per-bin shape): the total is
    chi2(R sum n_b); per bin each chi2(R n_b) is turned into a normal deviate through its
    exact CDF, and the squares add to chi2(nb).
    """
    r = chat.shape[0]
    per_bin = (counts * chat / truth).sum(axis=0)
    dof = r * counts
    total = per_bin.sum()
    cdf = stats.chi2.cdf(total, dof.sum())
    p_total = 2 * min(cdf, 1 - cdf)
    z = stats.norm.ppf(stats.chi2.cdf(per_bin, dof))
    p_shape = stats.chi2.sf(np.sum(z**2), len(counts))
    return p_total, p_shape


@pytest.fixture(scope="module")
def setup():
    patch = FlatPatch(128, 3.0)
    edges = patch.default_bin_edges(16)
    centres = 0.5 * (edges[1:] + edges[:-1])
    return patch, edges, centres


def test_power_spectrum_recovers_cl_within_cosmic_variance(setup):
    patch, edges, centres = setup
    levels = 10.0 * (centres / 1000.0) ** -2 + 0.5  # uK^2, red like the CMB damping tail
    spec = step_spectrum(patch, edges, levels)
    _, counts = mode_bins(patch, edges)
    rng = np.random.default_rng(11)
    maps = np.stack([gaussian_field(spec, patch, rng) for _ in range(4)])
    _, chat = power_spectrum(maps, patch, edges=edges)
    p_total, p_shape = chi2_pvalues(chat, levels, counts)
    print(f"\nflat TT: p(total) = {p_total:.3f}, p(per-bin) = {p_shape:.3f}")
    assert p_total > P_MIN and p_shape > P_MIN
    # The test has power: a 5% error in the normalization (8 sigma for 4 x 12,800
    # modes) is rejected.
    assert chi2_pvalues(chat, 1.05 * levels, counts)[0] < P_MIN


def test_eb_spectra_recover_ee_bb_and_null_eb(setup):
    patch, edges, centres = setup
    ee = 10.0 * (centres / 1000.0) ** -1.5 + 1.0
    bb = 0.2 * ee[::-1]  # a different shape, so that swapping E and B would show
    spec_e, spec_b = step_spectrum(patch, edges, ee), step_spectrum(patch, edges, bb)
    _, counts = mode_bins(patch, edges)
    rng = np.random.default_rng(12)
    qu = np.stack(
        [
            eb_to_qu(
                np.stack([gaussian_field(spec_e, patch, rng), gaussian_field(spec_b, patch, rng)]),
                patch,
            )
            for _ in range(4)
        ]
    )
    out = eb_spectra(qu, patch, edges=edges)
    for name, truth in (("EE", ee), ("BB", bb)):
        p_total, p_shape = chi2_pvalues(out[name], truth, counts)
        print(f"\nflat {name}: p(total) = {p_total:.3f}, p(per-bin) = {p_shape:.3f}")
        assert p_total > P_MIN and p_shape > P_MIN
    # EB of independent E and B: mean 0, variance C_EE C_BB / n_b per realization
    # (Re(E B*) of two complex Gaussians has variance C_E C_B / 2 per mode, and each
    # conjugate pair enters twice). Gaussian by the central limit theorem (>= 60 modes).
    z = out["EB"].mean(axis=0) / np.sqrt(ee * bb / (counts * out["EB"].shape[0]))
    assert stats.chi2.sf(np.sum(z**2), len(z)) > P_MIN


def test_cross_spectrum_recovers_te(setup):
    patch, edges, centres = setup
    tt = 50.0 * (centres / 1000.0) ** -2
    ee = 1.0 * (centres / 1000.0) ** -1
    rho = 0.6 * np.cos(centres / 800.0)
    te = rho * np.sqrt(tt * ee)
    spec_t, spec_e = step_spectrum(patch, edges, tt), step_spectrum(patch, edges, ee)
    rho2d = step_spectrum(patch, edges, rho)
    _, counts = mode_bins(patch, edges)
    rng = np.random.default_rng(13)
    chat = []
    for _ in range(4):
        w1, w2 = rng.standard_normal((2, *patch.shape))
        t = gaussian_field(spec_t, patch, rng, noise=w1)
        # E = rho * (T-like part) + sqrt(1 - rho^2) * (independent part), per mode.
        f1, f2 = np.fft.fft2(w1), np.fft.fft2(w2)
        ef = (rho2d * f1 + np.sqrt(1 - rho2d**2) * f2) * np.sqrt(spec_e / patch.omega_pix)
        chat.append(power_spectrum(t, patch, b=np.fft.ifft2(ef).real, edges=edges)[1])
    chat = np.mean(chat, axis=0)
    # Var of a cross spectrum per bin: (C_TE^2 + C_TT C_EE) / n_b (Gaussian fields;
    # e.g. Knox 1995 for the full-sky analogue); 4 realizations averaged.
    z = (chat - te) / np.sqrt((te**2 + tt * ee) / (4 * counts))
    assert stats.chi2.sf(np.sum(z**2), len(z)) > P_MIN


def test_windowed_spectrum_matches_the_mode_coupled_expectation(setup):
    # With an apodization window w the estimator of maps/spectra.py divides by mean(w^2);
    # its exact expectation is the binned circular convolution
    #   E|fft2(w x)_k|^2 = (1/N^2) sum_q |W_{k-q}|^2 E|X_q|^2       (DFT convolution theorem)
    # (pseudo-C_ell mode coupling, Hivon et al. 2002, arXiv:astro-ph/0105302, flat version).
    # Windowed modes are correlated, so the chi2 is approximate: each bin keeps about
    # n_b * mean(w^2)^2 / mean(w^4) independent modes (the same paper's f_sky
    # correction, common practice), and the Hann kernel couples only neighbouring
    # fundamental modes, so bins 4 fundamentals wide are nearly independent.
    patch, edges, centres = setup
    ell = patch.ell
    spec = np.where(ell > 0, 10.0 * (np.maximum(ell, 1.0) / 1000.0) ** -1 + 1.0, 0.0)
    win = apodization_window(patch.npix)
    n = patch.npix**2
    kernel = np.abs(np.fft.fft2(win)) ** 2
    expected_2d = np.fft.ifft2(np.fft.fft2(kernel) * np.fft.fft2(spec * n / patch.omega_pix))
    expected_2d = expected_2d.real / n**2 * patch.omega_pix / (n * np.mean(win**2))
    idx, counts = mode_bins(patch, edges)
    expected = np.bincount(idx[idx >= 0], weights=expected_2d[idx >= 0], minlength=len(counts))
    expected /= counts
    rng = np.random.default_rng(14)
    reps = 8
    maps = np.stack([gaussian_field(spec, patch, rng) for _ in range(reps)])
    _, chat = power_spectrum(maps, patch, edges=edges, window=win)
    nu_eff = counts * np.mean(win**2) ** 2 / np.mean(win**4)
    z = (chat.mean(axis=0) - expected) / (expected * np.sqrt(2.0 / (reps * nu_eff)))
    p = stats.chi2.sf(np.sum(z**2), len(z))
    print(f"\nwindowed TT: p = {p:.3f}, max |z| = {np.abs(z).max():.2f}")
    assert p > P_MIN
    # The window correction itself (deterministic): where C is smooth the expectation is C
    # up to the coupling bias, which is second order in the kernel width (~ l_f) and so
    # of order (l_f / l)^2 < 1.5% from the third bin on (l > 8 l_f); 3% allows twice that.
    # Without the mean(w^2) division the ratio would be 0.14.
    smooth = np.bincount(idx[idx >= 0], weights=spec[idx >= 0], minlength=len(counts)) / counts
    np.testing.assert_allclose(expected[2:], smooth[2:], rtol=0.03)
