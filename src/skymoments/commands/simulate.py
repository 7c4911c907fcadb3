"""``skymoments simulate``: draw samples of a scenario into an .npz, a PNG and a summary."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from omegaconf import DictConfig

from skymoments.atomic import save_npz
from skymoments.commands._entry import hydra_task
from skymoments.config import validate

# Multipoles at which the summary quotes the foreground-to-signal power ratio.
SUMMARY_ELLS = (200, 500, 1000, 2000)


def _output_dir(cfg: DictConfig) -> Path:
    if cfg.get("out"):
        return Path(str(cfg.out)).expanduser().resolve()
    from hydra.core.hydra_config import HydraConfig

    if HydraConfig.initialized():
        return Path(HydraConfig.get().runtime.output_dir)
    return Path.cwd()


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


def print_summary(parts: dict[str, np.ndarray], patch, npz_path: Path, png_path: Path) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console()
    table = Table(
        title=f"{len(parts['data_qu'])} samples on a {patch.npix}x{patch.npix} patch "
        f"of {patch.pixel_arcmin:g} arcmin",
        title_justify="left",
    )
    table.add_column("component")
    table.add_column("rms ch0 [uK]", justify="right")
    table.add_column("rms ch1 [uK]", justify="right")
    for key in ("signal_qu", "signal_eb", "foreground_qu", "noise_qu", "data_qu"):
        rms = np.sqrt(np.mean(parts[key] ** 2, axis=(0, 2, 3)))
        table.add_row(key, f"{rms[0]:.3g}", f"{rms[1]:.3g}")
    console.print(table)
    ratios = Table(title="foreground / signal power", title_justify="left", min_width=40)
    ratios.add_column("ell", justify="right")
    ratios.add_column("EE", justify="right")
    ratios.add_column("BB", justify="right")
    for ell, ee, bb in power_ratio_rows(parts, patch):
        ratios.add_row(str(ell), f"{ee:.3g}", f"{bb:.3g}")
    console.print(ratios)
    names = ", ".join(str(n) for n in parts["param_names"])
    console.print(f"params ({names}): mean {np.round(parts['params'].mean(axis=0), 4).tolist()}")
    console.print(f"wrote {npz_path}\nwrote {png_path}")


@hydra_task
def main(cfg: DictConfig) -> None:
    validate(cfg)
    parts = simulate(cfg)
    from skymoments.maps import FlatPatch

    patch = FlatPatch(int(cfg.patch.npix), float(cfg.patch.pixel_arcmin))
    out = _output_dir(cfg)
    npz_path = save_npz(out / "simulation.npz", **parts)
    png_path = out / "simulation.png"
    fig = quicklook_figure(parts)
    from skymoments.atomic import atomic_path

    with atomic_path(png_path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    print_summary(parts, patch, npz_path, png_path)
