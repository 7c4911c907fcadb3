"""``skymoments evaluate``: a tracked model re-evaluated on another scenario, as a child run."""

from __future__ import annotations

import subprocess
import sys

import mlflow
import numpy as np
import pytest
from hydra import compose, initialize_config_dir
from omegaconf import OmegaConf

from skymoments.config import conf_dir
from skymoments.study.reevaluate import (
    apply_overrides,
    evaluate_run,
    rewrite_argv,
    scenario_overrides,
)

CALIB = (
    "calib/z_mean_E",
    "calib/z_std_E",
    "calib/cov68_E",
    "calib/cov95_E",
    "calib/ks_E",
    "calib/z_mean_B",
    "calib/z_std_B",
    "calib/cov68_B",
    "calib/cov95_B",
    "calib/ks_B",
    "eval/mse_E",
    "eval/mse_B",
    "eval/mse_ratio_wiener_E",
    "eval/mse_ratio_wiener_B",
)


def _compose(*overrides: str, command: str = "run"):
    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        return compose(command, overrides=list(overrides))


def _skymoments(*args: str, cwd) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=1800)


# ---------------------------------------------------------------- overrides, no store


def test_run_id_spelling_and_scenario_overrides_reach_hydra_unrefused():
    args = ["run_id=abc", "prior.a_fg.value=2", "sky=gaussian", "tracking.root=s", "-m"]
    assert rewrite_argv(args) == [
        "evaluate.run_id=abc",
        "++prior.a_fg.value=2",
        "sky=gaussian",
        "tracking.root=s",
        "-m",
    ]
    task = ["evaluate.run_id=abc", "++prior.a_fg.value=2", "sky=gaussian", "tracking.root=s"]
    assert scenario_overrides(task) == ["prior.a_fg.value=2", "sky=gaussian"]


def test_overrides_apply_on_top_of_the_training_config():
    train = _compose("experiment=smoke")
    overrides = ["prior.a_fg.low=2", "++prior.a_fg.high=4", "sky=gaussian"]
    composed = _compose(*overrides, "evaluate.run_id=0", command="evaluate")
    out = apply_overrides(train, overrides, composed=composed)
    assert (out.prior.a_fg.low, out.prior.a_fg.high) == (2, 4)
    assert out.prior.a_fg.dist == train.prior.a_fg.dist
    # A group choice replaces the node with the one Hydra composed from conf/sky/gaussian.yaml
    # (with its defaults list: the shared CMB cosmology).
    assert out.sky.foreground._target_.endswith("GaussianPowerLaw")
    assert OmegaConf.to_container(out.sky) == OmegaConf.to_container(composed.sky)
    assert out.sky.cmb == train.sky.cmb
    # The rest of the training config is untouched, and so is the input.
    assert out.model == train.model and out.seed == train.seed
    assert train.sky.foreground._target_.endswith("Filaments")
    one = apply_overrides(train, ["sky.foreground.amplitude_uk=6"])
    assert one.sky.foreground.amplitude_uk == 6 and one.sky.cmb == train.sky.cmb


@pytest.mark.parametrize(
    "override, match",
    [
        ("model.mean.width=8", r"only the validation scenario can change"),
        ("train.n_val=4", r"drop the train override"),
        ("~prior.r", r"deleting keys"),
        ("sky=gaussian", r"needs the config Hydra composed"),
    ],
)
def test_training_overrides_are_refused_with_the_fix(override, match):
    with pytest.raises(ValueError, match=match):
        apply_overrides(_compose("experiment=smoke"), [override])


# ---------------------------------------------------------------- against a store


@pytest.fixture(scope="module")
def config_only_run(tmp_path_factory):
    """A FINISHED run holding only a smoke config (no model): enough for the refusals."""
    from skymoments.tracking import tracked_run

    root = tmp_path_factory.mktemp("store")
    cfg = _compose("experiment=smoke", f"tracking.root={root}")
    with tracked_run(cfg, run_name="config-only") as run:
        run.log_config(cfg)
    return root, run.run_id


