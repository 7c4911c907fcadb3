"""Training pairs drawn on the fly, and a fixed validation set: the DataModule.

Seeding (one base ``seed``, independent streams per purpose via numpy ``SeedSequence``,
see :mod:`skymoments.sky.seeds`):

- training batches: the ``train`` stream keyed by (DDP rank, DataLoader worker, stage,
  epoch), so every stage, epoch, rank and worker draws fresh
  signal, noise, amplitudes and foreground augmentations, reproducibly;
- validation: the ``val`` stream (rank 0 on every rank), drawn once from the validation
  scenario, whose foregrounds are independent generator draws, never synthesized and
  never seen in training.
"""

from __future__ import annotations

import numpy as np
import torch
from lightning import pytorch as pl
from torch.utils.data import DataLoader, IterableDataset, TensorDataset, get_worker_info

from skymoments.sky.seeds import stream

STAGES = ("mean", "var")


def stream_generator(seed: int, purpose: str, *indices: int) -> np.random.Generator:
    """The numpy Generator of one purpose, keyed further by integer ``indices``.

    Thin wrapper over :func:`skymoments.sky.seeds.stream`: the ``SeedSequence`` is
    ``SeedSequence(seed, spawn_key=(hash(purpose), *indices))``, numpy's way of deriving
    statistically independent children.

    Parameters
    ----------
    seed : int
        The config's base seed.
    purpose : str
        ``train``, ``val``, ``scalers``, ...
    *indices : int
        For training draws: DDP rank, DataLoader worker, stage, epoch.
    """
    return stream(int(seed), purpose, *indices)


def _as_batch(draw) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    def f32(a):
        return torch.as_tensor(a, dtype=torch.float32)

    return f32(draw.data_qu), f32(draw.target_eb), f32(draw.params)


def _worker_init(_worker_id: int) -> None:
    # Workers draw with numpy; one torch thread each leaves the cores to the training step.
    torch.set_num_threads(1)


class TrainDrawStream(IterableDataset):
    """An endless-per-epoch stream of whole training batches from a scenario.

    Each pass (``iter``) over this object is one epoch: ``steps_per_epoch`` batches of
    ``batch_size`` fresh draws, split round-robin over the DataLoader workers. The epoch
    index is the number of passes this copy has started, which is right in the main
    process and in persistent workers (each keeps its copy for the whole fit); the
    DataModule therefore always uses persistent workers.

    Yields
    ------
    (data_qu, target_eb, params) : Tensors, float32
        Shapes (batch_size, 2, npix, npix) in uK, (batch_size, 2, npix, npix) in uK, and
        (batch_size, n_params).
    """

    def __init__(
        self,
        scenario,
        batch_size: int,
        steps_per_epoch: int,
        seed: int,
        stage: int = 0,
        rank: int = 0,
        first_epoch: int = 0,
    ) -> None:
        super().__init__()
        self.scenario = scenario
        self.batch_size = int(batch_size)
        self.steps_per_epoch = int(steps_per_epoch)
        self.seed = int(seed)
        self.stage = int(stage)
        self.rank = int(rank)
        # A fit resumed from a checkpoint starts at its epoch, drawing what it would have.
        self._passes = int(first_epoch)

    def __len__(self) -> int:
        return self.steps_per_epoch

    def generator(self, epoch: int, worker: int = 0) -> np.random.Generator:
        """The Generator of one (epoch, worker) of this stage and rank."""
        return stream_generator(self.seed, "train", self.rank, worker, self.stage, int(epoch))

    def batches(self, epoch: int, worker: int = 0, num_workers: int = 1):
        """The batches that ``worker`` (of ``num_workers``) yields in ``epoch``."""
        rng = self.generator(epoch, worker)
        for _ in range(worker, self.steps_per_epoch, num_workers):
            yield _as_batch(self.scenario.draw(rng, self.batch_size, as_torch=True))

    def __iter__(self):
        info = get_worker_info()
        worker, num_workers = (info.id, info.num_workers) if info is not None else (0, 1)
        epoch = self._passes
        self._passes += 1
        return self.batches(epoch, worker, num_workers)


