"""Every config group is checked before any compute: one line, exit 2, the store untouched.

Each case runs the real `skymoments run` entry point in this process (Hydra parses the
overrides as on the command line) against a store that already holds a FINISHED and a
FAILED run, and checks: exit status 2, one line on stderr naming the key and the fix, no
traceback, no new run, the earlier runs' statuses unchanged, and the SQLite file sound
(SQLite's own ``PRAGMA integrity_check``, sqlite.org/pragma.html).
"""

from __future__ import annotations

import contextlib
import re
import sqlite3
import sys

import mlflow
import pytest
from omegaconf import OmegaConf

from skymoments.tracking import tracked_run

# override -> what the one line must say. Each is the only bad value of its config.
CASES = {
    "eval.fg_bins=0": r"eval\.fg_bins must be a positive integer.*got 0; e\.g\. eval\.fg_bins=4",
    "train.optimizer.lr=abc": r"train\.optimizer\.lr must be a positive number, got 'abc'",
    # UNet of depth 2 (experiment=smoke) halves the side twice: 30 is not a multiple of 4.
    "patch.npix=30": r"patch\.npix=30 cannot be pooled by model\.mean .*multiple of 4.*npix=32",
    "synthesis.n_images=0": r"synthesis\.n_images must be a positive integer, got 0",
    "train.range_margin=-1": r"train\.range_margin must be >= 0 .*got -1",
    "sky.foreground._target_=skymoments.sky.foregrounds.ImageBank": (
        r"sky\.foreground\._target_=.*ImageBank' is the training bank.*choose one of: "
        r"_target_=skymoments\.sky\.foregrounds\.Filaments"
    ),
}


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    root = tmp_path_factory.mktemp("store")
    tracking = {"kind": "local", "root": str(root), "experiment": "smoke"}
    cfg = OmegaConf.create({"tracking": tracking})
    with tracked_run(cfg, run_name="earlier") as run:
        run.log_metrics({"eval/mse_B": 0.5})
    with contextlib.suppress(RuntimeError), tracked_run(cfg, run_name="broken") as failed:
        raise RuntimeError("a run that failed")
    return root, {run.run_id: "FINISHED", failed.run_id: "FAILED"}


def _query(db, sql):
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        return con.execute(sql).fetchall()


def _statuses(root):
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    runs = client.search_runs([e.experiment_id for e in client.search_experiments()])
    return {r.info.run_id: r.info.status for r in runs}


@pytest.mark.parametrize("override", sorted(CASES))
def test_bad_config_is_refused_before_any_work(override, store, tmp_path, monkeypatch, capsys):
    from skymoments.commands.run import main

    root, before = store
    assert _statuses(root) == before
    monkeypatch.chdir(tmp_path)
    # augment=synthesis: the run would build a bank, so the synthesis node is checked too.
    argv = ["skymoments run", "experiment=smoke", "augment=synthesis", f"tracking.root={root}"]
    monkeypatch.setattr(sys, "argv", [*argv, override])
    with pytest.raises(SystemExit) as exit_info:
        main()
    assert exit_info.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert re.search(CASES[override], err), err
    # Nothing started (no new run, no checkpoint folder) and nothing tracked was touched.
    assert _statuses(root) == before
    assert _query(root / "mlflow.db", "PRAGMA integrity_check") == [("ok",)]
    assert not list(tmp_path.rglob("checkpoints"))


def test_a_good_config_passes_the_same_checks():
    # The refusals above are the bad values, not the checks refusing everything.
    from hydra import compose, initialize_config_dir

    from skymoments.config import conf_dir, validate

    with initialize_config_dir(config_dir=str(conf_dir()), version_base="1.3"):
        for experiment in ("smoke", "quickstart", "gaussian_check"):
            cfg = compose("run", overrides=[f"experiment={experiment}", "augment=synthesis"])
            validate(cfg, command="run")


# Overrides Hydra cannot compose -> what the one line must say (what was wrong, the fix).
COMPOSITION_CASES = {
    ("model=nonexistent",): (
        r"^skymoments: model=nonexistent: there is no model config named 'nonexistent'; "
        r"choose one of dilated_resnet, spectral, unet"
    ),
    ("+foo.bar=1", "bad=override"): (
        r"^skymoments: could not override 'bad': the config has no key 'bad'; fix its "
        r"spelling, or add a new key with \+bad=override$"
    ),
    ("model=[",): r"^skymoments: could not parse the override 'model=\[': .*key=value",
}


@pytest.mark.parametrize("overrides", sorted(COMPOSITION_CASES))
def test_overrides_that_do_not_compose_are_refused_in_one_line(
    overrides, store, tmp_path, monkeypatch, capsys
):
    from skymoments.commands.run import main

    root, before = store
    monkeypatch.chdir(tmp_path)
    argv = ["skymoments run", "experiment=smoke", f"tracking.root={root}", *overrides]
    monkeypatch.setattr(sys, "argv", argv)
    with pytest.raises(SystemExit) as exit_info:
        main()
    assert exit_info.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert re.search(COMPOSITION_CASES[overrides], err), err
    assert _statuses(root) == before
    assert _query(root / "mlflow.db", "PRAGMA integrity_check") == [("ok",)]
