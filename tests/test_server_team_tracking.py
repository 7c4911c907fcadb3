"""Team tracking against a real ``mlflow server`` with a PostgreSQL backend store.

The server (``tests/server_fixtures.py``) listens on 127.0.0.1 at a free port, keeps runs in a
fresh PostgreSQL database and serves artifacts from a shared folder
(``--artifacts-destination``). Against it:

* a two-job smoke sweep (``seed=0,1``) gives one parent and two FINISHED children with the
  contract's metrics, their artifacts in the shared folder and their models registered;
* ``skymoments compare`` reads the sweep back from a second process;
* a job whose server dies mid-run fails quickly with a message naming the server, and the
  runs finished before are intact once the server is back on the same port and database.

Each check compares what the store holds with what the jobs wrote: no numerical reference is
involved, so equalities are exact.
"""

from __future__ import annotations

import math
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest
from mlflow import MlflowClient

from server_fixtures import (  # noqa: F401  (pytest fixtures)
    MlflowServer,
    mlflow_auth_server,
    mlflow_server,
    postgres,
    skymoments_env,
)

pytestmark = [pytest.mark.mlflow_server, pytest.mark.slow]

EXPERIMENT = "smoke"  # experiment=smoke sets name=smoke, and tracking.experiment follows name
INTERRUPTED_EXPERIMENT = "smoke_interrupted"
REGISTERED = "skymoments-smoke-team"
SEEDS = ("0", "1")

# Metric names from the contract (DEVELOPERS.md, Metric names) that every smoke run logs.
CONTRACT_METRICS = (
    "calib/z_mean_E", "calib/z_std_E", "calib/cov68_E", "calib/cov95_E", "calib/cov997_E",
    "calib/z_mean_B", "calib/z_std_B", "calib/cov68_B", "calib/cov95_B", "calib/cov997_B",
    "calib/ks_E", "calib/ks_B", "eval/mse_E", "eval/mse_B",
    "eval/mse_ratio_wiener_E", "eval/mse_ratio_wiener_B",
    "train/loss_mean", "val/loss_mean", "train/loss_var", "val/loss_var",
    "perf/train_samples_per_s",
)  # fmt: skip
# Artifacts named in the contract, uploaded through the server.
CONTRACT_ARTIFACTS = (
    "config/resolved.yaml", "maps/posterior.npz", "plots/z_hist.png", "plots/coverage.png",
    "plots/spectra.png", "calibration/arrays.npz",
)  # fmt: skip

# MLflow's HTTP client settings for the jobs (read from the environment per request). The
# defaults (7 retries, backoff factor 2, 120 s per request) take minutes to give up on a dead
# server; with one retry, a 10 s request timeout and backoff factor 1 a lost server is
# reported within seconds, which is what a test (and an impatient user) wants.
FAST_HTTP = {
    "MLFLOW_HTTP_REQUEST_MAX_RETRIES": "1",
    "MLFLOW_HTTP_REQUEST_TIMEOUT": "10",
    "MLFLOW_HTTP_REQUEST_BACKOFF_FACTOR": "1",
}

# Bounds on subprocesses: guards against a hang, not speed checks. A smoke job takes about
# 1.5 min on the loaded 2-core development machine.
JOB_TIMEOUT_S = 1800
WAIT_RUNNING_S = 900.0
WAIT_FAILURE_S = 600.0


def _skymoments(*args: str, cwd: Path, env: dict[str, str]) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "skymoments.cli", *args]
    return subprocess.run(
        cmd, cwd=cwd, capture_output=True, text=True, timeout=JOB_TIMEOUT_S, env=env
    )


def _artifact_paths(client: MlflowClient, run_id: str, path: str = "") -> set[str]:
    out: set[str] = set()
    for item in client.list_artifacts(run_id, path or None):
        if item.is_dir:
            out |= _artifact_paths(client, run_id, item.path)
        else:
            out.add(item.path)
    return out


@dataclass(frozen=True)
class SweepResult:
    """What the sweep left on the server, read right after it ended."""

    parent_id: str
    child_ids: tuple[str, ...]
    metrics: dict[str, dict[str, float]]  # run id -> latest metrics
    stdout: str
    stderr: str


