"""The two Lightning stages and the pipeline, end to end on tiny CPU problems."""

from __future__ import annotations

import functools
import pickle
from pathlib import Path

import lightning.pytorch as pl
import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from _moments_fakes import GaussianToyScenario
from skymoments.moments import (
    MeanModule,
    MomentsDataModule,
    VarianceModule,
    fit_scalers,
    predict_moments,
    train_moments,
)
from skymoments.nets import SpectralNet, UNet
from skymoments.sky.seeds import stream

CONF = Path(__file__).resolve().parents[1] / "conf"

pytestmark = [
    # Expected here: the frozen mean network sits in eval mode during stage two, and the
    # training stream splits its own length over workers.
    pytest.mark.filterwarnings("ignore:.*module\\(s\\) in eval mode"),
    pytest.mark.filterwarnings("ignore:.*`IterableDataset` has `__len__` defined"),
]


@pytest.fixture(autouse=True)
def _one_thread():
    # The test machine's 2 cores are shared: one intra-op thread avoids oversubscription
    # (measured 3-4x faster per step under load); results do not depend on it.
    old = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(old)


def _composed(node: str, option: str):
    """``<node>=<option>`` as the primary config composes it (groups may use defaults lists)."""
    from hydra import compose, initialize_config_dir

    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        return compose("config", overrides=[f"{node}={option}"])[node]


def _composed_model():
    return _composed("model", "unet")


def _cfg(**train):
    cfg = OmegaConf.create(
        {
            "seed": 7,
            "model": OmegaConf.to_container(_composed_model(), resolve=True),
            "train": OmegaConf.load(CONF / "train" / "default.yaml"),
            "trainer": OmegaConf.load(CONF / "trainer" / "cpu.yaml"),
        }
    )
    for stage in ("mean", "variance"):
        cfg.model[stage].update(depth=1, width=4)
    cfg.train.update(
        batch_size=8,
        steps_per_epoch=3,
        n_val=16,
        val_batch_size=8,
        max_epochs_mean=2,
        max_epochs_var=2,
        num_workers=0,
        fit_scalers_n=32,
    )
    cfg.train.update(train)
    return cfg


def _trainer(**kw):
    args = dict(
        logger=False,
        enable_progress_bar=False,
        enable_model_summary=False,
        enable_checkpointing=False,
        num_sanity_val_steps=0,
    )
    args.update(kw)
    return pl.Trainer(**args)


def test_train_moments_runs_end_to_end(tmp_path):
    train_sc = GaussianToyScenario(npix=8, amp_range=(0.5, 2.0))
    val_sc = GaussianToyScenario(npix=8, amp_range=(0.5, 2.0))
    cfg = _cfg()
    res = train_moments(cfg, train_sc, val_sc, workdir=tmp_path)

    assert res.mean_eb.shape == res.std_eb.shape == res.val_target_eb.shape == (16, 2, 8, 8)
    assert res.val_params.shape == (16, 1) and res.param_names == ("a_sig",)
    assert np.all(np.isfinite(res.mean_eb)) and np.all(res.std_eb > 0)
    # The validation draw is the documented one: the "val" stream of the val scenario.
    np.testing.assert_array_equal(res.val_data_qu, val_sc.draw(stream(7, "val"), 16).data_qu)
    # Predictions are the model's own, in physical units: bitwise with the same batching...
    mean, std = predict_moments(res.model, res.val_data_qu, batch_size=8)
    np.testing.assert_array_equal(mean, res.mean_eb)
    np.testing.assert_array_equal(std, res.std_eb)
    # ... and up to float32 round-off (2**-24 = 6e-8 relative, accumulated over a few
    # hundred terms per convolution output) with another batching.
    mean5, std5 = predict_moments(res.model, res.val_data_qu, batch_size=5)
    np.testing.assert_allclose(mean5, res.mean_eb, rtol=1e-5, atol=1e-5 * np.abs(mean).max())
    np.testing.assert_allclose(std5, res.std_eb, rtol=1e-5)
    # Best checkpoints exist and their weights are the ones returned.
    for stage, net in (("mean", res.model.mean_net), ("var", res.model.var_net)):
        state = torch.load(res.checkpoints[stage], weights_only=False)["state_dict"]
        prefix = "net." if stage == "mean" else "var_net."
        for k, v in net.state_dict().items():
            torch.testing.assert_close(v, state[prefix + k], rtol=0, atol=0)
    assert np.isfinite(res.metrics["val/loss_mean_best"])
    assert np.isfinite(res.metrics["val/loss_var_best"])
    perf = res.perf
    assert perf["perf/train_samples_per_s"] > 0
    assert 0 <= perf["perf/data_draw_share"] <= 1
    assert perf["perf/epochs_mean"] == 2 and perf["perf/epochs_var"] == 2
    # Self-contained: pickles and reloads to the same outputs.
    again = pickle.loads(pickle.dumps(res.model))
    np.testing.assert_array_equal(predict_moments(again, res.val_data_qu, 8)[0], res.mean_eb)


