"""The step-over-floor measurement, the maps-seen counter and the threads/workers choice."""

from __future__ import annotations

import time
from pathlib import Path

import lightning.pytorch as pl
import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from _moments_fakes import GaussianToyScenario
from skymoments.moments import MeanModule, train_moments
from skymoments.moments.perf import (
    forward_backward_seconds,
    pick_parallelism,
    resolve_parallelism,
)
from skymoments.nets import UNet

CONF = Path(__file__).resolve().parents[1] / "conf"
NET = {"_target_": "skymoments.nets.UNet", "in_channels": 2, "out_channels": 2}
NET.update(depth=1, width=4, norm="batch", padding_mode="circular", activation="gelu")

pytestmark = [
    pytest.mark.filterwarnings("ignore:.*module\\(s\\) in eval mode"),
    pytest.mark.filterwarnings("ignore:.*`IterableDataset` has `__len__` defined"),
]


@pytest.fixture(autouse=True)
def _one_thread():
    old = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(old)


def test_floor_measurement_leaves_gradients_and_rng_as_they_were():
    torch.manual_seed(0)
    module = MeanModule(UNet(in_channels=2, out_channels=2, width=4, depth=1), None, None)
    x = torch.randn(4, 2, 8, 8)
    module(x).sum().backward()
    grads = [p.grad.clone() for p in module.parameters()]
    rng = torch.get_rng_state()
    sec = forward_backward_seconds(module, x, reps=2)
    assert sec > 0
    for p, g in zip(module.parameters(), grads, strict=True):
        torch.testing.assert_close(p.grad, g, rtol=0, atol=0)
    assert torch.equal(torch.get_rng_state(), rng)


def test_configured_parallelism_passes_through_and_bad_values_name_the_key():
    never = lambda: pytest.fail("nothing is measured when both are configured")  # noqa: E731
    out = resolve_parallelism({"torch_threads": 1, "num_workers": 2}, never, never)
    assert out == {"threads": 1, "workers": 2, "chosen": "configured"}
    with pytest.raises(ValueError, match="train.torch_threads"):
        resolve_parallelism({"torch_threads": 0, "num_workers": 0}, never, never)
    with pytest.raises(ValueError, match="train.num_workers"):
        resolve_parallelism({"torch_threads": 1, "num_workers": "many"}, never, never)


def test_measured_parallelism_follows_the_documented_rule():
    # A draw far dearer than the step (a 30 ms sleep against an empty step) gets a worker
    # when a core is left beside the threads; a free draw does not.
    slow = pick_parallelism(lambda: None, lambda: time.sleep(0.03), cores=2, reps=1)
    assert slow["threads"] in (1, 2) and slow["cores"] == 2
    assert slow["workers"] == (1 if slow["threads"] == 1 else 0)
    free = pick_parallelism(lambda: time.sleep(0.03), lambda: None, cores=2, reps=1)
    assert free["workers"] == 0
    one = pick_parallelism(lambda: None, lambda: time.sleep(0.03), cores=1, reps=1)
    assert one["threads"] == 1 and one["workers"] == 0  # no spare core for a worker


def _cfg(**train):
    cfg = OmegaConf.create(
        {
            "seed": 3,
            "model": {"mean": dict(NET), "variance": dict(NET), "positivity": "softplus"},
            "train": OmegaConf.load(CONF / "train" / "default.yaml"),
            "trainer": OmegaConf.load(CONF / "trainer" / "cpu.yaml"),
        }
    )
    cfg.train.update(
        batch_size=4,
        steps_per_epoch=3,
        n_val=8,
        val_batch_size=8,
        max_epochs_mean=2,
        max_epochs_var=1,
        patience=10,
        fit_scalers_n=16,
    )
    cfg.train.update(train)
    return cfg


class _Consumed(pl.Callback):
    """Counts the maps each training step received, independently of the pipeline."""

    def __init__(self):
        self.maps = []

    def on_train_start(self, trainer, pl_module):
        self.maps.append(0)

    def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
        self.maps[-1] += int(batch[0].shape[0])


def test_recorded_maps_seen_and_step_ratio_are_what_the_trainer_consumed(tmp_path, capsys):
    consumed = _Consumed()
    cfg = _cfg(torch_threads="auto", num_workers="auto")
    sc = GaussianToyScenario(npix=8, amp_range=(0.5, 2.0))
    res = train_moments(cfg, sc, sc, callbacks=[consumed], workdir=tmp_path)
    perf = res.perf
    # Stage one ran its 2 epochs x 3 steps x 4 maps, stage two 1 x 3 x 4 (no early stop:
    # patience 10), and the recorded counters say exactly that.
    assert consumed.maps == [24, 12]
    assert perf["perf/maps_seen_mean"] == 24 and perf["perf/maps_seen_var"] == 12
    for stage in ("mean", "var"):
        ratio = perf[f"perf/step_over_fwd_bwd_{stage}"]
        assert np.isfinite(ratio) and ratio > 0
    assert perf["perf/parallelism_measured"] == 1.0
    assert perf["perf/torch_threads"] >= 1 and perf["perf/num_workers"] in (0.0, 1.0)
    # Output captured here is no terminal: no bar, one summary line per epoch and stage.
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ", epoch " in ln]
    assert len(lines) == 3, err[-2000:]
    assert "epoch 2/2: " in lines[1] and "val/loss_mean=" in lines[1] and lines[1].endswith(" s")
    assert "\r" not in err  # no tqdm redraws
