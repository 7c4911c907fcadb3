"""Train both stages from a config and predict posterior moments.

``train_moments`` fits the scalers on training draws, trains the mean network (stage one),
restores its best weights, freezes it, trains the variance network (stage two), restores
its best weights, and predicts on the fixed validation set.
"""

from __future__ import annotations

import sys
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import lightning.pytorch as pl
import numpy as np
import torch
from hydra.utils import instantiate
from lightning.pytorch.callbacks import EarlyStopping, TQDMProgressBar
from omegaconf import DictConfig, OmegaConf

from skymoments.moments.data import MomentsDataModule, stream_generator
from skymoments.moments.distributed import with_job_ddp
from skymoments.moments.perf import DataWaitTimer, network_step, resolve_parallelism
from skymoments.moments.recalibration import recalibrate
from skymoments.moments.resume import (
    DONE,
    LAST,
    StageCheckpoint,
    adopt,
    finished_stage,
    stage_folder,
    write_record,
)
from skymoments.moments.stages import MeanModule, VarianceModule
from skymoments.nets import ChannelScaler, PosteriorMoments, build_network
from skymoments.sky.seeds import torch_seed

# Trainer arguments the pipeline sets itself, from cfg.train or per stage.
RESERVED_TRAINER_KEYS = (
    "max_epochs",
    "callbacks",
    "logger",
    "default_root_dir",
    "gradient_clip_val",
)


class StageProgressBar(TQDMProgressBar):
    """Progress of a stage: a tqdm bar naming it (``stage 1/2 mean, epoch 3``) on a terminal;
    where the output is not a terminal (a log file, CI), no bar but one line per epoch:
    ``stage 1/2 mean, epoch 3/20: train/loss_mean=0.41, val/loss_mean=0.43, 52 s``."""

    def __init__(self, label: str, stream=None) -> None:
        super().__init__()
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        self.plain = not (hasattr(self.stream, "isatty") and self.stream.isatty())
        if self.plain:
            self.disable()
        self._t0 = time.perf_counter()

    def on_train_start(self, trainer, *args) -> None:
        super().on_train_start(trainer, *args)
        self._t0 = time.perf_counter()

    def on_train_epoch_start(self, trainer, *args) -> None:
        super().on_train_epoch_start(trainer, *args)
        if not self.plain:
            self.train_progress_bar.set_description(f"{self.label}, epoch {trainer.current_epoch}")

    def on_train_epoch_end(self, trainer, pl_module) -> None:
        super().on_train_epoch_end(trainer, pl_module)
        if not self.plain or not trainer.is_global_zero:
            return
        metrics = {
            k: float(v)
            for k, v in trainer.callback_metrics.items()
            if k.startswith(("train/", "val/")) and getattr(v, "numel", lambda: 1)() == 1
        }
        parts = [f"{k}={v:.4g}" for k, v in sorted(metrics.items())]
        parts.append(f"{time.perf_counter() - self._t0:.0f} s")
        print(
            f"{self.label}, epoch {trainer.current_epoch + 1}/{trainer.max_epochs}: "
            + ", ".join(parts),
            file=self.stream,
            flush=True,
        )


