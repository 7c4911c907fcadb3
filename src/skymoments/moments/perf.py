"""Throughput, the share of step time spent waiting for training data, the step's cost over
the network's own forward and backward, and the choice of torch threads and workers."""

from __future__ import annotations

import os
import time

import lightning.pytorch as pl
import numpy as np
import torch

# Repetitions of the forward + backward floor measured at the end of each epoch.
FLOOR_REPS = 3
# A DataLoader worker is used when drawing a batch costs more than this fraction of a
# training step and a core is left for it (pick_parallelism).
WORKER_DRAW_SHARE = 0.10


class DataWaitTimer(pl.Callback):
    """Time the wait for each training batch against the step that consumes it.

    The wait is the time from the end of one training batch to the start of the next
    (it holds the DataLoader's ``next``, plus a little Lightning bookkeeping, so it
    overestimates the data share slightly). The first batch of each epoch also pays for
    starting the iterator (and the workers, on the first epoch); it counts in the
    throughput but is left out of the steady-state data share.

    With ``floor`` (default) it also keeps one steady-state batch and, at the end of each
    epoch, times the network's forward + backward alone on it
    (:func:`forward_backward_seconds`), in the same run and under the same load as the
    steps; :attr:`step_over_floor` is the full step (its data wait included) over it.
    """

    def __init__(self, floor: bool = True) -> None:
        self.floor = floor
        self.floor_s: list[float] = []
        self._floor_batch = None
        self.wait_s = 0.0
        self.step_s = 0.0
        self.first_wait_s = 0.0
        self.first_step_s = 0.0
        self.samples = 0
        self.batches = 0
        self.steady_batches = 0
        self._t_prev = None
        self._t_start = None
        self._first = False

    def on_train_epoch_start(self, trainer, pl_module) -> None:
        self._t_prev = time.perf_counter()
        self._first = True

    def on_train_batch_start(self, trainer, pl_module, batch, batch_idx) -> None:
        now = time.perf_counter()
        wait = now - self._t_prev
        if self._first:
            self.first_wait_s += wait
        else:
            self.wait_s += wait
        self._t_start = now

    def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx) -> None:
        now = time.perf_counter()
        step = now - self._t_start
        if self._first:
            self.first_step_s += step
            self._first = False
        else:
            self.step_s += step
            self.steady_batches += 1
            if self.floor and self._floor_batch is None:
                self._floor_batch = batch[0].detach().clone()
        self.samples += int(batch[0].shape[0]) * int(trainer.world_size)
        self.batches += 1
        self._t_prev = now

    @property
    def data_share(self) -> float:
        """Steady-state share of training time spent waiting for data (NaN if unknown)."""
        total = self.wait_s + self.step_s
        return self.wait_s / total if total > 0 else float("nan")

    @property
    def samples_per_s(self) -> float:
        """Training samples per second over all batches (all processes together)."""
        total = self.wait_s + self.step_s + self.first_wait_s + self.first_step_s
        return self.samples / total if total > 0 else float("nan")

    def on_train_epoch_end(self, trainer, pl_module) -> None:
        if self._floor_batch is not None:
            self.floor_s.append(forward_backward_seconds(pl_module, self._floor_batch))

    @property
    def step_over_floor(self) -> float:
        """Full steady-state step over the network's forward + backward alone (NaN if
        either is unknown); the median floor over the epochs' measurements."""
        if not self.floor_s or self.steady_batches == 0:
            return float("nan")
        full = (self.wait_s + self.step_s) / self.steady_batches
        return full / float(np.median(self.floor_s))


