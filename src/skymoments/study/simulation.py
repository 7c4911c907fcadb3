"""Samples of a scenario for ``skymoments simulate``: draws, power ratios, a quick look."""

from __future__ import annotations

import numpy as np
from omegaconf import DictConfig

# Multipoles at which the summary quotes the foreground-to-signal power ratio.
SUMMARY_ELLS = (200, 500, 1000, 2000)


def simulate(cfg: DictConfig) -> dict[str, np.ndarray]:
    """Draw ``cfg.n`` samples of the configured scenario (seeded by ``cfg.seed``)."""
    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.seeds import streams

    if not (isinstance(cfg.n, int) and cfg.n > 0):
        raise ValueError(f"n must be a positive integer number of samples, got {cfg.n!r}")
    scenario = scenario_from_config(cfg)
    rng = streams(int(cfg.seed), "simulate")["simulate"]
    parts = scenario.draw_components(rng, int(cfg.n))
    parts["param_names"] = np.array(scenario.param_names)
    parts["npix"] = np.array(scenario.patch.npix)
    parts["pixel_arcmin"] = np.array(scenario.patch.pixel_arcmin)
    return parts


def power_ratio_rows(parts: dict[str, np.ndarray], patch) -> list[tuple[int, float, float]]:
    """Foreground-to-signal EE and BB power ratios near each of ``SUMMARY_ELLS``."""
    from skymoments.maps.spectra import eb_spectra

    sig = eb_spectra(parts["signal_qu"], patch)
    fg = eb_spectra(parts["foreground_qu"], patch)
    rows = []
    for ell in SUMMARY_ELLS:
        if ell > patch.ell_nyquist:
            continue
        i = int(np.nanargmin(np.abs(sig["ell"] - ell)))
        ee = np.mean(fg["EE"][:, i]) / np.mean(sig["EE"][:, i])
        bb = np.mean(fg["BB"][:, i]) / np.mean(sig["BB"][:, i])
        rows.append((int(round(sig["ell"][i])), float(ee), float(bb)))
    return rows


def quicklook_figure(parts: dict[str, np.ndarray], max_rows: int = 3):
    """A grid of the first samples: signal E/B, foreground Q/U, noise Q, data Q/U."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    cols = [
        ("signal E", parts["signal_eb"][:, 0]),
        ("signal B", parts["signal_eb"][:, 1]),
        ("foreground Q", parts["foreground_qu"][:, 0]),
        ("foreground U", parts["foreground_qu"][:, 1]),
        ("noise Q", parts["noise_qu"][:, 0]),
        ("data Q", parts["data_qu"][:, 0]),
        ("data U", parts["data_qu"][:, 1]),
    ]
    rows = min(max_rows, len(parts["data_qu"]))
    fig, axes = plt.subplots(
        rows, len(cols), figsize=(2.1 * len(cols), 2.1 * rows + 0.4), squeeze=False
    )
    for r in range(rows):
        for c, (title, maps) in enumerate(cols):
            ax = axes[r, c]
            m = maps[r]
            lim = float(np.max(np.abs(m))) or 1.0
            im = ax.imshow(m, origin="lower", cmap="RdBu_r", vmin=-lim, vmax=lim)
            ax.set_xticks([])
            ax.set_yticks([])
            if r == 0:
                ax.set_title(f"{title} [uK]", fontsize=8)
            fig.colorbar(im, ax=ax, fraction=0.046, pad=0.02).ax.tick_params(labelsize=6)
    fig.tight_layout()
    return fig
