"""The exact-posterior check end to end: run it, print the figures against the targets.

    .venv/bin/python experiments/gaussian_check/benchmark.py [--root DIR] [overrides ...]

Runs ``skymoments run experiment=gaussian_check tracking.root=DIR [overrides]`` as one
process, as a user would, and prints from the tracked run: ``eval/mse_ratio_exact_E/B``
(target <= 1.02), ``eval/var_ratio_exact_E/B`` (target 0.95 to 1.05), the z-score std and
the wall time end to end (target <= 600 s on the 2-core machine), with the CPU time of the
run and the machine's load average beside it: on a shared machine the wall time says as
much about the neighbours as about the check.
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

TARGETS = {
    "eval/mse_ratio_exact_E": (None, 1.02),
    "eval/mse_ratio_exact_B": (None, 1.02),
    "eval/var_ratio_exact_E": (0.95, 1.05),
    "eval/var_ratio_exact_B": (0.95, 1.05),
}
SHOWN = (
    *TARGETS,
    "calib/z_std_E",
    "calib/z_std_B",
    "calib/cov68_E",
    "calib/cov68_B",
    "baseline/exact/calib/z_std_E",
    "baseline/exact/calib/z_std_B",
    "perf/epochs_mean",
    "perf/epochs_var",
    "perf/train_moments_s",
)
WALL_TARGET_S = 600.0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--root", default=None, help="tracking store folder (default: a temp dir)")
    ap.add_argument("overrides", nargs="*", help="extra Hydra overrides for the run")
    args = ap.parse_args()
    root = Path(args.root or tempfile.mkdtemp(prefix="gaussian_check-")).absolute()
    root.mkdir(parents=True, exist_ok=True)
    cmd = [
        sys.executable,
        "-m",
        "skymoments.cli",
        "run",
        "experiment=gaussian_check",
        f"tracking.root={root}",
        *args.overrides,
    ]
    print("command:", " ".join(cmd[2:]).replace("skymoments.cli", "skymoments", 1))
    load0 = os.getloadavg()
    cpu0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=root.parent, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    cpu1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    load1 = os.getloadavg()
    if proc.returncode != 0:
        print(proc.stderr[-4000:], file=sys.stderr)
        print(f"the run failed (exit {proc.returncode})", file=sys.stderr)
        return 1
    cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)

    import mlflow

    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    exp = client.get_experiment_by_name("gaussian_check")
    run = client.search_runs([exp.experiment_id], order_by=["attributes.start_time DESC"])[0]
    m = run.data.metrics
    print(f"run id: {run.info.run_id} ({run.info.status}), store {root}")
    ok_all = True
    for key in SHOWN:
        value = m.get(key, float("nan"))
        note = ""
        if key in TARGETS:
            lo, hi = TARGETS[key]
            ok = (lo is None or value >= lo) and value <= hi
            ok_all &= ok
            want = f"<= {hi}" if lo is None else f"{lo} to {hi}"
            note = f"  target {want}: {'met' if ok else 'MISSED'}"
        print(f"{key:32s} {value:10.4f}{note}")
    ok_wall = wall <= WALL_TARGET_S
    print(
        f"{'wall time end to end [s]':32s} {wall:10.1f}  target <= {WALL_TARGET_S:.0f}: "
        f"{'met' if ok_wall else 'MISSED'}"
    )
    print(f"{'CPU time of the run [s]':32s} {cpu:10.1f}  (user + system, all its processes)")
    print(f"load average before / after: {load0[0]:.1f} / {load1[0]:.1f} on {os.cpu_count()} cores")
    return 0 if ok_all and ok_wall else 3


if __name__ == "__main__":
    sys.exit(main())
