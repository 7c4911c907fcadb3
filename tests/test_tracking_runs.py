"""The run lifecycle: params, artifacts, metrics, figures, final status, Lightning logging."""

from __future__ import annotations

import io
import os

import matplotlib
import mlflow
import pytest
import torch
import yaml
from mlflow import MlflowClient
from omegaconf import OmegaConf
from rich.console import Console

from skymoments.tracking import (
    find_runs,
    flatten_config,
    get_run,
    metric_history,
    print_run_summary,
    tracked_run,
    view_hint,
)

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """One SQLite store for the module: MLflow's schema creation costs about 2 s per store."""
    return tmp_path_factory.mktemp("store")


def make_cfg(store, experiment):
    return OmegaConf.create(
        {
            "model": {"name": "unet", "width": 8, "channels": [8, 16]},
            "train": {"lr": 1e-3, "epochs": "${model.width}"},
            "tracking": {
                "kind": "local",
                "root": str(store),
                "uri": None,
                "artifact_location": None,
                "experiment": experiment,
                "register_as": None,
            },
        }
    )


def client_of(run):
    return MlflowClient(run.tracking_uri)


def test_finished_run_holds_config_metrics_and_figure(store):
    cfg = make_cfg(store, "lifecycle")
    with tracked_run(cfg, run_name="ok", tags={"purpose": "test"}) as run:
        params = run.log_config(cfg)
        run.log_metrics({"train/loss_mean": 0.5}, step=0)
        run.log_metrics({"train/loss_mean": torch.tensor(0.25)}, step=1)
        fig, ax = plt.subplots()
        ax.hist([0.0, 1.0, 1.5])
        run.log_figure(fig, "plots/z_hist.png")
        run.log_dict({"a": 1}, "extra/info.json")
    assert not plt.fignum_exists(fig.number)  # log_figure closes the figure

    record = get_run(cfg, run.run_id)
    assert record.status == "FINISHED"
    assert record.name == "ok"
    assert record.tags["purpose"] == "test"
    assert record.tags["skymoments.run_kind"] == "single"
    assert "mlflow.parentRunId" not in record.tags
    assert record.params == flatten_config(cfg) == params
    assert record.params["train.epochs"] == "8"  # resolved interpolation
    assert metric_history(cfg, run.run_id, "train/loss_mean") == [(0, 0.5), (1, 0.25)]

    client = client_of(run)
    listed = {f.path for f in client.list_artifacts(run.run_id, "plots")}
    assert listed == {"plots/z_hist.png"}
    local = client.download_artifacts(run.run_id, "config/resolved.yaml", str(store))
    with open(local) as handle:
        resolved = yaml.safe_load(handle)
    assert resolved == OmegaConf.to_container(cfg, resolve=True)
    png = client.download_artifacts(run.run_id, "plots/z_hist.png", str(store))
    with open(png, "rb") as handle:
        assert handle.read(8) == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, sec. 5.2)


def test_exception_marks_run_failed_and_propagates(store):
    cfg = make_cfg(store, "failing")
    with pytest.raises(RuntimeError, match="diverged"):
        with tracked_run(cfg, run_name="bad") as run:
            run.log_metrics({"train/loss_mean": 1.0})
            raise RuntimeError("diverged")
    record = get_run(cfg, run.run_id)
    assert record.status == "FAILED"
    assert record.tags["skymoments.error"] == "RuntimeError: diverged"
    assert record.metrics == {"train/loss_mean": 1.0}


def test_keyboard_interrupt_marks_run_killed(store):
    cfg = make_cfg(store, "killed")
    with pytest.raises(KeyboardInterrupt):
        with tracked_run(cfg) as run:
            raise KeyboardInterrupt
    assert get_run(cfg, run.run_id).status == "KILLED"


