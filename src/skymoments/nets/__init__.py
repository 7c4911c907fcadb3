"""Plain torch networks for posterior moments (no Lightning in here).

- :class:`UNet`, :class:`DilatedResNet`, :class:`SpectralNet`: architectures from scaled
  Q/U maps to scaled E/B maps, periodic when ``padding_mode="circular"``.
- :class:`ChannelScaler`: per-channel affine scaling kept in the state dict.
- :class:`PosteriorMoments`: the self-contained model, Q/U in uK to (mean, variance) of E/B.
- :func:`build_network`: a network from a Hydra ``_target_`` node.
"""

from skymoments.nets.build import build_network
from skymoments.nets.posterior import POSITIVITY, Positivity, PosteriorMoments
from skymoments.nets.resnet import DilatedResNet
from skymoments.nets.scaler import ChannelScaler, InputRange
from skymoments.nets.spectral import SpectralConv2d, SpectralNet
from skymoments.nets.unet import UNet

__all__ = [
    "POSITIVITY",
    "ChannelScaler",
    "InputRange",
    "DilatedResNet",
    "PosteriorMoments",
    "Positivity",
    "SpectralConv2d",
    "SpectralNet",
    "UNet",
    "build_network",
]
