"""The validation-set variance scale: its estimator, the model buffer, stored models."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf
from scipy.optimize import minimize_scalar

from _predict_fakes import make_qu, tiny_model
from skymoments.config.schema import ConfigError, validate
from skymoments.moments.recalibration import fit_variance_scale, recalibrate
from skymoments.nets.archive import describe, rebuild


def _gaussian_case(k_e=1.5, k_b=0.8, n=64, npix=16, seed=0):
    """Truths drawn around a mean with std sigma; predicted std sigma / k per component."""
    rng = np.random.default_rng(seed)
    mean = rng.normal(size=(n, 2, npix, npix))
    sigma = np.exp(rng.normal(scale=0.5, size=(n, 2, npix, npix)))
    target = mean + sigma * rng.normal(size=mean.shape)
    k = np.array([k_e, k_b])[None, :, None, None]
    return target, mean, sigma / k


def test_scale_recovers_the_variance_factor_within_its_sampling_error():
    target, mean, std = _gaussian_case()
    scale = fit_variance_scale(target, mean, std)
    # z^2 with the true std is chi^2 with 1 dof (mean 1, variance 2), so the factor k^2 is
    # recovered with relative sampling error sqrt(2 / N), N = 64 * 16 * 16 pixels per
    # component (analytic); 5 of those errors.
    n = 64 * 16 * 16
    np.testing.assert_allclose(scale, [1.5**2, 0.8**2], rtol=5 * np.sqrt(2 / n))


def test_scale_minimises_the_gaussian_nll_of_the_validation_pixels():
    target, mean, std = _gaussian_case(seed=1)
    scale = fit_variance_scale(target, mean, std)
    for c in range(2):
        r2 = (target[:, c] - mean[:, c]) ** 2
        g = std[:, c] ** 2

        def nll(log_c, r2=r2, g=g):
            v = np.exp(log_c) * g
            return np.mean(r2 / v + np.log(v)) / 2

        # Reference: scipy's scalar minimiser of the NLL over the factor.
        best = minimize_scalar(nll, bounds=(-5, 5), method="bounded", options={"xatol": 1e-10})
        np.testing.assert_allclose(scale[c], np.exp(best.x), rtol=1e-6)


def test_scale_refuses_bad_input():
    target, mean, std = _gaussian_case(n=2, npix=4)
    with pytest.raises(ValueError, match="share a shape"):
        fit_variance_scale(target, mean, std[:1])
    std[0, 0, 0, 0] = 0.0
    with pytest.raises(ValueError, match="> 0 everywhere"):
        fit_variance_scale(target, mean, std)


def test_recalibrate_scales_the_model_and_the_validation_std():
    model = tiny_model()
    x = torch.as_tensor(make_qu(m=3, seed=5), dtype=torch.float32)
    with torch.no_grad():
        mean0, var0 = model(x)
    target, mean, std = _gaussian_case(n=4, npix=8, seed=2)
    cfg = OmegaConf.create({"train": {"variance_calibration": "validation_scale"}})
    new_std, metrics = recalibrate(cfg, model, target, mean, std)
    scale = fit_variance_scale(target, mean, std)
    assert set(metrics) == {"valid/variance_scale_E", "valid/variance_scale_B"}
    np.testing.assert_allclose([metrics["valid/variance_scale_E"]], scale[:1])
    np.testing.assert_allclose(new_std, std * np.sqrt(scale)[None, :, None, None])
    # After the scale, validation z^2 averages to 1 per component (the fit's definition).
    z2 = ((target - mean) / new_std) ** 2
    np.testing.assert_allclose(z2.mean(axis=(0, 2, 3)), 1.0, rtol=1e-12)
    with torch.no_grad():
        mean1, var1 = model(x)
    # The mean is untouched and the variance multiplied by the factor (float32 buffer).
    assert torch.equal(mean0, mean1)
    np.testing.assert_allclose((var1 / var0).amax(dim=(0, 2, 3)).numpy(), scale, rtol=1e-6)
    np.testing.assert_allclose((var1 / var0).amin(dim=(0, 2, 3)).numpy(), scale, rtol=1e-6)

    # "none" leaves both alone.
    off = OmegaConf.create({"train": {"variance_calibration": "none"}})
    same, none_metrics = recalibrate(off, model, target, mean, std)
    assert none_metrics == {} and same is std


def test_stored_model_keeps_its_scale_and_older_models_load_with_one():
    model = tiny_model()
    model.variance_scale.mul_(torch.tensor([2.0, 0.5]).view(1, 2, 1, 1))
    again = rebuild(describe(model), model.state_dict())
    assert torch.equal(again.variance_scale, model.variance_scale)
    # A model stored before the buffer existed has no such key: it loads with factor 1.
    state = {k: v for k, v in model.state_dict().items() if k != "variance_scale"}
    old = rebuild(describe(model), state)
    assert torch.equal(old.variance_scale, torch.ones(1, 2, 1, 1))
    # Nor the flag's margin: such a model flags at the range's edge, as when it was stored.
    model.input_range.set_margin(0.2)
    state = {k: v for k, v in model.state_dict().items() if k != "input_range.margin"}
    assert float(rebuild(describe(model), state).input_range.margin) == 0.0
    assert float(rebuild(describe(model), model.state_dict()).input_range.margin) == 0.2


def test_unknown_method_is_refused_by_the_config_check():
    cfg = OmegaConf.create({"train": {"variance_calibration": "isotonic"}})
    with pytest.raises(ConfigError, match=r"train.variance_calibration='isotonic'; choose one"):
        validate(cfg)