def test_nothing_is_left_running(store):
    cfg = make_cfg(store, "many")
    for fail in (False, True, False):
        try:
            with tracked_run(cfg) as run:
                run.log_metrics({"m": 1.0})
                if fail:
                    raise ValueError("x")
        except ValueError:
            pass
    # every experiment of the store, including the other tests' runs
    runs = find_runs(f"sqlite:///{store}/mlflow.db")
    assert runs, "the store should hold the runs of this module"
    assert all(r.status != "RUNNING" for r in runs)
    statuses = sorted(r.status for r in find_runs(cfg))
    assert statuses == ["FAILED", "FINISHED", "FINISHED"]


def test_non_finite_metrics_are_skipped_with_a_warning(store):
    cfg = make_cfg(store, "nan")
    with tracked_run(cfg) as run:
        with pytest.warns(RuntimeWarning, match=r"calib/z_std_B=nan.*eval/mse_B=inf"):
            logged = run.log_metrics(
                {"calib/z_std_B": float("nan"), "eval/mse_B": float("inf"), "eval/mse_E": 2.0}
            )
        with pytest.raises(ValueError, match="'bad' has value"):
            run.log_metrics({"bad": [1.0, 2.0]})
    assert logged == {"eval/mse_E": 2.0}
    assert get_run(cfg, run.run_id).metrics == {"eval/mse_E": 2.0}


def test_runs_in_one_process_do_not_share_global_state(store, tmp_path):
    # Two stores used one after the other in one process (a sweep under the basic launcher):
    # each run lands in its own store and MLflow's process-wide URI stays untouched.
    before = (mlflow.get_tracking_uri(), os.environ.get("MLFLOW_TRACKING_URI"))
    first = make_cfg(store, "isolation")
    second = make_cfg(tmp_path, "isolation")
    with tracked_run(first) as run_a:
        run_a.log_metrics({"m": 1.0})
    with tracked_run(second) as run_b:
        run_b.log_metrics({"m": 2.0})
    assert [r.run_id for r in find_runs(first)] == [run_a.run_id]
    assert [r.run_id for r in find_runs(second)] == [run_b.run_id]
    assert (mlflow.get_tracking_uri(), os.environ.get("MLFLOW_TRACKING_URI")) == before
    assert mlflow.active_run() is None


def test_lightning_logger_writes_into_the_run_and_leaves_it_open(store):
    import lightning.pytorch as pl

    class Tiny(pl.LightningModule):
        def __init__(self):
            super().__init__()
            self.layer = torch.nn.Linear(2, 1)

        def training_step(self, batch, _):
            x, y = batch
            loss = torch.nn.functional.mse_loss(self.layer(x), y)
            self.log("train/loss_mean", loss, on_step=False, on_epoch=True)
            return loss

        def configure_optimizers(self):
            return torch.optim.SGD(self.parameters(), lr=0.1)

    gen = torch.Generator().manual_seed(0)
    x = torch.randn(16, 2, generator=gen)
    data = torch.utils.data.DataLoader(torch.utils.data.TensorDataset(x, x[:, :1]), batch_size=8)
    cfg = make_cfg(store, "lightning")
    with tracked_run(cfg) as run:
        trainer = pl.Trainer(
            max_epochs=2,
            logger=run.lightning_logger(),
            enable_checkpointing=False,
            enable_progress_bar=False,
            enable_model_summary=False,
            log_every_n_steps=1,
            accelerator="cpu",
            default_root_dir=str(store / "lightning"),
        )
        trainer.fit(Tiny(), data)
        # Lightning's own MLFlowLogger would have ended the run here; ours leaves it open.
        assert get_run(cfg, run.run_id).status == "RUNNING"
        run.log_metrics({"eval/mse_E": 0.1})
    record = get_run(cfg, run.run_id)
    assert record.status == "FINISHED"
    history = metric_history(cfg, run.run_id, "train/loss_mean")
    assert len(history) == 2  # one value per epoch
    assert "eval/mse_E" in record.metrics