@dataclass
class MomentsResult:
    """What :func:`train_moments` returns.

    Attributes
    ----------
    model : PosteriorMoments
        On the CPU, in eval mode; Q/U in uK to (mean, variance) of E/B.
    val_data_qu : ndarray, shape (n_val, 2, npix, npix), microkelvin
    val_target_eb : ndarray, shape (n_val, 2, npix, npix), microkelvin
    val_params : ndarray, shape (n_val, n_params)
    param_names : tuple of str
    mean_eb : ndarray, shape (n_val, 2, npix, npix), microkelvin
        Predicted posterior mean on the validation set.
    std_eb : ndarray, shape (n_val, 2, npix, npix), microkelvin
        Predicted posterior standard deviation on the validation set.
    perf : dict of str to float
        ``perf/train_samples_per_s``, ``perf/data_draw_share`` (both stages), the same per
        stage (suffix ``_mean``, ``_var``), ``perf/train_s_<stage>`` wall seconds and
        ``perf/epochs_<stage>``.
    metrics : dict of str to float
        ``val/loss_mean_best`` and ``val/loss_var_best``.
    checkpoints : dict of str to str
        Best checkpoint path of each stage.
    """

    model: PosteriorMoments
    val_data_qu: np.ndarray
    val_target_eb: np.ndarray
    val_params: np.ndarray
    param_names: tuple
    mean_eb: np.ndarray
    std_eb: np.ndarray
    perf: dict = field(default_factory=dict)
    metrics: dict = field(default_factory=dict)
    checkpoints: dict = field(default_factory=dict)


def _trainer_kwargs(cfg_trainer) -> dict:
    kwargs = instantiate(cfg_trainer, _convert_="all") if cfg_trainer is not None else {}
    kwargs = dict(kwargs or {})
    # strategy "ddp" relaunches the other ranks as this Hydra job (moments/distributed.py).
    kwargs = with_job_ddp(kwargs)
    for key in RESERVED_TRAINER_KEYS:
        if key in kwargs:
            raise ValueError(
                f"trainer.{key} is set by the pipeline; remove it from the trainer config "
                "(epochs: train.max_epochs_mean / train.max_epochs_var; clipping: "
                "train.gradient_clip_val)"
            )
    return kwargs


def scaler_draw(train_scenario, n: int, seed: int):
    """The ``n`` training draws the scalers and the input range are fitted on.

    Drawn from the ``scalers`` seed stream, so they do not reuse any training batch.
    """
    if isinstance(n, bool) or not isinstance(n, int) or n < 2:
        raise ValueError(f"train.fit_scalers_n must be an integer >= 2, got {n!r}")
    return train_scenario.draw(stream_generator(seed, "scalers"), n)