def test_trainer_config_may_not_set_pipeline_keys(tmp_path):
    cfg = _cfg()
    cfg.trainer.max_epochs = 3
    with pytest.raises(ValueError, match=r"trainer\.max_epochs is set by the pipeline"):
        train_moments(
            cfg, GaussianToyScenario(npix=8), GaussianToyScenario(npix=8), workdir=tmp_path
        )


def test_bad_network_config_fails_with_the_key_before_training(tmp_path):
    cfg = _cfg()
    cfg.model.variance.width = -2
    with pytest.raises(ValueError, match=r"model\.variance\.width"):
        train_moments(
            cfg, GaussianToyScenario(npix=8), GaussianToyScenario(npix=8), workdir=tmp_path
        )


def _dm(sc, **kw):
    args = dict(batch_size=8, steps_per_epoch=3, n_val=8, seed=1)
    args.update(kw)
    return MomentsDataModule(sc, sc, **args)


@pytest.mark.parametrize("positivity", ["softplus", "logvar"])
def test_variance_stage_leaves_the_mean_network_unchanged(positivity):
    sc = GaussianToyScenario(npix=8, amp_range=(0.5, 2.0))
    ins, outs = fit_scalers(sc, 32, 0)
    torch.manual_seed(0)
    mean_net, var_net = UNet(depth=1, width=4), UNet(depth=1, width=4)
    opt = functools.partial(torch.optim.AdamW, lr=1e-2)
    # Give the mean network trained weights and batch-norm statistics first.
    _trainer(max_epochs=1).fit(MeanModule(mean_net, opt, None, ins, outs), _dm(sc))
    mean_before = {k: v.clone() for k, v in mean_net.state_dict().items()}
    var_before = {k: v.clone() for k, v in var_net.state_dict().items()}

    module = VarianceModule(mean_net, var_net, positivity, opt, None, ins, outs)
    dm = _dm(sc)
    dm.set_stage("var")
    _trainer(max_epochs=2).fit(module, dm)

    # Parameters and batch-norm running statistics of f: bitwise unchanged.
    for k, v in mean_net.state_dict().items():
        torch.testing.assert_close(v, mean_before[k], rtol=0, atol=0)
    assert not mean_net.training
    assert not any(p.requires_grad for p in mean_net.parameters())
    # ... while g did train.
    changed = [not torch.equal(v, var_before[k]) for k, v in var_net.state_dict().items()]
    assert any(changed)


def test_scheduler_length_defaults_to_the_stage_epochs():
    sc = GaussianToyScenario(npix=8)
    sched = functools.partial(torch.optim.lr_scheduler.CosineAnnealingLR, eta_min=0.0)
    module = MeanModule(UNet(depth=1, width=4), functools.partial(torch.optim.SGD, lr=0.1), sched)
    trainer = _trainer(max_epochs=3)
    trainer.fit(module, _dm(sc))
    cosine = trainer.lr_scheduler_configs[0].scheduler
    assert cosine.T_max == 3
    # After 3 of T_max = 3 epochs the cosine schedule is at eta_min (analytic: cos(pi) = -1).
    assert trainer.optimizers[0].param_groups[0]["lr"] == pytest.approx(0.0, abs=1e-12)


