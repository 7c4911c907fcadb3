"""One study: train both stages on the training foreground, then evaluate and log it."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
from omegaconf import DictConfig, OmegaConf

from skymoments.study.evaluation import SETS_NOTE, evaluate_and_log, evaluate_validation
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
    # Synthesized maps and draws of the generator are periodic; a given image is taken as
    # periodic when its synthesis treats it so.
    periodic = not cfg.synthesis.get("image") or cfg.synthesis.get("boundary") == "periodic"
    return ImageBank(
        images,
        symmetries=bool(aug.symmetries),
        translations=bool(aug.get("translations", False)),
        periodic=bool(periodic),
    )


def check_split(cfg: DictConfig) -> None:
    """Refuse, before any synthesis, a bank too small for ``augment.var_images``."""
    aug = cfg.augment
    n_var = int(aug.get("var_images", 0) or 0)
    if aug.source == "generator" or n_var == 0:
        return
    n_bank = 1 + (int(cfg.synthesis.n_images) if aug.get("bank") else 0)
    if n_bank < n_var + 1:
        raise ValueError(
            f"augment.var_images={n_var} needs a bank of at least {n_var + 1} images (the "
            f"training image + synthesis.n_images >= {n_var}), but it holds {n_bank}; raise "
            "synthesis.n_images or lower augment.var_images (0 shares the bank)"
        )


def split_for_stages(cfg: DictConfig, fg, run):
    """The mean stage's and the variance stage's foregrounds: disjoint parts of a bank.

    ``augment.var_images`` images (the last of the bank, never the training image itself)
    go to the variance stage, the rest to the mean stage, so that the variance stage learns
    from residuals on foregrounds the mean network never fitted; 0 shares the whole bank.
    The split is recorded as the run param ``augment.split`` (``mean:<M1>,var:<M2>``).
    """
    n_var = int(cfg.augment.get("var_images", 0) or 0)
    if fg is None or n_var == 0:
        run.log_params({"augment.split": "shared"})
        return fg, None
    mean_fg, var_fg = fg.split(n_var, what="the training bank (image + syntheses)")
    run.log_params({"augment.split": f"mean:{len(mean_fg)},var:{len(var_fg)}"})
    return mean_fg, var_fg


def training_config(cfg: DictConfig) -> DictConfig:
    """The config of the training scenario: foreground amplitude fixed unless rescaled."""
    if cfg.augment.get("amplitude_rescale", True):
        return cfg
    out = OmegaConf.create(OmegaConf.to_container(cfg, resolve=True))
    out.prior.a_fg = {"dist": "fixed", "value": 1.0}
    return out


def run_study(cfg: DictConfig, run, resume_from=None) -> dict[str, float]:
    """Train, evaluate and log one study into the open tracked ``run``; return its metrics.

    ``resume_from``: a stopped run's job folder whose stage checkpoints this run continues
    (``train_moments(resume_from=<job>/checkpoints)``).
    """
    from skymoments.moments.pipeline import train_moments
    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.seeds import streams
    from skymoments.sky.training_image import training_image
    from skymoments.tracking import global_rank

    out = job_dir()
    val_scenario = scenario_from_config(cfg)
    image, _, _ = training_image(cfg)
    check_split(cfg)
    fg, var_fg = split_for_stages(cfg, training_foreground(cfg, image, run), run)
    train_scenario = scenario_from_config(training_config(cfg), foreground=fg)
    var_train_scenario = (
        None
        if var_fg is None
        else scenario_from_config(training_config(cfg), foreground=var_fg, cmb=train_scenario.cmb)
    )

    result = train_moments(
        cfg,
        train_scenario,
        val_scenario,
        logger=run.lightning_logger(),
        workdir=out / "checkpoints",
        var_train_scenario=var_train_scenario,
        resume_from=None if resume_from is None else Path(resume_from) / "checkpoints",
    )
    if global_rank() != 0:
        # Under DDP only rank zero evaluates and logs (the other ranks hold no MLflow run).
        return {}
    run.log_metrics({k: float(v) for k, v in result.perf.items()})
    valid = evaluate_validation(cfg, run, result, val_scenario, image)

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
    print(f"figures: {SETS_NOTE}")
    run.log_params({"eval.sets": SETS_NOTE})
    metrics = {**valid, **result.metrics, **metrics}
    run.log_model(result.model, name="model", registered_name=cfg.tracking.get("register_as"))
    return metrics


def objective(cfg: DictConfig, metrics: dict[str, float]) -> float:
    """The scalar a sweeper minimizes (``hparams_search`` picks it; default eval/mse_B).

    Always read on the validation set (``valid/<objective>``), never on the test set whose
    figures are reported. A metric name or ``calibration_score`` (the mean over E and B of
    ``|z_mean| + |z_std - 1| + mean coverage error``, a diagnostic without a sharpness term;
    ``calib/crps`` is the proper score), resolved by the metric contract as ``compare``
    resolves it (:func:`skymoments.metric_contract.objective_value`); NaN, a failed trial to
    the sweeper, when the run lacks it.
    """
    from skymoments.metric_contract import objective_value

    name = str(cfg.get("objective", "eval/mse_B")).removeprefix("valid/")
    value = objective_value(name, metrics, prefix="valid/")
    return float("nan") if value is None else value
