"""``skymoments simulate``: draw samples of a scenario into an .npz, a PNG and a summary."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from omegaconf import DictConfig

from skymoments.atomic import atomic_path, save_npz
from skymoments.commands._entry import hydra_task
from skymoments.config import validate


def _output_dir(cfg: DictConfig) -> Path:
    if cfg.get("out"):
        return Path(str(cfg.out)).expanduser().resolve()
    from skymoments.study.jobs import job_dir

    return job_dir()


def print_summary(parts: dict[str, np.ndarray], patch, npz_path: Path, png_path: Path) -> None:
    from rich.console import Console
    from rich.table import Table

    from skymoments.study.simulation import power_ratio_rows

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
    from skymoments.maps import FlatPatch
    from skymoments.study.simulation import quicklook_figure, simulate

    validate(cfg, command="simulate")
    parts = simulate(cfg)
    patch = FlatPatch(int(cfg.patch.npix), float(cfg.patch.pixel_arcmin))
    out = _output_dir(cfg)
    npz_path = save_npz(out / "simulation.npz", **parts)
    png_path = out / "simulation.png"
    fig = quicklook_figure(parts)
    with atomic_path(png_path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    print_summary(parts, patch, npz_path, png_path)
