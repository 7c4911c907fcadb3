"""How much of a training step waits for data? Measured side by side in one run.

Builds the quickstart-like scenario (``experiment=quickstart`` plus any overrides given on
the command line), then for each DataLoader setting runs a real stage-one fit (the same
MomentsDataModule, MeanModule and DataWaitTimer that ``train_moments`` uses) and prints
the steady-state share of training time spent waiting for the next batch, and training
samples per second. Also prints the cost of one batch draw and of one optimizer step
measured in isolation, so the ratio can be read off directly.

    python experiments/data_pipeline/benchmark.py [--steps 30] [--source bank] [--threads N]
        [--workers 0 1] [hydra overrides...]

``--source bank`` trains on an ImageBank of foreground images with the D4 symmetries (the
quickstart's training source; the images here are generator draws standing in for the
synthesized bank, which costs the same to draw from); ``--source generator`` draws the
foreground from the generator directly.
"""

from __future__ import annotations

import argparse
import time

import lightning.pytorch as pl
import numpy as np
import torch
from hydra import compose, initialize_config_dir
from hydra.utils import instantiate

from skymoments.config import conf_dir
from skymoments.moments import DataWaitTimer, MeanModule, MomentsDataModule, fit_scalers
from skymoments.nets import build_network
from skymoments.sky.build import foreground_from_config, scenario_from_config
from skymoments.sky.foregrounds import ImageBank
from skymoments.sky.seeds import stream


def _median_time(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=30, help="training steps per setting")
    ap.add_argument("--workers", type=int, nargs="+", default=[0, 1], help="num_workers to try")
    ap.add_argument("--source", choices=["bank", "generator"], default="bank")
    ap.add_argument("--bank-size", type=int, default=16)
    ap.add_argument("--threads", type=int, default=None, help="torch intra-op threads")
    ap.add_argument("overrides", nargs="*", help="Hydra overrides, e.g. train.batch_size=16")
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)

    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose("config", overrides=["experiment=quickstart", *args.overrides])
    val_scenario = scenario_from_config(cfg)
    if args.source == "bank":
        fg = foreground_from_config(cfg.sky.foreground)
        images = fg.draw(val_scenario.patch, stream(int(cfg.seed), "bench_bank"), args.bank_size)
        train_scenario = scenario_from_config(cfg, foreground=ImageBank(images, symmetries=True))
    else:
        train_scenario = val_scenario
    bs = int(cfg.train.batch_size)
    npix = val_scenario.patch.npix
    print(
        f"scenario: {npix}x{npix} px of {val_scenario.patch.pixel_arcmin} arcmin, "
        f"foreground {cfg.sky.foreground._target_.rsplit('.', 1)[-1]} "
        f"(training source: {args.source}), batch {bs}, "
        f"mean net {cfg.model.mean._target_} depth={cfg.model.mean.get('depth')} "
        f"width={cfg.model.mean.get('width')}, torch threads {torch.get_num_threads()}"
    )

    rng = stream(0, "bench_draw")
    draw_s = _median_time(lambda: train_scenario.draw(rng, bs, as_torch=True), 7)

    ins, outs = fit_scalers(train_scenario, int(cfg.train.fit_scalers_n), int(cfg.seed))
    torch.manual_seed(0)
    net = build_network(cfg.model.mean, key="model.mean")
    opt = instantiate(cfg.train.optimizer)(params=net.parameters())
    batch = train_scenario.draw(rng, bs, as_torch=True)

    def step():
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(net(ins(batch.data_qu)), outs(batch.target_eb))
        loss.backward()
        opt.step()

    step()  # warm-up
    step_s = _median_time(step, 7)
    print(
        f"isolated: one batch draw {draw_s * 1e3:.1f} ms, one optimizer step "
        f"{step_s * 1e3:.1f} ms -> draw/(draw+step) = {draw_s / (draw_s + step_s):.3f}"
    )

    print(
        f"{'num_workers':>11} {'data share':>10} {'samples/s':>10} {'steps':>6} "
        f"{'step/fwd+bwd':>12}"
    )
    for workers in args.workers:
        torch.manual_seed(0)
        module = MeanModule(
            build_network(cfg.model.mean, key="model.mean"),
            instantiate(cfg.train.optimizer),
            None,
            ins,
            outs,
        )
        dm = MomentsDataModule(
            train_scenario,
            val_scenario,
            batch_size=bs,
            steps_per_epoch=args.steps,
            n_val=bs,
            seed=int(cfg.seed),
            num_workers=workers,
        )
        timer = DataWaitTimer()
        pl.Trainer(
            max_epochs=1,
            callbacks=[timer],
            logger=False,
            enable_progress_bar=False,
            enable_model_summary=False,
            enable_checkpointing=False,
            num_sanity_val_steps=0,
            limit_val_batches=0,
            accelerator="cpu",
            devices=1,
        ).fit(module, dm)
        print(
            f"{workers:>11d} {timer.data_share:>10.3f} {timer.samples_per_s:>10.1f} "
            f"{timer.batches:>6d} {timer.step_over_floor:>12.3f}"
        )


if __name__ == "__main__":
    main()
