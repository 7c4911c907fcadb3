"""Training draws: fresh per epoch, stage, rank and worker; validation fixed and apart."""

from __future__ import annotations

import types

import numpy as np
import pytest
import torch

from _moments_fakes import GaussianToyScenario
from skymoments.moments import MomentsDataModule, TrainDrawStream
from skymoments.sky.seeds import stream


def _first(stream_obj, epoch=0, worker=0, num_workers=1):
    return next(iter(stream_obj.batches(epoch, worker, num_workers)))


def _stream(**kw):
    args = {"scenario": GaussianToyScenario(npix=8), "batch_size": 4, "steps_per_epoch": 3}
    args.update(seed=11)
    args.update(kw)
    return TrainDrawStream(**args)


def test_batches_have_the_documented_shapes_and_dtype():
    data, target, params = _first(_stream())
    assert data.shape == target.shape == (4, 2, 8, 8)
    assert params.shape == (4, 1)
    assert data.dtype == target.dtype == torch.float32


def test_training_draws_are_reproducible_and_differ_per_epoch_stage_rank_worker():
    ref = _first(_stream())[0]
    # Same (seed, rank, worker, stage, epoch): the same maps (seeded streams).
    torch.testing.assert_close(_first(_stream())[0], ref, rtol=0, atol=0)
    others = [
        _first(_stream(), epoch=1)[0],
        _first(_stream(stage=1))[0],
        _first(_stream(rank=1))[0],
        _first(_stream(), worker=1, num_workers=2)[0],
        _first(_stream(seed=12))[0],
    ]
    for other in others:
        # Independent Gaussian draws: no pixel in common.
        assert not torch.isclose(other, ref).any()


def test_one_pass_is_one_epoch_and_workers_split_the_steps():
    s = _stream(steps_per_epoch=5)
    assert len(s) == 5
    e0 = [b[0] for b in s]
    e1 = [b[0] for b in s]  # a second pass is the next epoch
    assert len(e0) == len(e1) == 5
    torch.testing.assert_close(e0[0], _first(_stream(), epoch=0)[0], rtol=0, atol=0)
    torch.testing.assert_close(e1[0], _first(_stream(), epoch=1)[0], rtol=0, atol=0)
    # Round-robin split over 2 workers: 3 + 2 batches.
    assert len(list(s.batches(0, 0, 2))) == 3 and len(list(s.batches(0, 1, 2))) == 2


def _dm(**kw):
    args = dict(
        train_scenario=GaussianToyScenario(npix=8, amp_range=(0.5, 2.0)),
        val_scenario=GaussianToyScenario(npix=8, amp_range=(0.5, 2.0)),
        batch_size=4,
        steps_per_epoch=4,
        n_val=6,
        seed=5,
    )
    args.update(kw)
    return MomentsDataModule(**args)


def test_persistent_workers_draw_fresh_maps_every_epoch():
    dm = _dm(num_workers=2)
    loader = dm.train_dataloader()
    assert loader.persistent_workers
    epochs = [torch.cat([b[0] for b in loader]) for _ in range(2)]
    assert all(e.shape == (16, 2, 8, 8) for e in epochs)
    maps = torch.cat(epochs).flatten(1)
    # 32 maps from 2 epochs x 2 workers: pairwise distinct (no repeated draw anywhere).
    same = torch.isclose(maps[:, None, :], maps[None, :, :]).all(-1)
    assert same.sum() == len(maps)


def test_validation_set_is_fixed_seeded_and_apart_from_training():
    dm = _dm()
    dm.setup("fit")
    val = dm.val_draw()
    # Drawn once: the same object and values on every call and in a new DataModule.
    assert dm.val_draw() is val
    np.testing.assert_array_equal(_dm().val_draw().data_qu, val.data_qu)
    # From the documented "val" stream of the validation scenario.
    ref = dm.val_scenario.draw(stream(5, "val"), 6)
    np.testing.assert_array_equal(ref.data_qu, val.data_qu)
    # The loader serves exactly those maps, as float32.
    loaded = torch.cat([b[0] for b in dm.val_dataloader()])
    torch.testing.assert_close(loaded, torch.as_tensor(val.data_qu, dtype=torch.float32))
    # No validation map appears among the training draws of either stage.
    train = []
    for stage in ("mean", "var"):
        dm.set_stage(stage)
        ds = dm.train_dataset()
        train += [b[0] for _ in range(2) for b in ds]
    train = torch.cat(train).flatten(1)
    val_t = loaded.flatten(1)
    assert not torch.isclose(val_t[:, None, :], train[None, :, :]).all(-1).any()


def test_batch_size_is_divided_over_ddp_processes():
    dm = _dm(batch_size=8)
    dm.trainer = types.SimpleNamespace(world_size=2, global_rank=1)
    ds = dm.train_dataset()
    assert ds.batch_size == 4 and ds.rank == 1
    dm3 = _dm(batch_size=8)
    dm3.trainer = types.SimpleNamespace(world_size=3, global_rank=0)
    with pytest.raises(ValueError, match=r"train\.batch_size=8 does not divide over 3"):
        dm3.train_dataset()


@pytest.mark.parametrize(
    ("kw", "key"),
    [
        ({"batch_size": 0}, "train.batch_size"),
        ({"steps_per_epoch": -1}, "train.steps_per_epoch"),
        ({"n_val": 2.5}, "train.n_val"),
        ({"num_workers": -1}, "train.num_workers"),
        ({"stage": "both"}, "stage"),
    ],
)
def test_bad_settings_name_the_key(kw, key):
    with pytest.raises(ValueError, match=key.replace(".", r"\.")):
        _dm(**kw)
