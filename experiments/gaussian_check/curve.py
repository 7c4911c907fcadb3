"""Sample efficiency on the exact-posterior check: eval/mse_ratio_exact against maps seen,
per architecture of conf/model/.

    .venv/bin/python experiments/gaussian_check/curve.py [--models unet spectral ...]
        [--maps 4000 8000 16000] [--root DIR] [overrides ...]

For each architecture and each budget of training maps per stage, runs
``skymoments run experiment=gaussian_check model=<m>`` with ``train.max_epochs_mean`` and
``train.max_epochs_var`` set so that each stage sees that many maps (epochs of
``train.steps_per_epoch x train.batch_size`` maps, no early stop), and reads back from the
tracked run the maps each stage actually consumed (``perf/maps_seen_mean``,
``perf/maps_seen_var``, counted by the trainer) and the exact-posterior ratios. It prints the
curve per architecture and the maps to target: the smallest budget with
``eval/mse_ratio_exact_E/B <= 1.01`` and ``eval/var_ratio_exact_E/B`` within 0.97-1.03.

Each architecture's curve is also logged to the same store as a run ``curve-<model>`` of the
experiment ``sample_efficiency``: metric histories ``curve/mse_ratio_exact_E`` (...) and
``curve/mse_ratio_exact_worst`` (the larger of E and B) with the maps seen as the step (the
latest value is the largest budget's), and ``curve/maps_to_target`` where a budget reached
the target, so that ``compare`` ranks the architectures:

    skymoments compare tracking.root=DIR compare.experiment=sample_efficiency \\
        compare.objective=curve/mse_ratio_exact_worst compare.direction=min
    # or compare.objective=curve/maps_to_target among those that reached it
"""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
MSE_TARGET = 1.01
VAR_RANGE = (0.97, 1.03)
KEYS = (
    "eval/mse_ratio_exact_E",
    "eval/mse_ratio_exact_B",
    "eval/var_ratio_exact_E",
    "eval/var_ratio_exact_B",
)


def meets(m: dict) -> bool:
    """Whether a run's metrics meet the sample-efficiency targets for E and B."""
    mse = all(m.get(f"eval/mse_ratio_exact_{c}", math.inf) <= MSE_TARGET for c in "EB")
    var = all(
        VAR_RANGE[0] <= m.get(f"eval/var_ratio_exact_{c}", math.nan) <= VAR_RANGE[1] for c in "EB"
    )
    return mse and var


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    models = sorted(p.stem for p in (ROOT / "conf" / "model").glob("*.yaml"))
    ap.add_argument("--models", nargs="+", default=models)
    ap.add_argument("--maps", nargs="+", type=int, default=[4000, 8000, 16000])
    ap.add_argument("--batch", type=int, default=32, help="train.batch_size")
    ap.add_argument("--steps", type=int, default=25, help="train.steps_per_epoch")
    ap.add_argument("--root", default=None, help="tracking store folder (default: a temp dir)")
    ap.add_argument("overrides", nargs="*", help="extra Hydra overrides for every run")
    args = ap.parse_args()
    root = Path(args.root or tempfile.mkdtemp(prefix="curve-")).absolute()
    root.mkdir(parents=True, exist_ok=True)
    print(f"load average at start: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    per_epoch = args.batch * args.steps

    import mlflow

    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    curves: dict[str, list[tuple[int, dict]]] = {}
    for model in args.models:
        for budget in sorted(args.maps):
            epochs = max(1, round(budget / per_epoch))
            cmd = [
                sys.executable, "-m", "skymoments.cli", "run", "experiment=gaussian_check",
                f"model={model}", f"tracking.root={root}", f"train.batch_size={args.batch}",
                f"train.steps_per_epoch={args.steps}", f"train.max_epochs_mean={epochs}",
                f"train.max_epochs_var={epochs}", f"train.patience={epochs + 1}",
                *args.overrides,
            ]  # fmt: skip
            proc = subprocess.run(cmd, cwd=root, capture_output=True, text=True)
            if proc.returncode != 0:
                print(f"{model} @ {budget}: FAILED (exit {proc.returncode})")
                print(proc.stderr[-2000:], file=sys.stderr)
                continue
            exp = client.get_experiment_by_name("gaussian_check")
            run = client.search_runs(
                [exp.experiment_id], order_by=["attributes.start_time DESC"], max_results=1
            )[0]
            m = run.data.metrics
            seen = int(m.get("perf/maps_seen_mean", -1))
            seen_var = int(m.get("perf/maps_seen_var", -1))
            curves.setdefault(model, []).append((seen, m))
            print(
                f"{model:16s} maps seen {seen:6d} (var stage {seen_var})"
                + "".join(f"  {k.split('/')[1]}={m.get(k, math.nan):.4f}" for k in KEYS),
                flush=True,
            )
    exp_id = client.get_experiment_by_name("sample_efficiency")
    exp_id = exp_id.experiment_id if exp_id else client.create_experiment("sample_efficiency")
    print("maps to target (mse_ratio_exact <= 1.01, var_ratio_exact in 0.97-1.03, E and B):")
    for model, pts in curves.items():
        hit = [seen for seen, m in sorted(pts, key=lambda p: p[0]) if meets(m)]
        to_target = float(hit[0]) if hit else math.nan
        run = client.create_run(exp_id, run_name=f"curve-{model}", tags={"model": model})
        client.log_param(run.info.run_id, "model", model)
        for seen, m in sorted(pts, key=lambda p: p[0]):
            for k in KEYS:
                if k in m:
                    client.log_metric(run.info.run_id, "curve/" + k.split("/")[1], m[k], step=seen)
            worst = max(m.get(f"eval/mse_ratio_exact_{c}", math.inf) for c in "EB")
            client.log_metric(run.info.run_id, "curve/mse_ratio_exact_worst", worst, step=seen)
        if hit:  # absent when no budget reached the target
            client.log_metric(run.info.run_id, "curve/maps_to_target", to_target)
        client.set_terminated(run.info.run_id, "FINISHED")
        print(f"  {model:16s} {to_target if hit else 'not reached'}")
    print(
        f"rank: skymoments compare tracking.root={root} compare.experiment=sample_efficiency "
        "compare.objective=curve/mse_ratio_exact_worst compare.direction=min"
    )
    print(f"load average at end: {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
