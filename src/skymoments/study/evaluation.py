"""Judge a trained posterior on fresh draws of a scenario and log the report into a run.

Three independent sets, each from its own seed stream (``skymoments.sky.seeds``):
training draws (stream ``train``); the validation set (stream ``val``: early stopping,
checkpoint choice, the sweep objective, ``compare`` ranking), whose figures are logged
under ``valid/``; and the test set (stream ``eval``), whose figures are the reported
``calib/*`` and ``eval/*`` and choose nothing.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from omegaconf import DictConfig

from skymoments.metric_contract import SUMMARY_KEYS as CONTRACT_SUMMARY_KEYS
from skymoments.study.baselines import baselines

# Metrics shown in the end-of-run summary table (the metric contract's).
SUMMARY_KEYS = CONTRACT_SUMMARY_KEYS

# Prefix of the validation set's figures; the test set's carry none.
VALID_PREFIX = "valid/"
SETS_NOTE = (
    "calib/* and eval/*: the test set (stream eval), which chose nothing; valid/*: the "
    "validation set (stream val) of early stopping, checkpoint choice and the objective"
)


def patch_flags(model, data_qu):
    """Per-patch out-of-range ``(flag, score)`` from the data alone, or (None, None).

    From the model's recorded training-input range (``model.input_range``); a model
    trained before it was recorded has none.
    """
    method = getattr(model, "out_of_range", None)
    return method(data_qu) if method is not None else (None, None)


def evaluate_validation(cfg: DictConfig, run, result, scenario, image: np.ndarray) -> dict:
    """Figures of the validation set (``valid/...``) from a training result; logged.

    The validation set is the one early stopping and checkpoint choice already used
    (``result.val_*``, stream ``val``); numbers only, no figures.
    """
    from skymoments.calibration.report import evaluate_posterior

    wiener, _ = baselines(cfg, scenario, image) if cfg.eval.wiener else (None, None)
    flagged, _ = patch_flags(result.model, result.val_data_qu)
    report = evaluate_posterior(
        result.val_target_eb,
        result.val_data_qu,
        result.mean_eb,
        result.std_eb,
        scenario.patch,
        wiener=wiener,
        prefix=VALID_PREFIX,
        make_figures=False,
        flagged=flagged,
    )
    run.log_metrics(report.metrics)
    return report.metrics


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
    from skymoments.calibration.edges import edge_calibration
    from skymoments.calibration.report import evaluate_posterior, write_posterior
    from skymoments.moments.pipeline import predict_moments

    patch = scenario.patch
    test = scenario.draw_components(rng, int(n))
    mean, std = predict_moments(model, test["data_qu"])
    flagged, score = patch_flags(model, test["data_qu"])
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
        flagged=flagged,
    )
    # The edge band and the interior apart (calib/z_std_edge_C, ...; calibration.edges).
    report.metrics.update(
        edge_calibration(test["signal_eb"], mean, std, int(cfg.eval.get("edge_px", 4)))
    )
    run.log_metrics({**report.metrics, **(extra_metrics or {})})
    run.log_artifact(
        str(save_arrays(out / "arrays.npz", report.arrays, test["signal_eb"], mean, std)),
        artifact_path="calibration",
    )
    for path, fig in report.figures.items():
        run.log_figure(fig, path)
    header = {"RUNID": run.run_id, "NAME": str(cfg.name), "SEED": int(cfg.seed), **(header or {})}
    written_files = write_posterior(
        out / "posterior", mean, std, patch, header=header, patch_flag=flagged, patch_score=score
    )
    for written in written_files:
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
