"""``skymoments predict``: apply a tracked model to a map; refuse bad input before compute."""

from __future__ import annotations

import logging
import sys

from omegaconf import DictConfig

from skymoments.commands._entry import hydra_task
from skymoments.config import validate

# Exit status of an expected refusal (bad input, geometry mismatch, existing output).
EXIT_REFUSED = 2


def _job_dir():
    from hydra.core.hydra_config import HydraConfig

    if HydraConfig.initialized():
        return HydraConfig.get().runtime.output_dir
    return None


def print_summary(result) -> None:
    """A short table: patches, posterior amplitudes, files written, tracking run."""
    import numpy as np
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    console = Console()
    p = result.patch
    src = result.source
    title = (
        f"{len(result.mean_eb)} patch(es) of {p.npix}x{p.npix} x {p.pixel_arcmin:g} arcmin, "
        f"model {src.uri}" + (f" (version {src.version})" if src.version else "")
    )
    table = Table(title=title, title_justify="left")
    table.add_column("")
    # Brackets are rich markup: escape the unit.
    table.add_column(escape("E [uK]"), justify="right")
    table.add_column(escape("B [uK]"), justify="right")
    rms = np.sqrt(np.mean(result.mean_eb**2, axis=(0, 2, 3)))
    med = np.median(result.std_eb, axis=(0, 2, 3))
    table.add_row("rms of the posterior mean", f"{rms[0]:.4g}", f"{rms[1]:.4g}")
    table.add_row("median posterior std", f"{med[0]:.4g}", f"{med[1]:.4g}")
    flagged = result.provenance.get("out_of_range_patches")
    if flagged is not None:
        # From the data alone: patches outside the training inputs' range (flag per patch
        # in the npz/FITS outputs); their error bars are an extrapolation.
        n = len(result.mean_eb)
        margin = result.provenance.get("out_of_range_margin", 0.0)
        table.add_row(
            f"patches beyond the training range (score > {margin:g})", f"{flagged} of {n}", ""
        )
    console.print(table)
    for path in result.paths.values():
        console.print(f"wrote {path}")
    if result.prediction_run_id:
        console.print(f"logged as MLflow run {result.prediction_run_id}")


@hydra_task
def main(cfg: DictConfig) -> None:
    from skymoments.tracking import TrackingUnavailableError

    # healpy reports every smoothing it does at INFO, which Hydra's logging would print.
    logging.getLogger("healpy").setLevel(logging.WARNING)

    try:
        validate(cfg, command="predict")
        from skymoments.predict.pipeline import run_prediction

        result = run_prediction(cfg, default_out=_job_dir())
    except (ValueError, TrackingUnavailableError) as exc:
        # Expected refusals: the message names the problem and the fix; no traceback.
        print(f"skymoments predict: {exc}", file=sys.stderr)
        sys.exit(EXIT_REFUSED)
    print_summary(result)