class MomentsDataModule(pl.LightningDataModule):
    """Training pairs drawn on the fly, and one fixed validation set.

    Parameters
    ----------
    train_scenario : skymoments.sky.Scenario
        Training draws; its foreground is whatever it holds (an ``ImageBank`` of the
        synthesized bank with spin-2 symmetries, or the generator).
    val_scenario : skymoments.sky.Scenario
        Validation draws: independent foreground generator draws, never synthesized.
    batch_size : int
        Global batch size; each of the ``world_size`` DDP processes draws
        ``batch_size // world_size`` (it must divide evenly).
    steps_per_epoch : int
        Batches per epoch and process.
    n_val : int
        Size of the fixed validation set.
    seed : int
        Base seed (streams ``train`` and ``val``).
    num_workers : int
        DataLoader worker processes for the training draws (0: draw in the main
        process). Workers are persistent across epochs.
    val_batch_size : int, optional
        Global validation batch size; default ``batch_size``.
    stage : {"mean", "var"}
        Which stage the next ``train_dataloader`` serves; each stage gets its own draws.
    var_train_scenario : skymoments.sky.Scenario, optional
        Training draws of the variance stage (default ``train_scenario``): a scenario on a
        part of the foreground bank the mean stage never saw, so that the variance stage
        learns from residuals on foregrounds new to the mean network, as at test time.
    """

    def __init__(
        self,
        train_scenario,
        val_scenario,
        batch_size: int,
        steps_per_epoch: int,
        n_val: int,
        seed: int,
        num_workers: int = 0,
        val_batch_size: int | None = None,
        pin_memory: bool = False,
        stage: str = "mean",
        var_train_scenario=None,
    ) -> None:
        super().__init__()
        for name, value in (
            ("train.batch_size", batch_size),
            ("train.steps_per_epoch", steps_per_epoch),
            ("train.n_val", n_val),
        ):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"{name} must be a positive integer, got {value!r}")
        if isinstance(num_workers, bool) or not isinstance(num_workers, int) or num_workers < 0:
            raise ValueError(f"train.num_workers must be an integer >= 0, got {num_workers!r}")
        self.train_scenario = train_scenario
        self.var_train_scenario = (
            var_train_scenario if var_train_scenario is not None else train_scenario
        )
        self.val_scenario = val_scenario
        self.batch_size = batch_size
        self.steps_per_epoch = steps_per_epoch
        self.n_val = n_val
        self.seed = int(seed)
        self.num_workers = num_workers
        self.val_batch_size = int(val_batch_size or batch_size)
        self.pin_memory = bool(pin_memory)
        self.set_stage(stage)
        self._val = None

    def set_stage(self, stage: str) -> None:
        """Serve the training draws of ``stage`` ("mean" or "var") from now on."""
        if stage not in STAGES:
            raise ValueError(f"stage={stage!r}; choose one of {STAGES}")
        self.stage = stage

    @property
    def world_size(self) -> int:
        trainer = getattr(self, "trainer", None)
        return int(trainer.world_size) if trainer is not None else 1

    @property
    def rank(self) -> int:
        trainer = getattr(self, "trainer", None)
        return int(trainer.global_rank) if trainer is not None else 0

    def per_device(self, global_batch: int, name: str) -> int:
        """``global_batch // world_size``, or a ValueError if it does not divide evenly."""
        if global_batch % self.world_size:
            raise ValueError(
                f"{name}={global_batch} does not divide over {self.world_size} processes; "
                f"use a multiple of {self.world_size}"
            )
        return global_batch // self.world_size

    def val_draw(self):
        """The fixed validation draw (numpy, float64), drawn once from the ``val`` stream.

        Returns
        -------
        SkyDraw with ``data_qu`` (n_val, 2, npix, npix) uK, ``target_eb`` (n_val, 2, npix,
        npix) uK, ``params`` (n_val, n_params) and ``param_names``.
        """
        if self._val is None:
            rng = stream_generator(self.seed, "val")
            self._val = self.val_scenario.draw(rng, self.n_val)
        return self._val

    def setup(self, stage: str | None = None) -> None:
        self.val_draw()

    def train_dataset(self) -> TrainDrawStream:
        scenario = self.var_train_scenario if self.stage == "var" else self.train_scenario
        return TrainDrawStream(
            scenario,
            self.per_device(self.batch_size, "train.batch_size"),
            self.steps_per_epoch,
            self.seed,
            stage=STAGES.index(self.stage),
            rank=self.rank,
            first_epoch=int(getattr(getattr(self, "trainer", None), "current_epoch", 0) or 0),
        )

    def train_dataloader(self) -> DataLoader:
        workers = self.num_workers
        return DataLoader(
            self.train_dataset(),
            batch_size=None,  # the stream yields whole batches
            num_workers=workers,
            persistent_workers=workers > 0,
            worker_init_fn=_worker_init if workers > 0 else None,
            prefetch_factor=2 if workers > 0 else None,
            pin_memory=self.pin_memory,
        )

    def val_dataloader(self) -> DataLoader:
        val = self.val_draw()
        ds = TensorDataset(*_as_batch(val))
        return DataLoader(
            ds,
            batch_size=self.per_device(self.val_batch_size, "train.val_batch_size"),
            shuffle=False,
            pin_memory=self.pin_memory,
        )
