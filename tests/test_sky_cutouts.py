"""Cut-out draws (patch.margin): the centre of a larger periodic draw, not periodic,
with the theory spectrum; margin 0 unchanged; edge and interior calibration metrics."""

from __future__ import annotations

import numpy as np
import pytest
from hydra import compose, initialize_config_dir
from scipy import stats

from skymoments.calibration.edges import EDGE_STEMS, REGIONS, edge_calibration, edge_mask
from skymoments.config import ConfigError, conf_dir, validate
from skymoments.maps import FlatPatch, eb_to_qu, qu_to_eb
from skymoments.maps.spectra import apodization_window, power_spectrum
from skymoments.metric_contract import METRICS, direction
from skymoments.sky.build import scenario_from_config
from skymoments.sky.cmb import CMBSpectra
from skymoments.sky.foregrounds import Filaments, GaussianPowerLaw, ImageBank
from skymoments.sky.gaussian import gaussian_eb, interp_cl_2d
from skymoments.sky.noise import apply_beam, white_noise_qu
from skymoments.sky.priors import Fixed, LogUniform, Uniform
from skymoments.sky.scenario import PARAM_NAMES, Scenario, check_margin
from skymoments.sky.seeds import as_generator

P_MIN = 1e-3  # accept unless p < 0.001 (as tests/test_sky_gaussian.py)
R_FIXED = 0.1


def make_cmb(lmax: int = 8000) -> CMBSpectra:
    """Stand-in for the CAMB spectra a scenario holds: the smooth analytic shapes of
    tests/test_sky_scenario.py (no CAMB call). The checks below hold for any spectra the
    scenario is given: they compare the draws with the very spectra the scenario uses."""
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


def fixed_scenario(margin: int, npix: int = 32, foreground=None, beam: float = 0.0, noise=0.0):
    priors = {k: Fixed(v) for k, v in zip(PARAM_NAMES, (R_FIXED, 1.0, 1.0, noise), strict=True)}
    fg = foreground if foreground is not None else GaussianPowerLaw(amplitude_uk=2.0)
    return Scenario(
        FlatPatch(npix, 4.0), make_cmb(), fg, priors, beam_fwhm_arcmin=beam, margin=margin
    )


