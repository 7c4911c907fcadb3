"""The evaluation report, the foreground stratification, figures and posterior files.

References: the exact Gaussian posterior (a report of the exact posterior against itself
gives ratios of exactly 1); the analytic Gaussian kernel (Poisson summation on a periodic
grid); the normal distribution (scipy.stats.norm) for stratified z; astropy FITS for the
file format.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.io import fits
from matplotlib.figure import Figure
from numpy.testing import assert_allclose

from skymoments.calibration.report import evaluate_posterior, read_posterior, write_posterior
from skymoments.calibration.stratify import foreground_intensity, stratified_calibration
from skymoments.calibration.wiener import (
    WienerFilter,
    estimate_power_2d_from_image,
    realmap_eb_gain,
    white_noise_power_2d,
)
from skymoments.maps.eb import eb_to_qu, qu_to_eb
from skymoments.maps.geometry import FlatPatch

SIGMA_PIX = 2.0  # uK white noise per pixel in Q and U


def make_gaussian_case(seed: int, n: int = 40, npix: int = 24):
    """A seeded all-Gaussian validation set and its exact posterior filter.

    Signal ~ ell^-1 red spectrum, foreground a power law ell^-2.42 with BB/EE = 0.5
    (Planck Intermediate Results XXX, arXiv:1409.5738), white noise; E/B fields made real
    and turned into Q/U with eb_to_qu.
    """
    patch = FlatPatch(npix, 3.0)
    rng = np.random.default_rng(seed)
    ell = np.where(patch.ell > 0, patch.ell, 1.0)
    lref = 4 * patch.ell_fundamental
    s_ee = 4e-4 / (1 + (ell / lref) ** 2)
    f_ee = 3e-5 * (ell / lref) ** -2.42

    def field(p_ee, p_bb, m):
        amp = np.sqrt(np.stack([p_ee, p_bb]) / patch.omega_pix)
        w = rng.standard_normal((m, 2, npix, npix))
        return eb_to_qu(np.fft.ifft2(np.fft.fft2(w) * amp).real, patch)

    signal = field(s_ee, 0.3 * s_ee, n)
    fg = field(f_ee, 0.5 * f_ee, n)
    data = signal + fg + SIGMA_PIX * rng.standard_normal(signal.shape)
    g_eb, g_qu = realmap_eb_gain(patch, "eb"), realmap_eb_gain(patch, "qu")
    white = white_noise_power_2d(patch, sigma_pix_uk=SIGMA_PIX)
    exact = WienerFilter(
        patch,
        g_eb * s_ee,
        g_eb * 0.3 * s_ee,
        g_eb * f_ee + g_qu * white,
        g_eb * 0.5 * f_ee + g_qu * white,
    )
    # The Gaussian-foreground baseline a user would build: spectrum fitted to ONE image.
    train_fg = field(f_ee, 0.5 * f_ee, 1)[0]
    fe, fb = estimate_power_2d_from_image(train_fg, patch)
    wiener = WienerFilter(
        patch, g_eb * s_ee, g_eb * 0.3 * s_ee, fe + g_qu * white, fb + g_qu * white
    )
    return patch, qu_to_eb(signal, patch), data, fg, exact, wiener


def test_report_of_the_exact_posterior():
    """The exact posterior judged against itself: ratios of exactly 1, every artifact made.

    Reference: identity (mse and variance of the same arrays); calibration itself is
    tested in test_calibration_wiener.py.
    """
    patch, truth, data, fg, exact, wiener = make_gaussian_case(7)
    mean, std = exact.posterior(data)
    rep = evaluate_posterior(
        truth, data, mean, std, patch, foreground_qu=fg, wiener=wiener, exact=exact, prefix="val/"
    )
    m = rep.metrics
    for c in "EB":
        assert m[f"val/eval/mse_ratio_exact_{c}"] == pytest.approx(1.0, rel=1e-12)
        assert m[f"val/eval/var_ratio_exact_{c}"] == pytest.approx(1.0, rel=1e-12)
        for key in (
            "calib/z_mean",
            "calib/z_std",
            "calib/cov68",
            "calib/cov95",
            "calib/cov997",
            "calib/ks",
            "eval/mse",
            "eval/mse_ratio_wiener",
            "eval/snr_gain",
            "baseline/wiener/calib/z_std",
            "baseline/exact/calib/z_std",
            "calib/z_std_fgbin0",
            "calib/z_std_fgbin3",
        ):
            assert np.isfinite(m[f"val/{key}_{c}"]), key
        # The Wiener filter beats doing nothing on every scale taken together.
        assert m[f"val/eval/snr_gain_{c}"] > 1
    assert_allclose(rep.arrays["std_over_exact"], 1.0, rtol=1e-12)
    assert all(k.startswith("val/") for k in m)
    assert set(rep.figures) == {
        "maps/grid.png",
        "plots/z_hist.png",
        "plots/coverage.png",
        "plots/pit.png",
        "plots/spectra.png",
        "plots/fg_intensity.png",
        "plots/data_strata.png",
        "plots/std_over_exact.png",
    }
    for fig in rep.figures.values():
        assert isinstance(fig, Figure)
    labels = [ax.get_ylabel() for ax in rep.figures["plots/spectra.png"].axes]
    assert "C_ell [uK^2]" in labels
    rows = rep.summary_rows()
    assert [r[0] for r in rows][:2] == ["z mean", "z std"]
    assert any(r[0] == "MSE / exact MSE" and r[1] == pytest.approx(1.0) for r in rows)
    assert "norm.ppf" in rep.note


@pytest.mark.slow  # renders seven PNGs: about 6 s on the 2-core machine
def test_report_saves_pngs_and_arrays(tmp_path):
    patch, truth, data, fg, exact, wiener = make_gaussian_case(8, n=6, npix=16)
    mean, std = exact.posterior(data)
    rep = evaluate_posterior(truth, data, mean, std, patch, wiener=wiener)
    paths = rep.save(tmp_path)
    assert (tmp_path / "plots" / "coverage.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "maps" / "grid.png") in paths
    with np.load(tmp_path / "calibration" / "arrays.npz") as z:
        assert_allclose(z["coverage_E"], rep.arrays["coverage_E"])
    assert not list(tmp_path.rglob("*.part"))  # atomic writes leave no temporaries
    assert "plots/fg_intensity.png" not in rep.figures  # needs the foreground


def test_report_rejects_bad_input():
    patch, truth, data, _, exact, _ = make_gaussian_case(9, n=4, npix=16)
    mean, std = exact.posterior(data)
    with pytest.raises(ValueError, match="data_qu has shape"):
        evaluate_posterior(truth, data[:3], mean, std, patch)
    with pytest.raises(ValueError, match="must be > 0"):
        evaluate_posterior(truth, data, mean, -std, patch)
    with pytest.raises(ValueError, match="expected"):
        evaluate_posterior(truth, data, mean, std, FlatPatch(8, 3.0))


def test_smoothing_kernel_is_the_periodic_gaussian():
    """A delta smoothed with FWHM f pixels is the periodically summed Gaussian.

    Reference: analytic; the FFT of the sampled continuous Gaussian transform equals the
    Poisson sum of the continuous Gaussian on the grid, up to the transform's value
    beyond Nyquist, exp(-sigma^2 pi^2 / 2) < 1e-20 here.
    """
    npix, fwhm = 32, 8.0
    patch = FlatPatch(npix, 3.0)
    fg = np.zeros((1, 2, npix, npix))
    fg[0, 0, 0, 0] = 1.0  # |P| is a unit delta at the origin
    got = foreground_intensity(fg, patch, fwhm_pix=fwhm)[0]
    sigma = fwhm / np.sqrt(8 * np.log(2))
    r = np.arange(npix)
    # Sum over periodic images in each axis separately (the kernel is separable).
    one_d = sum(np.exp(-0.5 * (r - k * npix) ** 2 / sigma**2) for k in (-2, -1, 0, 1, 2))
    expect = np.outer(one_d, one_d) / (2 * np.pi * sigma**2)
    assert_allclose(got, expect, rtol=1e-10, atol=1e-15)
    assert got.sum() == pytest.approx(1.0, rel=1e-12)  # the kernel's l = 0 value is 1


def test_stratification_finds_overconfidence_where_the_foreground_is_bright():
    """A posterior whose std is halved in bright-foreground pixels shows z std 2 there.

    Reference: scipy.stats.norm reasoning, z ~ N(0, 4) in those pixels and N(0, 1)
    elsewhere; each of 4 bins holds 25 % of 30 x 32 x 32 pixels, but the pixels are
    correlated only through the bin assignment, not the draws, so binomial-like errors
    of ~1/sqrt(2 x 7680) = 0.008 apply; we allow 0.05.
    """
    rng = np.random.default_rng(12)
    npix, n = 32, 30
    patch = FlatPatch(npix, 3.0)
    fg = rng.standard_normal((n, 2, npix, npix)) * np.linspace(0.1, 3.0, npix)[None, None, :, None]
    inten = foreground_intensity(fg, patch)
    bright = inten > np.median(inten)
    mean = rng.normal(0, 1, (n, 2, npix, npix))
    std = np.full(mean.shape, 1.5)
    truth = mean + std * rng.standard_normal(mean.shape)
    pred_std = np.where(bright[:, None], std / 2, std)
    m, a = stratified_calibration(truth, mean, pred_std, fg, patch, n_bins=4)
    assert np.all(a["fg_counts"] == n * npix * npix // 4)
    assert np.all(np.diff(a["fg_centres"]) > 0)
    for c in "EB":
        assert abs(m[f"calib/z_std_fgbin0_{c}"] - 1) < 0.05
        assert abs(m[f"calib/z_std_fgbin1_{c}"] - 1) < 0.05
        assert abs(m[f"calib/z_std_fgbin2_{c}"] - 2) < 0.1
        assert abs(m[f"calib/z_std_fgbin3_{c}"] - 2) < 0.1
        assert m[f"eval/std_fgbin3_{c}"] == pytest.approx(0.75)
    with pytest.raises(ValueError, match="foreground_qu has shape"):
        stratified_calibration(truth, mean, pred_std, fg[:2], patch)


def test_posterior_files_round_trip(tmp_path):
    """npz and FITS hold the maps, uK units, pixel size and the provenance dict.

    Reference: astropy.io.fits reads the file back; FITS stores float32, so values agree
    to float32 round-off (rtol 1e-7 of the map values, which are O(10) uK).
    """
    patch = FlatPatch(16, 2.5)
    rng = np.random.default_rng(13)
    mean = rng.normal(0, 5, (3, 2, 16, 16))
    std = rng.uniform(0.5, 2, mean.shape)
    header = {
        "run_id": "abc123",
        "experiment": "gaussian_check",
        "seed": 7,
        "a_rather_long_provenance_key": "x" * 120,
    }
    npz, fpath = write_posterior(tmp_path / "maps" / "posterior", mean, std, patch, header)
    assert npz.name == "posterior.npz" and fpath.name == "posterior.fits"
    m1, s1, p1, h1 = read_posterior(npz)
    assert_allclose(m1, mean, rtol=0, atol=0)
    assert p1 == patch and h1 == header
    m2, s2, p2, h2 = read_posterior(fpath)
    assert_allclose(m2, mean, rtol=1e-6, atol=1e-6)
    assert_allclose(s2, std, rtol=1e-6)
    assert p2 == patch and h2 == header
    with fits.open(fpath) as hdul:
        for name in ("MEAN", "STD"):
            assert hdul[name].header["BUNIT"] == "uK"
            assert hdul[name].header["PIXARCM"] == 2.5
            assert hdul[name].header["CDELT1"] == pytest.approx(2.5 / 60)
        assert hdul[0].header["HIERARCH SKYM run_id"] == "abc123"
        assert json.loads(hdul[0].header["PROVJSON"]) == header
    assert not list(tmp_path.rglob("*.part"))


def test_posterior_files_reject_bad_input(tmp_path):
    patch = FlatPatch(8, 3.0)
    mean = np.zeros((2, 8, 8))
    std = np.ones((2, 8, 8))
    with pytest.raises(ValueError, match="must be > 0"):
        write_posterior(tmp_path / "p", mean, np.zeros_like(std), patch, {})
    with pytest.raises(ValueError, match="same shape"):
        write_posterior(tmp_path / "p", mean, std[:1], patch, {})
    bad = mean.copy()
    bad[0, 1, 1] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        write_posterior(tmp_path / "p", bad, std, patch, {})
    with pytest.raises(ValueError, match="expected"):
        write_posterior(tmp_path / "p", np.zeros((2, 4, 4)), np.ones((2, 4, 4)), patch, {})
    assert not list(tmp_path.iterdir())  # nothing half-written
