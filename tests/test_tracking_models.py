"""A logged torch module reloads through MLflow and computes the same thing."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from skymoments.tracking import load_model, model_uri, set_model_alias, tracked_run

# Importing mlflow.pytorch pulls in pytorch_lightning (about 8 s on the 2-core machine), paid
# by the first test here: the whole module is marked slow.
pytestmark = pytest.mark.slow


class ScaledNet(torch.nn.Module):
    """A small conv net with input/target scalings kept as buffers, like the moment nets."""

    def __init__(self) -> None:
        super().__init__()
        self.conv = torch.nn.Conv2d(2, 2, 3, padding=1, padding_mode="circular")
        self.register_buffer("in_scale", torch.tensor([2.0, 0.5]).view(1, 2, 1, 1))
        self.register_buffer("out_scale", torch.tensor([3.0, 1.5]).view(1, 2, 1, 1))
        self.label = "scaled"

    def forward(self, qu: torch.Tensor) -> torch.Tensor:
        return self.conv(qu / self.in_scale) * self.out_scale


@pytest.fixture(scope="module")
def logged(tmp_path_factory):
    root = tmp_path_factory.mktemp("models")
    cfg = OmegaConf.create(
        {"tracking": {"kind": "local", "root": str(root), "experiment": "models"}}
    )
    torch.manual_seed(0)
    net = ScaledNet().eval()
    example = torch.randn(2, 2, 8, 8, generator=torch.Generator().manual_seed(1))
    with torch.no_grad():
        expected = net(example).numpy()
    with tracked_run(cfg) as run:
        info = run.log_model(net, registered_name="scaled-net", input_example=example[:1])
    return cfg, run, info, example, expected


@pytest.mark.parametrize("form", ["bare", "runs", "registered", "logged"])
def test_model_reloads_with_the_same_output(logged, form):
    cfg, run, info, example, expected = logged
    ref = {
        "bare": run.run_id,
        "runs": f"runs:/{run.run_id}/model",
        "registered": "models:/scaled-net/1",
        "logged": info.model_uri,
    }[form]
    model = load_model(ref, cfg.tracking, map_location="cpu")
    assert isinstance(model, ScaledNet) and model.label == "scaled"
    with torch.no_grad():
        got = model(example).numpy()
    # Same weights, same float32 ops on the same CPU: a pickle round trip is bit-exact.
    np.testing.assert_array_equal(got, expected)
    # A batch size other than the example's still works (no traced, fixed-shape graph).
    assert model(example[:1]).shape == (1, 2, 8, 8)


def test_registration_and_alias(logged):
    cfg, run, info, example, expected = logged
    assert info.registered_model_version == 1
    set_model_alias(cfg, "scaled-net", 1, "champion")
    model = load_model("models:/scaled-net@champion", cfg)
    with torch.no_grad():
        np.testing.assert_array_equal(model(example).numpy(), expected)


def test_model_logged_in_the_runs_experiment(logged):
    from mlflow import MlflowClient

    cfg, run, info, _, _ = logged
    client = MlflowClient(run.tracking_uri)
    model = client.get_logged_model(info.model_id)
    # MLflow would otherwise file it under the process's default experiment.
    assert model.experiment_id == run.experiment_id
    assert model.source_run_id == run.run_id
    assert str(model.status).endswith("READY")


def test_bad_model_references_are_refused():
    assert model_uri("0" * 32) == f"runs:/{'0' * 32}/model"
    with pytest.raises(ValueError, match="not understood"):
        model_uri("my-model")
    with pytest.raises(ValueError, match="nothing after the scheme"):
        model_uri("models:/")
