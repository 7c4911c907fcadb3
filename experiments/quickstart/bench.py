"""Run the quickstart end to end and print its wall time, peak memory and key figures.

    .venv/bin/python experiments/quickstart/bench.py [--rerun] [extra overrides ...]

The run goes into a fresh store under a temporary folder (or --root DIR), with a fresh
cache beside it (CAMB spectra and the synthesis bank), so the first run pays what a new
machine pays. With --rerun the study runs twice: the second run reuses the cached bank,
and the two wall times are printed side by side with their ratio.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import mlflow

KEYS = (
    "calib/z_mean_E",
    "calib/z_std_E",
    "calib/cov68_E",
    "calib/cov95_E",
    "calib/cov997_E",
    "calib/z_mean_B",
    "calib/z_std_B",
    "calib/cov68_B",
    "calib/cov95_B",
    "calib/cov997_B",
    "calib/z_std_stddec_min_E",
    "calib/z_std_stddec_max_E",
    "calib/z_std_stddec_min_B",
    "calib/z_std_stddec_max_B",
    "calib/crps_E",
    "calib/crps_B",
    "eval/flagged_fraction",
    "calib/z_std_inrange_E",
    "calib/z_std_inrange_B",
    "eval/mse_ratio_wiener_E",
    "eval/mse_ratio_wiener_B",
    "eval/snr_gain_E",
    "eval/snr_gain_B",
    "perf/train_samples_per_s",
    "perf/data_draw_share",
    "perf/bank_s",
    "perf/synthesis_s_per_image",
)


def run_once(root: Path, extra: list[str]) -> tuple[float, float]:
    """Wall seconds and peak resident memory (GiB) of one quickstart run in a child process."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t0 = time.perf_counter()
    cmd = [
        sys.executable,
        "-m",
        "skymoments.cli",
        "run",
        "experiment=quickstart",
        f"tracking.root={root}",
        *extra,
    ]
    env = {**os.environ, "SKYMOMENTS_CACHE": str(root.parent / "cache")}
    proc = subprocess.run(cmd, cwd=root.parent, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr[-5000:])
        raise SystemExit(f"quickstart failed with exit code {proc.returncode}")
    peak = max(before, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)
    return wall, peak / 1024**2  # ru_maxrss is in KiB on Linux


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--root", type=Path, default=None)
    parser.add_argument("--rerun", action="store_true")
    args, extra = parser.parse_known_args()
    root = args.root or Path(tempfile.mkdtemp(prefix="quickstart-")) / "store"
    root.parent.mkdir(parents=True, exist_ok=True)
    wall, peak = run_once(root, extra)
    print(f"quickstart: {wall:.0f} s end to end, peak RSS {peak:.2f} GiB")
    if args.rerun:
        wall2, _ = run_once(root, extra)
        print(f"rerun (bank reused): {wall2:.0f} s; rerun / first = {wall2 / wall:.2f}")
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    exp = client.get_experiment_by_name("quickstart")
    run = client.search_runs([exp.experiment_id], order_by=["attributes.start_time ASC"])[0]
    print(f"run {run.info.run_id} ({run.info.status}) in {root}")
    for key in KEYS:
        value = run.data.metrics.get(key)
        print(f"  {key:<28} {'-' if value is None else f'{value:.4g}'}")


if __name__ == "__main__":
    main()
