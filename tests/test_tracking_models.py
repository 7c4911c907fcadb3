"""A logged model is architecture plus weights: it reloads exactly and never runs stored code."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from urllib.parse import unquote, urlparse

import mlflow
import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from _predict_fakes import make_qu, tiny_model
from skymoments.tracking import load_model, model_uri, set_model_alias, tracked_run
from skymoments.tracking.models import ENV_UNSAFE_UNPICKLE

# Logging and loading go through MLflow's model machinery (a few seconds on the 2-core
# machine for the first test): the whole module is marked slow.
pytestmark = pytest.mark.slow


class Marker:
    """Unpickling this creates ``path``: what a hostile pickle in a shared store could do."""

    def __init__(self, path: Path) -> None:
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


@pytest.fixture(scope="module")
def logged(tmp_path_factory):
    root = tmp_path_factory.mktemp("models")
    cfg = OmegaConf.create(
        {"tracking": {"kind": "local", "root": str(root), "experiment": "models"}}
    )
    model = tiny_model(seed=0)
    example = torch.as_tensor(make_qu(m=3, seed=1), dtype=torch.float32)
    with torch.no_grad():
        expected = [t.numpy() for t in model(example)]
    with tracked_run(cfg) as run:
        info = run.log_model(model, registered_name="tiny-net")
    return cfg, run, info, example, expected


def _model_folder(run, info) -> Path:
    """The logged model's folder inside the local store (what a teammate would download)."""
    client = mlflow.MlflowClient(run.tracking_uri)
    location = client.get_logged_model(info.model_id).artifact_location
    return Path(unquote(urlparse(location).path))


@pytest.mark.parametrize("form", ["bare", "runs", "registered", "logged"])
def test_model_reloads_with_the_same_output(logged, form):
    cfg, run, info, example, expected = logged
    ref = {
        "bare": run.run_id,
        "runs": f"runs:/{run.run_id}/model",
        "registered": "models:/tiny-net/1",
        "logged": info.model_uri,
    }[form]
    model = load_model(ref, cfg.tracking, map_location="cpu")
    assert not model.training
    with torch.no_grad():
        got = [t.numpy() for t in model(example)]
    # Same weights and buffers, same float32 ops on the same CPU: bit-exact.
    for a, b in zip(got, expected, strict=True):
        np.testing.assert_array_equal(a, b)
    assert model(example[:1])[0].shape == (1, 2, 16, 16)


def test_stored_as_architecture_and_tensors(logged):
    _, run, info, _, _ = logged
    folder = _model_folder(run, info)
    assert sorted(p.name for p in folder.iterdir() if p.name != "registered_model_meta") == [
        "MLmodel",
        "architecture.json",
        "requirements.txt",
        "weights.pt",
    ]
    arch = json.loads((folder / "architecture.json").read_text())
    assert arch["mean_net"]["_target_"] == "skymoments.nets.UNet"
    assert arch["mean_net"]["depth"] == 1 and arch["mean_net"]["width"] == 4
    # The weights are the full state dict, scalers' buffers included.
    state = torch.load(folder / "weights.pt", weights_only=True)
    assert {"input_scaler.shift", "input_scaler.scale", "target_scaler.scale"} <= set(state)


def test_pyfunc_serves_the_same_posterior(logged):
    _, run, _, example, expected = logged
    mlflow.set_tracking_uri(run.tracking_uri)
    try:
        served = mlflow.pyfunc.load_model("models:/tiny-net/1")
        out = served.predict(example.numpy())
    finally:
        mlflow.set_tracking_uri(None)
    np.testing.assert_allclose(out["mean"], expected[0], rtol=1e-6)
    np.testing.assert_allclose(out["std"], np.sqrt(expected[1]), rtol=1e-6)


def test_registration_and_alias(logged):
    cfg, run, info, example, expected = logged
    assert info.registered_model_version == 1
    set_model_alias(cfg, "tiny-net", 1, "champion")
    model = load_model("models:/tiny-net@champion", cfg)
    with torch.no_grad():
        np.testing.assert_array_equal(model(example)[0].numpy(), expected[0])