def test_summary_prints_metrics_run_id_and_ui_command(store):
    cfg = make_cfg(store, "summary")
    with tracked_run(cfg) as run:
        run.log_metrics({"calib/z_std_E": 1.02})
    buffer = io.StringIO()
    hint = print_run_summary(
        run,
        {"calib/z_std_E": 1.0234, "eval/mse_E": 3.5},
        keys=["calib/z_std_E", "calib/cov68_E"],
        console=Console(file=buffer, width=200),
    )
    text = buffer.getvalue()
    assert hint == f"mlflow ui --backend-store-uri sqlite:///{store}/mlflow.db"
    assert hint in text
    assert run.run_id in text
    assert "1.023" in text and "calib/cov68_E" in text and "eval/mse_E" not in text
    # For a server the hint is the run's page (MLflow UI route /#/experiments/<id>/runs/<id>).
    assert view_hint("http://h:5000", "3", "abc") == "http://h:5000/#/experiments/3/runs/abc"


def test_missing_tracking_node_is_a_clear_error():
    with pytest.raises(ValueError, match="no 'tracking' node"):
        with tracked_run(OmegaConf.create({"model": {}})):
            pass


def test_ranks_other_than_zero_create_no_run(store, monkeypatch):
    # Under DDP every rank runs the task; only rank zero owns the run (Lightning sets
    # LOCAL_RANK in the processes it launches).
    cfg = make_cfg(store, "ranks")
    with tracked_run(cfg) as lead:
        monkeypatch.setenv("LOCAL_RANK", "1")
        with tracked_run(cfg) as follower:
            assert follower.passive and follower.run_id == lead.run_id
            follower.log_metrics({"m": 5.0})
            follower.log_params({"p": 1})
            assert follower.lightning_logger().run_id is None
        monkeypatch.delenv("LOCAL_RANK")
        lead.log_metrics({"m": 1.0})
    (record,) = find_runs(cfg)
    assert record.run_id == lead.run_id
    assert record.metrics == {"m": 1.0} and record.params == {}


def test_attach_adds_artifacts_without_touching_the_status(store, tmp_path):
    from skymoments.tracking import attach_run

    cfg = make_cfg(store, "attach")
    with tracked_run(cfg) as run:
        pass
    folder = tmp_path / "report"
    folder.mkdir()
    (folder / "index.html").write_text("<html></html>")
    (folder / "fig.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    handle = attach_run(cfg, run.run_id)
    handle.log_artifact(folder, "report")
    with pytest.raises(ValueError, match="does not exist"):
        handle.log_artifact(tmp_path / "nope.txt")
    listed = {f.path for f in client_of(run).list_artifacts(run.run_id, "report")}
    assert listed == {"report/index.html", "report/fig.png"}
    assert get_run(cfg, run.run_id).status == "FINISHED"


def test_sweep_parent_abandoned_at_exit_is_marked_failed(store, tmp_path):
    # If the sweep dies before on_multirun_end (an exception escaping the launcher), the
    # atexit hook marks the parent FAILED instead of leaving it RUNNING.
    import atexit

    from skymoments.tracking.hydra_callbacks import SweepTracking

    cfg = make_cfg(store, "abandoned")
    cfg.hydra = {
        "sweep": {"dir": "multirun/s"},
        "runtime": {"cwd": str(tmp_path)},
        "overrides": {"task": ["x=1,2"]},
    }
    callback = SweepTracking()
    callback.on_multirun_start(cfg)
    try:
        parent_id = callback._record.run_id
        assert (tmp_path / "multirun" / "s" / ".skymoments-parent-run").is_file()
        assert os.environ["SKYMOMENTS_PARENT_RUN_ID"] == parent_id
        assert get_run(cfg, parent_id).status == "RUNNING"
        callback._abandoned()
    finally:
        atexit.unregister(callback._abandoned)
        callback._release()
    record = get_run(cfg, parent_id)
    assert record.status == "FAILED"
    assert record.tags["skymoments.sweep_overrides"] == "x=1,2"
    assert "SKYMOMENTS_PARENT_RUN_ID" not in os.environ