def _eval_cfg(root, run_id, *extra):
    overrides = [f"tracking.root={root}", f"evaluate.run_id={run_id}", *extra]
    return _compose(*overrides, command="evaluate")


@pytest.mark.slow
def test_other_patch_geometry_is_refused(config_only_run, tmp_path):
    root, run_id = config_only_run
    with pytest.raises(ValueError, match=r"trained on a 32x32 patch of 6-arcmin.*64x64 of 3"):
        evaluate_run(_eval_cfg(root, run_id), ["patch=flat64"], out=tmp_path)
    with pytest.raises(ValueError, match=r"training geometry"):
        evaluate_run(_eval_cfg(root, run_id), ["patch.pixel_arcmin=3"], out=tmp_path)


@pytest.mark.slow
def test_unknown_run_id_is_a_clear_error(config_only_run, tmp_path):
    root, _ = config_only_run
    with pytest.raises(ValueError, match=r"no run 0123456789abcdef0123456789abcdef in .*tracking"):
        evaluate_run(_eval_cfg(root, "0123456789abcdef0123456789abcdef"), [], out=tmp_path)
    with pytest.raises(ValueError, match=r"not an MLflow run id"):
        evaluate_run(_eval_cfg(root, "not-an-id"), [], out=tmp_path)
    with pytest.raises(ValueError, match=r"no tracking store"):
        evaluate_run(_eval_cfg(tmp_path / "nowhere", "0" * 32), [], out=tmp_path)


# ---------------------------------------------------------------- end to end


@pytest.mark.slow
def test_evaluate_logs_a_finished_child_run_of_the_trained_run(tmp_path):
    root = tmp_path / "store"
    # The smallest training that still logs a model: the test is about the plumbing.
    tiny = ["train.steps_per_epoch=2", "train.max_epochs_mean=1", "train.max_epochs_var=1"]
    tiny += ["train.num_workers=0", "train.fit_scalers_n=8", "trainer.enable_progress_bar=false"]
    proc = _skymoments("run", "experiment=smoke", *tiny, f"tracking.root={root}", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-4000:]
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    exp = client.get_experiment_by_name("smoke")
    (parent,) = client.search_runs([exp.experiment_id])
    pid = parent.info.run_id

    # A foreground twice as bright as any the network was trained on.
    proc = _skymoments(
        "evaluate",
        f"run_id={pid}",
        "prior.a_fg.low=2",
        "prior.a_fg.high=4",
        f"tracking.root={root}",
        cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr[-4000:]
    children = client.search_runs([exp.experiment_id], f"tags.mlflow.parentRunId = '{pid}'")
    assert len(children) == 1
    child = children[0]
    assert child.info.status == "FINISHED"
    assert child.data.tags["skymoments.evaluated_run"] == pid
    for key in CALIB:
        assert key in child.data.metrics, key
    assert child.data.params["prior.a_fg.low"] == "2"
    assert child.data.params["prior.a_fg.high"] == "4"
    assert child.data.params["model.mean.width"] == parent.data.params["model.mean.width"]
    assert child.info.run_id in proc.stdout and pid in proc.stdout

    # Same code path as `run`: re-evaluating on the run's own evaluation stream with no
    # override reproduces the run's metrics. The reloaded network is the pickled float32
    # module, so outputs agree to float32 round-off; metrics that average them agree to
    # well under 1e-4 relative.
    same = evaluate_run(_eval_cfg(root, pid, "evaluate.stream=eval"), [], out=tmp_path / "same")
    for key in CALIB:
        np.testing.assert_allclose(
            same.metrics[key], parent.data.metrics[key], rtol=1e-4, atol=1e-6, err_msg=key
        )

    # A re-evaluation is not itself a model to evaluate.
    with pytest.raises(ValueError, match=r"itself a re-evaluation"):
        evaluate_run(_eval_cfg(root, child.info.run_id), [], out=tmp_path / "again")
