"""Seeded factories shared by the predict tests: Q/U maps and a tiny PosteriorMoments."""

from __future__ import annotations

import numpy as np
import torch

from skymoments.nets import ChannelScaler, PosteriorMoments, build_network

NPIX, PIXEL = 16, 60.0


def make_qu(m=2, npix=NPIX, seed=0):
    """``m`` seeded Q/U maps, shape (m, 2, npix, npix), rms 5 uK in Q and 2 uK in U."""
    rng = np.random.default_rng(seed)
    return rng.normal(size=(m, 2, npix, npix)) * np.array([5.0, 2.0])[None, :, None, None]


def tiny_model(seed=0, norm="batch"):
    """PosteriorMoments with 1-level U-Nets of width 4 and scalers fitted on seeded maps."""
    torch.manual_seed(seed)
    # Built from config nodes, as the pipeline does: a stored model is rebuilt from them.
    node = {"_target_": "skymoments.nets.UNet", "depth": 1, "width": 4, "norm": norm}
    nets = [build_network(node) for _ in range(2)]
    fit = make_qu(m=8, seed=seed + 100)
    model = PosteriorMoments(
        nets[0], nets[1], ChannelScaler(2).fit(fit), ChannelScaler(2, center=False).fit(fit)
    )
    return model.eval()