@pytest.fixture(scope="module")
def sweep(mlflow_server: MlflowServer, tmp_path_factory) -> SweepResult:  # noqa: F811
    """A two-job smoke sweep (``seed=0,1``) tracked to the server, launched from a tmp folder."""
    workdir = tmp_path_factory.mktemp("sweep")
    proc = _skymoments(
        "run", "-m", "experiment=smoke", f"seed={','.join(SEEDS)}",
        "tracking=server", f"tracking.uri={mlflow_server.url}",
        f"tracking.register_as={REGISTERED}",
        cwd=workdir, env=skymoments_env(**FAST_HTTP),
    )  # fmt: skip
    assert proc.returncode == 0, (
        f"sweep failed (exit {proc.returncode}):\n{proc.stderr[-4000:]}\n"
        f"server log:\n{mlflow_server.log_tail(30)}"
    )
    client = MlflowClient(mlflow_server.url)
    exp = client.get_experiment_by_name(EXPERIMENT)
    assert exp is not None, f"no experiment {EXPERIMENT!r} on the server"
    runs = client.search_runs([exp.experiment_id])
    parents = [r for r in runs if r.data.tags.get("skymoments.run_kind") == "sweep"]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert len(parents) == 1, [r.data.tags.get("skymoments.run_kind") for r in runs]
    return SweepResult(
        parent_id=parents[0].info.run_id,
        child_ids=tuple(sorted(r.info.run_id for r in children)),
        metrics={r.info.run_id: dict(r.data.metrics) for r in children},
        stdout=proc.stdout,
        stderr=proc.stderr,
    )


def test_sweep_on_the_server_gives_a_parent_and_two_finished_children(
    sweep: SweepResult,
    mlflow_server: MlflowServer,  # noqa: F811
):
    client = MlflowClient(mlflow_server.url)
    parent = client.get_run(sweep.parent_id)
    assert parent.info.status == "FINISHED"
    assert parent.data.tags["skymoments.n_children"] == "2"
    assert parent.data.tags["skymoments.n_finished_children"] == "2"
    assert len(sweep.child_ids) == 2
    seeds = set()
    for run_id in sweep.child_ids:
        run = client.get_run(run_id)
        assert run.info.status == "FINISHED", (run_id, run.info.status)
        assert run.data.tags["mlflow.parentRunId"] == sweep.parent_id
        assert run.data.tags["skymoments.sweep_id"] == parent.data.tags["skymoments.sweep_id"]
        seeds.add(run.data.params["seed"])
        missing = [k for k in CONTRACT_METRICS if k not in run.data.metrics]
        assert not missing, f"run {run_id} lacks metrics {missing}"
        assert all(math.isfinite(run.data.metrics[k]) for k in CONTRACT_METRICS)
    assert seeds == set(SEEDS)


def test_sweep_artifacts_go_through_the_server_into_the_shared_store(
    sweep: SweepResult,
    mlflow_server: MlflowServer,  # noqa: F811
    tmp_path,
):
    client = MlflowClient(mlflow_server.url)
    shared = mlflow_server.artifacts_destination
    for run_id in sweep.child_ids:
        run = client.get_run(run_id)
        # Served artifacts: clients hold only a proxy URI, never a path on the server.
        assert run.info.artifact_uri.startswith("mlflow-artifacts:"), run.info.artifact_uri
        listed = _artifact_paths(client, run_id)
        missing = [p for p in CONTRACT_ARTIFACTS if p not in listed]
        assert not missing, f"run {run_id} lacks artifacts {missing}; has {sorted(listed)}"
        # The same files sit in the shared destination folder, byte for byte what a
        # download through the server gives.
        on_disk = list(shared.rglob(f"{run_id}/artifacts/config/resolved.yaml"))
        assert len(on_disk) == 1, f"resolved.yaml of {run_id} not under {shared}"
        fetched = client.download_artifacts(run_id, "config/resolved.yaml", str(tmp_path))
        assert Path(fetched).read_bytes() == on_disk[0].read_bytes()


def test_sweep_models_are_registered_and_load_from_the_server(
    sweep: SweepResult,
    mlflow_server: MlflowServer,  # noqa: F811
):
    import torch

    from skymoments.tracking import load_model

    client = MlflowClient(mlflow_server.url, registry_uri=mlflow_server.url)
    versions = client.search_model_versions(f"name = '{REGISTERED}'")
    assert sorted(v.run_id for v in versions) == sorted(sweep.child_ids)
    model = load_model(f"models:/{REGISTERED}/1", mlflow_server.url)
    assert isinstance(model, torch.nn.Module)


