"""``skymoments synthesize``: enlarge one training foreground image into an on-disk bank.

    skymoments synthesize synthesis.image=dust_qu.npy synthesis.n_images=32 synthesis.out=DIR

writes ``DIR/bank-<key>.npz`` (array ``images``, shape (M, 2, n, n)) and its ``.json``
metadata, reusing an existing bank for the same image, settings, M and seed. The run is
tracked in MLflow: the settings as params, the ``synth/...`` quality metrics (against the
training image and, when the image is a draw of ``sky.foreground``, against independent
draws of it), ``perf/synthesis_s_per_image``, and a PNG mosaic of the target beside
syntheses.
"""

from __future__ import annotations

from omegaconf import DictConfig

from skymoments.commands._entry import hydra_task
from skymoments.config import ConfigError, validate


@hydra_task
def main(cfg: DictConfig) -> None:
    """Hydra task of ``skymoments synthesize``."""
    from rich.console import Console

    from skymoments.sky.training_image import training_image
    from skymoments.synthesis.pipeline import flat_settings, log_bank, progress_bar, run_synthesis
    from skymoments.tracking import tracked_run

    validate(cfg, command="synthesis")
    # Read and check the training image before a run exists: a bad file is one line
    # (exit 2) and leaves no FAILED run behind.
    try:
        training_image(cfg)
    except ValueError as err:
        raise ConfigError(str(err)) from err
    console = Console(stderr=True)
    with tracked_run(cfg, run_name="synthesize") as run:
        run.log_config(cfg)
        run.log_params(flat_settings(cfg))
        with progress_bar(int(cfg.synthesis.max_iter), console) as progress:
            out = run_synthesis(cfg, progress=progress)
        log_bank(run, out)
        meta = out["metadata"]
        state = "reused" if meta["reused"] else f"built in {meta['seconds']:.1f} s"
        console.print(f"bank {out['path']} ({out['images'].shape}, {state}); run {run.run_id}")
        for k in sorted(out["metrics"]):
            console.print(f"  {k} = {out['metrics'][k]:.4g}")
