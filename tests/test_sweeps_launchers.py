"""Sweeps through Hydra launchers: joblib in parallel, submitit's local executor, and a search.

Each sweep writes to one SQLite store and must give one parent run and a FINISHED, tagged
child per job, with every contract metric, and leave the store intact.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys

import mlflow
import pytest

from skymoments.sweeps.study import RESULTS_FILE
from test_run_smoke import NAMED_METRICS

# The smoke study made smaller still: one epoch of two batches per stage, 8 validation maps,
# draws in the main process. The numbers are meaningless; the tracking is what is tested.
TINY = (
    "experiment=smoke", "train.steps_per_epoch=2", "train.n_val=8", "train.max_epochs_mean=1",
    "train.max_epochs_var=1", "train.num_workers=0", "train.fit_scalers_n=8",
    "trainer.enable_progress_bar=false",
)  # fmt: skip


def sweep(tmp_path, *overrides: str) -> tuple[subprocess.CompletedProcess, mlflow.MlflowClient]:
    """Run ``skymoments run -m <TINY> <overrides>`` in ``tmp_path``; return it and a client."""
    root = tmp_path / "store"
    env = {**os.environ, "HYDRA_FULL_ERROR": "1"}
    for key in ("SKYMOMENTS_PARENT_RUN_ID", "SKYMOMENTS_SWEEP_DIR", "SKYMOMENTS_RUN_ID"):
        env.pop(key, None)
    cmd = [sys.executable, "-m", "skymoments.cli", "run", "-m", *TINY, *overrides,
           f"tracking.root={root}"]  # fmt: skip
    proc = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr[-4000:]
    return proc, mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")


def parent_and_children(client, n_jobs: int):
    """The sweep's runs, checked: one parent, ``n_jobs`` FINISHED children tagged with it."""
    exp = client.get_experiment_by_name("smoke")
    runs = client.search_runs([exp.experiment_id])
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert len(parents) == 1, [r.data.tags.get("skymoments.run_kind") for r in runs]
    parent = parents[0]
    assert parent.info.status == "FINISHED"
    assert len(children) == n_jobs
    assert parent.data.tags["skymoments.n_finished_children"] == str(n_jobs)
    sweep_id = parent.data.tags["skymoments.sweep_id"]
    for child in children:
        tags = child.data.tags
        assert child.info.status == "FINISHED", tags.get("skymoments.error")
        assert tags["mlflow.parentRunId"] == parent.info.run_id
        assert tags["skymoments.sweep_id"] == sweep_id
        missing = [k for k in NAMED_METRICS if k not in child.data.metrics]
        assert not missing, missing
    return parent, children


def store_is_intact(root) -> None:
    with sqlite3.connect(root / "mlflow.db") as db:
        assert db.execute("PRAGMA integrity_check").fetchall() == [("ok",)]


@pytest.mark.slow
def test_joblib_runs_jobs_in_parallel_into_one_store(tmp_path):
    _, client = sweep(tmp_path, "hydra/launcher=joblib", "hydra.launcher.n_jobs=2", "seed=0,1")
    parent, children = parent_and_children(client, 2)
    assert parent.data.tags["skymoments.launcher"].endswith("JoblibLauncher")
    # Each job is tagged with its own overrides: the two seeds, once each.
    seeds = []
    for child in children:
        overrides = child.data.tags["skymoments.overrides"].split()
        seeds += [o.split("=")[1] for o in overrides if o.startswith("seed=")]
        assert child.data.params["seed"] == seeds[-1]
    assert sorted(seeds) == ["0", "1"]
    # The jobs ran side by side (their runs overlap in time), so the store had concurrent
    # writers, and every run landed whole.
    spans = sorted((c.info.start_time, c.info.end_time) for c in children)
    assert any(later[0] < earlier[1] for earlier, later in zip(spans, spans[1:], strict=False))
    store_is_intact(tmp_path / "store")


@pytest.mark.slow
def test_submitit_local_sweep_gives_a_parent_and_two_children(tmp_path):
    _, client = sweep(tmp_path, "hydra/launcher=submitit_local", "seed=0,1")
    parent, children = parent_and_children(client, 2)
    assert parent.data.tags["skymoments.launcher"].endswith("submitit_launcher.LocalLauncher")
    assert sorted(c.data.params["seed"] for c in children) == ["0", "1"]
    for child in children:
        assert "seed=" in child.data.tags["skymoments.overrides"]
    store_is_intact(tmp_path / "store")


@pytest.mark.slow
def test_hparams_search_runs_trials_of_the_run_command(tmp_path):
    # Two trials of the lr_width search (objective eval/mse_B), both in one launched batch.
    _, client = sweep(
        tmp_path, "hparams_search=lr_width", "hydra.sweeper.n_trials=2", "hydra.sweeper.n_jobs=2"
    )
    parent, children = parent_and_children(client, 2)
    sweep_dir = parent.data.tags["skymoments.sweep_dir"]
    results = json.loads(open(os.path.join(sweep_dir, RESULTS_FILE)).read())
    assert results["objective"] == "eval/mse_B" and results["n_complete"] == 2
    by_job = {int(c.data.tags["skymoments.job_num"]): c for c in children}
    for trial in results["trials"]:
        child = by_job[trial["job"]]
        # The trial's value is what the job logged on the validation set (the sets that
        # choose, never the test set whose eval/* figures are reported).
        assert trial["value"] == pytest.approx(child.data.metrics["valid/eval/mse_B"], rel=1e-12)
        assert trial["value"] != child.data.metrics["eval/mse_B"]
        for key, value in trial["params"].items():
            assert child.data.params[key] == str(value)
    best = min(results["trials"], key=lambda t: t["value"])
    assert results["best_params"] == best["params"]
    assert parent.data.tags["skymoments.search_best_job"] == str(best["job"])
    store_is_intact(tmp_path / "store")