def target_spectra_2d(cmb: CMBSpectra, grid: FlatPatch) -> list[np.ndarray]:
    """The 2-D EE and BB power of the target on ``grid`` at r = R_FIXED, A_lens = 1.

    The target is qu_to_eb(eb_to_qu(E, B)): in Fourier space E_k (c^2 + s^2) = E_k, except at
    l = 0 and the Nyquist corner of an even grid, which maps/eb.py zeroes; so the target's
    power is the drawn power with those modes set to 0 (maps/eb.py, _angles).
    """
    out = []
    for cl in (cmb.ee_lensed + R_FIXED * cmb.ee_tensor, cmb.bb_lensed + R_FIXED * cmb.bb_tensor):
        c = interp_cl_2d(cmb.ell, cl, grid)
        c[0, 0] = 0.0
        if grid.npix % 2 == 0:
            c[grid.npix // 2, grid.npix // 2] = 0.0
        out.append(c)
    return out


def correlation(c2d: np.ndarray, grid: FlatPatch) -> np.ndarray:
    """Pixel correlation xi(d) of a periodic stationary field on ``grid``.

    With <|X_k|^2> = C_k N / Omega_pix (DEVELOPERS.md, numpy's unnormalized fft2) and
    x = ifft2(X), <x(a) x(b)> = (1 / (N Omega_pix)) sum_k C_k e^{ik(a - b)} = ifft2(C)(a - b)
    / Omega_pix (Parseval; the spectrum is even, so xi is real).
    """
    return np.fft.ifft2(c2d).real / grid.omega_pix


# ----------------------------------------------------------------- margin 0, and the parent
def test_margin_zero_is_the_periodic_draw_bit_for_bit():
    # The draw before cut-outs, written out from its parts with the same seed streams:
    # params, CMB, foreground and noise from rng.spawn(4), in that order.
    patch = FlatPatch(32, 4.0)
    priors = {
        "r": Uniform(0.0, 0.2),
        "a_lens": Uniform(0.5, 1.5),
        "a_fg": LogUniform(0.5, 2.0),
        "noise_uk_arcmin": Uniform(1.0, 3.0),
    }
    fg = Filaments(amplitude_uk=2.0)
    for sc in (
        Scenario(patch, make_cmb(), fg, priors, beam_fwhm_arcmin=8.0),
        Scenario(patch, make_cmb(), fg, priors, beam_fwhm_arcmin=8.0, margin=0),
    ):
        got = sc.draw_components(7, 5)
        r_par, r_cmb, r_fg, r_noise = as_generator(7).spawn(4)
        params = sc.sample_params(r_par, 5)
        ee, bb = sc.signal_power_2d(params[:, 0], params[:, 1])
        signal_qu = eb_to_qu(gaussian_eb(patch, ee, bb, r_cmb, 5), patch)
        fg_qu = params[:, 2, None, None, None] * fg.draw(patch, r_fg, 5)
        noise = white_noise_qu(patch, params[:, 3], r_noise, 5)
        want = {
            "params": params,
            "signal_qu": signal_qu,
            "signal_eb": qu_to_eb(signal_qu, patch),
            "foreground_qu": fg_qu,
            "noise_qu": noise,
            "data_qu": apply_beam(signal_qu + fg_qu, patch, 8.0) + noise,
        }
        assert set(got) == set(want)
        for key in want:
            np.testing.assert_array_equal(got[key], want[key], err_msg=key)
        assert sc.parent_patch == patch and sc.margin == 0


def test_a_cutout_is_the_centre_of_the_periodic_draw_on_the_parent_patch():
    # Same seed: the margin-m draw's signal, target and generator foreground are the centre
    # of the margin-0 draw on the (npix + 2m)-pixel patch, bit for bit, and its data minus
    # its own noise is the centre of the parent's beamed sky (float64 round-off of one sum).
    m, npix = 8, 32
    cut = fixed_scenario(m, npix, beam=6.0, noise=2.0)
    parent = Scenario(cut.parent_patch, cut.cmb, cut.foreground, cut.priors, beam_fwhm_arcmin=6.0)
    assert cut.parent_patch == FlatPatch(npix + 2 * m, 4.0)
    a, b = cut.draw_components(3, 4), parent.draw_components(3, 4)
    centre = (Ellipsis, slice(m, m + npix), slice(m, m + npix))
    for key in ("signal_qu", "signal_eb", "foreground_qu"):
        assert a[key].shape == (4, 2, npix, npix)
        np.testing.assert_array_equal(a[key], b[key][centre], err_msg=key)
    np.testing.assert_array_equal(a["params"], b["params"])
    sky = (b["data_qu"] - b["noise_qu"])[centre]
    np.testing.assert_allclose(a["data_qu"] - a["noise_qu"], sky, rtol=0, atol=1e-12)
    # The noise is white, drawn on the cut: per-pixel sigma = w / pixel_arcmin (analytic),
    # sum of squares / sigma^2 ~ chi2(N) (scipy.stats.chi2), two-sided.
    stat = np.sum(a["noise_qu"] ** 2) / (2.0 / 4.0) ** 2
    dof = a["noise_qu"].size
    assert 2 * min(stats.chi2.cdf(stat, dof), stats.chi2.sf(stat, dof)) > P_MIN
    # The target is the parent's E/B, not the periodic E/B of the cut Q/U.
    leak = qu_to_eb(a["signal_qu"], cut.patch) - a["signal_eb"]
    assert np.sqrt(np.mean(leak**2)) > 0.05 * np.sqrt(np.mean(a["signal_eb"] ** 2))


def test_an_image_bank_foreground_is_taken_as_it_is():
    # A bank of patch-sized images has nothing outside the patch to cut from: its image is
    # the foreground as it is, beamed on the patch; the CMB is still cut from the parent.
    m, npix = 8, 32
    bank = ImageBank(np.random.default_rng(0).standard_normal((3, 2, npix, npix)))
    cut = fixed_scenario(m, npix, foreground=bank, beam=6.0)
    periodic = fixed_scenario(0, npix, foreground=bank, beam=6.0)
    a, b = cut.draw_components(4, 3), periodic.draw_components(4, 3)
    np.testing.assert_array_equal(a["foreground_qu"], b["foreground_qu"])
    # The CMB stream does not depend on the foreground model: the parent's own draw.
    parent = Scenario(cut.parent_patch, cut.cmb, GaussianPowerLaw(), cut.priors)
    cmb = parent.draw_components(4, 3)["signal_qu"]
    centre = (Ellipsis, slice(m, m + npix), slice(m, m + npix))
    want = apply_beam(cmb, cut.parent_patch, 6.0)[centre] + apply_beam(
        a["foreground_qu"], cut.patch, 6.0
    )
    np.testing.assert_allclose(a["data_qu"], want, rtol=0, atol=1e-12)


def test_the_variance_ceiling_of_a_cutout_is_the_parent_pixel_variance():
    # A cut-out pixel is a pixel of the parent's stationary field: its prior variance is
    # mean_k C(k) / Omega_pix over the parent's modes (Parseval), the ceiling of the margin-0
    # scenario on the parent patch; the floor is the periodic patch's, as before.
    priors = {
        "r": Uniform(0.0, 0.2),
        "a_lens": Uniform(0.5, 1.5),
        "a_fg": Fixed(1.0),
        "noise_uk_arcmin": Fixed(1.0),
    }
    fg = GaussianPowerLaw()
    cut = Scenario(FlatPatch(32, 4.0), make_cmb(), fg, priors, margin=8)
    parent = Scenario(cut.parent_patch, make_cmb(), fg, priors)
    periodic = Scenario(cut.patch, make_cmb(), fg, priors)
    floor, ceiling = cut.target_variance_bounds()
    np.testing.assert_allclose(ceiling, parent.target_variance_bounds()[1], rtol=1e-12)
    np.testing.assert_array_equal(floor, periodic.target_variance_bounds()[0])


# ------------------------------------------------------------------------- the spectrum
def expected_windowed_power(c2d_parent, parent: FlatPatch, patch: FlatPatch, win):
    """Exact expectation of maps/spectra.py's windowed 2-D power of an npix cut.

    For x the npix x npix cut of a stationary field with correlation xi on the parent and
    Y_k = sum_x w(x) x(x) e^{-2 pi i k x / n}:
        E|Y_k|^2 = sum_d A(d) xi(d) e^{-2 pi i k d / n},  A(d) = sum_x w(x) w(x + d),
    |d| < n per axis (the double sum regrouped by separation). On a 2n grid this is the
    fft2 of A xi at the even frequencies; A is the zero-padded autocorrelation of w (DFT
    convolution theorem). The estimator divides by N mean(w^2) / Omega_pix.
    """
    n = patch.npix
    xi = correlation(c2d_parent, parent)
    padded = np.zeros((2 * n, 2 * n))
    padded[:n, :n] = win
    auto = np.fft.ifft2(np.abs(np.fft.fft2(padded)) ** 2).real
    d = np.rint(np.fft.fftfreq(2 * n, 1.0 / (2 * n))).astype(int) % parent.npix
    power = np.fft.fft2(auto * xi[np.ix_(d, d)]).real[::2, ::2]
    return power * patch.omega_pix / (n**2 * np.mean(win**2))


def _bins(patch: FlatPatch, n_bins: int = 8):
    # Below the Nyquist multipole, as tests/test_sky_gaussian.py, so every mode of a bin
    # comes with its mirror.
    edges = np.linspace(0.5 * patch.ell_fundamental, 0.98 * patch.ell_nyquist, n_bins + 1)
    idx = np.digitize(patch.ell, edges) - 1
    ok = (idx >= 0) & (idx < n_bins)
    counts = np.bincount(idx[ok], minlength=n_bins)

    def binned(p2d):
        return np.bincount(idx[ok], weights=p2d[ok], minlength=n_bins) / counts

    return edges, counts, binned


def test_the_exact_expectation_at_margin_zero_is_the_circular_convolution():
    # With the cut the whole periodic grid, the formula must reduce to the circular
    # convolution (1/N^2) sum_q |W_{k-q}|^2 E|X_q|^2 tested in tests/test_maps_spectra.py.
    patch = FlatPatch(32, 4.0)
    ee, _ = target_spectra_2d(make_cmb(), patch)
    win = apodization_window(patch.npix)
    n = patch.npix**2
    kernel = np.abs(np.fft.fft2(win)) ** 2
    circ = np.fft.ifft2(np.fft.fft2(kernel) * np.fft.fft2(ee * n / patch.omega_pix)).real
    circ *= patch.omega_pix / (n**3 * np.mean(win**2))
    got = expected_windowed_power(ee, patch, patch, win)
    np.testing.assert_allclose(got, circ, rtol=1e-10, atol=1e-12 * ee.max())


def test_cutout_target_spectra_match_the_theory_within_cosmic_variance():
    # The cut target's Hann-windowed binned EE and BB against their exact expectation from
    # the scenario's spectra (expected_windowed_power). Windowed modes are correlated, so
    # the chi2 is approximate as in tests/test_maps_spectra.py: each bin keeps about
    # n_b mean(w^2)^2 / mean(w^4) independent modes (Hivon et al. 2002,
    # arXiv:astro-ph/0105302, the f_sky correction); the relative variance of a bin mean of
    # n maps is then 2 / (n nu_eff). Accepted unless p < 1e-3; half the power is rejected.
    sc = fixed_scenario(16)
    n = 64
    d = sc.draw_components(5, n)
    patch, parent = sc.patch, sc.parent_patch
    win = apodization_window(patch.npix)
    edges, counts, binned = _bins(patch)
    nu_eff = counts * np.mean(win**2) ** 2 / np.mean(win**4)
    theory = target_spectra_2d(sc.cmb, patch)
    chi2, chi2_wrong = 0.0, 0.0
    for i, c2d in enumerate(target_spectra_2d(sc.cmb, parent)):
        expect = binned(expected_windowed_power(c2d, parent, patch, win))
        _, chat = power_spectrum(d["signal_eb"][:, i], patch, edges=edges, window=win)
        sigma = expect * np.sqrt(2.0 / (n * nu_eff))
        chi2 += np.sum(((chat.mean(0) - expect) / sigma) ** 2)
        chi2_wrong += np.sum(((chat.mean(0) - 0.5 * expect) / sigma) ** 2)
        # The expectation is the theory spectrum up to the Hann window's own mode coupling:
        # a bias second order in the kernel's width (about one fundamental l_f per axis),
        # of order alpha^2 (l_f / l)^2 / 2 for C ~ l^-alpha with alpha <= 2 here, so below
        # 6% from the fourth bin on (l > 6 l_f). The cut adds none of its own.
        np.testing.assert_allclose(expect[3:], binned(theory[i])[3:], rtol=0.06)
    dof = 2 * len(counts)
    assert stats.chi2.sf(chi2, dof) > P_MIN, (chi2, dof)
    assert stats.chi2.sf(chi2_wrong, dof) < 1e-6


# ---------------------------------------------------------------------- not periodic
def difference_cov(xi: np.ndarray, pairs_a, pairs_b) -> np.ndarray:
    """Covariance of D_k = x(a_k) - x(b_k) for a stationary field with correlation xi:
    Cov(D_k, D_l) = xi(a_k - a_l) - xi(a_k - b_l) - xi(b_k - a_l) + xi(b_k - b_l)."""
    size = np.array(xi.shape)

    def x(p, q):
        diff = (p[:, None, :] - q[None, :, :]) % size
        return xi[diff[..., 0], diff[..., 1]]

    return x(pairs_a, pairs_a) - x(pairs_a, pairs_b) - x(pairs_b, pairs_a) + x(pairs_b, pairs_b)


def wrap_pairs(npix: int):
    """The pixel pairs across the patch's wrap-around: (i, 0)-(i, n-1) for every row i and
    (0, j)-(n-1, j) for every column j but the last, whose difference is a sum of the others
    (the four corners close a cycle: D_col(0) - D_col(n-1) = D_row(0) - D_row(n-1))."""
    i, j = np.arange(npix), np.arange(npix - 1)
    first = np.concatenate([np.stack([i, 0 * i], 1), np.stack([0 * j, j], 1)])
    last = np.concatenate([np.stack([i, 0 * i + npix - 1], 1), np.stack([0 * j + npix - 1, j], 1)])
    return first, last


def wrap_chi2_p(maps: np.ndarray, cov: np.ndarray) -> float:
    """Two-sided p of sum_maps D^T cov^-1 D ~ chi2(maps * len(D)) (exact for Gaussian D)."""
    npix = maps.shape[-1]
    first, last = wrap_pairs(npix)
    diffs = maps[:, first[:, 0], first[:, 1]] - maps[:, last[:, 0], last[:, 1]]
    white = np.linalg.solve(np.linalg.cholesky(cov), diffs.T)
    stat, dof = float(np.sum(white**2)), diffs.size
    return 2 * min(stats.chi2.cdf(stat, dof), stats.chi2.sf(stat, dof))


@pytest.mark.parametrize("margin", [0, 16])
def test_cutouts_are_not_periodic_and_periodic_draws_are(margin):
    # The differences across the wrap-around (first minus last column and row) are a
    # Gaussian vector whose covariance follows from the pixel correlation (analytic, above).
    # A periodic map: the last column is a neighbour of the first, xi on the npix grid.
    # A cut-out: they are n - 1 pixels apart on the parent, xi on the parent grid, and the
    # difference is larger (about twice the variance here). Each draw must fit its own
    # model (p > 1e-3) and be rejected by the other one (p < 1e-6), for E and for B.
    npix = 32
    sc = fixed_scenario(margin, npix)
    maps = sc.draw_components(9, 16)["signal_eb"]
    first, last = wrap_pairs(npix)
    grids = {"periodic": sc.patch, "cut": FlatPatch(npix + 32, 4.0)}
    own = "cut" if margin else "periodic"
    for i in range(2):
        for name, grid in grids.items():
            xi = correlation(target_spectra_2d(sc.cmb, grid)[i], grid)
            p = wrap_chi2_p(maps[:, i], difference_cov(xi, first, last))
            if name == own:
                assert p > P_MIN, (i, name, p)
            else:
                assert p < 1e-6, (i, name, p)


# ------------------------------------------------------------------------- refusals, config
def test_bad_margins_are_refused_in_one_line():
    for bad in (-1, 1.5, "8", True, float("nan")):
        with pytest.raises(ValueError, match=r"^patch\.margin must be a whole number") as err:
            check_margin(bad)
        assert "\n" not in str(err.value)
        with pytest.raises(ValueError, match=r"patch\.margin"):
            fixed_scenario(bad)
    assert check_margin(16) == check_margin(16.0) == check_margin(np.int64(16)) == 16


def _compose(*overrides: str):
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        return compose("run", overrides=list(overrides))


def test_config_margin_checks_and_the_cutouts_experiment():
    with pytest.raises(ConfigError, match=r"patch\.margin must be a whole number.*-2"):
        validate(_compose("patch.margin=-2"))
    with pytest.raises(ConfigError, match=r"patch"):
        validate(_compose("patch.margin=1.5"))
    with pytest.raises(ConfigError, match=r"eval\.edge_px"):
        validate(_compose("patch=flat32", "eval.edge_px=16"))
    cfg = validate(_compose("experiment=cutouts"))
    quick = validate(_compose("experiment=quickstart"))
    assert cfg.patch.margin == 16 and quick.patch.margin == 0
    assert cfg.model.mean.padding_mode == cfg.model.variance.padding_mode == "zeros"
    assert cfg.eval.edge_px == 4
    # The rest is the quickstart.
    for key in ("patch.npix", "patch.pixel_arcmin", "seed", "augment", "prior", "train"):
        node, ref = cfg, quick
        for part in key.split("."):
            node, ref = node[part], ref[part]
        assert node == ref, key
    # The margin reaches the scenario (the CMB spectra given, so CAMB is not run).
    sc = scenario_from_config(cfg, cmb=make_cmb())
    assert sc.margin == 16 and sc.parent_patch == FlatPatch(96, 3.0)
    assert scenario_from_config(quick, cmb=make_cmb()).margin == 0


# ------------------------------------------------------------------------- edge metrics
def test_edge_and_interior_metrics_match_numpy_by_hand():
    rng = np.random.default_rng(3)
    n, npix, k = 5, 20, 3
    truth = rng.standard_normal((n, 2, npix, npix))
    mean = 0.3 * rng.standard_normal((n, 2, npix, npix))
    std = rng.uniform(0.5, 2.0, (n, 2, npix, npix))
    # Make the band different from the interior, so a swapped mask would show.
    truth[..., :k, :] *= 3.0
    got = edge_calibration(truth, mean, std, edge_px=k)
    z = (truth - mean) / std
    for i, c in enumerate("EB"):
        zc = z[:, i]
        band = np.concatenate(
            [
                zc[:, :k, :].ravel(),
                zc[:, npix - k :, :].ravel(),
                zc[:, k : npix - k, :k].ravel(),
                zc[:, k : npix - k, npix - k :].ravel(),
            ]
        )
        inner = zc[:, k : npix - k, k : npix - k].ravel()
        assert band.size == n * 4 * k * (npix - k) and band.size + inner.size == zc.size
        for region, v in (("edge", band), ("interior", inner)):
            want = {
                "z_mean": v.mean(),
                "z_std": np.sqrt(np.mean((v - v.mean()) ** 2)),
                "cov68": np.count_nonzero(np.abs(v) < 1) / v.size,
                "cov95": np.count_nonzero(np.abs(v) < 2) / v.size,
            }
            for stem, value in want.items():
                assert got[f"calib/{stem}_{region}_{c}"] == pytest.approx(value, rel=1e-12)
    assert len(got) == len(EDGE_STEMS) * len(REGIONS) * 2
    assert got["calib/z_std_edge_E"] > 1.5 * got["calib/z_std_interior_E"]
    mask = edge_mask(npix, k)
    assert mask.sum() == 4 * k * (npix - k) and not mask[k:-k, k:-k].any()
    # Every name is in the metric contract, with the whole-patch ideals.
    stems = {m.stem: m for m in METRICS}
    for name in got:
        spec = stems[name.rsplit("_", 1)[0]]
        whole = stems[spec.stem.rsplit("_", 1)[0]]
        assert spec.ideal == whole.ideal and spec.better == "ideal"
        assert direction(name) == "min"
    for bad in (0, 10, 2.5):
        with pytest.raises(ValueError, match="edge_px"):
            edge_mask(npix, bad)
