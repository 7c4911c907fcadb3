"""The variance stage's loss, its bounds from the problem, and the variance net's inputs.

References: the minimiser of a proper score is the true predictive (Gneiting & Raftery
2007, JASA 102:359); for a constant log-variance s over samples r, the Gaussian negative
log-likelihood is minimised at exp(s) = mean(r^2) (analytic); Jeffrey & Wandelt 2020
(arXiv:2011.05991) for E[(t - f)^2 | d] = Var[t | d] as the variance target; the pixel
variance of a periodic stationary field, mean_k C(k) / Omega_pix (Parseval), checked
against numpy on seeded draws; torch autograd for gradients.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from skymoments.moments.stages import VarianceModule, gaussian_nll
from skymoments.nets import ChannelScaler, Positivity, PosteriorMoments, UNet


def test_nll_minimiser_is_the_mean_squared_residual():
    # Minimising over a constant s: d/ds mean(r^2 e^-s + s)/2 = 0 at e^s = mean(r^2).
    r2 = torch.as_tensor(np.random.default_rng(0).chisquare(1, 4000) * 2.5, dtype=torch.float64)
    s = torch.zeros((), dtype=torch.float64, requires_grad=True)
    opt = torch.optim.LBFGS([s], max_iter=100, tolerance_grad=1e-12, line_search_fn="strong_wolfe")

    def closure():
        opt.zero_grad()
        loss = gaussian_nll(r2, s)
        loss.backward()
        return loss

    opt.step(closure)
    assert math.exp(float(s.detach())) == pytest.approx(float(r2.mean()), rel=1e-6)
    # The value is the Gaussian log density: 0.5 (r^2 e^-s + s + log 2 pi), analytic.
    val = gaussian_nll(torch.tensor([4.0]), torch.tensor([0.0]))
    assert float(val) == pytest.approx(0.5 * (4.0 + math.log(2 * math.pi)))


def test_nll_gradient_does_not_vanish_at_a_tiny_variance():
    # At g = e^s = 1e-8 with residual^2 = 1: d NLL / ds = (1 - r^2 e^-s)/2 = -5e7, pushing g up;
    # the squared loss (r^2 - e^s)^2 has d/ds = -2 (r^2 - e^s) e^s = -2e-8: no way back.
    s = torch.tensor([math.log(1e-8)], dtype=torch.float64, requires_grad=True)
    gaussian_nll(torch.tensor([1.0], dtype=torch.float64), s).backward()
    assert float(s.grad) == pytest.approx(0.5 * (1 - 1e8), rel=1e-9)
    s2 = torch.tensor([math.log(1e-8)], dtype=torch.float64, requires_grad=True)
    ((1.0 - torch.exp(s2)) ** 2).sum().backward()
    assert abs(float(s2.grad)) < 1e-7


def test_bounds_hold_exactly_and_pass_the_gradient_through():
    pos = Positivity("logvar", n_channels=2).set_bounds([1e-3, 1e-2], [1.0, 2.0])
    raw = torch.tensor([-50.0, 0.0, 50.0]).view(1, 1, 1, 3).expand(1, 2, 1, 3).clone()
    raw.requires_grad_(True)
    g = pos(raw)
    # exp of the clamped log-variance, per channel (the bounds as given).
    want = torch.tensor([[1e-3, 1.0, 1.0], [1e-2, 1.0, 2.0]]).view(1, 2, 1, 3)
    torch.testing.assert_close(g.detach(), want)
    pos.log_variance(raw).sum().backward()
    # Straight-through: d s / d raw = 1 even where the bound is active.
    torch.testing.assert_close(raw.grad, torch.ones_like(raw))
    with pytest.raises(ValueError, match="0 < min < max"):
        pos.set_bounds(1.0, 0.5)


def test_scenario_ceiling_is_the_pixel_variance_of_the_target():
    from skymoments.maps.geometry import FlatPatch
    from skymoments.sky.cmb import CMBCosmology, cmb_spectra
    from skymoments.sky.foregrounds import GaussianPowerLaw
    from skymoments.sky.scenario import Scenario

    patch = FlatPatch(32, 6.0)
    priors = {
        "r": {"dist": "uniform", "low": 0.0, "high": 0.2},
        "a_lens": {"dist": "fixed", "value": 1.0},
        "a_fg": {"dist": "fixed", "value": 1.0},
        "noise_uk_arcmin": {"dist": "fixed", "value": 5.0},
    }
    sc = Scenario(patch, cmb_spectra(CMBCosmology()), GaussianPowerLaw(), priors)
    floor, ceiling = sc.target_variance_bounds()
    # Draws at the top of the prior (r = 0.2): their mean squared target is the ceiling.
    params = np.tile([0.2, 1.0, 1.0, 5.0], (400, 1))
    t = sc.draw_components(np.random.default_rng(1), 400, params=params)["signal_eb"]
    measured = np.mean(t**2, axis=(0, 2, 3))
    # 400 maps of 32^2 pixels: the mean square scatters by well under 5% (cosmic variance of
    # ~4e5 nearly independent Fourier modes; the largest scales dominate, hence the margin).
    np.testing.assert_allclose(measured, ceiling, rtol=0.05)
    # Floor: the noise-only Wiener variance, below the prior variance, above zero with noise.
    assert np.all(floor > 0) and np.all(floor < ceiling)


def _toy_model(sees_mean: bool):
    torch.manual_seed(0)
    x = torch.randn(6, 2, 8, 8)
    ins = ChannelScaler(2).fit(x)
    outs = ChannelScaler(2, center=False).fit(x)
    var_net = UNet(in_channels=4 if sees_mean else 2, depth=1, width=4)
    model = PosteriorMoments(UNet(depth=1, width=4), var_net, ins, outs, "logvar", 1e-6, sees_mean)
    return model.eval(), x


def test_variance_net_sees_the_mean_and_the_flag_travels_in_the_state_dict():
    model, x = _toy_model(True)
    with torch.no_grad():
        mean, var = model(x)
        xs = model.input_scaler(x)
        want = model.positivity(model.var_net(torch.cat([xs, model.mean_net(xs)], dim=1)))
    torch.testing.assert_close(var, want * model.target_scaler.scale**2)
    state = model.state_dict()
    assert bool(state["variance_sees_mean"])
    fresh, _ = _toy_model(True)
    fresh.variance_sees_mean.fill_(False)
    fresh.load_state_dict(state)
    with torch.no_grad():
        torch.testing.assert_close(fresh(x)[1], var)


def test_variance_module_trains_with_the_models_bounds():
    model, x = _toy_model(False)
    model.positivity.set_bounds(1e-4, 3.0)
    opt = lambda params: torch.optim.SGD(params, lr=0.1)  # noqa: E731
    module = VarianceModule(
        model.mean_net,
        model.var_net,
        model.positivity,
        opt,
        None,
        model.input_scaler,
        model.target_scaler,
        loss="gaussian_nll",
    )
    assert module.positivity is model.positivity
    loss = module._step((x, 3 * x), "train")
    assert torch.isfinite(loss)
    with pytest.raises(ValueError, match="train.variance_loss"):
        VarianceModule(model.mean_net, model.var_net, "logvar", opt, loss="mae")
