"""``skymoments run``: one tracked study — train both stages, evaluate calibration, log it all."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
from omegaconf import DictConfig, OmegaConf

from skymoments.commands._entry import hydra_task
from skymoments.config import validate

# Metrics shown in the end-of-run summary table.
SUMMARY_KEYS = (
    "calib/z_mean_E",
    "calib/z_std_E",
    "calib/cov68_E",
    "calib/cov95_E",
    "calib/z_mean_B",
    "calib/z_std_B",
    "calib/cov68_B",
    "calib/cov95_B",
    "eval/mse_E",
    "eval/mse_B",
    "eval/mse_ratio_wiener_E",
    "eval/mse_ratio_wiener_B",
    "eval/mse_ratio_exact_E",
    "eval/mse_ratio_exact_B",
    "eval/var_ratio_exact_E",
    "eval/var_ratio_exact_B",
)


def job_dir() -> Path:
    """The Hydra job's output folder (the current folder outside a Hydra app)."""
    from hydra.core.hydra_config import HydraConfig

    if HydraConfig.initialized():
        return Path(HydraConfig.get().runtime.output_dir)
    return Path.cwd()


def training_foreground(cfg: DictConfig, image: np.ndarray, run):
    """The training foreground as ``augment`` selects; None means the generator itself.

    ``single_image``: the one training image, enlarged into a WPH bank when
    ``augment.bank`` (built or reused by :func:`skymoments.synthesis.pipeline.run_synthesis`,
    its quality metrics logged into this run), rotated and flipped when ``augment.symmetries``.
    """
    from skymoments.sky.foregrounds import ImageBank

    aug = cfg.augment
    if aug.source == "generator":
        return None
    if aug.source != "single_image":
        raise ValueError(f"augment.source={aug.source!r}; choose single_image or generator")
    images = image[None]
    if aug.bank:
        from skymoments.synthesis.pipeline import log_bank, progress_bar, run_synthesis

        t0 = time.perf_counter()
        with progress_bar(int(cfg.synthesis.max_iter)) as progress:
            out = run_synthesis(cfg, progress=progress)
        run.log_metrics({"perf/bank_s": time.perf_counter() - t0})
        log_bank(run, out)
        images = np.concatenate([images, out["images"]], axis=0)
    return ImageBank(images, symmetries=bool(aug.symmetries))


def training_config(cfg: DictConfig) -> DictConfig:
    """The config of the training scenario: foreground amplitude fixed unless rescaled."""
    if cfg.augment.get("amplitude_rescale", True):
        return cfg
    out = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    out.prior.a_fg = {"dist": "fixed", "value": 1.0}
    return out


def baselines(cfg: DictConfig, scenario, image: np.ndarray):
    """The Gaussian-foreground Wiener filter, and the exact posterior where one exists."""
    from skymoments.calibration.wiener import WienerFilter, estimate_power_2d_from_image

    patch = scenario.patch
    s_ee, s_bb = scenario.mean_signal_power_2d()
    a2 = scenario.prior_second_moment("a_fg")
    noise2d = scenario.mean_noise_power_2d()
    fg_ee, fg_bb = estimate_power_2d_from_image(image, patch)
    # Noise powers are referred to the sky (divided by B_ell^2), so the filters take the beam.
    beam = scenario.beam_2d
    wiener = WienerFilter(
        patch, s_ee, s_bb, a2 * fg_ee + noise2d, a2 * fg_bb + noise2d, beam_2d=beam
    )
    exact = None
    if scenario.is_gaussian_fixed():
        t_ee, t_bb = scenario.true_noise_power_2d()
        exact = WienerFilter(patch, s_ee, s_bb, t_ee, t_bb, beam_2d=beam)
    return wiener, exact


def run_study(cfg: DictConfig, run) -> dict[str, float]:
    """Train, evaluate and log one study into the open tracked ``run``; return its metrics."""
    from skymoments.moments.pipeline import train_moments
    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.seeds import streams
    from skymoments.synthesis.pipeline import training_image
    from skymoments.tracking import global_rank

    out = job_dir()
    val_scenario = scenario_from_config(cfg)
    image, _, _ = training_image(cfg)
    fg = training_foreground(cfg, image, run)
    train_scenario = scenario_from_config(training_config(cfg), foreground=fg)

    result = train_moments(
        cfg,
        train_scenario,
        val_scenario,
        logger=run.lightning_logger(),
        workdir=out / "checkpoints",
    )
    if global_rank() != 0:
        # Under DDP only rank zero evaluates and logs (the other ranks hold no MLflow run).
        return {}
    run.log_metrics({k: float(v) for k, v in result.perf.items()})

    # Calibration is judged on a fresh set of independent generator draws: neither trained
    # on nor used for early stopping.
    rng = streams(int(cfg.seed), "eval")["eval"]
    metrics = evaluate_and_log(
        cfg,
        run,
        result.model,
        val_scenario,
        image,
        out,
        rng,
        int(cfg.train.n_val),
        extra_metrics=result.metrics,
    )
    run.log_model(result.model, name="model", registered_name=cfg.tracking.get("register_as"))
    return metrics


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


@hydra_task
def main(cfg: DictConfig) -> float | None:
    from skymoments.tracking import print_run_summary, run_job_safely, tracked_run

    def job(cfg: DictConfig) -> float:
        validate(cfg, command="run")
        with tracked_run(cfg, run_name=str(cfg.name)) as run:
            run.log_config(cfg)
            metrics = run_study(cfg, run)
            print_run_summary(run, metrics, keys=SUMMARY_KEYS)
        return objective(cfg, metrics)

    return run_job_safely(job, cfg, failed_value=float("nan"))


def objective(cfg: DictConfig, metrics: dict[str, float]) -> float:
    """The scalar a sweeper minimizes (``hparams_search`` picks it; default eval/mse_B).

    ``calibration_score`` is ``calib/score``: the mean over E and B of
    ``|z_mean| + |z_std - 1| + mean coverage error`` (``calibration.metrics.component_score``).
    """
    key = cfg.get("objective", "eval/mse_B")
    if key == "calibration_score":
        key = "calib/score"
    return float(metrics.get(key, float("nan")))
