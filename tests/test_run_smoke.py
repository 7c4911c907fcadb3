"""`skymoments run`: a smoke study is tracked end to end; sweeps give parent and children runs."""

from __future__ import annotations

import subprocess
import sys

import mlflow
import pytest

NAMED_METRICS = (
    "calib/z_mean_E",
    "calib/z_std_E",
    "calib/cov68_E",
    "calib/cov95_E",
    "calib/cov997_E",
    "calib/z_mean_B",
    "calib/z_std_B",
    "calib/cov68_B",
    "calib/cov95_B",
    "calib/cov997_B",
    "calib/ks_E",
    "calib/ks_B",
    "eval/mse_E",
    "eval/mse_B",
    "eval/mse_ratio_wiener_E",
    "eval/mse_ratio_wiener_B",
    "train/loss_mean",
    "val/loss_mean",
    "train/loss_var",
    "val/loss_var",
    "perf/train_samples_per_s",
)
NAMED_ARTIFACTS = (
    "config/resolved.yaml",
    "maps/grid.png",
    "plots/z_hist.png",
    "plots/coverage.png",
    "plots/spectra.png",
    "calibration/arrays.npz",
    "maps/posterior.npz",
    "maps/posterior.fits",
)


def _skymoments(*args: str, cwd) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=900)


def _client(root):
    uri = f"sqlite:///{root / 'mlflow.db'}"
    return mlflow.MlflowClient(tracking_uri=uri)


def _runs(client, experiment: str):
    exp = client.get_experiment_by_name(experiment)
    assert exp is not None, f"no experiment {experiment!r}"
    return client.search_runs([exp.experiment_id])


def _artifact_paths(client, run_id: str, path: str = "") -> set[str]:
    out = set()
    for item in client.list_artifacts(run_id, path):
        if item.is_dir:
            out |= _artifact_paths(client, run_id, item.path)
        else:
            out.add(item.path)
    return out


@pytest.mark.slow
def test_smoke_run_is_finished_with_named_metrics_and_artifacts(tmp_path):
    root = tmp_path / "store"
    proc = _skymoments("run", "experiment=smoke", f"tracking.root={root}", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-4000:]
    client = _client(root)
    runs = _runs(client, "smoke")
    assert len(runs) == 1
    run = runs[0]
    assert run.info.status == "FINISHED"
    for key in NAMED_METRICS:
        assert key in run.data.metrics, key
    assert run.data.params["patch.npix"] == "32"
    _check_params_are_the_runs_own(run)
    paths = _artifact_paths(client, run.info.run_id)
    for path in NAMED_ARTIFACTS:
        assert path in paths, (path, sorted(paths))
    _check_model_reloads(client, run, root, tmp_path)
    assert "mlflow ui --backend-store-uri" in proc.stdout
    assert run.info.run_id in proc.stdout


# Nodes of the other commands' primary configs (conf/predict.yaml, compare.yaml, ...).
OTHER_COMMANDS = ("predict", "compare", "evaluate", "settle")


def _check_params_are_the_runs_own(run):
    # `run` composes conf/run.yaml: its MLflow params (read back through the client) hold
    # the study's keys and no key of another command's node.
    params = run.data.params
    foreign = sorted(k for k in params if k.split(".", 1)[0] in OTHER_COMMANDS)
    assert not foreign, foreign
    assert "???" not in params.values()
    for key in ("model.mean._target_", "train.optimizer.lr", "sky.foreground._target_", "seed"):
        assert key in params, key


def _check_model_reloads(client, run, root, tmp_path):
    # The logged model, reloaded through MLflow, reproduces the posterior the run wrote for
    # its evaluation maps (regenerated here from the same config and seed stream).
    import numpy as np
    from hydra import compose, initialize_config_dir

    from skymoments.calibration.report import read_posterior
    from skymoments.config import conf_dir
    from skymoments.moments.pipeline import predict_moments
    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.seeds import streams
    from skymoments.tracking import download_artifact, load_model

    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        cfg = compose("config", overrides=["experiment=smoke"])
    scenario = scenario_from_config(cfg)
    test = scenario.draw_components(streams(int(cfg.seed), "eval")["eval"], int(cfg.train.n_val))
    model = load_model(run.info.run_id, f"sqlite:///{root / 'mlflow.db'}")
    mean, std = predict_moments(model, test["data_qu"])
    logged = download_artifact(
        f"sqlite:///{root / 'mlflow.db'}", run.info.run_id, "maps/posterior.npz", tmp_path / "dl"
    )
    mean0, std0, _, _ = read_posterior(logged)
    # Same float32 network on the same inputs: equal up to float32 round-off.
    np.testing.assert_allclose(mean, mean0, rtol=1e-4, atol=1e-4 * np.abs(mean0).max())
    np.testing.assert_allclose(std, std0, rtol=1e-4, atol=1e-4 * std0.max())


@pytest.mark.slow
def test_sweep_gives_parent_and_children_and_survives_a_failed_job(tmp_path):
    # The second job's weight decay passes the config checks (they check the learning rate,
    # not every optimizer keyword) and is refused by torch.optim.AdamW at run time, after its
    # run was opened: that job must be FAILED and the first must still finish.
    root = tmp_path / "store"
    proc = _skymoments(
        "run",
        "-m",
        "experiment=smoke",
        "train.optimizer.weight_decay=0.0,-1.0",
        f"tracking.root={root}",
        cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr[-4000:]
    client = _client(root)
    runs = _runs(client, "smoke")
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert len(parents) == 1 and len(children) == 2
    assert {c.data.tags["mlflow.parentRunId"] for c in children} == {parents[0].info.run_id}
    status = {c.data.params["train.optimizer.weight_decay"]: c.info.status for c in children}
    assert status == {"0.0": "FINISHED", "-1.0": "FAILED"}
