"""Build (or reuse) the synthesis bank a config describes, and judge and log its quality.

Shared by ``skymoments synthesize`` and ``skymoments run`` (``augment.bank``), so that the
bank key and the ``synth/...`` metrics are the same in both; the training image itself is
:func:`skymoments.sky.training_image.training_image`.
"""

from __future__ import annotations

import contextlib
import time

import numpy as np
from omegaconf import DictConfig, OmegaConf

MOSAIC_COLUMNS = 4


def settings_from_config(node):
    """:class:`SynthesisSettings` from the ``synthesis`` config node (ValueError if bad)."""
    from skymoments.synthesis.synthesize import SynthesisSettings

    data = OmegaConf.to_container(node, resolve=True) if isinstance(node, DictConfig) else node
    return SynthesisSettings.from_mapping(data)


def mosaic_figure(target: np.ndarray, images: np.ndarray, columns: int = MOSAIC_COLUMNS):
    """Q and U of the target (first column) beside the first syntheses, one colour scale."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    k = min(columns, len(images))
    fig, axes = plt.subplots(2, k + 1, figsize=(2.2 * (k + 1), 4.6), squeeze=False)
    for row, name in enumerate(("Q", "U")):
        lim = float(np.max(np.abs(target[row])))
        panels = [("target", target[row])] + [(f"synth {i}", images[i, row]) for i in range(k)]
        for col, (title, m) in enumerate(panels):
            ax = axes[row, col]
            ax.imshow(m, origin="lower", cmap="RdBu_r", vmin=-lim, vmax=lim)
            ax.set_title(f"{title} {name}", fontsize=8)
            ax.set_xticks([])
            ax.set_yticks([])
    fig.tight_layout()
    return fig


def evaluate(target, images, patch, seed: int, truth=None) -> dict[str, float]:
    """The ``synth/...`` metrics, with the Gaussian surrogate, vs target and vs truth."""
    from skymoments.sky.seeds import stream
    from skymoments.synthesis.quality import gaussian_surrogate, quality_metrics

    gauss = gaussian_surrogate(target, len(images), stream(int(seed), "synthesis_surrogate"))
    metrics = quality_metrics(images, target, patch, surrogate=gauss, prefix="synth/")
    if truth is not None and len(truth):
        metrics.update(quality_metrics(images, truth, patch, gauss, prefix="synth/truth_"))
    return metrics


def run_synthesis(cfg: DictConfig, progress=None) -> dict:
    """Build (or reuse) the bank described by ``cfg`` and compute its quality metrics.

    Returns
    -------
    dict with ``path``, ``images``, ``metadata``, ``target``, ``metrics``, ``patch``.
    """
    import torch

    from skymoments.sky.training_image import training_image
    from skymoments.synthesis.bank import ensure_bank

    node = cfg.synthesis
    settings = settings_from_config(node)
    if node.get("threads"):
        torch.set_num_threads(int(node.threads))
    target, source, patch = training_image(cfg)
    seed = int(node.seed)
    path, images, meta = ensure_bank(
        target, settings, node.get("out"), seed=seed, progress=progress, source=source
    )
    truth = None
    n_truth = int(node.get("truth_draws") or 0)
    if not node.get("image") and n_truth > 0 and target.shape[-1] == patch.npix:
        from skymoments.sky.build import foreground_from_config
        from skymoments.sky.seeds import stream

        fg = foreground_from_config(cfg.sky.foreground)
        truth = fg.draw(patch, stream(int(cfg.seed), "synthesis_truth"), n_truth)
    metrics = {}
    if target.shape[0] == 2:
        metrics = evaluate(target, images, patch, seed, truth)
    metrics["perf/synthesis_s_per_image"] = float(meta["seconds_per_image"])
    metrics["synth/loss_mean"] = float(np.mean(meta["loss"]))
    return {
        "path": path,
        "images": images,
        "metadata": meta,
        "target": target,
        "metrics": metrics,
        "patch": patch,
    }


def flat_settings(cfg: DictConfig) -> dict:
    """The ``synthesis`` node as dotted params."""
    node = OmegaConf.to_container(cfg.synthesis, resolve=True)
    return {f"synthesis.{k}": v for k, v in node.items()}


@contextlib.contextmanager
def progress_bar(max_iter: int, console=None):
    """A rich progress bar with the loss; yields the callback :func:`run_synthesis` takes."""
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    console = console or Console(stderr=True)
    if not console.is_terminal:
        # A log file or pipe: one plain line per batch stage and every 50 iterations.
        yield _line_progress(console)
        return
    with Progress(
        TextColumn("[bold]synthesis[/] batch {task.fields[batch]}"),
        BarColumn(),
        TextColumn("iter {task.completed:.0f}/{task.total:.0f}"),
        TextColumn("loss {task.fields[loss]:.4g}"),
        TimeElapsedColumn(),
        console=console,
        transient=False,
    ) as bar:
        task = bar.add_task("synth", total=int(max_iter), batch="-", loss=0.0)

        def progress(info: dict) -> None:
            bar.update(
                task,
                completed=info["iteration"],
                total=info["max_iter"],
                batch=f"{min(info['batch'] + 1, info['n_batches'])}/{info['n_batches']}"
                + (" (half resolution)" if info.get("stage") == "coarse" else ""),
                loss=info["loss"],
            )

        yield progress


def _line_progress(console, every: int = 50):
    """The synthesis callback for output that is not a terminal: a plain line at times."""
    t0 = time.perf_counter()
    last = {"key": None}

    def progress(info: dict) -> None:
        if info.get("stage") == "done":
            # The closing call: the mean over every image, not another batch's line.
            console.print(
                f"synthesis done: {int(info['n_images'])} maps, mean loss "
                f"{float(info['loss']):.4g}, {time.perf_counter() - t0:.0f} s",
                highlight=False,
                soft_wrap=True,
            )
            return
        key = (info["batch"], info.get("stage"))
        it = int(info["iteration"])
        if key == last["key"] and it % every and it < int(info["max_iter"]):
            return
        last["key"] = key
        stage = " (half resolution)" if info.get("stage") == "coarse" else ""
        batch = f"{min(info['batch'] + 1, info['n_batches'])}/{info['n_batches']}"
        console.print(
            f"synthesis batch {batch}{stage}: iter {it}/{int(info['max_iter'])}, "
            f"loss {float(info['loss']):.4g}, {time.perf_counter() - t0:.0f} s",
            highlight=False,
            soft_wrap=True,
        )

    return progress


def log_bank(run, out: dict) -> None:
    """Log a bank's quality metrics, key, mosaic and metadata into a tracked run."""
    meta = out["metadata"]
    run.log_metrics(out["metrics"])
    run.log_params({"synthesis.bank_key": meta["key"], "synthesis.reused": meta["reused"]})
    run.log_figure(mosaic_figure(out["target"], out["images"]), "plots/synthesis_mosaic.png")
    run.log_artifact(out["path"].with_suffix(".json"), artifact_path="bank")
