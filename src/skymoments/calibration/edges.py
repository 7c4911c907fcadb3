"""Calibration of the patch's edge band and of its interior, apart.

A patch cut from a sky that is not periodic (``predict`` on HEALPix cuts and FITS images,
or training draws with ``patch.margin > 0``) is hardest at its edges: the E/B of a pixel
there depends on Q/U outside the patch. A posterior can be calibrated on average while
its z = (truth - mean) / std is too wide in the outer band and too narrow inside, so the
two are reported apart.

The edge band is every pixel within ``edge_px`` pixels of a side (the outer ``edge_px``
rows and columns); the interior is the rest. For each component C and each region R in
(``edge``, ``interior``), over all maps and the region's pixels:

* ``calib/z_mean_R_C``: mean of z;
* ``calib/z_std_R_C``: standard deviation of z (about its own mean, as ``calib/z_std_C``);
* ``calib/cov68_R_C``, ``calib/cov95_R_C``: fraction of pixels with ``|z| < 1``, ``< 2``.

The ideals are those of the whole-patch metrics (0, 1, 0.6827, 0.9545; metric_contract).
"""

from __future__ import annotations

import numpy as np

from skymoments.calibration.metrics import COMPONENTS, SIGMA_LEVELS, zscores

__all__ = ["EDGE_STEMS", "REGIONS", "edge_calibration", "edge_mask"]

REGIONS = ("edge", "interior")
# Logged as calib/<stem>_<region>_<C>.
EDGE_STEMS = ("z_mean", "z_std", "cov68", "cov95")


def edge_mask(npix: int, edge_px: int) -> np.ndarray:
    """Boolean (npix, npix) mask, True within ``edge_px`` pixels of a side.

    Raises
    ------
    ValueError
        Unless ``1 <= edge_px`` and ``2 * edge_px < npix`` (an interior must be left).
    """
    if isinstance(edge_px, bool) or not isinstance(edge_px, int | np.integer):
        raise ValueError(f"edge_px must be an integer number of pixels, got {edge_px!r}")
    if edge_px < 1 or 2 * edge_px >= npix:
        raise ValueError(
            f"edge_px={edge_px} must be >= 1 and leave an interior on a {npix}-pixel patch "
            f"(2 * edge_px < {npix})"
        )
    idx = np.arange(npix)
    near = (idx < edge_px) | (idx >= npix - edge_px)
    return near[:, None] | near[None, :]


def edge_calibration(truth_eb, mean_eb, std_eb, edge_px: int = 4) -> dict[str, float]:
    """z mean, z std, cov68 and cov95 per component in the edge band and the interior.

    Parameters
    ----------
    truth_eb, mean_eb, std_eb : ndarray or torch.Tensor, shape (n, 2, npix, npix), uK
        Truth, posterior mean and posterior std (> 0), channels (E, B).
    edge_px : int
        Width of the edge band in pixels.

    Returns
    -------
    dict
        ``calib/<stem>_<region>_<C>`` for stem in :data:`EDGE_STEMS`, region in
        :data:`REGIONS`, C in (E, B) (module docstring).
    """
    z = zscores(truth_eb, mean_eb, std_eb)
    edge = edge_mask(z.shape[-1], edge_px)
    out: dict[str, float] = {}
    for i, c in enumerate(COMPONENTS):
        for region, mask in zip(REGIONS, (edge, ~edge), strict=True):
            zr = z[:, i][:, mask].ravel()
            out[f"calib/z_mean_{region}_{c}"] = float(np.mean(zr))
            out[f"calib/z_std_{region}_{c}"] = float(np.std(zr))
            for k in ("cov68", "cov95"):
                out[f"calib/{k}_{region}_{c}"] = float(np.mean(np.abs(zr) < SIGMA_LEVELS[k]))
    return out
