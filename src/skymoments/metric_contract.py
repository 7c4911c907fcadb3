"""The metric contract: each logged metric's name, ideal value and which way is better.

One table read by the run summary, the ``evaluate`` summary, ``compare`` (tables, figures,
report, ranking direction) and the sweep objective, so that a name or an ideal is written
once. A per-component metric is logged as ``<stem>_E`` and ``<stem>_B``.

Ideals. A calibrated posterior gives z = (truth - mean) / std ~ N(0, 1): z mean 0, z std 1,
KS distance 0 between the z distribution and N(0, 1), and the Gaussian coverage of the
1, 2 and 3 sigma intervals, erf(k / sqrt 2) = 0.6827, 0.9545, 0.9973 (Abramowitz & Stegun
7.1.1). A ratio to the Wiener filter of 1 means no gain over that baseline; a ratio to the
exact posterior of 1 means the network reaches it.

``calibration_score`` is resolved here once: the mean over E and B of ``calib/score_C``,
``|z_mean| + |z_std - 1| + mean_k |cov_k - nominal_k|`` (k = 68.27 / 95.45 / 99.73 %), read
from the logged metric or recomputed from the logged z and coverage metrics (the same
formula, :func:`skymoments.calibration.metrics.component_score`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

from skymoments.calibration.metrics import COMPONENTS, component_score

__all__ = [
    "CALIBRATION_SCORE",
    "COMPONENTS",
    "KEY_METRICS",
    "METRICS",
    "SUMMARY_KEYS",
    "MetricSpec",
    "calibration_score",
    "direction",
    "objective_value",
]

CALIBRATION_SCORE = "calibration_score"


@dataclass(frozen=True)
class MetricSpec:
    """One metric of the contract.

    Attributes
    ----------
    stem : str
        The logged name without the component suffix (``calib/z_std`` for ``calib/z_std_E``).
    label : str
        A short column label.
    ideal : float or None
        The value of a perfect posterior; None where there is none (an MSE).
    better : str
        ``"min"`` (smaller is better), ``"max"``, or ``"ideal"`` (closer to ``ideal``).
    """

    stem: str
    label: str
    ideal: float | None
    better: str


METRICS: tuple[MetricSpec, ...] = (
    MetricSpec("calib/z_mean", "z mean", 0.0, "ideal"),
    MetricSpec("calib/z_std", "z std", 1.0, "ideal"),
    MetricSpec("calib/cov68", "cov68", 0.6827, "ideal"),
    MetricSpec("calib/cov95", "cov95", 0.9545, "ideal"),
    MetricSpec("calib/cov997", "cov997", 0.9973, "ideal"),
    MetricSpec("calib/ks", "KS", 0.0, "min"),
    MetricSpec("calib/score", "calibration score", 0.0, "min"),
    # Proper scores of the per-pixel Gaussian predictive (Gneiting & Raftery 2007, JASA
    # 102:359): smaller is better, no fixed ideal (it depends on the problem).
    MetricSpec("calib/crps", "CRPS", None, "min"),
    MetricSpec("calib/nll", "NLL", None, "min"),
    # The former calibration score under a name that says what it is (no sharpness term).
    MetricSpec("calib/zcov_error", "z/coverage error", 0.0, "min"),
    # z std in the extreme deciles of the predicted std (a calibrated posterior: 1 in each).
    MetricSpec("calib/z_std_stddec_min", "z std decile min", 1.0, "ideal"),
    MetricSpec("calib/z_std_stddec_max", "z std decile max", 1.0, "ideal"),
    # Unflagged test maps only (inside the training inputs' range).
    MetricSpec("calib/z_std_inrange", "z std in range", 1.0, "ideal"),
    # The fraction of test maps the out-of-range flag marks (one number, no component).
    MetricSpec("eval/flagged_fraction", "flagged fraction", 0.0, "min"),
    # The same in the patch's outer eval.edge_px-pixel band and in its interior
    # (calibration.edges): calib/z_std_edge_C, calib/z_std_interior_C, ...
    *(
        MetricSpec(f"calib/{stem}_{region}", f"{label} {region}", ideal, "ideal")
        for stem, label, ideal in (
            ("z_mean", "z mean", 0.0),
            ("z_std", "z std", 1.0),
            ("cov68", "cov68", 0.6827),
            ("cov95", "cov95", 0.9545),
        )
        for region in ("edge", "interior")
    ),
    MetricSpec("eval/mse", "MSE", None, "min"),
    MetricSpec("eval/mse_ratio_wiener", "MSE/Wiener", 1.0, "min"),
    MetricSpec("eval/mse_ratio_exact", "MSE/exact", 1.0, "min"),
    MetricSpec("eval/var_ratio_exact", "var/exact", 1.0, "ideal"),
    MetricSpec("eval/snr_gain", "SNR gain", None, "max"),
    # The factor the validation set put on the predicted variance (moments.recalibration):
    # 1 when the variance network was already calibrated on independent foregrounds.
    MetricSpec("valid/variance_scale", "variance scale", 1.0, "ideal"),
)
_BY_STEM = {m.stem: m for m in METRICS}


def _per_component(*stems: str) -> tuple[str, ...]:
    return tuple(f"{s}_{c}" for s in stems for c in COMPONENTS)


# `compare`'s key-metric columns and panels: (label, stem, ideal).
KEY_METRICS: tuple[tuple[str, str, float | None], ...] = tuple(
    (m.label, m.stem, m.ideal)
    for m in METRICS
    if m.stem
    in (
        "calib/z_mean",
        "calib/z_std",
        "calib/cov68",
        "calib/cov95",
        "calib/ks",
        "eval/mse",
        "eval/mse_ratio_wiener",
    )
)
# The end-of-run summary of `run` and `evaluate`: the calibration of E, then of B, then the
# errors against the baselines.
SUMMARY_KEYS: tuple[str, ...] = (
    tuple(
        f"{s}_{c}"
        for c in COMPONENTS
        for s in ("calib/z_mean", "calib/z_std", "calib/cov68", "calib/cov95")
    )
    + _per_component(
        "eval/mse",
        "eval/mse_ratio_wiener",
        "eval/mse_ratio_exact",
        "eval/var_ratio_exact",
        "calib/crps",
        "calib/z_std_stddec_min",
        "calib/z_std_stddec_max",
        "calib/z_std_inrange",
        "valid/variance_scale",
    )
    + ("eval/flagged_fraction",)
)


def _spec(name: str) -> MetricSpec | None:
    if name in _BY_STEM:
        return _BY_STEM[name]
    stem, _, comp = name.rpartition("_")
    return _BY_STEM.get(stem) if comp in COMPONENTS else None


def direction(name: str) -> str:
    """``"max"`` where larger is better (``eval/snr_gain_*``), else ``"min"``.

    Metrics with an ideal inside their range (z std, coverages) are no objective on their
    own; ``calibration_score`` folds them in, and is smaller-is-better.
    """
    spec = _spec(name)
    return "max" if spec is not None and spec.better == "max" else "min"


def calibration_score(metrics: Mapping[str, float], prefix: str = "") -> float | None:
    """``calibration_score`` of one run: mean over E, B of ``calib/score_C`` (0 is ideal).

    ``prefix`` reads the metrics of one evaluation set (``"valid/"``: ``valid/calib/...``).
    Returns None when neither ``calib/score_C`` nor the z/coverage metrics behind it are
    there for both components.
    """
    scores = []
    for c in COMPONENTS:
        value = metrics.get(f"{prefix}calib/score_{c}")
        if value is None:
            parts = [f"{prefix}calib/z_mean_{c}", f"{prefix}calib/z_std_{c}"]
            covs = [f"calib/cov68_{c}", f"calib/cov95_{c}", f"calib/cov997_{c}"]
            if not all(k in metrics for k in parts + [prefix + k for k in covs]):
                return None
            value = component_score(
                metrics[parts[0]],
                metrics[parts[1]],
                {k.split("/")[1].rsplit("_", 1)[0]: metrics[prefix + k] for k in covs},
            )
        scores.append(float(value))
    return float(sum(scores) / len(scores))


def objective_value(name: str, metrics: Mapping[str, float], prefix: str = "") -> float | None:
    """The objective ``name`` (a metric name or ``calibration_score``) of a run's metrics.

    ``prefix`` reads it on one evaluation set (``"valid/"``). None when it cannot be
    computed or is not finite.
    """
    if name == CALIBRATION_SCORE:
        value = calibration_score(metrics, prefix)
    else:
        value = metrics.get(prefix + name)
    if value is None or not math.isfinite(float(value)):
        return None
    return float(value)
