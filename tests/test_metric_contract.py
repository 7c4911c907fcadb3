"""The metric contract: ideals from the normal distribution, one calibration_score for all."""

from __future__ import annotations

import math

import pytest
from scipy import special

from skymoments.calibration.metrics import component_score
from skymoments.compare.objective import resolve_objective
from skymoments.metric_contract import (
    KEY_METRICS,
    METRICS,
    SUMMARY_KEYS,
    calibration_score,
    direction,
    objective_value,
)


def test_coverage_ideals_are_the_normal_fractions():
    # P(|z| < k) = erf(k / sqrt 2) for z ~ N(0, 1) (scipy.special.erf as the reference).
    ideal = {m.stem: m.ideal for m in METRICS}
    for k, stem in ((1, "calib/cov68"), (2, "calib/cov95"), (3, "calib/cov997")):
        assert ideal[stem] == pytest.approx(special.erf(k / math.sqrt(2)), abs=5e-5)
    assert (ideal["calib/z_mean"], ideal["calib/z_std"]) == (0.0, 1.0)
    # compare's columns and the run summary are read from the same table.
    assert ("z std", "calib/z_std", 1.0) in KEY_METRICS
    stems = {m.stem for m in METRICS}
    assert all(k in stems or k.rsplit("_", 1)[0] in stems for k in SUMMARY_KEYS)
    assert "eval/flagged_fraction" in SUMMARY_KEYS


def test_directions():
    assert direction("eval/snr_gain_E") == "max"
    assert direction("eval/mse_B") == direction("calibration_score") == "min"
    assert resolve_objective("eval/snr_gain_B").direction == "max"


def test_calibration_score_is_resolved_once_for_every_reader():
    z = {"E": (0.1, 1.3, (0.60, 0.93, 0.99)), "B": (-0.05, 0.9, (0.72, 0.97, 1.0))}
    metrics = {}
    for c, (mean, std, covs) in z.items():
        metrics[f"calib/z_mean_{c}"], metrics[f"calib/z_std_{c}"] = mean, std
        for name, value in zip(("cov68", "cov95", "cov997"), covs, strict=True):
            metrics[f"calib/{name}_{c}"] = value
    want = sum(
        component_score(mean, std, dict(zip(("cov68", "cov95", "cov997"), covs, strict=True)))
        for mean, std, covs in z.values()
    ) / len(z)
    assert calibration_score(metrics) == pytest.approx(want)
    # The logged per-component score wins over the recomputation; a prefix reads one set.
    logged = {"valid/calib/score_E": 0.2, "valid/calib/score_B": 0.4}
    assert objective_value("calibration_score", logged, prefix="valid/") == pytest.approx(0.3)
    assert objective_value("calibration_score", {}) is None
    assert objective_value("eval/mse_B", {"eval/mse_B": float("nan")}) is None
    # compare ranks by the same number.
    assert resolve_objective("calibration_score").value(metrics) == pytest.approx(want)


def test_the_sweep_objective_reads_the_validation_set_through_the_contract():
    from omegaconf import OmegaConf

    from skymoments.study.training import objective

    metrics = {"valid/calib/score_E": 0.2, "valid/calib/score_B": 0.4, "calib/score_E": 9.0}
    metrics |= {"valid/eval/mse_B": 3.0, "eval/mse_B": 1.0}
    for name, want in (("calibration_score", 0.3), ("eval/mse_B", 3.0), ("valid/eval/mse_B", 3.0)):
        assert objective(OmegaConf.create({"objective": name}), metrics) == pytest.approx(want)
    assert math.isnan(objective(OmegaConf.create({"objective": "calib/crps"}), metrics))
