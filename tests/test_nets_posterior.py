"""ChannelScaler, positivity, and the self-contained PosteriorMoments model."""

from __future__ import annotations

import io
import pickle

import numpy as np
import pytest
import torch

from skymoments.nets import ChannelScaler, DilatedResNet, Positivity, PosteriorMoments, UNet


def _maps(n=64, npix=8, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 2, npix, npix))
    # Channels with different offsets and amplitudes, as Q/U of a bright foreground.
    return (
        x * np.array([3.0, 0.5])[None, :, None, None] + np.array([10.0, -2.0])[None, :, None, None]
    )


def test_scaler_fit_gives_zero_mean_unit_rms_and_round_trips():
    x = _maps()
    sc = ChannelScaler(2, center=True).fit(x)
    y = sc(torch.as_tensor(x, dtype=torch.float64))
    # Fitted on these very maps: mean 0 and rms 1 per channel, up to the float32 storage
    # of the buffers: relative round-off 2**-24 = 6e-8 of shift (10) over scale (3) gives
    # ~2e-7 in the scaled mean, so 1e-6.
    np.testing.assert_allclose(y.mean(dim=(0, 2, 3)).numpy(), 0.0, atol=1e-6)
    np.testing.assert_allclose(y.square().mean(dim=(0, 2, 3)).numpy(), 1.0, rtol=1e-6)
    # The inverse uses the same stored buffers: exact up to float64 round-off.
    np.testing.assert_allclose(sc.inverse(y).numpy(), x, rtol=1e-12, atol=1e-11)


def test_uncentred_scaler_keeps_zero_fixed_and_scales_variance():
    x = _maps()
    sc = ChannelScaler(2, center=False).fit(x)
    assert torch.all(sc.shift == 0)
    # Scale is the rms about zero: sqrt(mean(x^2)) per channel (definition), stored in
    # float32 (relative round-off 2**-24 = 6e-8).
    np.testing.assert_allclose(
        sc.scale.flatten().numpy(), np.sqrt((x**2).mean(axis=(0, 2, 3))), rtol=2e-7
    )
    v = torch.ones(1, 2, 1, 1, dtype=torch.float64)
    np.testing.assert_allclose(sc.inverse_variance(v).flatten().numpy(), sc.scale.flatten() ** 2)


def test_scaler_rejects_misuse():
    with pytest.raises(ValueError, match="before fit"):
        ChannelScaler(2)(torch.zeros(1, 2, 4, 4))
    with pytest.raises(ValueError, match=r"shaped \(n, 2, ny, nx\)"):
        ChannelScaler(2).fit(np.zeros((3, 4, 4)))
    x = _maps()
    x[:, 1] = 5.0
    with pytest.raises(ValueError, match="constant channel"):
        ChannelScaler(2).fit(x)


def test_scaler_state_survives_a_state_dict_round_trip():
    sc = ChannelScaler(2).fit(_maps())
    other = ChannelScaler(2)
    other.load_state_dict(sc.state_dict())
    x = torch.randn(2, 2, 8, 8, dtype=torch.float64)
    torch.testing.assert_close(other(x.float()), sc(x.float()), rtol=0, atol=0)


@pytest.mark.parametrize("kind", ["softplus", "logvar"])
def test_positivity_gives_strictly_positive_variance(kind):
    raw = torch.linspace(-200.0, 200.0, 1001)
    g = Positivity(kind, eps=1e-6)(raw)
    assert torch.all(g > 0) and torch.all(torch.isfinite(g))
    # Both maps are increasing in raw (monotone, so the network can reach any variance).
    assert torch.all(torch.diff(g) >= 0)


def test_positivity_values():
    raw = torch.tensor([-50.0, 0.0, 2.0])
    # softplus(0) = ln 2 (analytic); the eps floor holds where softplus underflows.
    sp = Positivity("softplus", eps=1e-6)(raw)
    want = torch.tensor([1e-6, np.log(2) + 1e-6, np.log1p(np.e**2) + 1e-6], dtype=torch.float32)
    torch.testing.assert_close(sp, want)
    torch.testing.assert_close(Positivity("logvar")(raw), torch.exp(raw))
    with pytest.raises(ValueError, match=r"model\.positivity='relu'"):
        Positivity("relu")


def _model(positivity="softplus", seed=0):
    torch.manual_seed(seed)
    x = _maps(seed=seed)
    target = _maps(seed=seed + 1) - np.array([10.0, -2.0])[None, :, None, None]
    return PosteriorMoments(
        UNet(depth=2, width=4),
        DilatedResNet(width=4, n_blocks=2),
        ChannelScaler(2, center=True).fit(x),
        ChannelScaler(2, center=False).fit(target),
        positivity=positivity,
    ).eval()


@pytest.mark.parametrize("positivity", ["softplus", "logvar"])
def test_posterior_moments_units_and_positive_variance(positivity):
    model = _model(positivity)
    data = torch.as_tensor(_maps(n=4, seed=5), dtype=torch.float32)
    with torch.no_grad():
        mean, var = model(data)
        # Physical units by construction: inverse target scaling of the scaled outputs.
        x = model.input_scaler(data)
        s = model.target_scaler.scale
        torch.testing.assert_close(mean, model.mean_net(x) * s)
        torch.testing.assert_close(var, model.scaled_var(x) * s**2)
    assert mean.shape == var.shape == data.shape
    assert torch.all(var > 0)


def test_posterior_moments_rejects_wrong_shapes():
    with pytest.raises(ValueError, match=r"data_qu must be shaped \(n, 2, npix, npix\)"):
        _model()(torch.zeros(2, 8, 8))


@pytest.mark.parametrize("positivity", ["softplus", "logvar"])
def test_save_and_load_give_identical_outputs(positivity, tmp_path):
    model = _model(positivity, seed=3)
    data = torch.as_tensor(_maps(n=3, seed=7), dtype=torch.float32)
    with torch.no_grad():
        ref = model(data)

    # state_dict into a freshly built model of the same architecture (other init seed).
    path = tmp_path / "state.pt"
    torch.save(model.state_dict(), path)
    fresh = _model(positivity, seed=99)
    fresh.load_state_dict(torch.load(path, weights_only=True))
    # The whole module, pickled (what MLflow's PyTorch flavour stores).
    whole_path = tmp_path / "whole.pt"
    torch.save(model, whole_path)
    whole = torch.load(whole_path, weights_only=False)
    buf = io.BytesIO(pickle.dumps(model))
    unpickled = pickle.loads(buf.getvalue())

    with torch.no_grad():
        for other in (fresh.eval(), whole.eval(), unpickled.eval()):
            out = other(data)
            # Same weights, same ops, same CPU: bitwise identical.
            torch.testing.assert_close(out[0], ref[0], rtol=0, atol=0)
            torch.testing.assert_close(out[1], ref[1], rtol=0, atol=0)
    assert whole.positivity.kind == positivity
