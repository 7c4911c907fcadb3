"""Ranking, objectives, varying-param detection and the terminal table (no store needed)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from skymoments.calibration.metrics import component_score
from skymoments.compare import (
    build_comparison,
    calibration_score,
    rank_runs,
    render_text,
    resolve_objective,
    run_overrides,
    varying_params,
)
from skymoments.compare.select import Selection
from skymoments.tracking import RunRecord
from skymoments.tracking.settings import TrackingSettings


def make_run(k: int, status: str = "FINISHED", params=None, metrics=None, overrides: str = ""):
    """A seeded, store-free run record."""
    tags = {"skymoments.overrides": overrides} if overrides else {}
    return RunRecord(
        run_id=f"{k:032x}",
        name=f"job{k}",
        status=status,
        experiment_id="1",
        params=dict(params or {}),
        metrics=dict(metrics or {}),
        tags=tags,
    )


def test_rank_smaller_is_better_and_larger_is_better():
    values = [3.0, 1.0, 2.0, 5.0]
    runs = [make_run(k, metrics={"eval/mse_B": v}) for k, v in enumerate(values)]
    runs.append(make_run(9, status="FAILED", metrics={"eval/mse_B": 0.1}))
    runs.append(make_run(10, metrics={"eval/mse_E": 1.0}))  # finished, no objective
    low = rank_runs(runs, resolve_objective("eval/mse_B", "min"))
    assert [e.run.name for e in low if e.ranked] == ["job1", "job2", "job0", "job3"]
    assert [e.rank for e in low if e.ranked] == [1, 2, 3, 4]
    high = rank_runs(runs, resolve_objective("eval/mse_B", "max"))
    assert [e.run.name for e in high if e.ranked] == ["job3", "job0", "job2", "job1"]
    # The failed run has the best value but is never ranked; it is listed with its status.
    unranked = {e.run.name: e.reason for e in low if not e.ranked}
    assert unranked == {"job9": "status FAILED", "job10": "no eval/mse_B"}
    assert [e.run.name for e in low[-2:]] == ["job9", "job10"]


def test_ties_keep_the_runs_order():
    runs = [make_run(k, metrics={"calib/ks_B": 0.5}) for k in range(3)]
    ranked = rank_runs(runs, resolve_objective("calib/ks_B"))
    assert [e.run.name for e in ranked] == ["job0", "job1", "job2"]


def test_missing_objective_names_the_metrics_that_exist():
    runs = [make_run(0, metrics={"eval/mse_B": 1.0, "eval/mse_E": 2.0})]
    with pytest.raises(ValueError, match=r"eval/mse_Bx.*eval/mse_B"):
        rank_runs(runs, resolve_objective("eval/mse_Bx"))


def test_direction_auto_and_bad_values():
    assert resolve_objective("eval/mse_B").direction == "min"
    assert resolve_objective("calibration_score").direction == "min"
    assert resolve_objective("eval/snr_gain_E").direction == "max"
    assert resolve_objective("eval/mse_B", "MAX").direction == "max"
    with pytest.raises(ValueError, match="compare.direction"):
        resolve_objective("eval/mse_B", "down")
    with pytest.raises(ValueError, match="compare.objective is empty"):
        resolve_objective("")


def test_calibration_score_from_logged_scores_and_from_components():
    # From the logged per-component scores: their mean.
    assert calibration_score({"calib/score_E": 0.1, "calib/score_B": 0.3}) == pytest.approx(0.2)
    # Recomputed from z moments and coverages: the calibration module's own formula.
    m = {}
    for c, (zm, zs, c68, c95, c997) in {
        "E": (0.1, 1.2, 0.60, 0.93, 0.99),
        "B": (-0.05, 0.9, 0.72, 0.97, 0.999),
    }.items():
        m.update(
            {
                f"calib/z_mean_{c}": zm,
                f"calib/z_std_{c}": zs,
                f"calib/cov68_{c}": c68,
                f"calib/cov95_{c}": c95,
                f"calib/cov997_{c}": c997,
            }
        )
    expected = np.mean(
        [
            component_score(0.1, 1.2, {"cov68": 0.60, "cov95": 0.93, "cov997": 0.99}),
            component_score(-0.05, 0.9, {"cov68": 0.72, "cov95": 0.97, "cov997": 0.999}),
        ]
    )
    assert calibration_score(m) == pytest.approx(expected, rel=1e-12)
    # Analytic: an exactly N(0, 1) z has mean 0, std 1 and the Gaussian masses 2 Phi(k) - 1
    # inside k = 1, 2, 3 sigma, so its score is 0 up to round-off.
    ideal = {}
    for c in "EB":
        ideal.update({f"calib/z_mean_{c}": 0.0, f"calib/z_std_{c}": 1.0})
        for name, k in (("cov68", 1), ("cov95", 2), ("cov997", 3)):
            ideal[f"calib/{name}_{c}"] = 2 * stats.norm.cdf(k) - 1
    assert calibration_score(ideal) == pytest.approx(0.0, abs=1e-12)
    assert calibration_score({"calib/score_E": 0.1}) is None


def test_run_overrides_keep_study_choices_only():
    run = make_run(
        0,
        overrides="model=unet +train.lr=0.01 ~eval.wiener hydra/launcher=joblib "
        "hydra.job.chdir=true ++seed=3",
    )
    assert run_overrides(run) == {"model": "unet", "train.lr": "0.01", "seed": "3"}


def test_varying_params_drop_constants_group_confounded_and_ignore_tracking():
    base = {"seed": "0", "patch.npix": "32", "tracking.root": "/a"}
    runs = [
        make_run(
            0,
            params={
                **base,
                "model.mean.width": "16",
                "model.mean._target_": "U",
                "train.lr": "0.01",
                "tracking.root": "/a",
            },
            overrides="model=unet train.lr=0.01",
        ),
        make_run(
            1,
            params={
                **base,
                "model.mean.width": "32",
                "model.mean._target_": "R",
                "train.lr": "0.001",
                "tracking.root": "/b",
            },
            overrides="model=resnet train.lr=0.001",
        ),
        make_run(
            2,
            params={
                **base,
                "model.mean.width": "16",
                "model.mean._target_": "U",
                "train.lr": "0.1",
                "seed": "7",
                "extra": "x",
            },
            overrides="model=unet train.lr=0.1",
        ),
    ]
    found = {p.key: p for p in varying_params(runs)}
    # seed varies only through run 2, so it is kept; extra is missing in two runs, which is
    # a value of its own; both split the runs {0, 1} | {2} and are grouped under the shorter.
    assert set(found) == {"model", "train.lr", "seed"}
    assert found["model"].group_choice and found["model"].values == ("unet", "resnet", "unet")
    assert set(found["model"].aliases) == {"model.mean.width", "model.mean._target_"}
    assert found["train.lr"].numeric and found["train.lr"].floats() == [0.01, 0.001, 0.1]
    assert not found["model"].numeric
    assert found["seed"].aliases == ("extra",)
    assert all(not k.startswith("tracking.") for p in found.values() for k in (p.key, *p.aliases))
    assert [p.key for p in varying_params(runs)][0] == "model"  # group choices come first
    # With tracking no longer ignored, the root (which splits {0, 2} | {1}) joins model.
    keys = {k for p in varying_params(runs, ignore=()) for k in (p.key, *p.aliases)}
    assert "tracking.root" in keys
    assert varying_params(runs[:1]) == []


def _selection(runs):
    settings = TrackingSettings("uri", "sqlite:////nowhere/mlflow.db", None, "exp")
    return Selection(runs, "experiment 'exp'", settings, "exp")


def test_table_text_shows_ranks_params_metrics_and_unranked_runs():
    runs = [
        make_run(
            0,
            params={"train.lr": "0.01"},
            metrics={
                "eval/mse_B": 2.0,
                "eval/mse_E": 1.5,
                "calib/z_std_E": 1.1,
                "calib/z_std_B": 0.95,
            },
        ),
        make_run(1, params={"train.lr": "0.001"}, metrics={"eval/mse_B": 1.0}),
        make_run(2, status="FAILED", params={"train.lr": "0.1"}),
    ]
    comp = build_comparison(_selection(runs), resolve_objective("eval/mse_B"))
    # 80 columns: the default width of a console that is not a terminal.
    text = render_text(comp, width=80)
    assert max(len(line) for line in text.splitlines()) <= 80
    lines = text.splitlines()

    def cells(line):
        return [c.strip() for c in line.strip()[1:-1].split("│")]

    ranking = [cells(line) for line in lines if line.startswith("│") and "job" in line][:3]
    assert [(r[0], r[1], r[3], r[4], r[5]) for r in ranking] == [
        ("1", "job1", "FINISHED", "1", "0.001"),
        ("2", "job0", "FINISHED", "2", "0.01"),
        ("-", "job2", "FAILED", "-", "0.1"),
    ]
    assert any("train.lr" in line for line in lines if line.startswith("┃"))
    # Key metrics: two rows per run with metrics, E then B; columns z mean, z std, cov68,
    # cov95, KS, MSE, MSE/Wiener after (#, run, C). The failed run has none and no rows.
    metric_rows = [cells(line) for line in lines if line.startswith("│")][3:]
    assert [r[:3] for r in metric_rows] == [
        ["1", "job1", "E"],
        ["", "", "B"],
        ["2", "job0", "E"],
        ["", "", "B"],
    ]
    assert metric_rows[2][4] == "1.1" and metric_rows[3][4] == "0.95"
    assert metric_rows[2][8] == "1.5" and metric_rows[3][8] == "2"
    assert metric_rows[1][8] == "1" and metric_rows[0][8] == "-"
    assert "not ranked: job2 (status FAILED)" in text
