"""``trainer=ddp``: one training under Lightning DDP (two CPU processes, gloo), one MLflow run.

Rank zero owns the run; the other rank is relaunched as the same Hydra job
(``skymoments.moments.distributed``), trains its share of each batch and creates nothing in
the store.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import mlflow
import pytest

from test_run_smoke import NAMED_METRICS


def _run(tmp_path, *overrides: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "HYDRA_FULL_ERROR": "1"}
    for key in ("SKYMOMENTS_PARENT_RUN_ID", "SKYMOMENTS_SWEEP_DIR", "SKYMOMENTS_RUN_ID"):
        env.pop(key, None)
    cmd = [sys.executable, "-m", "skymoments.cli", "run", *overrides]
    return subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True)


@pytest.mark.slow
def test_ddp_on_two_cpu_processes_gives_one_run_with_the_contract_metrics(tmp_path):
    root = tmp_path / "store"
    proc = _run(
        tmp_path, "experiment=smoke", "trainer=ddp", "trainer.enable_progress_bar=false",
        "train.num_workers=0", f"tracking.root={root}",
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-4000:]
    # Two processes joined one process group (Lightning's own log lines, one per rank).
    for rank in (0, 1):
        assert f"GLOBAL_RANK: {rank}, MEMBER: {rank + 1}/2" in proc.stderr

    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    experiments = client.search_experiments()
    runs = client.search_runs([e.experiment_id for e in experiments])
    assert len(runs) == 1, [(r.info.run_name, r.data.tags.get("skymoments.run_kind")) for r in runs]
    run = runs[0]
    assert run.info.status == "FINISHED"
    assert run.data.params["trainer.strategy"] == "ddp"
    assert run.data.params["trainer.devices"] == "2"
    missing = [k for k in NAMED_METRICS if k not in run.data.metrics]
    assert not missing, missing

    # Rank one ran as the same job: in the job's folder, with its own log file, and without
    # rewriting the job's .hydra/ record (which keeps rank zero's command line).
    job_dir = Path(run.data.tags["skymoments.output_dir"])
    assert (job_dir / "run_rank1.log").is_file()
    overrides = (job_dir / ".hydra" / "overrides.yaml").read_text()
    assert "trainer=ddp" in overrides and "hydra.run.dir" not in overrides


@pytest.mark.slow
def test_ddp_job_in_a_submitit_sweep_is_one_child_run(tmp_path):
    # Inside a -m sweep the process's argv is the whole sweep; rank one must join its own job
    # (the job's overrides), not start the sweep again. submitit_local runs the job in a
    # process of its own, as submitit_slurm does on a cluster.
    root = tmp_path / "store"
    proc = _run(
        tmp_path, "-m", "hydra/launcher=submitit_local", "experiment=smoke", "trainer=ddp",
        "seed=3", "trainer.enable_progress_bar=false", "train.num_workers=0",
        "train.steps_per_epoch=2", "train.max_epochs_mean=1", "train.max_epochs_var=1",
        f"tracking.root={root}",
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-4000:]
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    runs = client.search_runs([e.experiment_id for e in client.search_experiments()])
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert len(parents) == 1 and len(children) == 1
    child = children[0]
    assert child.info.status == "FINISHED"
    assert child.data.params["seed"] == "3" and child.data.params["trainer.devices"] == "2"
    missing = [k for k in NAMED_METRICS if k not in child.data.metrics]
    assert not missing, missing
    job_dir = Path(child.data.tags["skymoments.output_dir"])
    assert (job_dir / "run_rank1.log").is_file()


@pytest.mark.slow
def test_basic_launcher_runs_one_ddp_job_and_refuses_a_second_in_the_same_process(tmp_path):
    # Job 0 joins its own ranks even though argv holds the whole sweep. Job 1 runs in the
    # same process, whose DDP process group is job 0's: it must fail with the advice, not
    # hang, and the sweep must go on.
    root = tmp_path / "store"
    proc = _run(
        tmp_path, "-m", "experiment=smoke", "trainer=ddp", "seed=0,1",
        "trainer.enable_progress_bar=false", "train.num_workers=0", "train.steps_per_epoch=2",
        "train.max_epochs_mean=1", "train.max_epochs_var=1", f"tracking.root={root}",
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-4000:]
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    runs = client.search_runs([e.experiment_id for e in client.search_experiments()])
    children = {r.data.params["seed"]: r for r in runs if "mlflow.parentRunId" in r.data.tags}
    assert sorted(children) == ["0", "1"] and len(runs) == 3
    assert children["0"].info.status == "FINISHED"
    assert children["1"].info.status == "FAILED"
    assert "one process per job" in children["1"].data.tags["skymoments.error"]
