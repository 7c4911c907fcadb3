"""Network shapes, periodicity (translation equivariance) and config-driven building."""

from __future__ import annotations

import pytest
import torch
from hydra import compose, initialize_config_dir
from omegaconf import OmegaConf

from skymoments.config import conf_dir
from skymoments.nets import DilatedResNet, SpectralNet, UNet, build_network


def _x(n=3, npix=16, seed=0, dtype=torch.float64):
    g = torch.Generator().manual_seed(seed)
    return torch.randn(n, 2, npix, npix, generator=g, dtype=dtype)


@pytest.mark.parametrize(
    "net",
    [
        UNet(depth=2, width=4),
        UNet(depth=3, width=4, norm="group", padding_mode="zeros", activation="relu"),
        UNet(depth=1, width=3, norm="instance", padding_mode="reflect"),
        UNet(depth=2, width=4, norm="none", activation="silu"),
        DilatedResNet(width=4, n_blocks=3),
        SpectralNet(width=4, n_layers=2, modes=4),
        SpectralNet(width=4, n_layers=1, modes=32),  # more modes than the patch holds
    ],
    ids=lambda n: type(n).__name__,
)
def test_output_shape_matches_input(net):
    x = _x(dtype=torch.float32)
    y = net(x)
    assert y.shape == x.shape
    assert torch.isfinite(y).all()


def test_out_channels_are_configurable():
    # E/B plus an extra channel, e.g. a scalar map: shape follows out_channels.
    assert (
        UNet(in_channels=2, out_channels=3, depth=1, width=4)(_x(dtype=torch.float32)).shape[1] == 3
    )


def _roll(x, s):
    return torch.roll(x, shifts=(s, -s), dims=(-2, -1))


@pytest.mark.parametrize("depth", [1, 2, 3])
def test_circular_unet_commutes_with_shifts_by_multiples_of_2_to_depth(depth):
    # Analytic: circular convolutions commute with every integer shift; a stride-2 pool and
    # a stride-2 transposed convolution commute with shifts by 2 (one coarse pixel), so
    # ``depth`` levels commute with shifts by multiples of 2**depth. float64: round-off of
    # O(1e-15) per operation, so 1e-10 leaves many orders of margin.
    torch.manual_seed(1)
    net = UNet(depth=depth, width=4).double().eval()
    x = _x(npix=16)
    for s in (2**depth, 2 * 2**depth):
        torch.testing.assert_close(net(_roll(x, s)), _roll(net(x), s), atol=1e-10, rtol=0)


def test_equivariance_also_holds_in_training_mode():
    # Batch statistics of a periodic map are shift invariant, so batch norm with batch
    # statistics (training mode) keeps the equivariance.
    torch.manual_seed(2)
    net = UNet(depth=2, width=4).double().train()
    x = _x(npix=16)
    torch.testing.assert_close(net(_roll(x, 4)), _roll(net(x), 4), atol=1e-10, rtol=0)


def test_zero_padding_breaks_the_equivariance():
    # The same check has teeth: with zero padding the edges differ by O(1).
    torch.manual_seed(1)
    net = UNet(depth=2, width=4, padding_mode="zeros").double().eval()
    x = _x(npix=16)
    assert (net(_roll(x, 4)) - _roll(net(x), 4)).abs().max() > 1e-3


@pytest.mark.parametrize(
    "net",
    [
        DilatedResNet(width=4, n_blocks=2, dilations=(1, 3)),
        SpectralNet(width=4, n_layers=2, modes=5),
    ],
    ids=lambda n: type(n).__name__,
)
def test_full_resolution_networks_commute_with_every_pixel_shift(net):
    # No resampling: a circular conv (analytic) and a mode-wise Fourier multiplication
    # (shift theorem) commute with any whole-pixel shift. float64 tolerance as above.
    torch.manual_seed(3)
    net = net.double().eval()
    x = _x(npix=16)
    for s in (1, 3):
        torch.testing.assert_close(net(_roll(x, s)), _roll(net(x), s), atol=1e-10, rtol=0)


def test_spectral_layer_is_linear_and_band_limited():
    # A Fourier layer with modes m passes nothing above |k| >= m (Li et al. 2021, eq. 4).
    from skymoments.nets import SpectralConv2d

    torch.manual_seed(4)
    layer = SpectralConv2d(2, 2, modes=3).double()
    x = torch.zeros(1, 2, 16, 16, dtype=torch.float64)
    cols = torch.arange(16, dtype=torch.float64)
    x[:, :, :, :] = torch.cos(2 * torch.pi * 5 * cols / 16)  # k_x = 5 only
    assert layer(x).abs().max() < 1e-12
    a, b = _x(1), _x(1, seed=9)
    torch.testing.assert_close(layer(2 * a + b), 2 * layer(a) + layer(b), atol=1e-12, rtol=0)


def test_unet_rejects_a_patch_that_does_not_divide():
    with pytest.raises(ValueError, match="multiple of 8"):
        UNet(depth=3, width=4)(_x(npix=12, dtype=torch.float32))


@pytest.mark.parametrize(
    ("kwargs", "key"),
    [
        ({"width": -4}, "width"),
        ({"depth": 0}, "depth"),
        ({"norm": "layer"}, "norm"),
        ({"padding_mode": "wrap"}, "padding_mode"),
        ({"activation": "swish"}, "activation"),
    ],
)
def test_bad_constructor_arguments_name_the_argument(kwargs, key):
    with pytest.raises(ValueError, match=key):
        UNet(**kwargs)


def test_build_network_names_the_config_key_of_a_negative_width():
    node = OmegaConf.create({"_target_": "skymoments.nets.UNet", "depth": 2, "width": -4})
    with pytest.raises(ValueError, match=r"model\.mean\.width must be a positive integer"):
        build_network(node, key="model.mean")


def test_build_network_names_the_key_of_a_bad_choice_and_a_missing_target():
    node = {"_target_": "skymoments.nets.DilatedResNet", "norm": "layer"}
    with pytest.raises(ValueError, match=r"model\.variance: norm='layer'"):
        build_network(node, key="model.variance")
    with pytest.raises(ValueError, match=r"model\.mean must be a config node with a _target_"):
        build_network({"depth": 2}, key="model.mean")


@pytest.mark.parametrize("name", ["unet", "dilated_resnet", "spectral"])
def test_model_configs_build_both_stages(name):
    # The group files hold defaults lists (conf/model/net/*): compose them as Hydra does.
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose("run", overrides=[f"model={name}"]).model
    assert cfg.positivity in ("softplus", "logvar")
    for stage in ("mean", "variance"):
        net = build_network(cfg[stage], key=f"model.{stage}")
        x = _x(2, npix=16, dtype=torch.float32)
        assert net(x).shape == x.shape
