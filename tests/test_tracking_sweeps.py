"""A real Hydra ``-m`` sweep: one parent run, tagged child runs, a failure that stays contained."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from skymoments.tracking import find_runs

APP = textwrap.dedent(
    """
    import hydra

    from skymoments.tracking import run_job_safely, tracked_run


    def task(cfg):
        with tracked_run(cfg, run_name=f"x={cfg.x}") as run:
            run.log_config(cfg)
            run.log_metrics({"score": float(cfg.x)})
            if cfg.x == cfg.fail_on:
                raise RuntimeError(f"job x={cfg.x} fails on purpose")
        return float(cfg.x)


    @hydra.main(version_base="1.3", config_path=".", config_name="config")
    def main(cfg):
        return run_job_safely(task, cfg)


    if __name__ == "__main__":
        main()
    """
)

CONFIG = textwrap.dedent(
    """
    x: 0
    fail_on: -1
    tracking:
      kind: local
      root: unused-default
      uri: null
      artifact_location: null
      experiment: sweeps
      register_as: null
    hydra:
      job:
        chdir: true
      sweep:
        dir: multirun/sweep
      run:
        dir: outputs/single
      callbacks:
        sweep_tracking:
          _target_: skymoments.tracking.hydra_callbacks.SweepTracking
    """
)


def write_app(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "app.py").write_text(APP)
    (folder / "config.yaml").write_text(CONFIG)
    return folder


def run_app(folder: Path, *args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "HYDRA_FULL_ERROR": "1"}
    env.pop("SKYMOMENTS_PARENT_RUN_ID", None)
    return subprocess.run(
        [sys.executable, "app.py", *args],
        cwd=folder,
        env=env,
        capture_output=True,
        text=True,
        check=False,
    )


def store_of(folder: Path) -> dict:
    # tracking.root=store is relative: it must land under the launch folder, not the job dirs
    # (hydra.job.chdir=true above moves each job into its own output folder).
    return {"kind": "local", "root": str(folder / "store"), "experiment": "sweeps"}


@pytest.mark.slow
def test_sweep_gives_a_parent_and_tagged_children_and_contains_a_failure(tmp_path):
    folder = write_app(tmp_path / "app")
    result = run_app(folder, "-m", "x=1,2", "fail_on=2", "tracking.root=store")
    assert result.returncode == 0, result.stderr[-3000:]
    assert (folder / "store" / "mlflow.db").is_file()

    runs = find_runs(store_of(folder))
    parents = [r for r in runs if r.tags.get("skymoments.run_kind") == "sweep"]
    assert len(parents) == 1
    parent = parents[0]
    children = sorted(
        (r for r in runs if r.parent_run_id == parent.run_id), key=lambda r: r.params["x"]
    )
    assert len(runs) == 3 and len(children) == 2

    record = json.loads((folder / "multirun" / "sweep" / ".skymoments-parent-run").read_text())
    assert record["run_id"] == parent.run_id
    assert parent.status == "FINISHED"
    assert parent.name == "sweep multirun/sweep"
    assert parent.tags["skymoments.sweep_overrides"] == "x=1,2 fail_on=2 tracking.root=store"
    assert parent.tags["skymoments.n_children"] == "2"
    assert parent.tags["skymoments.n_failed_children"] == "1"

    ok, bad = children
    assert [ok.status, bad.status] == ["FINISHED", "FAILED"]
    assert bad.tags["skymoments.error"] == "RuntimeError: job x=2 fails on purpose"
    for index, child in enumerate(children):
        assert child.tags["skymoments.sweep_id"] == parent.tags["skymoments.sweep_id"]
        assert child.tags["skymoments.job_num"] == str(index)
        assert child.tags["skymoments.overrides"] == f"x={index + 1} fail_on=2 tracking.root=store"
        assert child.params["x"] == str(index + 1)
        assert child.metrics == {"score": float(index + 1)}
    # the failure was logged by run_job_safely (Hydra's job log goes to stdout and to the
    # job's log file), and the sweep went on
    log_text = (folder / "multirun" / "sweep" / "1" / "app.log").read_text()
    assert "sweep job #1 (x=2 fail_on=2 tracking.root=store) failed" in log_text
    assert "fails on purpose" in log_text


@pytest.mark.slow
def test_single_run_has_no_parent_and_its_failure_propagates(tmp_path):
    folder = write_app(tmp_path / "app")
    result = run_app(folder, "x=3", "fail_on=3", "tracking.root=store")
    assert result.returncode != 0
    assert "fails on purpose" in result.stderr
    (run,) = find_runs(store_of(folder))
    assert run.status == "FAILED"
    assert run.parent_run_id is None
    assert run.tags["skymoments.run_kind"] == "single"
    assert run.tags["skymoments.overrides"] == "x=3 fail_on=3 tracking.root=store"


@pytest.mark.slow
def test_joblib_workers_find_the_parent(tmp_path):
    # Jobs in loky worker processes find the parent through the sweep folder's file.
    folder = write_app(tmp_path / "app")
    result = run_app(
        folder,
        "-m",
        "hydra/launcher=joblib",
        "hydra.launcher.n_jobs=2",
        "x=1,2",
        "tracking.root=store",
    )
    assert result.returncode == 0, result.stderr[-3000:]
    runs = find_runs(store_of(folder))
    (parent,) = [r for r in runs if r.tags.get("skymoments.run_kind") == "sweep"]
    children = [r for r in runs if r.parent_run_id == parent.run_id]
    assert sorted(c.params["x"] for c in children) == ["1", "2"]
    assert all(c.status == "FINISHED" for c in children)
    assert {c.tags["skymoments.sweep_id"] for c in children} == {parent.tags["skymoments.sweep_id"]}
    assert parent.tags["skymoments.n_children"] == "2"