def _gaussian_scenario():
    """16x16 patch, CAMB CMB + Gaussian power-law foreground + white noise, all fixed."""
    from skymoments.sky.build import scenario_from_config

    sky = _composed("sky", "gaussian")  # same CAMB cosmology: cached
    cfg = {
        "patch": {"npix": 16, "pixel_arcmin": 8.0},
        "sky": OmegaConf.to_container(sky, resolve=True),
        "prior": {
            "r": {"dist": "fixed", "value": 0.1},
            "a_lens": {"dist": "fixed", "value": 1.0},
            "a_fg": {"dist": "fixed", "value": 1.0},
            "noise_uk_arcmin": {"dist": "fixed", "value": 5.0},
        },
    }
    return scenario_from_config(cfg)


class _WienerRatio(pl.Callback):
    """MSE of the network's mean over that of the exact Wiener mean, after each epoch."""

    def __init__(self, wiener_mse, test, input_scaler, target_scaler):
        self.test = test
        self.wiener_mse = wiener_mse
        self.x = input_scaler(torch.as_tensor(test.data_qu, dtype=torch.float32))
        self.target_scaler = target_scaler
        self.ratios = []

    def on_train_epoch_end(self, trainer, pl_module):
        was = pl_module.training
        pl_module.eval()
        with torch.no_grad():
            pred = self.target_scaler.inverse(pl_module.net(self.x)).double().numpy()
        pl_module.train(was)
        self.ratios.append(np.mean((pred - self.test.target_eb) ** 2) / self.wiener_mse)


@pytest.mark.slow
def test_mean_network_approaches_the_wiener_filter_on_a_gaussian_sky():
    # All-Gaussian CMB, foreground and noise with fixed amplitudes: the exact posterior
    # mean is the per-mode Wiener filter S/(S+N) d in Fourier E/B, with N the foreground
    # plus noise power (standard Gaussian conditioning; Elsner & Wandelt
    # 2013, arXiv:1210.4931). The squared loss makes the network regress that mean
    # (Jeffrey & Wandelt 2020, arXiv:2011.05991): its MSE ratio to the Wiener filter must
    # fall towards 1 as training runs.
    from skymoments.maps.eb import qu_to_eb_fourier

    sc = _gaussian_scenario()
    assert sc.is_gaussian_fixed()
    s_ee, s_bb = sc.mean_signal_power_2d()
    n_ee, n_bb = sc.true_noise_power_2d()
    with np.errstate(invalid="ignore", divide="ignore"):
        filt = np.nan_to_num(np.stack([s_ee / (s_ee + n_ee), s_bb / (s_bb + n_bb)]))
    test = sc.draw(np.random.default_rng(999), 256)
    wiener = np.fft.ifft2(qu_to_eb_fourier(test.data_qu, sc.patch) * filt).real
    wiener_mse = np.mean((wiener - test.target_eb) ** 2)

    ins, outs = fit_scalers(sc, 256, 0)
    torch.manual_seed(0)
    net = SpectralNet(width=16, n_layers=2, modes=8)  # modes=8 keeps every mode of 16x16
    module = MeanModule(net, functools.partial(torch.optim.AdamW, lr=3e-3), None, ins, outs)
    ratio = _WienerRatio(wiener_mse, test, ins, outs)
    dm = MomentsDataModule(sc, sc, batch_size=32, steps_per_epoch=20, n_val=32, seed=0)
    _trainer(max_epochs=6, callbacks=[ratio]).fit(module, dm)

    r = np.array(ratio.ratios)
    assert r[-1] < r[0]
    # The Wiener mean is the minimum-MSE estimator, so no network beats it beyond the
    # sampling noise of the test set: the cross term 2<(f - W)(W - truth)> has mean 0 and,
    # over 256 maps x 512 pixel values, a relative std of order 1e-3 for |f - W|^2 ~ 10%
    # of the Wiener MSE. 0.99 leaves a wide margin.
    assert r.min() > 0.99
    # "Approaches": predicting zero has ratio <|target|^2> / MSE_W ~ 5 here (the Wiener
    # filter removes ~80% of the E variance error), so 1.2 means the network is far
    # closer to the Wiener filter than to the trivial estimate.
    assert r[-1] < 1.2
