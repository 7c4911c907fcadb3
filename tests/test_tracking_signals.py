"""A stopped `skymoments run` is never FINISHED: SIGTERM, SIGINT and SIGKILL on a real run.

Each test starts a tiny study (``experiment=smoke``, with enough epochs that it is still
training when the signal comes) as a subprocess, waits until the store holds its first
training loss, sends the signal, then reads the store back with the MLflow client. The store
also holds an earlier finished run, which must come through intact.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sqlite3
import subprocess
import sys
import time

import mlflow
import pytest
from omegaconf import OmegaConf

pytestmark = pytest.mark.slow

HEARTBEAT_S = 0.5
# Long enough to still be training when the signal arrives, short enough to end by itself.
TRAINING = ("train.max_epochs_mean=200", "train.patience=200")


@pytest.fixture
def store(tmp_path):
    """A store holding one earlier FINISHED run."""
    from skymoments.tracking import tracked_run

    root = tmp_path / "store"
    tracking = {"kind": "local", "root": str(root), "experiment": "smoke"}
    cfg = OmegaConf.create({"tracking": tracking})
    with tracked_run(cfg, run_name="earlier") as run:
        run.log_metrics({"eval/mse_B": 1.0})
    return root, run.run_id


def _start(tmp_path, root) -> subprocess.Popen:
    env = {**os.environ, "SKYMOMENTS_HEARTBEAT_S": str(HEARTBEAT_S)}
    cmd = [
        sys.executable,
        "-m",
        "skymoments.cli",
        "run",
        "experiment=smoke",
        f"tracking.root={root}",
        "trainer.enable_progress_bar=false",
        *TRAINING,
    ]
    return _spawn(cmd, tmp_path, env)


def _spawn(cmd, cwd, env):
    """Start ``cmd`` in a session of its own, so a signal meant for it never reaches pytest."""
    return subprocess.Popen(
        cmd,
        cwd=cwd,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )


def _query(db, sql):
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        return con.execute(sql).fetchall()


def _wait_for_training(proc, db) -> None:
    """Poll the store until the new run has logged a training loss (the study is training)."""
    while proc.poll() is None:
        if db.is_file():
            try:
                if _query(db, "SELECT 1 FROM metrics WHERE key = 'train/loss_mean' LIMIT 1"):
                    return
            except sqlite3.Error:
                pass  # tables not created yet
        time.sleep(0.2)
    out, err = proc.communicate()
    pytest.fail(f"the run ended (exit {proc.returncode}) before training started:\n{err[-3000:]}")


def _runs(root):
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    exp = client.get_experiment_by_name("smoke")
    return client, {r.info.run_name: r for r in client.search_runs([exp.experiment_id])}


def _store_intact(root, earlier_id):
    (ok,) = _query(root / "mlflow.db", "PRAGMA integrity_check")[0]
    assert ok == "ok"
    client, runs = _runs(root)
    earlier = client.get_run(earlier_id)
    assert earlier.info.status == "FINISHED"
    assert earlier.data.metrics == {"eval/mse_B": 1.0}


def _stop(tmp_path, store, signum):
    root, earlier_id = store
    proc = _start(tmp_path, root)
    _wait_for_training(proc, root / "mlflow.db")
    os.killpg(proc.pid, signum) if signum == signal.SIGINT else proc.send_signal(signum)
    out, err = proc.communicate()
    _store_intact(root, earlier_id)
    client, runs = _runs(root)
    return proc.returncode, out, err, runs["smoke"]


@pytest.mark.parametrize(
    ("signum", "code", "line"),
    [(signal.SIGTERM, 143, "stopped by SIGTERM"), (signal.SIGINT, 130, "interrupted")],
)
def test_stopped_run_is_killed_with_one_line_and_nonzero_exit(tmp_path, store, signum, code, line):
    # Ctrl-C in a terminal reaches the whole foreground process group: SIGINT goes to the
    # group; SIGTERM, as a scheduler or `timeout` sends it, to the process.
    returncode, out, err, run = _stop(tmp_path, store, signum)
    assert returncode == code, err[-3000:]
    assert run.info.status == "KILLED"
    assert run.data.tags["skymoments.stopped_by"] == signal.Signals(signum).name
    last = err.strip().splitlines()[-1]
    assert last == f"skymoments: {line}: run {run.info.run_id} is marked KILLED in " + (
        f"sqlite:///{store[0] / 'mlflow.db'}"
    ), err[-3000:]
    assert "Traceback" not in err


def test_sigkilled_run_is_found_by_its_stopped_heartbeat(tmp_path, store):
    returncode, _, _, run = _stop(tmp_path, store, signal.SIGKILL)
    assert returncode == -signal.SIGKILL
    # Nothing can run on SIGKILL: the store still says RUNNING ...
    assert run.info.status == "RUNNING"
    beat_ms = int(run.data.tags["skymoments.heartbeat"])
    assert float(run.data.tags["skymoments.heartbeat_s"]) == HEARTBEAT_S
    # ... but the heartbeat was kept while it trained (later than the run's start) ...
    assert beat_ms > run.info.start_time
    # ... and stops: once 4 periods have passed, `compare` and `settle` call the run lost.
    time.sleep(max(0.0, beat_ms / 1000 + 4 * HEARTBEAT_S + 0.5 - time.time()))
    root = store[0]
    compare = _cli(
        tmp_path,
        "compare",
        f"tracking.root={root}",
        "compare.experiment=smoke",
        "compare.log_report=false",
        f"compare.out={tmp_path / 'compare.html'}",
    )
    assert compare.returncode == 0, compare.stderr[-3000:]
    assert "LOST" in compare.stdout
    assert f"lost: run {run.info.run_id}" in compare.stdout
    # The HTML report says the same as the terminal table: the run's row shows LOST.
    report = (tmp_path / "compare.html").read_text()
    row = report.split(f'data-run-id="{run.info.run_id}"', 1)[1].split("</tr>", 1)[0]
    assert '<td class="text status-LOST">LOST</td>' in row
    assert "RUNNING" not in row
    listed = _cli(tmp_path, "settle", f"tracking.root={root}")
    assert listed.returncode == 0, listed.stderr[-3000:]
    assert f"lost: run {run.info.run_id} (smoke)" in listed.stdout
    assert _runs(root)[1]["smoke"].info.status == "RUNNING"  # listing changes nothing
    marked = _cli(tmp_path, "settle", f"tracking.root={root}", "settle.mark=true")
    assert marked.returncode == 0, marked.stderr[-3000:]
    assert "marked 1 run(s) KILLED" in marked.stdout
    after = _runs(root)[1]["smoke"]
    assert after.info.status == "KILLED"
    assert after.data.tags["skymoments.stopped_by"] == "heartbeat"
    assert after.info.end_time == beat_ms
    _store_intact(root, store[1])


def _cli(cwd, *args):
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)


# A sweep whose one job waits to be stopped (started through Hydra's basic launcher).
SWEEP_APP = """
import time
from pathlib import Path

