"""Ablation of the error-bar protocol: test-set figures before and after each change.

    .venv/bin/python experiments/error_bars/ablation.py [--quick] [--rows a,b,...]
        [--augment oracle,synthesis] [--root DIR] [extra overrides ...]

Each row adds one change to the row above it, from the former protocol (squared variance
loss, unbounded log-variance, variance network on the data alone, no translations, one bank
shared by both stages, no validation-set variance scale) to the committed quickstart.
Every row runs twice: with ``augment=oracle`` (fresh generator foregrounds for every
training pair, the upper bound) and with the quickstart's own ``augment=synthesis`` (the
single image and its WPH bank). A row whose config equals an earlier row's (the oracle of
``translations`` and ``split``, which have nothing to translate or split, is the oracle of
``sees_mean``) reports that run instead of repeating it.
The figures are those of the test set (``calib/*``, ``eval/*``: the ``eval`` stream, which
chose nothing); ``--quick`` shortens training (4 + 3 epochs of 20 steps) to rank changes
cheaply: its figures are not the quickstart's.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import mlflow

# Each row's overrides on top of experiment=quickstart (cumulative: the row and all above).
BEFORE = [
    "train.variance_loss=squared",
    "train.variance_bounds=false",
    "model.variance_sees_mean=false",
    "model.variance.in_channels=2",
    "augment.translations=false",
    "augment.var_images=0",
    "train.variance_calibration=none",
]
ROWS = {
    "before": [],
    "nll": ["train.variance_loss=gaussian_nll"],
    "bounds": ["train.variance_bounds=true"],
    "sees_mean": ["model.variance_sees_mean=true", "model.variance.in_channels=4"],
    "translations": ["augment.translations=true"],
    "split": ["augment.var_images=4"],
    "scale": ["train.variance_calibration=validation_scale"],
}
QUICK = ["train.max_epochs_mean=4", "train.max_epochs_var=3", "train.steps_per_epoch=20"]
KEYS = (
    ("z_mean", "calib/z_mean"),
    ("z_std", "calib/z_std"),
    ("cov68", "calib/cov68"),
    ("cov95", "calib/cov95"),
    ("dec min", "calib/z_std_stddec_min"),
    ("dec max", "calib/z_std_stddec_max"),
    ("mse/W", "eval/mse_ratio_wiener"),
    ("crps", "calib/crps"),
    ("scale", "valid/variance_scale"),
)


def overrides_for(row: str) -> list[str]:
    """The cumulative overrides of ``row``: BEFORE, then every row's change up to it."""
    out = list(BEFORE)
    for name, change in ROWS.items():
        out += change
        if name == row:
            return out
    raise SystemExit(f"unknown row {row!r}; choose from {', '.join(ROWS)}")


def run_once(root: Path, overrides: list[str]) -> tuple[dict, float]:
    """Metrics of one quickstart run (a child process) and its wall seconds."""
    cmd = [sys.executable, "-m", "skymoments.cli", "run", "experiment=quickstart"]
    cmd += [f"tracking.root={root}", *overrides]
    env = {**os.environ, "SKYMOMENTS_CACHE": str(root.parent / "cache")}
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=root.parent, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr[-4000:])
        raise SystemExit(f"run failed ({proc.returncode}): {' '.join(overrides)}")
    client = mlflow.MlflowClient(tracking_uri=f"sqlite:///{root / 'mlflow.db'}")
    exp = client.get_experiment_by_name("quickstart")
    run = client.search_runs([exp.experiment_id], order_by=["attributes.start_time DESC"])[0]
    return dict(run.data.metrics), wall


def fmt_row(row: str, augment: str, m: dict, wall: float) -> str:
    cells = []
    for _, key in KEYS:
        e, b = m.get(f"{key}_E"), m.get(f"{key}_B")
        cells.append(" / ".join("-" if v is None else f"{v:.3g}" for v in (e, b)))
    flag = m.get("eval/flagged_fraction")
    flag = "-" if flag is None else f"{flag:.2f}"
    return f"| {row} | {augment} | " + " | ".join(cells) + f" | {flag} | {wall:.0f} |"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--root", type=Path, default=None)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--rows", default=",".join(ROWS))
    parser.add_argument("--augment", default="oracle,synthesis")
    args, extra = parser.parse_known_args()
    root = args.root or Path(tempfile.mkdtemp(prefix="ablation-")) / "store"
    root.parent.mkdir(parents=True, exist_ok=True)
    head = " | ".join(f"{label} E / B" for label, _ in KEYS)
    print(f"| row | augment | {head} | flagged | wall s |")
    print("|" + " --- |" * (len(KEYS) + 4))
    done: dict[tuple, tuple] = {}
    for row in args.rows.split(","):
        for augment in args.augment.split(","):
            ov = [f"augment={augment}", *overrides_for(row), *(QUICK if args.quick else []), *extra]
            if augment == "oracle":
                # Nothing to translate or split with fresh generator draws.
                ov = [o for o in ov if not o.startswith(("augment.translations", "augment.var"))]
            # The effective config decides the run: a row whose overrides (the last value of
            # each key) equal an earlier row's is that run again (the oracle of translations
            # and split is the oracle of sees_mean), so it is reported, not rerun.
            key = tuple(sorted(dict(o.split("=", 1) for o in ov).items()))
            if key in done:
                metrics, wall, same = done[key]
                print(fmt_row(row, augment, metrics, wall) + f" (the {same} run)", flush=True)
                continue
            metrics, wall = run_once(root, ov)
            done[key] = (metrics, wall, f"{row} / {augment}")
            print(fmt_row(row, augment, metrics, wall), flush=True)


if __name__ == "__main__":
    main()