def forward_backward_seconds(pl_module, data: torch.Tensor, reps: int = FLOOR_REPS) -> float:
    """Median seconds of the network's forward + backward on a batch already in memory.

    Runs ``pl_module(input_scaler(data))`` and the backward of a scalar of its output, the
    network's own work in a training step; the optimizer step, data drawing and logging
    are not in it. Gradients and the torch RNG state are restored afterwards, so the
    training that follows is unchanged.
    """
    params = [p for p in pl_module.parameters() if p.requires_grad]
    saved = [None if p.grad is None else p.grad.clone() for p in params]
    rng = torch.get_rng_state()
    was_training = pl_module.training
    pl_module.train()
    times = []
    try:
        with torch.no_grad():
            x = pl_module.input_scaler(data)
        for _ in range(reps):
            t0 = time.perf_counter()
            out = pl_module(x)
            out.square().mean().backward()
            times.append(time.perf_counter() - t0)
    finally:
        for p, g in zip(params, saved, strict=True):
            p.grad = g
        torch.set_rng_state(rng)
        pl_module.train(was_training)
    return float(np.median(times))


def available_cores() -> int:
    """CPU cores this process may run on (its affinity mask where the OS has one)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def pick_parallelism(step_fn, draw_fn, cores: int | None = None, reps: int = 3) -> dict:
    """Torch threads and DataLoader workers for this machine, chosen by measurement.

    The rule: time a training step (``step_fn``) with 1 thread and with all cores (median
    of ``reps`` each) and keep the faster; then time one batch draw (``draw_fn``) and use
    one worker when the draw costs more than ``WORKER_DRAW_SHARE`` of the step and a core
    is left beside the threads (the worker then overlaps the draw with the step), else
    draw in the main process (a worker on a fully used CPU only takes time from the step).

    Returns
    -------
    dict with ``threads``, ``workers``, ``cores``, ``step_s`` (per thread count tried) and
    ``draw_s``. torch's thread count is left as it was found.
    """
    cores = available_cores() if cores is None else int(cores)
    before = torch.get_num_threads()
    step_s = {}
    try:
        for n in sorted({1, max(1, cores)}):
            torch.set_num_threads(n)
            step_fn()  # warm-up
            ts = []
            for _ in range(reps):
                t0 = time.perf_counter()
                step_fn()
                ts.append(time.perf_counter() - t0)
            step_s[n] = float(np.median(ts))
    finally:
        torch.set_num_threads(before)
    threads = min(step_s, key=step_s.get)
    t0 = time.perf_counter()
    draw_fn()
    draw_s = time.perf_counter() - t0
    spare = cores - threads >= 1
    workers = 1 if (spare and draw_s > WORKER_DRAW_SHARE * step_s[threads]) else 0
    return {
        "threads": int(threads),
        "workers": int(workers),
        "cores": int(cores),
        "step_s": step_s,
        "draw_s": float(draw_s),
    }


def resolve_parallelism(train_node, draw_fn, step_fn) -> dict:
    """``train.torch_threads`` and ``train.num_workers`` as used: given values pass
    through; ``auto`` (either) is settled by :func:`pick_parallelism` on this machine.

    Returns
    -------
    dict with ``threads`` (int, or None for torch's default), ``workers`` (int) and
    ``chosen`` (``"measured"`` or ``"configured"``), plus the measurements when measured.
    """
    threads = train_node.get("torch_threads")
    workers = train_node.get("num_workers", 0)
    if threads != "auto" and threads is not None:
        if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
            raise ValueError(
                f"train.torch_threads must be a positive integer, null or auto, got {threads!r}"
            )
    if workers != "auto":
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
            raise ValueError(f"train.num_workers must be an integer >= 0 or auto, got {workers!r}")
    if threads != "auto" and workers != "auto":
        return {"threads": threads, "workers": int(workers), "chosen": "configured"}
    picked = pick_parallelism(step_fn, draw_fn)
    return {
        **picked,
        "threads": picked["threads"] if threads == "auto" else threads,
        "workers": picked["workers"] if workers == "auto" else int(workers),
        "chosen": "measured",
    }


def network_step(net, x: torch.Tensor):
    """A function running the network's forward + backward on ``x`` (gradients cleared
    after each call), the work :func:`pick_parallelism` times per thread count."""

    def run():
        net.train()
        net(x).square().mean().backward()
        net.zero_grad(set_to_none=True)

    return run
