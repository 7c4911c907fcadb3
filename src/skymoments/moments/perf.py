"""Throughput and the share of step time spent waiting for training data."""

from __future__ import annotations

import time

import lightning.pytorch as pl


class DataWaitTimer(pl.Callback):
    """Time the wait for each training batch against the step that consumes it.

    The wait is the time from the end of one training batch to the start of the next
    (it holds the DataLoader's ``next``, plus a little Lightning bookkeeping, so it
    overestimates the data share slightly). The first batch of each epoch also pays for
    starting the iterator (and the workers, on the first epoch); it counts in the
    throughput but is left out of the steady-state data share.
    """

    def __init__(self) -> None:
        self.wait_s = 0.0
        self.step_s = 0.0
        self.first_wait_s = 0.0
        self.first_step_s = 0.0
        self.samples = 0
        self.batches = 0
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