def test_compare_reads_the_sweep_back_from_a_second_process(
    sweep: SweepResult,
    mlflow_server: MlflowServer,  # noqa: F811
    tmp_path,
):
    report = tmp_path / "compare.html"
    proc = _skymoments(
        "compare", f"compare.sweep={sweep.parent_id}",
        "tracking=server", f"tracking.uri={mlflow_server.url}", f"compare.out={report}",
        cwd=tmp_path, env=skymoments_env(**FAST_HTTP),
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-4000:]
    assert sweep.parent_id in proc.stdout  # the table names the sweep it compared
    html = report.read_text()
    for run_id in sweep.child_ids:
        assert run_id in html, f"report does not mention child run {run_id}"
    # The report is logged to the sweep's parent run, through the server.
    client = MlflowClient(mlflow_server.url)
    assert "compare/report.html" in _artifact_paths(client, sweep.parent_id)


def _wait_for_training_run(
    client: MlflowClient, job: subprocess.Popen, job_log: Path, timeout: float
) -> str:
    """The id of the job's run once it is RUNNING and has logged a training loss."""
    deadline = time.perf_counter() + timeout
    while time.perf_counter() < deadline:
        if job.poll() is not None:
            pytest.fail(
                f"the long job ended (exit {job.returncode}) before the server was stopped:\n"
                f"{job_log.read_text()[-4000:]}"
            )
        exp = client.get_experiment_by_name(INTERRUPTED_EXPERIMENT)
        if exp is not None:
            for run in client.search_runs([exp.experiment_id]):
                if run.info.status == "RUNNING" and "train/loss_mean" in run.data.metrics:
                    return run.info.run_id
        time.sleep(1.0)
    pytest.fail(f"the long job's run did not start training within {timeout:.0f} s")


def test_server_lost_mid_run_fails_the_job_clearly_and_keeps_finished_runs(
    sweep: SweepResult,
    mlflow_server: MlflowServer,  # noqa: F811
    tmp_path,
):
    # A job far longer than the test (1000 epochs per stage, no early stopping), so that it is
    # still training when the server goes away.
    out_log, err_log = tmp_path / "job.out", tmp_path / "job.err"
    cmd = [
        sys.executable, "-m", "skymoments.cli", "run", "experiment=smoke",
        "train.max_epochs_mean=1000", "train.max_epochs_var=1000", "train.patience=1000",
        "tracking=server", f"tracking.uri={mlflow_server.url}",
        f"tracking.experiment={INTERRUPTED_EXPERIMENT}",
    ]  # fmt: skip
    client = MlflowClient(mlflow_server.url)
    with open(out_log, "w") as out, open(err_log, "w") as err:
        job = subprocess.Popen(
            cmd, cwd=tmp_path, stdout=out, stderr=err, env=skymoments_env(**FAST_HTTP)
        )
    try:
        run_id = _wait_for_training_run(client, job, err_log, WAIT_RUNNING_S)
        mlflow_server.kill()
        killed_at = time.perf_counter()
        try:
            code = job.wait(timeout=WAIT_FAILURE_S)
        except subprocess.TimeoutExpired:
            pytest.fail(f"the job kept going {WAIT_FAILURE_S:.0f} s after its server died")
        seconds_to_fail = time.perf_counter() - killed_at
    finally:
        if job.poll() is None:
            job.kill()
            job.wait(timeout=60)
        if mlflow_server.proc is None:
            mlflow_server.wait_port_free()
            mlflow_server.start()

    stderr = err_log.read_text()
    assert code != 0, f"the job exited 0 although its server died:\n{stderr[-3000:]}"
    # The message names the server and says it cannot be reached, and it is the end of the
    # output, not buried above a traceback.
    tail = "\n".join(stderr.strip().splitlines()[-6:])
    assert "cannot reach the MLflow tracking server" in tail, stderr[-3000:]
    assert mlflow_server.url in tail, stderr[-3000:]
    print(f"job failed {seconds_to_fail:.1f} s after the server was killed; end of stderr:\n{tail}")

    # Back on the same port and database: the finished sweep is intact.
    client = MlflowClient(mlflow_server.url)
    assert client.get_run(sweep.parent_id).info.status == "FINISHED"
    for child in sweep.child_ids:
        run = client.get_run(child)
        assert run.info.status == "FINISHED"
        assert dict(run.data.metrics) == sweep.metrics[child]
        assert set(CONTRACT_ARTIFACTS) <= _artifact_paths(client, child)
    # Nobody could close the interrupted run; it must at least not claim to have finished.
    assert client.get_run(run_id).info.status != "FINISHED"


