"""A stopped `skymoments run` continues from its checkpoints as a new, linked run.

One tiny study (``experiment=smoke``) is started as a subprocess, stopped by SIGTERM once
its variance stage has saved an epoch, and resumed with ``train.resume=<run id>``; every
test reads that one pair of runs (and the refusals run against the same store).
"""

from __future__ import annotations

import glob
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import mlflow
import pytest
import torch
from omegaconf import OmegaConf

pytestmark = pytest.mark.slow

# smoke: 2 mean epochs and 3 batches of 8 maps per epoch; 6 variance epochs so that the
# stop lands inside the variance stage (epochs of a second or two on a 2-core machine).
STUDY = (
    "experiment=smoke",
    "trainer.enable_progress_bar=false",
    "train.max_epochs_var=6",
    "train.patience=100",
)
MEAN_EPOCHS, BATCHES_PER_EPOCH, BATCH_SIZE, VAR_EPOCHS = 2, 3, 8, 6


def _cli(cwd, *args):
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)


def _client(root):
    return mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("resume")
    root = cwd / "store"
    args = [*STUDY, f"tracking.root={root}"]
    proc = subprocess.Popen(
        [sys.executable, "-m", "skymoments.cli", "run", *args],
        cwd=cwd,
        env={**os.environ, "SKYMOMENTS_HEARTBEAT_S": "0.5"},
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )
    pattern = str(cwd / "outputs" / "smoke" / "*" / "checkpoints" / "var" / "last.ckpt")
    while proc.poll() is None and not glob.glob(pattern):
        time.sleep(0.2)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate()
    assert proc.returncode == 143, err[-3000:]
    client = _client(root)
    (stopped,) = client.search_runs([client.get_experiment_by_name("smoke").experiment_id])
    (job,) = [Path(p).parents[2] for p in glob.glob(pattern)]
    resumed = _cli(cwd, "run", *args, f"train.resume={stopped.info.run_id}")
    assert resumed.returncode == 0, resumed.stderr[-3000:]
    runs = client.search_runs([stopped.info.experiment_id])
    (new,) = [r for r in runs if r.info.run_id != stopped.info.run_id]
    return SimpleNamespace(
        cwd=cwd,
        root=root,
        args=args,
        job=job,
        client=client,
        old_id=stopped.info.run_id,
        old=client.get_run(stopped.info.run_id),
        new=new,
        out=resumed.stdout,
    )


def test_resumed_run_finishes_tagged_as_a_continuation(study):
    new, old = study.new, study.old
    assert new.info.status == "FINISHED"
    assert new.data.tags["skymoments.resumed_from"] == study.old_id
    assert new.data.params["train.resume"] == study.old_id
    assert old.info.status == "KILLED"
    assert old.data.tags["skymoments.stopped_by"] == "SIGTERM"
    assert old.data.tags["skymoments.resumed_by"] == new.info.run_id
    assert f"resuming run {study.old_id} (KILLED)" in study.out
    # A continuation of the same study: same experiment, same params but the resume key.
    assert new.info.experiment_id == old.info.experiment_id
    differing = {
        k
        for k in set(old.data.params) | set(new.data.params)
        if old.data.params.get(k) != new.data.params.get(k)
    }
    # augment.split and eval.sets are logged by the study itself, the stopped run never got
    # that far.
    assert differing <= {"train.resume", "augment.split", "eval.sets"}


def test_finished_mean_stage_is_not_trained_again(study):
    metrics = study.new.data.metrics
    # No mean-stage epoch ran in the continuation: no training loss of that stage at all.
    assert study.client.get_metric_history(study.new.info.run_id, "train/loss_mean") == []
    assert study.client.get_metric_history(study.old_id, "train/loss_mean") != []
    # Its figures are the stopped run's: every epoch, each of batches x maps (a count).
    assert metrics["perf/epochs_mean"] == MEAN_EPOCHS
    assert metrics["perf/maps_seen_mean"] == MEAN_EPOCHS * BATCHES_PER_EPOCH * BATCH_SIZE


def test_interrupted_variance_stage_resumes_from_its_last_epoch(study):
    # The stopped run's last variance checkpoint, read back as the resume read it.
    last = torch.load(study.job / "checkpoints" / "var" / "last.ckpt", weights_only=True)
    done = int(last["epoch"]) + 1  # epochs the stopped run completed
    assert 1 <= done < VAR_EPOCHS
    metrics = study.new.data.metrics
    assert metrics["perf/epochs_var"] == VAR_EPOCHS
    # The continuation trained only the epochs left (maps counted, not timed).
    assert metrics["perf/maps_seen_var"] == (VAR_EPOCHS - done) * BATCHES_PER_EPOCH * BATCH_SIZE
    # The best validation loss carries over the stopped run's epochs: never above the best
    # of those (the same float32 values, logged by both runs).
    before = study.client.get_metric_history(study.old_id, "val/loss_var")
    assert before
    assert metrics["val/loss_var_best"] <= min(m.value for m in before)


def test_resume_with_another_config_is_refused_in_one_line(study):
    got = _cli(study.cwd, "run", *study.args, f"train.resume={study.old_id}", "seed=1")
    assert got.returncode == 2, got.stderr[-3000:]
    last = got.stderr.strip().splitlines()[-1]
    assert last.startswith(f"skymoments: train.resume={study.old_id}: the config differs")
    assert "seed (0 -> 1)" in last
    assert "Traceback" not in got.stderr


def test_run_without_checkpoint_is_refused_in_one_line(study, tmp_path):
    from skymoments.tracking import tracked_run

    # A run of the same config that stopped before its first epoch ended: its job folder
    # holds no checkpoint.
    cfg = OmegaConf.load(study.job / ".hydra" / "config.yaml")
    empty = tmp_path / "job"
    empty.mkdir()
    with (
        pytest.raises(RuntimeError),
        tracked_run(cfg, run_name="early", tags={"skymoments.output_dir": str(empty)}) as run,
    ):
        run.log_config(cfg)
        raise RuntimeError("stopped before its first epoch")
    got = _cli(study.cwd, "run", *study.args, f"train.resume={run.run_id}")
    assert got.returncode == 2, got.stderr[-3000:]
    last = got.stderr.strip().splitlines()[-1]
    assert last == (
        f"skymoments: run {run.run_id} has no checkpoint to resume from in "
        f"{empty / 'checkpoints'} (it stopped before its first epoch ended, or was trained "
        "before runs kept last.ckpt); start it again without train.resume"
    )
    assert study.client.get_run(run.run_id).info.status == "FAILED"  # left as it was


def test_finished_or_unknown_run_is_refused(study):
    from skymoments.tracking.resume import ResumeRefused, resume_point

    cfg = OmegaConf.create(
        {"tracking": {"kind": "local", "root": str(study.root), "experiment": "smoke"}}
    )
    with pytest.raises(ResumeRefused, match="FINISHED, there is nothing to resume"):
        resume_point(cfg, study.new.info.run_id)
    with pytest.raises(ResumeRefused, match="no such run"):
        resume_point(cfg, "0" * 32)
