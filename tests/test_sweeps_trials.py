"""The ``trials`` sweeper: search spaces, the search loop, failed trials, and its configs."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import textwrap

import pytest
from hydra.core.override_parser.overrides_parser import OverridesParser
from optuna.distributions import CategoricalDistribution, FloatDistribution, IntDistribution

from skymoments.sweeps.space import format_value, parse_search_space, spec_to_distribution
from skymoments.sweeps.study import RESULTS_FILE, make_study, objective_value, run_search


def test_grammar_and_mapping_specs_give_the_same_distributions():
    # Hydra's sweep grammar and the mapping spelling describe the same Optuna distributions.
    space = parse_search_space(
        {
            "a": "tag(log, interval(1e-4, 1e-2))",
            "b": {"type": "float", "low": 1e-4, "high": 1e-2, "log": True},
            "c": "range(2, 9, 2)",
            "d": {"type": "int", "low": 2, "high": 8, "step": 2},
            "model": "unet,spectral",
            "e": {"type": "choice", "choices": ["unet", "spectral"]},
            "seed": 3,
        }
    )
    d = space.distributions
    assert d["a"] == d["b"] == FloatDistribution(1e-4, 1e-2, log=True)
    # range(2, 9, 2) is 2, 4, 6, 8 (stop excluded, as in Python): low 2, high 8, step 2.
    assert d["c"] == d["d"] == IntDistribution(2, 8, step=2)
    assert d["model"] == d["e"] == CategoricalDistribution(("unet", "spectral"))
    assert space.fixed == {"seed": "3"}


def test_command_line_overrides_replace_config_entries():
    space = parse_search_space(
        {"lr": "interval(0.1, 0.2)", "seed": 1}, ["lr=0.5", "seed=choice(1,2)", "name=x"]
    )
    assert space.distributions == {"seed": CategoricalDistribution((1, 2))}
    assert space.fixed == {"lr": "0.5", "name": "x"}
    assert space.overrides({"seed": 2}) == ["lr=0.5", "name=x", "seed=2"]


@pytest.mark.parametrize("value", [0.00123, 1e-05, 7, True, None, "dilated_resnet", "a b,c"])
def test_formatted_values_parse_back_to_themselves(value):
    # Round trip through Hydra's own override parser: what a trial asks for is what it gets.
    override = OverridesParser.create().parse_override(f"k={format_value(value)}")
    assert override.value() == value


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ({"type": "float", "low": 1.0, "high": 1.0}, "must be below"),
        ({"type": "float", "low": 0.0, "high": 1.0, "log": True}, "low > 0"),
        ({"type": "int", "low": 1, "high": 4.5}, "not whole"),
        ({"type": "choice", "choices": []}, "empty"),
        ({"type": "gauss", "low": 0, "high": 1}, "choose one of"),
        ({"type": "float", "low": 0, "hi": 1}, "unknown keys"),
    ],
)
def test_bad_specs_are_refused_with_the_key_named(spec, words):
    with pytest.raises(ValueError, match=words) as err:
        spec_to_distribution("train.optimizer.lr", spec)
    assert "train.optimizer.lr" in str(err.value)


def test_a_space_with_nothing_to_search_is_refused():
    with pytest.raises(ValueError, match="nothing to search"):
        parse_search_space({"seed": 1}, ["name=x"])


class _Return:
    def __init__(self, value):
        from hydra.core.utils import JobStatus

        self.status = JobStatus.COMPLETED
        self._return_value = value


def test_failed_trials_are_recorded_and_the_search_goes_on():
    # Objective (x - 0.3)^2 on [0, 1], minimum 0 at x = 0.3 (analytic). Trials above 0.8
    # "fail" (NaN, as run_job_safely returns for a failed sweep job); the study carries on.
    study = make_study("minimize", "random", seed=0)
    space = parse_search_space({"x": "interval(0, 1)"})
    calls = []

    def launch(batch, first_job):
        calls.append((len(batch), first_job))
        out = []
        for overrides in batch:
            x = float(overrides[0].split("=")[1])
            out.append(_Return(float("nan") if x > 0.8 else (x - 0.3) ** 2))
        return out

    result = run_search(study, space, launch, n_trials=10, n_jobs=4)
    assert calls == [(4, 0), (4, 4), (2, 8)]  # batches of n_jobs, numbered on
    xs = [t["params"]["x"] for t in result.trials]
    failed = [t for t in result.trials if t["state"] == "FAIL"]
    assert len(result.trials) == 10 and len(failed) == sum(x > 0.8 for x in xs)
    assert result.n_complete + result.n_failed == 10
    states = [t.state.name for t in study.trials]
    assert states.count("FAIL") == result.n_failed
    best = min((t for t in result.trials if t["value"] is not None), key=lambda t: t["value"])
    assert result.best_params == best["params"] and result.best_job == best["job"]
    assert math.isclose(result.best_value, (best["params"]["x"] - 0.3) ** 2)


def test_a_seeded_sampler_repeats_its_trials():
    def params(seed):
        study = make_study("min", "tpe", seed=seed)
        space = parse_search_space({"x": "interval(0, 1)", "m": "a,b"})
        res = run_search(
            study, space, lambda b, j: [_Return(len(o[0])) for o in b], n_trials=4, n_jobs=2
        )
        return [t["params"] for t in res.trials]

    assert params(5) == params(5)
    assert params(5) != params(6)


def test_none_and_non_numbers_are_failed_objectives():
    assert objective_value(_Return(None)) is None
    assert objective_value(_Return("x")) is None
    assert objective_value(_Return(float("inf"))) is None
    assert objective_value(_Return(2)) == 2.0


APP = textwrap.dedent(
    """
    import hydra

    from skymoments.tracking import run_job_safely, tracked_run


    def task(cfg):
        with tracked_run(cfg, run_name="trial") as run:
            run.log_config(cfg)
            if cfg.x > cfg.fail_above:
                raise RuntimeError(f"x={cfg.x} fails on purpose")
            value = (cfg.x - 0.5) ** 2 + (0.0 if cfg.kind == "b" else 1.0)
            run.log_metrics({"score": value})
        return value


    @hydra.main(version_base="1.3", config_path=".", config_name="config")
    def main(cfg):
        return run_job_safely(task, cfg, failed_value=float("nan"))


    if __name__ == "__main__":
        main()
    """
)

CONFIG = textwrap.dedent(
    """
    x: 0.0
    kind: a
    fail_above: 100.0
    tracking: {kind: local, root: store, uri: null, artifact_location: null,
               experiment: trials, register_as: null}
    hydra:
      job: {chdir: false}
      sweep: {dir: multirun/sweep}
      callbacks:
        sweep_tracking:
          _target_: skymoments.tracking.hydra_callbacks.SweepTracking
    """
)


@pytest.mark.slow
def test_trials_sweeper_searches_through_hydra_with_a_tracked_parent(tmp_path):
    # Objective (x - 0.5)^2 + [kind == a] (analytic minimum 0 at x = 0.5, kind = b); jobs
    # with x > 0 fail. Six trials, two per launched batch, through Hydra's basic launcher;
    # sampler seed 1 draws both failing and succeeding trials among the six.
    (tmp_path / "app.py").write_text(APP)
    (tmp_path / "config.yaml").write_text(CONFIG)
    env = {**os.environ, "HYDRA_FULL_ERROR": "1"}
    env.pop("SKYMOMENTS_PARENT_RUN_ID", None)
    cmd = [
        sys.executable, "app.py", "-m", "hydra/sweeper=trials",
        "hydra.sweeper.n_trials=6", "hydra.sweeper.n_jobs=2", "hydra.sweeper.seed=1",
        "x=interval(-2, 2)", "kind=choice(a, b)", "fail_above=0.0",
    ]  # fmt: skip
    proc = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr[-4000:]
    results = json.loads((tmp_path / "multirun/sweep" / RESULTS_FILE).read_text())
    trials = results["trials"]
    assert [t["job"] for t in trials] == list(range(6))
    for t in trials:
        assert (t["state"] == "FAIL") == (t["params"]["x"] > 0.0)
        if t["value"] is not None:
            expected = (t["params"]["x"] - 0.5) ** 2 + (t["params"]["kind"] == "a")
            assert math.isclose(t["value"], expected, rel_tol=1e-12)
    done = [t for t in trials if t["value"] is not None]
    assert 0 < len(done) < 6 and results["n_failed"] == 6 - len(done)
    best = min(done, key=lambda t: t["value"])
    assert results["best_params"] == best["params"]

    import mlflow

    client = mlflow.MlflowClient(f"sqlite:///{tmp_path / 'store' / 'mlflow.db'}")
    runs = client.search_runs([client.get_experiment_by_name("trials").experiment_id])
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert len(parents) == 1 and len(children) == 6
    parent = parents[0]
    assert parent.data.tags["skymoments.search_best_job"] == str(best["job"])
    assert math.isclose(parent.data.metrics["search/best_value"], best["value"])
    by_job = {int(c.data.tags["skymoments.job_num"]): c for c in children}
    for t in trials:
        child = by_job[t["job"]]
        assert child.info.status == ("FAILED" if t["state"] == "FAIL" else "FINISHED")
        assert child.data.tags["skymoments.sweep_id"] == parent.data.tags["skymoments.sweep_id"]
        assert f"x={t['params']['x']!r}" in child.data.tags["skymoments.overrides"]


def _compose(overrides):
    from hydra import compose, initialize_config_dir

    from skymoments.config import conf_dir

    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        return compose("config", overrides=overrides, return_hydra_config=True)


@pytest.mark.parametrize(
    ("name", "objective"), [("lr_width", "eval/mse_B"), ("calibration", "calib/crps")]
)
def test_hparams_search_configs_pick_the_trials_sweeper_and_parse(name, objective):
    cfg = _compose(["experiment=smoke", f"hparams_search={name}"])
    assert cfg.objective == objective
    assert cfg.hydra.sweeper._target_.endswith("skymoments_trials.trials_sweeper.TrialsSweeper")
    from omegaconf import OmegaConf

    space = parse_search_space(OmegaConf.to_container(cfg.hydra.sweeper.params, resolve=True))
    # Every searched key exists in the composed config, so no trial fails on a typo.
    for key in space.distributions:
        assert OmegaConf.select(cfg, key) is not None, key


def test_slurm_launcher_config_follows_the_trainer_and_renders_an_sbatch_script(
    tmp_path, monkeypatch
):
    import submitit
    from hydra_plugins.hydra_submitit_launcher.config import BaseQueueConf
    from omegaconf import OmegaConf

    cfg = _compose(
        ["experiment=smoke", "hydra/launcher=slurm", "trainer=ddp", "trainer.accelerator=gpu",
         "trainer.devices=4", "trainer.num_nodes=2", "hydra.launcher.partition=gpu"]
    )  # fmt: skip
    params = OmegaConf.to_container(cfg.hydra.launcher, resolve=True)
    assert (params["nodes"], params["tasks_per_node"], params["gpus_per_node"]) == (2, 4, 4)
    # The same key mapping as hydra_submitit_launcher's SlurmLauncher.launch, so that every
    # key of our config is one submitit accepts.
    params.pop("_target_")
    params.pop("submitit_folder")
    # submitit's SLURM executor only checks that an `srun` is on the PATH; nothing is run.
    fake_bin = tmp_path / "bin"
    fake_bin.mkdir()
    (fake_bin / "srun").write_text("#!/bin/sh\nexit 1\n")
    (fake_bin / "srun").chmod(0o755)
    monkeypatch.setenv("PATH", f"{fake_bin}{os.pathsep}{os.environ['PATH']}")
    executor = submitit.AutoExecutor(
        folder=str(tmp_path), cluster="slurm", slurm_max_num_timeout=params.pop("max_num_timeout")
    )
    base = set(OmegaConf.structured(BaseQueueConf).keys())
    executor.update_parameters(**{k if k in base else f"slurm_{k}": v for k, v in params.items()})
    text = executor._executor._make_submission_file_text("python -c pass", "uid")
    for line in ("--nodes=2", "--ntasks-per-node=4", "--gpus-per-node=4", "--partition=gpu"):
        assert f"#SBATCH {line}" in text, text
