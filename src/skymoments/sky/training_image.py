"""The one training foreground image of a study, shape (2, n, n) in uK.

A study trains on a foreground it knows from one image only: either a user's file
(``synthesis.image``, read with :func:`skymoments.maps.training_file.load_training_image`)
or one draw of the configured ``sky.foreground`` from the ``training_image`` seed stream.
``synthesize``, ``run`` and ``evaluate`` all take it from here, so the bank, the Wiener
baseline and a re-evaluation see the same image.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.training_file import load_training_image

__all__ = ["training_image"]


def training_image(cfg) -> tuple[np.ndarray, str, FlatPatch]:
    """The training image (2, n, n), a description of its source, and the patch.

    Parameters
    ----------
    cfg : DictConfig or mapping
        Reads ``patch``, ``seed``, ``sky.foreground`` and, when present, the image keys of
        ``synthesis`` (``image``, ``image_key``, ``lon_deg``, ``lat_deg``); a config
        without a ``synthesis`` node draws the image from ``sky.foreground``.
    """
    from skymoments.sky.build import foreground_from_config
    from skymoments.sky.seeds import stream

    node = cfg.get("synthesis") or {}
    patch = FlatPatch(int(cfg["patch"]["npix"]), float(cfg["patch"]["pixel_arcmin"]))
    if node.get("image"):
        img = load_training_image(
            str(node["image"]),
            key=node.get("image_key"),
            lon_deg=node.get("lon_deg"),
            lat_deg=node.get("lat_deg"),
            patch=patch,
        )
        return img, str(Path(str(node["image"])).expanduser().resolve()), patch
    seed = int(cfg["seed"])
    fg = foreground_from_config(cfg["sky"]["foreground"])
    img = fg.draw(patch, stream(seed, "training_image"), 1)[0]
    return img, f"sky.foreground draw (seed {seed}, stream training_image)", patch
