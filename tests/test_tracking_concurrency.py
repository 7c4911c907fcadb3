"""Four processes writing into one fresh SQLite store lose and corrupt nothing."""

from __future__ import annotations

import multiprocessing as mp
import sqlite3
from contextlib import closing

import pytest
from mlflow import MlflowClient

from skymoments.tracking import find_runs, metric_history

N_WORKERS = 4
RUNS_PER_WORKER = 3
STEPS = 5


def _worker(root: str, worker: int, barrier) -> None:
    from skymoments.tracking import tracked_run

    cfg = {"tracking": {"kind": "local", "root": root, "experiment": "parallel"}}
    barrier.wait()  # all four hit the uninitialized store at once
    for index in range(RUNS_PER_WORKER):
        with tracked_run(cfg, run_name=f"w{worker}-r{index}") as run:
            run.log_params({"worker": worker, "index": index, "model.width": 8 * (index + 1)})
            for step in range(STEPS):
                run.log_metrics({"train/loss_mean": 1.0 / (step + 1), "worker": worker}, step)
            run.log_text(f"worker {worker} run {index}", "notes/who.txt")


@pytest.mark.slow
def test_parallel_processes_lose_nothing(tmp_path):
    root = tmp_path / "store"
    # spawn, not fork: a forked child would share the parent's open SQLite connections.
    ctx = mp.get_context("spawn")
    barrier = ctx.Barrier(N_WORKERS)
    procs = [ctx.Process(target=_worker, args=(str(root), k, barrier)) for k in range(N_WORKERS)]
    for proc in procs:
        proc.start()
    for proc in procs:
        proc.join()
    assert [p.exitcode for p in procs] == [0] * N_WORKERS

    cfg = {"kind": "local", "root": str(root), "experiment": "parallel"}
    runs = find_runs(cfg)
    names = sorted(r.name for r in runs)
    expected = sorted(f"w{k}-r{i}" for k in range(N_WORKERS) for i in range(RUNS_PER_WORKER))
    assert names == expected
    client = MlflowClient(f"sqlite:///{root}/mlflow.db")
    for run in runs:
        assert run.status == "FINISHED"
        worker, index = (int(part[1:]) for part in run.name.split("-"))
        assert run.params == {
            "worker": str(worker),
            "index": str(index),
            "model.width": str(8 * (index + 1)),
        }
        history = metric_history(cfg, run.run_id, "train/loss_mean")
        assert history == [(s, 1.0 / (s + 1)) for s in range(STEPS)]
        assert len(metric_history(cfg, run.run_id, "worker")) == STEPS
        text = client.download_artifacts(run.run_id, "notes/who.txt", str(tmp_path))
        with open(text) as handle:
            assert handle.read() == f"worker {worker} run {index}"
    with closing(sqlite3.connect(root / "mlflow.db")) as con:
        # SQLite's own consistency check (sqlite.org/pragma.html#pragma_integrity_check).
        assert con.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        assert con.execute("PRAGMA journal_mode").fetchone() == ("wal",)
