"""Scenario: components add up, per-map spectra follow the drawn r, seeds, noise level."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy import stats

from skymoments.maps import FlatPatch, eb_to_qu, qu_to_eb
from skymoments.sky.cmb import CMBSpectra
from skymoments.sky.foregrounds import Filaments, GaussianPowerLaw, ImageBank
from skymoments.sky.noise import apply_beam, beam_transfer
from skymoments.sky.priors import Fixed, LogUniform, Uniform
from skymoments.sky.scenario import PARAM_NAMES, Scenario, SkyDraw


def make_cmb(lmax: int = 8000) -> CMBSpectra:
    """Seeded-factory stand-in for CAMB: smooth analytic spectra (no CAMB call).

    Tensor BB is made 10x the lensing BB at ell ~ 300 so per-map r shows in the maps.
    """
    ell = np.arange(lmax + 1, dtype=float)
    x = np.maximum(ell, 1.0) / 1000.0
    on = (ell >= 2).astype(float)
    return CMBSpectra(
        ell=ell,
        ee_lensed=on * 1e-4 * x**-1.0 * np.exp(-((x / 3.0) ** 2)),
        bb_lensed=on * 2e-6 * np.exp(-((x / 3.0) ** 2)),
        ee_tensor=on * 1e-5 * x**-2.0,
        bb_tensor=on * 2e-5 * x**-2.0,
    )


def make_scenario(
    npix: int = 32,
    noise=None,
    beam: float = 0.0,
    foreground=None,
    r=None,
) -> Scenario:
    patch = FlatPatch(npix, 4.0)
    priors = {
        "r": r if r is not None else Uniform(0.0, 0.2),
        "a_lens": Uniform(0.5, 1.5),
        "a_fg": LogUniform(0.5, 2.0),
        "noise_uk_arcmin": noise if noise is not None else Fixed(0.0),
    }
    fg = foreground if foreground is not None else Filaments(amplitude_uk=2.0)
    return Scenario(patch, make_cmb(), fg, priors, beam_fwhm_arcmin=beam)


def test_shapes_and_params_in_their_priors():
    sc = make_scenario()
    d = sc.draw_components(0, 5)
    for key in ("signal_eb", "signal_qu", "foreground_qu", "noise_qu", "data_qu"):
        assert d[key].shape == (5, 2, 32, 32), key
        assert d[key].dtype == np.float64
    assert d["params"].shape == (5, 4)
    for j, name in enumerate(PARAM_NAMES):
        lo, hi = sc.priors[name].support
        assert np.all((d["params"][:, j] >= lo) & (d["params"][:, j] <= hi)), name
    assert sc.param_names == PARAM_NAMES


def test_components_add_up_exactly_without_noise_and_beam():
    # data = signal + foreground + noise, with noise identically zero: bitwise.
    sc = make_scenario()
    d = sc.draw_components(1, 4)
    assert np.all(d["noise_qu"] == 0.0)
    np.testing.assert_array_equal(d["data_qu"], d["signal_qu"] + d["foreground_qu"])


def test_components_add_up_with_noise_and_beam():
    sc = make_scenario(noise=Uniform(1.0, 3.0), beam=8.0)
    d = sc.draw_components(2, 3)
    sky = apply_beam(d["signal_qu"] + d["foreground_qu"], sc.patch, 8.0)
    # float64 round-off of one sum (maps of a few uK).
    np.testing.assert_allclose(d["data_qu"], sky + d["noise_qu"], rtol=0, atol=1e-12)
    np.testing.assert_array_equal(sc.beam_2d, beam_transfer(sc.patch, 8.0))


def test_target_is_the_eb_of_the_qu_signal():
    # maps.eb reference: the target E/B is the E/B content of the Q/U signal, a fixed
    # point of the Q/U <-> E/B round trip (round-off of FFTs on uK maps).
    sc = make_scenario()
    d = sc.draw_components(3, 4)
    scale = np.abs(d["signal_eb"]).max()
    np.testing.assert_allclose(
        qu_to_eb(d["signal_qu"], sc.patch), d["signal_eb"], atol=1e-12 * scale
    )
    np.testing.assert_allclose(
        eb_to_qu(d["signal_eb"], sc.patch), d["signal_qu"], atol=1e-12 * scale
    )


def test_reproducible_from_seed_and_independent_components():
    sc = make_scenario(noise=Fixed(2.0))
    a = sc.draw_components(11, 3)
    b = sc.draw_components(np.random.default_rng(11), 3)
    for key in a:
        np.testing.assert_array_equal(a[key], b[key])
    c = sc.draw_components(12, 3)
    assert not np.array_equal(a["data_qu"], c["data_qu"])
    # The CMB realization of a seed does not depend on the foreground model.
    other = make_scenario(noise=Fixed(2.0), foreground=GaussianPowerLaw(amplitude_uk=2.0))
    d = other.draw_components(11, 3)
    np.testing.assert_array_equal(a["signal_eb"], d["signal_eb"])
    np.testing.assert_array_equal(a["noise_qu"], d["noise_qu"])


def test_draw_as_torch_is_float32():
    sc = make_scenario()
    s = sc.draw(4, 3, as_torch=True)
    assert isinstance(s, SkyDraw)
    for x in (s.data_qu, s.target_eb, s.params):
        assert isinstance(x, torch.Tensor) and x.dtype == torch.float32
    assert tuple(s.data_qu.shape) == (3, 2, 32, 32) and tuple(s.params.shape) == (3, 4)
    assert s.param_names == PARAM_NAMES
    # Same seed, numpy draw: the tensors are its float32 rounding (relative 2^-24).
    n = sc.draw(4, 3)
    np.testing.assert_allclose(s.data_qu.numpy(), n.data_qu, rtol=1e-6, atol=1e-6)
    np.testing.assert_array_equal(n.target_eb, sc.draw_components(4, 3)["signal_eb"])


def test_noise_level_matches_each_maps_draw():
    # Analytic: per-pixel sigma = w_i / pixel_arcmin for map i. sum_i M s_i^2 / sigma_i^2
    # over maps is chi2(n M) (scipy.stats.chi2), two-sided, accepted unless p < 1e-3.
    sc = make_scenario(noise=Uniform(1.0, 5.0))
    d = sc.draw_components(5, 16)
    w = d["params"][:, 3]
    sigma2 = (w / sc.patch.pixel_arcmin) ** 2
    m = d["noise_qu"][0].size
    stat = np.sum(np.sum(d["noise_qu"] ** 2, axis=(1, 2, 3)) / sigma2)
    dof = 16 * m
    assert 2 * min(stats.chi2.cdf(stat, dof), stats.chi2.sf(stat, dof)) > 1e-3


def test_per_map_bb_power_follows_the_drawn_r_and_a_lens():
    # Each map's BB is Gaussian with C = a_lens C_lens + r C_tens. Its total power over
    # modes, divided by the expectation, has variance 2 sum C^2 / (sum C)^2 (pairs of
    # mirrored modes); the squared normalized residuals of 24 maps sum to ~chi2(24), and
    # the same statistic with r replaced by the prior mean must fail (power to detect).
    sc = make_scenario(npix=32, r=Uniform(0.0, 0.5))
    d = sc.draw_components(6, 24)
    bf = np.fft.fft2(d["signal_eb"][:, 1])
    power = np.abs(bf) ** 2 * sc.patch.omega_pix / sc.patch.npix**2
    keep = sc.patch.ell < 0.98 * sc.patch.ell_nyquist  # mirrored pairs only
    keep[0, 0] = False

    def chi2_for(r, a_lens):
        _, bb2d = sc.signal_power_2d(r, a_lens)
        expect = bb2d[:, keep].sum(1)
        var = 2 * (bb2d[:, keep] ** 2).sum(1)
        return np.sum((power[:, keep].sum(1) - expect) ** 2 / var)

    r, a_lens = d["params"][:, 0], d["params"][:, 1]
    assert stats.chi2.sf(chi2_for(r, a_lens), 24) > 1e-3
    r_bar = np.full_like(r, sc.priors["r"].mean())
    assert stats.chi2.sf(chi2_for(r_bar, a_lens), 24) < 1e-6


def test_power_helpers():
    sc = make_scenario(noise=Uniform(1.0, 3.0), beam=5.0)
    ee, bb = sc.signal_power_2d(0.1, 1.0)
    assert ee.shape == bb.shape == (32, 32)
    ee_n, bb_n = sc.signal_power_2d(np.array([0.0, 0.1]), np.array([1.0, 1.0]))
    np.testing.assert_array_equal(bb_n[1], bb)
    # Linear in r and A_lens: the prior average is the spectrum at the prior means.
    m_ee, m_bb = sc.mean_signal_power_2d()
    np.testing.assert_allclose(m_bb, sc.signal_power_2d(0.1, 1.0)[1], rtol=1e-14)
    # E[w^2] of Uniform(1, 3) is 13/3 (analytic); noise power referred to the sky is
    # (w arcmin)^2 / B^2.
    arcmin = np.pi / 180 / 60
    np.testing.assert_allclose(
        sc.mean_noise_power_2d(), 13 / 3 * arcmin**2 / sc.beam_2d**2, rtol=1e-12
    )
    assert sc.prior_second_moment("a_fg") == pytest.approx(LogUniform(0.5, 2.0).second_moment())
    assert not sc.is_gaussian_fixed()
    with pytest.raises(ValueError, match="is_gaussian_fixed"):
        sc.true_noise_power_2d()


def test_exact_posterior_inputs_in_the_all_gaussian_fixed_case():
    fg = GaussianPowerLaw(amplitude_uk=2.0)
    patch = FlatPatch(32, 4.0)
    priors = {k: Fixed(v) for k, v in zip(PARAM_NAMES, (0.1, 1.0, 1.5, 2.0), strict=True)}
    sc = Scenario(patch, make_cmb(), fg, priors)
    assert sc.is_gaussian_fixed()
    t_ee, t_bb = sc.true_noise_power_2d()
    f_ee, f_bb = fg.power_2d(patch)
    white = (2.0 * np.pi / 180 / 60) ** 2
    np.testing.assert_allclose(t_ee, 1.5**2 * f_ee + white, rtol=1e-12)
    np.testing.assert_allclose(t_bb, 1.5**2 * f_bb + white, rtol=1e-12)


def test_image_bank_foreground_and_given_params():
    patch = FlatPatch(32, 4.0)
    bank = ImageBank(np.random.default_rng(0).standard_normal((2, 2, 32, 32)), symmetries=False)
    priors = {k: Fixed(1.0) for k in PARAM_NAMES}
    sc = Scenario(patch, make_cmb(), bank, priors)
    params = np.array([[0.1, 1.0, 2.0, 0.0], [0.0, 0.5, 0.5, 0.0]])
    d = sc.draw_components(0, 2, params=params)
    np.testing.assert_array_equal(d["params"], params)
    # a_fg multiplies the bank image exactly.
    for i in range(2):
        img = d["foreground_qu"][i] / params[i, 2]
        assert any(np.allclose(img, b, rtol=1e-14) for b in bank.images)


def test_bad_scenario_inputs_raise():
    patch = FlatPatch(32, 4.0)
    fg = GaussianPowerLaw()
    good = {k: Fixed(1.0) for k in PARAM_NAMES}
    with pytest.raises(ValueError, match="missing: noise_uk_arcmin"):
        Scenario(patch, make_cmb(), fg, {k: v for k, v in good.items() if k != "noise_uk_arcmin"})
    with pytest.raises(ValueError, match="unknown: tau"):
        Scenario(patch, make_cmb(), fg, {**good, "tau": Fixed(0.06)})
    with pytest.raises(ValueError, match=r"prior\.r reaches -0.1"):
        Scenario(patch, make_cmb(), fg, {**good, "r": Uniform(-0.1, 0.1)})
    with pytest.raises(ValueError, match=r"prior\.a_fg"):
        Scenario(patch, make_cmb(), fg, {**good, "a_fg": {"dist": "uniform", "low": 2, "high": 1}})
    with pytest.raises(ValueError, match="beam"):
        Scenario(patch, make_cmb(), fg, good, beam_fwhm_arcmin=-1.0)
    with pytest.raises(ValueError, match="CMBSpectra"):
        Scenario(patch, {"ee": 1}, fg, good)
    with pytest.raises(ValueError, match="draw"):
        Scenario(patch, make_cmb(), "filaments", good)
    with pytest.raises(ValueError, match="lmax"):
        Scenario(patch, make_cmb(lmax=1000), fg, good)
    sc = Scenario(patch, make_cmb(), fg, good)
    with pytest.raises(ValueError, match="params has shape"):
        sc.draw_components(0, 2, params=np.ones((3, 4)))
    with pytest.raises(ValueError, match="positive integer"):
        sc.draw_components(0, 0)
    wrong = Scenario(patch, make_cmb(), ImageBank(np.zeros((1, 2, 16, 16))), good)
    with pytest.raises(ValueError, match="patch is 32x32"):
        wrong.draw_components(0, 1)