def test_model_logged_in_the_runs_experiment(logged):
    cfg, run, info, _, _ = logged
    model = mlflow.MlflowClient(run.tracking_uri).get_logged_model(info.model_id)
    # MLflow would otherwise file it under the process's default experiment.
    assert model.experiment_id == run.experiment_id
    assert model.source_run_id == run.run_id
    assert str(model.status).endswith("READY")


def _fresh(tmp_path, name):
    """A model logged into a store of its own, to be tampered with."""
    cfg = OmegaConf.create(
        {"tracking": {"kind": "local", "root": str(tmp_path / name), "experiment": "t"}}
    )
    with tracked_run(cfg) as run:
        info = run.log_model(tiny_model(seed=2))
    return cfg, run, _model_folder(run, info)


def test_weights_replaced_by_a_code_carrying_pickle_are_refused(tmp_path):
    cfg, run, folder = _fresh(tmp_path, "weights")
    marker = tmp_path / "marker-weights"
    torch.save(Marker(marker), folder / "weights.pt")
    # The file is live: PyTorch's full unpickler would create the marker (checked on a copy
    # with a marker of its own, so the refusal below is not vacuous).
    control = tmp_path / "marker-control"
    torch.save(Marker(control), tmp_path / "control.pt")
    torch.load(tmp_path / "control.pt", weights_only=False)
    assert control.exists()
    with pytest.raises(ValueError, match="not a plain state dict"):
        load_model(run.run_id, cfg.tracking)
    mlflow.set_tracking_uri(run.tracking_uri)
    try:
        with pytest.raises(ValueError, match="not a plain state dict"):
            mlflow.pyfunc.load_model(f"runs:/{run.run_id}/model")
    finally:
        mlflow.set_tracking_uri(None)
    assert not marker.exists()


def test_old_pickled_model_is_refused_with_the_risk_named(tmp_path, monkeypatch):
    cfg, run, folder = _fresh(tmp_path, "legacy")
    marker = tmp_path / "marker-legacy"
    # What MLflow's PyTorch flavour wrote for a pickled module: MLmodel + data/model.pth.
    for item in folder.iterdir():
        if item.name != "registered_model_meta":
            shutil.rmtree(item) if item.is_dir() else item.unlink()
    (folder / "data").mkdir()
    torch.save(Marker(marker), folder / "data" / "model.pth")
    (folder / "MLmodel").write_text(
        "flavors:\n  pytorch:\n    model_data: data\n    pytorch_version: 2.13.0\n"
        "    serialization_format: pickle\n"
    )
    monkeypatch.delenv(ENV_UNSAFE_UNPICKLE, raising=False)
    with pytest.raises(ValueError, match=f"stored pickled.*{ENV_UNSAFE_UNPICKLE}=1"):
        load_model(run.run_id, cfg.tracking)
    assert not marker.exists()


def test_architecture_naming_another_class_is_refused(tmp_path):
    cfg, run, folder = _fresh(tmp_path, "arch")
    path = folder / "architecture.json"
    arch = json.loads(path.read_text())
    arch["mean_net"]["_target_"] = "torch.nn.Identity"
    path.write_text(json.dumps(arch))
    with pytest.raises(ValueError, match="not one of skymoments' networks"):
        load_model(run.run_id, cfg.tracking)


def test_a_network_not_built_from_a_config_node_cannot_be_logged(tmp_path):
    from skymoments.nets import UNet

    model = tiny_model()
    model.mean_net = UNet(2, 2, depth=1, width=4)
    cfg = OmegaConf.create(
        {"tracking": {"kind": "local", "root": str(tmp_path / "s"), "experiment": "t"}}
    )
    with pytest.raises(ValueError, match="not made by skymoments.nets.build_network"):
        with tracked_run(cfg) as run:
            run.log_model(model)


def test_bad_model_references_are_refused():
    assert model_uri("0" * 32) == f"runs:/{'0' * 32}/model"
    with pytest.raises(ValueError, match="not understood"):
        model_uri("my-model")
    with pytest.raises(ValueError, match="nothing after the scheme"):
        model_uri("models:/")