# ---------------------------------------------------------------------------- basic auth
def _last_line(text: str) -> str:
    lines = text.strip().splitlines()
    return lines[-1] if lines else ""


def test_basic_auth_server_refuses_clients_without_credentials_and_admits_a_member(
    mlflow_auth_server: MlflowServer,  # noqa: F811
    tmp_path,
    monkeypatch,
):
    from skymoments.tracking import tracked_run

    server = mlflow_auth_server
    password = "member-password-123"
    server.create_user("member", password)
    home = tmp_path / "home"
    (home / ".mlflow").mkdir(parents=True)
    env = skymoments_env(HOME=str(home), **FAST_HTTP)
    track = ("tracking=server", f"tracking.uri={server.url}")
    refused = f"skymoments: the MLflow tracking server at {server.url} refused this client"

    # No credentials: refused before any work, in one line, exit 2.
    proc = _skymoments("run", "experiment=smoke", *track, cwd=tmp_path, env=env)
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert _last_line(proc.stderr).startswith(refused), proc.stderr[-3000:]
    assert "MLFLOW_TRACKING_USERNAME" in _last_line(proc.stderr)
    assert "Traceback" not in proc.stderr

    # A wrong password: the same.
    wrong = {**env, "MLFLOW_TRACKING_USERNAME": "member", "MLFLOW_TRACKING_PASSWORD": "nope"}
    proc = _skymoments("settle", *track, cwd=tmp_path, env=wrong)
    assert proc.returncode == 2 and _last_line(proc.stderr).startswith(refused), proc.stderr

    # Credentials on the command line (in the URI) are refused without being used.
    with_creds = server.url.replace("http://", f"http://member:{password}@")
    proc = _skymoments(
        "settle", "tracking=server", f"tracking.uri={with_creds}", cwd=tmp_path, env=env
    )
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert "tracking.uri holds a user name or password" in _last_line(proc.stderr)
    assert password not in proc.stderr

    # A credentials file that other users can read is refused; at mode 600 it is used.
    creds = home / ".mlflow" / "credentials"
    creds.write_text(
        f"[mlflow]\nmlflow_tracking_username = member\nmlflow_tracking_password = {password}\n"
    )
    creds.chmod(0o644)
    proc = _skymoments("settle", *track, cwd=tmp_path, env=env)
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert f"run `chmod 600 {creds}`" in _last_line(proc.stderr)
    creds.chmod(0o600)
    proc = _skymoments("settle", *track, cwd=tmp_path, env=env)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "0 lost" in proc.stdout

    # Credentials from the environment: a run is logged.
    monkeypatch.setenv("HOME", str(tmp_path / "empty-home"))
    monkeypatch.setenv("MLFLOW_TRACKING_USERNAME", "member")
    monkeypatch.setenv("MLFLOW_TRACKING_PASSWORD", password)
    cfg = {"kind": "server", "uri": server.url, "experiment": "member_study"}
    with tracked_run({"tracking": cfg}, run_name="authenticated") as run:
        run.log_metrics({"eval/mse_B": 0.5})
    # Read back as the admin: the member's run, and nothing from the refused attempts.
    monkeypatch.setenv("MLFLOW_TRACKING_USERNAME", server.auth.admin_username)
    monkeypatch.setenv("MLFLOW_TRACKING_PASSWORD", server.auth.admin_password)
    client = MlflowClient(server.url)
    stored = client.get_run(run.run_id)
    assert stored.info.status == "FINISHED"
    assert stored.data.metrics == {"eval/mse_B": 0.5}
    assert stored.info.user_id == "member"
    assert client.get_experiment_by_name(EXPERIMENT) is None
