"""Judge a trained posterior on fresh draws of a scenario and log the report into a run."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from omegaconf import DictConfig

from skymoments.metric_contract import SUMMARY_KEYS as CONTRACT_SUMMARY_KEYS
from skymoments.study.baselines import baselines

# Metrics shown in the end-of-run summary table (the metric contract's).
SUMMARY_KEYS = CONTRACT_SUMMARY_KEYS


def evaluate_and_log(
    cfg: DictConfig,
    run,
    model,
    scenario,
    image: np.ndarray,
    out: Path,
    rng,
    n: int,
    *,
    extra_metrics=None,
    header=None,
) -> dict[str, float]:
    """Evaluate ``model`` on ``n`` fresh draws of ``scenario`` and log it all into ``run``.

    Shared by ``run`` and ``evaluate``: the calibration report (metrics, figures,
    ``calibration/arrays.npz``) against the Wiener baseline built from the training
    ``image`` (shape (2, npix, npix), uK) and, for an all-Gaussian fixed scenario, the exact
    posterior; the posterior maps as ``maps/posterior.npz`` and ``.fits``. ``out`` is the
    local folder the files are written to first; ``header`` adds provenance to the posterior
    files. Returns the report's metrics.
    """
    from skymoments.calibration.report import evaluate_posterior, write_posterior
    from skymoments.moments.pipeline import predict_moments

    patch = scenario.patch
    test = scenario.draw_components(rng, int(n))
    mean, std = predict_moments(model, test["data_qu"])
    wiener, exact = baselines(cfg, scenario, image) if cfg.eval.wiener else (None, None)
    report = evaluate_posterior(
        test["signal_eb"],
        test["data_qu"],
        mean,
        std,
        patch,
        foreground_qu=test["foreground_qu"],
        wiener=wiener,
        exact=exact,
        n_fg_bins=int(cfg.eval.fg_bins),
    )
    run.log_metrics({**report.metrics, **(extra_metrics or {})})
    run.log_artifact(
        str(save_arrays(out / "arrays.npz", report.arrays, test["signal_eb"], mean, std)),
        artifact_path="calibration",
    )
    for path, fig in report.figures.items():
        run.log_figure(fig, path)
    header = {"RUNID": run.run_id, "NAME": str(cfg.name), "SEED": int(cfg.seed), **(header or {})}
    for written in write_posterior(out / "posterior", mean, std, patch, header=header):
        run.log_artifact(str(written), artifact_path="maps")
    return report.metrics


def save_arrays(path: Path, arrays: dict, truth, mean, std) -> Path:
    """The report's curves plus z histograms, for ``compare`` to overlay across runs.

    Written as ``calibration/arrays.npz``: ``coverage_levels``, ``coverage_E``/``_B``,
    ``z_hist_edges`` and ``z_hist_E``/``_B`` (densities), and every other report array.
    """
    from skymoments.atomic import save_npz

    z = (np.asarray(truth) - mean) / std
    edges = np.linspace(-5.0, 5.0, 51)
    extra = {"z_hist_edges": edges}
    for i, c in enumerate("EB"):
        extra[f"z_hist_{c}"] = np.histogram(z[:, i], bins=edges, density=True)[0]
    plain = {k: np.asarray(v) for k, v in arrays.items() if np.asarray(v).dtype != object}
    return save_npz(path, **plain, **extra)