def fit_input_range(input_range, draw, scenarios, n, seed: int, chunk: int = 256) -> None:
    """Fit the out-of-range statistics on the scaler draw and ``n`` more training draws.

    The range is that of the training inputs: the networks see thousands of them, so a
    few hundred would flag as new what training showed (the maximum of ``N`` draws grows
    with ``N``). ``n`` more draws (``train.range_draws``; None or 0: the scaler draw alone)
    come from the ``range`` seed stream, in chunks, shared between the mean stage's and
    (when it has its own) the variance stage's training scenario; only their features are
    kept.
    """
    feats = [input_range.features(draw.data_qu)]
    scenarios = [s for s in scenarios if s is not None]
    n = int(n or 0)
    if n < 0:
        raise ValueError(f"train.range_draws must be >= 0, got {n}")
    rng = stream_generator(seed, "range")
    done = 0
    while done < n:
        k = min(chunk, n - done)
        scenario = scenarios[(done // chunk) % len(scenarios)]
        feats.append(input_range.features(scenario.draw(rng, k).data_qu))
        done += k
    input_range.fit_features(torch.cat(feats))


def fit_scalers(
    train_scenario, n: int, seed: int, draw=None
) -> tuple[ChannelScaler, ChannelScaler]:
    """Input (Q/U, centred) and target (E/B, zero shift) scalers from ``n`` training draws.

    Drawn from the ``scalers`` seed stream (:func:`scaler_draw`) unless ``draw`` is given.
    """
    if draw is None:
        draw = scaler_draw(train_scenario, n, seed)
    n_in = int(np.shape(draw.data_qu)[1])
    n_out = int(np.shape(draw.target_eb)[1])
    return (
        ChannelScaler(n_in, center=True).fit(draw.data_qu),
        ChannelScaler(n_out, center=False).fit(draw.target_eb),
    )


# Lowest variance floor relative to the ceiling: float32 resolves a scaled residual of O(1)
# to about 1e-7, so a variance of 1e-6 (std 1e-3) is still far above round-off while far
# below any posterior std a study reports.
MIN_FLOOR_FRACTION = 1e-6


def variance_bounds(scenario, target_scaler, cfg) -> tuple[np.ndarray, np.ndarray] | None:
    """Floor and ceiling of the log-variance head in scaled units, or None for no bounds.

    From the problem itself (:meth:`skymoments.sky.Scenario.target_variance_bounds`): the
    prior pixel variance of the target at the top of its prior as the ceiling, the
    noise-only posterior variance as the floor (at least ``MIN_FLOOR_FRACTION`` of the
    ceiling), each divided by the target scale squared. Only for ``model.positivity=logvar``
    with ``train.variance_bounds`` true, on a scenario that can give them.
    """
    if str(cfg.model.get("positivity", "softplus")) != "logvar":
        return None
    if not bool(cfg.train.get("variance_bounds", True)):
        return None
    bounds = getattr(scenario, "target_variance_bounds", None)
    if bounds is None:
        return None
    floor, ceiling = bounds()
    scale2 = target_scaler.scale.detach().double().reshape(-1).numpy() ** 2
    ceiling = np.asarray(ceiling) / scale2
    floor = np.maximum(np.asarray(floor) / scale2, MIN_FLOOR_FRACTION * ceiling)
    return floor, ceiling


def _check_variance_inputs(node, input_scaler, target_scaler, sees_mean: bool) -> None:
    want = input_scaler.n_channels + (target_scaler.n_channels if sees_mean else 0)
    got = node.get("in_channels") if hasattr(node, "get") else None
    if got is not None and int(got) != want:
        raise ValueError(
            f"model.variance.in_channels={got} but the variance network reads {want} channels "
            + (
                "(the data and the mean network's output, model.variance_sees_mean=true)"
                if sees_mean
                else "(the data; set model.variance_sees_mean=true to add the mean's output)"
            )
        )


def _fit_stage(
    module, dm, *, label, monitor, max_epochs, cfg, logger, callbacks, workdir, resume=None
):
    """Fit one stage with checkpointing and early stopping; restore the best weights.

    ``resume``: a stopped run's folder of this stage (:mod:`skymoments.moments.resume`): a
    stage it finished is not fitted again, one it interrupted goes on from its last epoch.
    """
    adopted = adopt(resume, workdir)
    if adopted == DONE:
        return finished_stage(module, workdir)
    ckpt = StageCheckpoint(
        dirpath=str(workdir),
        filename="best",
        monitor=monitor,
        mode="min",
        save_top_k=1,
        save_last=True,
        auto_insert_metric_name=False,
        enable_version_counter=False,
    )
    stop = EarlyStopping(monitor=monitor, mode="min", patience=int(cfg.train.patience))
    timer = DataWaitTimer()
    kwargs = _trainer_kwargs(cfg.get("trainer"))
    cbs = [ckpt, stop, timer, *callbacks]
    if kwargs.get("enable_progress_bar", True):
        cbs.append(StageProgressBar(label))
    trainer = pl.Trainer(
        max_epochs=int(max_epochs),
        callbacks=cbs,
        logger=logger if logger is not None else False,
        default_root_dir=str(workdir),
        gradient_clip_val=cfg.train.get("gradient_clip_val"),
        **kwargs,
    )
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        # The frozen mean network of stage two is in eval mode on purpose.
        warnings.filterwarnings("ignore", message=r".*module\(s\) in eval mode.*")
        # TrainDrawStream splits its steps over the workers itself, so its length is exact.
        warnings.filterwarnings("ignore", message=r".*`IterableDataset` has `__len__` defined.*")
        # A resumed stage's folder holds the stopped run's checkpoints on purpose.
        warnings.filterwarnings("ignore", message=r"Checkpoint directory .* exists and is not")
        resume_at = str(Path(workdir) / LAST) if adopted else None
        trainer.fit(module, datamodule=dm, ckpt_path=resume_at, weights_only=True)
    wall = time.perf_counter() - t0
    best = ckpt.best_model_path
    if best:
        state = torch.load(best, map_location="cpu", weights_only=True)["state_dict"]
        module.load_state_dict(state)
    best_score = float(ckpt.best_model_score) if ckpt.best_model_score is not None else float("nan")
    write_record(workdir, trainer.current_epoch, best_score, wall, timer)
    return {
        "timer": timer,
        "wall": wall,
        "epochs": trainer.current_epoch,
        "best_path": best,
        "best_score": best_score,
    }


def mean_network_node(node, scenario):
    """The mean network's config node, with ``zero_mean`` set for a periodic scenario.

    On a periodic patch (``patch.margin`` 0) the target E/B maps have no l = 0 mode
    (``maps/eb.py``), so the posterior mean has none: the mean network's output loses its
    spatial mean (:func:`skymoments.nets.layers.remove_spatial_mean`), in training and
    prediction alike. A cut-out's E/B has a mean of its own, so there it is kept. A
    ``zero_mean`` already in the node (``+model.mean.zero_mean=false``) is left as given.
    The key lands in the stored architecture, so a reloaded model does the same.
    """
    if "zero_mean" in node:
        return node
    plain = OmegaConf.to_container(node, resolve=True)
    # A scenario without a margin (the tests' toy scenarios) draws periodic maps.
    periodic = int(getattr(scenario, "margin", 0)) == 0
    return OmegaConf.create({**plain, "zero_mean": periodic})


def train_moments(
    cfg: DictConfig,
    train_scenario,
    val_scenario,
    logger=None,
    callbacks=(),
    workdir: str | Path = "checkpoints",
    var_train_scenario=None,
    resume_from: str | Path | None = None,
) -> MomentsResult:
    """Train the mean stage, then the variance stage, and predict on the validation set.

    Parameters
    ----------
    cfg : DictConfig
        Uses ``cfg.seed``, ``cfg.model`` (``mean``, ``variance`` network nodes,
        ``positivity``, optional ``eps``), ``cfg.train`` (batch_size, steps_per_epoch,
        n_val, max_epochs_mean, max_epochs_var, patience, num_workers, optimizer,
        scheduler, fit_scalers_n, gradient_clip_val, optional val_batch_size and
        torch_threads) and
        ``cfg.trainer`` (Lightning Trainer keyword arguments).
    train_scenario, val_scenario : skymoments.sky.Scenario
        Training draws (foreground from the bank or the generator) and validation draws
        (independent generator foregrounds).
    logger : Lightning logger, optional
        Shared by both stages (metrics ``train/loss_mean``, ``val/loss_mean``,
        ``train/loss_var``, ``val/loss_var`` per epoch).
    callbacks : sequence of Lightning callbacks
        Added to both stages' trainers.
    workdir : path
        Where the stage checkpoints go (``<workdir>/mean/best.ckpt``, ``.../var/...``).
    var_train_scenario : skymoments.sky.Scenario, optional
        Training draws of the variance stage (default ``train_scenario``), e.g. on a part
        of the foreground bank disjoint from the mean stage's.
    resume_from : path, optional
        A stopped run's checkpoint folder (its ``workdir``) to continue: a stage it finished
        is not trained again (its ``perf/*_<stage>`` are the ones it recorded), the stage it
        interrupted resumes from its ``last.ckpt`` (its ``perf/*`` count the epochs trained
        here, ``perf/epochs_<stage>`` all of them; :mod:`skymoments.moments.resume`).

    Returns
    -------
    MomentsResult
    """
    if isinstance(cfg, dict):
        cfg = OmegaConf.create(cfg)
    workdir = Path(workdir).absolute()
    seed = int(cfg.seed)
    tr = cfg.train
    t_start = time.perf_counter()

    draw = scaler_draw(train_scenario, int(tr.fit_scalers_n), seed)
    input_scaler, target_scaler = fit_scalers(train_scenario, 0, seed, draw=draw)
    torch.manual_seed(torch_seed(seed, "init"))
    sees_mean = bool(cfg.model.get("variance_sees_mean", False))
    mean_net = build_network(mean_network_node(cfg.model.mean, train_scenario), key="model.mean")
    var_net = build_network(cfg.model.variance, key="model.variance")
    _check_variance_inputs(cfg.model.variance, input_scaler, target_scaler, sees_mean)
    positivity = str(cfg.model.get("positivity", "softplus"))
    eps = float(cfg.model.get("eps", 1e-6))
    model = PosteriorMoments(
        mean_net, var_net, input_scaler, target_scaler, positivity, eps, sees_mean
    )
    bounds = variance_bounds(train_scenario, target_scaler, cfg)
    if bounds is not None:
        model.positivity.set_bounds(*bounds)
    fit_input_range(
        model.input_range, draw, (train_scenario, var_train_scenario), tr.get("range_draws"), seed
    )
    model.input_range.set_margin(float(tr.get("range_margin", 0.0)))

    # Threads and workers: as configured, or measured on this machine when `auto` (a
    # draw of its own stream, so no training or scaler draw changes).
    def probe():
        return train_scenario.draw(stream_generator(seed, "parallelism"), int(tr.batch_size))

    x0 = input_scaler(torch.as_tensor(np.asarray(probe().data_qu), dtype=torch.float32))
    parallel = resolve_parallelism(tr, probe, network_step(mean_net, x0))
    if parallel["threads"] is not None:
        # Process-wide: on a small shared CPU, fewer intra-op threads than cores avoids
        # oversubscription (see experiments/data_pipeline/README.md).
        torch.set_num_threads(parallel["threads"])

    optimizer = instantiate(tr.optimizer)
    scheduler = instantiate(tr.scheduler) if tr.get("scheduler") is not None else None
    dm = MomentsDataModule(
        train_scenario,
        val_scenario,
        batch_size=int(tr.batch_size),
        steps_per_epoch=int(tr.steps_per_epoch),
        n_val=int(tr.n_val),
        seed=seed,
        num_workers=parallel["workers"],
        val_batch_size=tr.get("val_batch_size"),
        stage="mean",
        var_train_scenario=var_train_scenario,
    )
    common = {"cfg": cfg, "logger": logger, "callbacks": list(callbacks)}

    mean_module = MeanModule(mean_net, optimizer, scheduler, input_scaler, target_scaler)
    s1 = _fit_stage(
        mean_module,
        dm,
        label="stage 1/2 mean",
        monitor="val/loss_mean",
        max_epochs=tr.max_epochs_mean,
        workdir=workdir / "mean",
        resume=stage_folder(resume_from, "mean"),
        **common,
    )

    dm.set_stage("var")
    var_module = VarianceModule(
        mean_net,
        var_net,
        model.positivity,
        optimizer,
        scheduler,
        input_scaler,
        target_scaler,
        eps,
        loss=str(tr.get("variance_loss", "gaussian_nll")),
        sees_mean=sees_mean,
    )
    s2 = _fit_stage(
        var_module,
        dm,
        label="stage 2/2 variance",
        monitor="val/loss_var",
        max_epochs=tr.max_epochs_var,
        workdir=workdir / "var",
        resume=stage_folder(resume_from, "var"),
        **common,
    )

    model = model.cpu().eval()
    val = dm.val_draw()
    mean_eb, std_eb = predict_moments(model, val.data_qu, batch_size=int(dm.val_batch_size))
    _, scale_metrics = recalibrate(cfg, model, val.target_eb, mean_eb, std_eb)
    if scale_metrics:
        # What the scaled model itself predicts (its float32 factor), as every reader sees it.
        mean_eb, std_eb = predict_moments(model, val.data_qu, batch_size=int(dm.val_batch_size))

    perf = {}
    for name, st in (("mean", s1), ("var", s2)):
        perf[f"perf/train_samples_per_s_{name}"] = st["timer"].samples_per_s
        perf[f"perf/data_draw_share_{name}"] = st["timer"].data_share
        perf[f"perf/train_s_{name}"] = st["wall"]
        perf[f"perf/epochs_{name}"] = float(st["epochs"])
        perf[f"perf/step_over_fwd_bwd_{name}"] = st["timer"].step_over_floor
        perf[f"perf/maps_seen_{name}"] = float(st["timer"].samples)
    timers = (s1["timer"], s2["timer"])
    wait = sum(t.wait_s for t in timers)
    steady = sum(t.wait_s + t.step_s for t in timers)
    total = sum(t.wait_s + t.step_s + t.first_wait_s + t.first_step_s for t in timers)
    perf["perf/train_samples_per_s"] = sum(t.samples for t in timers) / total
    perf["perf/data_draw_share"] = wait / steady if steady > 0 else float("nan")
    perf["perf/train_moments_s"] = time.perf_counter() - t_start
    # What the run used: torch threads (0: torch's default), DataLoader workers, and
    # whether they were measured (train.*=auto: 1) or configured (0).
    perf["perf/torch_threads"] = float(parallel["threads"] or 0)
    perf["perf/num_workers"] = float(parallel["workers"])
    perf["perf/parallelism_measured"] = float(parallel["chosen"] == "measured")
    return MomentsResult(
        model=model,
        val_data_qu=np.asarray(val.data_qu),
        val_target_eb=np.asarray(val.target_eb),
        val_params=np.asarray(val.params),
        param_names=tuple(val.param_names),
        mean_eb=mean_eb,
        std_eb=std_eb,
        perf=perf,
        metrics={
            "val/loss_mean_best": s1["best_score"],
            "val/loss_var_best": s2["best_score"],
            **scale_metrics,
        },
        checkpoints={"mean": s1["best_path"], "var": s2["best_path"]},
    )


@torch.no_grad()
def predict_moments(
    model: PosteriorMoments, data_qu, batch_size: int = 64, device=None
) -> tuple[np.ndarray, np.ndarray]:
    """Posterior mean and standard deviation of E/B for Q/U data maps.

    Parameters
    ----------
    model : PosteriorMoments
    data_qu : ndarray, shape (n, 2, npix, npix), microkelvin
    batch_size : int
        Maps per forward pass.
    device : torch.device or str, optional
        Default: where the model's parameters are.

    Returns
    -------
    mean_eb : ndarray, shape (n, 2, npix, npix), microkelvin, float64
    std_eb : ndarray, shape (n, 2, npix, npix), microkelvin, float64
    """
    data = np.asarray(data_qu)
    if data.ndim != 4:
        raise ValueError(f"data_qu must be shaped (n, 2, npix, npix), got {data.shape}")
    if not np.all(np.isfinite(data)):
        raise ValueError("data_qu contains NaN or infinite values; mask or fill them first")
    if isinstance(batch_size, bool) or not isinstance(batch_size, int) or batch_size < 1:
        raise ValueError(f"batch_size must be a positive integer, got {batch_size!r}")
    if device is None:
        device = next(model.parameters()).device
    was_training = model.training
    model.eval()
    means, stds = [], []
    try:
        for i in range(0, len(data), batch_size):
            x = torch.as_tensor(data[i : i + batch_size], dtype=torch.float32, device=device)
            mean, var = model(x)
            means.append(mean.double().cpu().numpy())
            stds.append(var.double().sqrt().cpu().numpy())
    finally:
        model.train(was_training)
    return np.concatenate(means), np.concatenate(stds)
