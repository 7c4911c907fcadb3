"""``experiment=gaussian_check``: all-Gaussian with fixed amplitudes, in a non-trivial regime,
and its exact-posterior baseline is calibrated on the check's own draws."""

from __future__ import annotations

import numpy as np
import pytest
from hydra import compose, initialize_config_dir

from skymoments.config import conf_dir, validate


def _compose(*overrides: str):
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        return compose("config", overrides=["experiment=gaussian_check", *overrides])


@pytest.fixture(scope="module")
def check():
    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.training_image import training_image
    from skymoments.study.baselines import baselines

    cfg = validate(_compose())
    scenario = scenario_from_config(cfg)
    image, _, _ = training_image(cfg)
    wiener, exact = baselines(cfg, scenario, image)
    return cfg, scenario, exact


def test_composes_all_gaussian_with_fixed_amplitudes_and_oracle_foregrounds():
    cfg = validate(_compose())
    assert cfg.name == "gaussian_check"
    assert cfg.sky.foreground._target_ == "skymoments.sky.foregrounds.GaussianPowerLaw"
    assert all(cfg.prior[k].dist == "fixed" for k in cfg.prior)
    # Training foregrounds come from the generator: the check is about the networks.
    assert cfg.augment.source == "generator"
    # The noise is on: the exact posterior is not the identity anywhere.
    assert cfg.prior.noise_uk_arcmin.value > 0


@pytest.mark.slow
def test_scenario_is_gaussian_fixed_so_the_exact_posterior_exists(check):
    _, scenario, exact = check
    assert scenario.is_gaussian_fixed()
    assert exact is not None


@pytest.mark.slow
def test_regime_is_neither_signal_nor_noise_dominated(check):
    # Guard against a weakened check. For the per-mode Wiener filter (Elsner & Wandelt 2013,
    # arXiv:1210.4931) the exact posterior removes 1 - sum(S N/(S+N)) / sum(S) of the prior
    # pixel variance. Near 0 the answer is "predict zero", near 1 it is "copy the data": both
    # trivial. The check is specified (conf/experiment/gaussian_check.yaml) to sit in between
    # for E and for B, with the Wiener weight S/(S+N) spanning a wide range over ell.
    _, scenario, exact = check
    for i, c in enumerate("EB"):
        s = exact.signal_2d[i]
        removed = 1.0 - exact.mode_variance[i].sum() / s.sum()
        assert 0.3 < removed < 0.7, (c, removed)
        w = exact.weight[i][s > 0]
        assert w.min() < 0.2 and w.max() > 0.5, c


@pytest.mark.slow
def test_exact_posterior_is_calibrated_on_the_check_draws(check):
    # On draws of the check's own scenario, the exact posterior's residual has the variance
    # it predicts (the Gaussian conditioning formula): mean z^2 over the pixels of a map is 1
    # on average. By Parseval it is sum_k |r_k|^2 / sum_k v_k with v_k = S N/(S+N) the exact
    # mode variance; the residual modes are independent Gaussians except that k and -k of a
    # real map are one complex mode, so its relative std is sqrt(2 sum_k v_k^2) / sum_k v_k,
    # and over n independent maps that over sqrt(n). Tolerance: 4 of these (about 1 in 16000
    # for a correct posterior).
    from skymoments.sky.seeds import streams

    cfg, scenario, exact = check
    n = 64
    test = scenario.draw_components(streams(int(cfg.seed), "eval")["eval"], n)
    mean, std = exact.posterior(test["data_qu"])
    z2 = ((test["signal_eb"] - mean) / std) ** 2
    for i, c in enumerate("EB"):
        v = exact.mode_variance[i].ravel()
        rel = np.sqrt(2.0 * np.sum(v**2)) / np.sum(v)
        tol = 4.0 * rel / np.sqrt(n)
        assert abs(z2[:, i].mean() - 1.0) < tol, (c, z2[:, i].mean(), tol)