import hydra

from skymoments.tracking import run_job_safely, tracked_run


def task(cfg):
    with tracked_run(cfg, run_name=f"x={cfg.x}") as run:
        Path(cfg.started).write_text(run.run_id)
        while True:
            time.sleep(0.05)


@hydra.main(version_base="1.3", config_path=".", config_name="config")
def main(cfg):
    return run_job_safely(task, cfg)


if __name__ == "__main__":
    main()
"""

SWEEP_CONFIG = """
x: 0
started: started
tracking: {kind: local, root: store, uri: null, artifact_location: null, experiment: sweeps,
           register_as: null}
hydra:
  sweep: {dir: multirun/sweep}
  callbacks:
    sweep_tracking: {_target_: skymoments.tracking.hydra_callbacks.SweepTracking}
"""


def _sweep_runs(root):
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    exp = client.get_experiment_by_name("sweeps")
    runs = client.search_runs([exp.experiment_id])
    (parent,) = [r for r in runs if r.data.tags.get("skymoments.run_kind") == "sweep"]
    (child,) = [r for r in runs if r.data.tags.get("mlflow.parentRunId") == parent.info.run_id]
    return parent, child


@pytest.mark.parametrize("signum", [signal.SIGKILL, signal.SIGTERM])
def test_stopped_sweep_parent_is_lost_or_killed(tmp_path, signum):
    from skymoments.compare.table import shown_status
    from skymoments.tracking.liveness import find_lost_runs

    (tmp_path / "app.py").write_text(SWEEP_APP)
    (tmp_path / "config.yaml").write_text(SWEEP_CONFIG)
    started = tmp_path / "started"
    env = {**os.environ, "SKYMOMENTS_HEARTBEAT_S": str(HEARTBEAT_S)}
    proc = _spawn([sys.executable, "app.py", "-m", "x=1", f"started={started}"], tmp_path, env)
    root = tmp_path / "store"
    # The job is running and the parent has beaten since it was created.
    while proc.poll() is None:
        if started.is_file():
            parent, _ = _sweep_runs(root)
            if int(parent.data.tags["skymoments.heartbeat"]) > parent.info.start_time:
                break
        time.sleep(0.2)
    assert proc.poll() is None, proc.communicate()[1][-3000:]
    assert float(parent.data.tags["skymoments.heartbeat_s"]) == HEARTBEAT_S
    proc.send_signal(signum)
    proc.communicate()
    parent, child = _sweep_runs(root)
    if signum == signal.SIGTERM:
        # The job's run and the sweep's parent both say how they ended.
        assert child.info.status == "KILLED"
        assert parent.info.status == "KILLED"
        assert parent.data.tags["skymoments.stopped_by"] == "SIGTERM"
        return
    # SIGKILL: both stay RUNNING, and both are lost once 4 periods have passed.
    assert parent.info.status == child.info.status == "RUNNING"
    last_ms = max(int(r.data.tags["skymoments.heartbeat"]) for r in (parent, child))
    time.sleep(max(0.0, last_ms / 1000 + 4 * HEARTBEAT_S + 0.5 - time.time()))
    lost, _ = find_lost_runs(f"sqlite:///{root / 'mlflow.db'}")
    assert {r.run_id for r, _ in lost} == {parent.info.run_id, child.info.run_id}
    assert {shown_status(r) for r, _ in lost} == {"LOST"}
