"""Proper scores of a Gaussian predictive, and calibration in bins of what the analyst sees.

References: Gneiting & Raftery 2007 (JASA 102:359): the CRPS definition
``int (F(x) - 1{x >= y})^2 dx`` and its Gaussian closed form (their eq. 21), the
logarithmic score; scipy.stats.norm for the log density and scipy.integrate.quad for the
integral; the exact posterior of an all-Gaussian scenario (the Wiener filter with the true
spectra), whose z-scores have ``E[z^2 | d] = 1`` for every function of the data ``d``.
"""

from __future__ import annotations

import numpy as np
import pytest
from hydra import compose, initialize_config_dir
from scipy import integrate, stats

from skymoments.calibration.metrics import calibration_metrics, gaussian_crps, gaussian_nll
from skymoments.calibration.stratify import data_stratified_calibration
from skymoments.config import conf_dir


@pytest.mark.parametrize(("y", "mu", "sigma"), [(0.3, 0.0, 1.0), (-2.5, 1.0, 0.4), (7.0, 6.0, 3.0)])
def test_crps_closed_form_matches_its_definition(y, mu, sigma):
    # CRPS(F, y) = int (F(x) - 1{x >= y})^2 dx (Gneiting & Raftery 2007, eq. 20), by quadrature.
    def integrand(x):
        return (stats.norm.cdf(x, mu, sigma) - (x >= y)) ** 2

    lo, hi = mu - 12 * sigma, mu + 12 * sigma
    want = integrate.quad(integrand, lo, y)[0] + integrate.quad(integrand, y, hi)[0]
    assert gaussian_crps(y, mu, sigma) == pytest.approx(want, rel=1e-7)


def test_nll_is_the_negative_normal_log_density():
    y, mu, sigma = np.array([0.1, -3.0, 2.0]), np.array([0.0, 1.0, 2.5]), np.array([1.0, 2.0, 0.1])
    # scipy.stats.norm.logpdf is the reference log density.
    np.testing.assert_allclose(gaussian_nll(y, mu, sigma), -stats.norm.logpdf(y, mu, sigma))


@pytest.fixture(scope="module")
def gaussian_check_draws():
    """The gaussian_check scenario (all Gaussian, fixed amplitudes) and its exact posterior."""
    from skymoments.sky.build import scenario_from_config
    from skymoments.study.baselines import baselines

    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose("config", overrides=["experiment=gaussian_check"])
    scenario = scenario_from_config(cfg)
    assert scenario.is_gaussian_fixed()
    draws = scenario.draw_components(np.random.default_rng(3), 48)
    image = scenario.foreground.draw(scenario.patch, np.random.default_rng(4), 1)[0]
    _, exact = baselines(cfg, scenario, image)
    mean, std = exact.posterior(draws["data_qu"])
    return scenario, draws, mean, std


def test_exact_posterior_scores_best_in_gaussian_check(gaussian_check_draws):
    # Propriety (Gneiting & Raftery 2007): the expected CRPS and log score are minimised by
    # the true predictive, here the exact posterior; the prior (mean 0, prior std), and the
    # exact mean with a std 1.5x too wide or 0.67x too narrow must all score worse.
    scenario, draws, mean, std = gaussian_check_draws
    truth = draws["signal_eb"]
    _, ceiling = scenario.target_variance_bounds()  # fixed priors: the prior pixel variance
    prior_std = np.broadcast_to(np.sqrt(ceiling)[None, :, None, None], truth.shape)
    exact = calibration_metrics(truth, mean, std).metrics
    rivals = {
        "prior": calibration_metrics(truth, np.zeros_like(truth), prior_std).metrics,
        "std x1.5": calibration_metrics(truth, mean, 1.5 * std).metrics,
        "std x0.67": calibration_metrics(truth, mean, 0.67 * std).metrics,
    }
    for c in "EB":
        for name, m in rivals.items():
            assert exact[f"calib/crps_{c}"] < m[f"calib/crps_{c}"], (name, c)
            assert exact[f"calib/nll_{c}"] < m[f"calib/nll_{c}"], (name, c)
    # The old z/coverage score has no sharpness term: it cannot tell the prior from the exact
    # posterior by much (both are calibrated), which is why it is only a diagnostic.
    assert rivals["prior"]["calib/zcov_error"] < 0.1


def test_exact_posterior_is_calibrated_in_every_bin_of_the_data(gaussian_check_draws):
    # E[z^2 | d] = 1 for the exact posterior and any function of d: z std 1 per decile of the
    # predicted std and per quartile of the observed intensity. Tolerance: 48 maps of 32^2
    # pixels give ~12000 pixels per quartile; with correlated pixels (a few per independent
    # mode) the z std scatters by ~1-2%, and 0.06 is three times that.
    scenario, draws, mean, std = gaussian_check_draws
    metrics, arrays = data_stratified_calibration(
        draws["signal_eb"], mean, std, draws["data_qu"], scenario.patch
    )
    for c in "EB":
        np.testing.assert_allclose(arrays[f"z_std_dbin_{c}"], 1.0, atol=0.06)
        np.testing.assert_allclose(arrays[f"z_std_stddec_{c}"], 1.0, atol=0.1)
        assert len(arrays[f"z_std_stddec_{c}"]) == 10
    # A std 0.67x too narrow is caught in every bin (z std ~1.5).
    _, bad = data_stratified_calibration(
        draws["signal_eb"], mean, 0.67 * std, draws["data_qu"], scenario.patch
    )
    assert np.all(bad["z_std_dbin_E"] > 1.3)
