"""Flattening configs into MLflow params, and resolving where the tracking store lives."""

from __future__ import annotations

import pytest
from omegaconf import OmegaConf

from skymoments.tracking import flatten_config, resolve_tracking, settings_from
from skymoments.tracking.flatten import MAX_KEY_LENGTH, MAX_PARAM_LENGTH, TRUNCATION_MARK

LOCAL = {
    "kind": "local",
    "root": "skymoments-runs",
    "uri": None,
    "artifact_location": None,
    "experiment": "skymoments",
    "register_as": None,
}


def test_nested_dicts_and_lists_become_dotted_keys():
    cfg = OmegaConf.create(
        {
            "model": {"name": "unet", "channels": [8, 16], "norm": None, "blocks": []},
            "lr": 1e-3,
            "flag": True,
            "opts": {},
            "ref": "${model.name}",
            "hydra": {"run": {"dir": "x"}},
        }
    )
    flat = flatten_config(cfg)
    # Values are written as one would type them in a Hydra override (null, true, 0.001).
    assert flat == {
        "model.name": "unet",
        "model.channels.0": "8",
        "model.channels.1": "16",
        "model.norm": "null",
        "model.blocks": "[]",
        "lr": "0.001",
        "flag": "true",
        "opts": "{}",
        "ref": "unet",
    }


def test_flattening_is_stable_and_order_follows_the_config():
    a = OmegaConf.create({"b": {"y": 1, "x": 2}, "a": [1, {"k": "v"}]})
    b = OmegaConf.create({"b": {"y": 1, "x": 2}, "a": [1, {"k": "v"}]})
    assert flatten_config(a) == flatten_config(b)
    assert list(flatten_config(a)) == ["b.y", "b.x", "a.0", "a.1.k"]
    # Same mapping built in another order: same params (dicts compare as sets of items).
    c = OmegaConf.create({"a": [1, {"k": "v"}], "b": {"x": 2, "y": 1}})
    assert flatten_config(c) == flatten_config(a)


def test_long_values_are_capped_at_mlflows_limit():
    long_value = "x" * (MAX_PARAM_LENGTH + 500)
    flat = flatten_config({"text": long_value, "short": "ok"})
    # MLflow 3 refuses param values over MAX_PARAM_VAL_LENGTH (6000) characters.
    assert len(flat["text"]) == MAX_PARAM_LENGTH
    assert flat["text"].endswith(TRUNCATION_MARK)
    assert flat["short"] == "ok"
    assert flatten_config({"text": long_value}) == {"text": flat["text"]}


def test_keys_are_cleaned_and_long_keys_stay_distinct():
    flat = flatten_config({"a@b": 1, "k" * 300: 1, "k" * 299 + "j": 2})
    assert "a_b" in flat
    long_keys = [k for k in flat if k.startswith("kkk")]
    assert len(long_keys) == 2
    assert all(len(k) <= MAX_KEY_LENGTH for k in long_keys)


def test_clashing_cleaned_keys_are_refused():
    with pytest.raises(ValueError, match="both map to the MLflow name"):
        flatten_config({"a@b": 1, "a_b": 2})


def test_local_default_resolves_to_absolute_paths_under_the_launch_dir(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    uri, artifacts, experiment = resolve_tracking(OmegaConf.create(LOCAL))
    root = tmp_path / "skymoments-runs"
    assert uri == f"sqlite:///{root}/mlflow.db"
    assert uri.startswith("sqlite:////")  # four slashes: an absolute SQLite path
    assert artifacts == (root / "artifacts").as_uri()
    assert experiment == "skymoments"


def test_local_paths_follow_hydras_launch_dir_not_the_job_dir(tmp_path, monkeypatch):
    # Under Hydra with hydra.job.chdir=true the process runs in the job's output folder; the
    # store must still be under the folder the command was launched from (hydra.runtime.cwd).
    from hydra import compose, initialize_config_dir
    from hydra.core.hydra_config import HydraConfig

    conf = tmp_path / "conf"
    conf.mkdir()
    (conf / "config.yaml").write_text("tracking:\n  kind: local\n  root: runs\n  experiment: e\n")
    job_dir = tmp_path / "outputs" / "job"
    job_dir.mkdir(parents=True)
    with initialize_config_dir(config_dir=str(conf), version_base="1.3"):
        cfg = compose("config", return_hydra_config=True)
        cfg.hydra.runtime.cwd = str(tmp_path)
        HydraConfig.instance().set_config(cfg)
        try:
            monkeypatch.chdir(job_dir)
            uri, artifacts, _ = resolve_tracking(cfg.tracking)
        finally:
            HydraConfig.instance().cfg = None
    assert uri == f"sqlite:///{tmp_path}/runs/mlflow.db"
    assert artifacts == (tmp_path / "runs" / "artifacts").as_uri()


def test_explicit_uri_and_artifact_location_are_kept_absolute(tmp_path):
    cfg = {**LOCAL, "uri": "sqlite:///rel/store.db", "artifact_location": "art"}
    uri, artifacts, _ = resolve_tracking(cfg, base_dir=tmp_path)
    assert uri == f"sqlite:///{tmp_path}/rel/store.db"
    assert artifacts == (tmp_path / "art").as_uri()
    cfg = {**LOCAL, "root": str(tmp_path / "abs"), "artifact_location": "s3://bucket/x"}
    uri, artifacts, _ = resolve_tracking(cfg, base_dir="/elsewhere")
    assert uri == f"sqlite:///{tmp_path}/abs/mlflow.db"
    assert artifacts == "s3://bucket/x"


def test_server_settings_and_bad_tracking_configs():
    server = {"kind": "server", "uri": "http://127.0.0.1:5000/", "experiment": "team"}
    assert resolve_tracking(server) == ("http://127.0.0.1:5000", None, "team")
    # The whole config works as well as its tracking node.
    assert settings_from({"tracking": server}).tracking_uri == "http://127.0.0.1:5000"
    with pytest.raises(ValueError, match=r"tracking=server needs tracking.uri"):
        resolve_tracking({"kind": "server", "uri": "???", "experiment": "e"})
    with pytest.raises(ValueError, match=r"not an http\(s\) URL"):
        resolve_tracking({"kind": "server", "uri": "localhost:5000", "experiment": "e"})
    with pytest.raises(ValueError, match="tracking.kind must be one of"):
        resolve_tracking({"kind": "cloud", "experiment": "e"})
    with pytest.raises(ValueError, match="tracking.experiment is empty"):
        resolve_tracking({**LOCAL, "experiment": None})


def test_a_store_folder_or_uri_string_is_accepted(tmp_path):
    (tmp_path / "mlflow.db").write_bytes(b"")
    assert settings_from(tmp_path).tracking_uri == f"sqlite:///{tmp_path}/mlflow.db"
    assert settings_from(str(tmp_path / "mlflow.db")).tracking_uri.endswith("/mlflow.db")
    assert settings_from("http://h:1").is_http
    with pytest.raises(ValueError, match="neither a tracking URI nor an existing"):
        settings_from(str(tmp_path / "missing"))
