"""The mean network's zero_mean output: no spatial mean, less squared error, archived."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from skymoments.maps.eb import qu_to_eb
from skymoments.maps.geometry import FlatPatch
from skymoments.moments.pipeline import mean_network_node
from skymoments.nets import ChannelScaler, PosteriorMoments
from skymoments.nets.archive import describe, rebuild
from skymoments.nets.build import build_network
from skymoments.nets.layers import remove_spatial_mean

NODES = {
    "unet": {"_target_": "skymoments.nets.UNet", "depth": 2, "width": 4},
    "dilated_resnet": {"_target_": "skymoments.nets.DilatedResNet", "width": 4, "n_blocks": 2},
    "spectral": {"_target_": "skymoments.nets.SpectralNet", "width": 4, "n_layers": 1, "modes": 4},
}


@pytest.mark.parametrize("name", sorted(NODES))
def test_zero_mean_output_has_no_spatial_mean(name):
    torch.manual_seed(0)
    x = torch.randn(3, 2, 16, 16) + 2.0
    plain = build_network(NODES[name])
    on = build_network({**NODES[name], "zero_mean": True})
    on.load_state_dict(plain.state_dict())
    y, y0 = on(x), plain(x)
    assert y.mean(dim=(-2, -1)).abs().max() < 1e-5
    # The same network otherwise: the two outputs differ by a constant per map and channel.
    diff = y0 - y
    torch.testing.assert_close(diff, diff.mean(dim=(-2, -1), keepdim=True).expand_as(diff))
    with pytest.raises(ValueError, match="zero_mean must be true or false"):
        build_network({**NODES[name], "zero_mean": "yes"})


def test_removing_the_mean_lowers_the_error_by_its_square(rng):
    # Analytic: E/B of a periodic patch have no l = 0 mode (maps/eb.py, checked here with
    # numpy's mean), so for any estimate m, |t - m|^2 = |t - (m - mean m)|^2 + N (mean m)^2.
    qu = rng.standard_normal((4, 2, 16, 16))
    truth = qu_to_eb(qu, FlatPatch(16, 3.0))
    np.testing.assert_allclose(truth.mean(axis=(-2, -1)), 0.0, atol=1e-12)
    m = torch.as_tensor(truth + 0.3 * rng.standard_normal(truth.shape) + 0.5)
    mc = remove_spatial_mean(m).numpy()
    err, err_c = ((truth - m.numpy()) ** 2).sum(), ((truth - mc) ** 2).sum()
    dc = m.numpy().mean(axis=(-2, -1))
    np.testing.assert_allclose(err - err_c, 16 * 16 * (dc**2).sum(), rtol=1e-10)


def test_mean_node_turns_it_on_for_periodic_scenarios_only():
    class Sc:
        def __init__(self, margin):
            self.margin = margin

    node = OmegaConf.create(NODES["unet"])
    assert mean_network_node(node, Sc(0))["zero_mean"] is True
    assert mean_network_node(node, Sc(16))["zero_mean"] is False
    given = OmegaConf.create({**NODES["unet"], "zero_mean": False})
    assert mean_network_node(given, Sc(0))["zero_mean"] is False


def test_archive_keeps_zero_mean():
    torch.manual_seed(1)
    mean_net = build_network({**NODES["unet"], "zero_mean": True})
    var_net = build_network(NODES["unet"])
    model = PosteriorMoments(
        mean_net, var_net, ChannelScaler(2), ChannelScaler(2, center=False)
    ).eval()
    for s in (model.input_scaler, model.target_scaler):
        s.fit(torch.randn(8, 2, 16, 16))
    back = rebuild(describe(model), model.state_dict())
    assert back.mean_net.zero_mean is True and back.var_net.zero_mean is False
    x = torch.randn(2, 2, 16, 16)
    with torch.no_grad():
        torch.testing.assert_close(back(x)[0], model(x)[0])
