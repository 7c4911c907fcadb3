"""One study: train both stages on the training foreground, then evaluate and log it."""

from __future__ import annotations

import time

import numpy as np
from omegaconf import DictConfig, OmegaConf

from skymoments.study.evaluation import evaluate_and_log
from skymoments.study.jobs import job_dir


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


def run_study(cfg: DictConfig, run) -> dict[str, float]:
    """Train, evaluate and log one study into the open tracked ``run``; return its metrics."""
    from skymoments.moments.pipeline import train_moments
    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.seeds import streams
    from skymoments.sky.training_image import training_image
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


def objective(cfg: DictConfig, metrics: dict[str, float]) -> float:
    """The scalar a sweeper minimizes (``hparams_search`` picks it; default eval/mse_B).

    ``calibration_score`` is ``calib/score``: the mean over E and B of
    ``|z_mean| + |z_std - 1| + mean coverage error`` (``calibration.metrics.component_score``).
    """
    key = cfg.get("objective", "eval/mse_B")
    if key == "calibration_score":
        key = "calib/score"
    return float(metrics.get(key, float("nan")))
