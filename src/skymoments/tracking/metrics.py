"""Writing metrics into a run: finite numbers only, in batches, with retries.

Below both :mod:`skymoments.tracking.run` (``TrackedRun.log_metrics``) and
:mod:`skymoments.tracking.lightning` (the Lightning logger), which therefore need not
import each other.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Mapping
from typing import Any

from mlflow.entities import Metric

from skymoments.tracking.flatten import clean_key
from skymoments.tracking.settings import TrackingSettings
from skymoments.tracking.store import client_for, with_retries

__all__ = ["write_metrics"]

# MLflow's batch limit (mlflow.utils.validation): 1000 metrics per log_batch call.
_METRICS_PER_BATCH = 1000


def _finite_metrics(metrics: Mapping[str, Any]) -> tuple[dict[str, float], dict[str, float]]:
    finite: dict[str, float] = {}
    skipped: dict[str, float] = {}
    for key, value in metrics.items():
        try:
            number = float(value)
        except (TypeError, ValueError, RuntimeError) as exc:
            raise ValueError(
                f"metric {key!r} has value {value!r}, which is not a single number; log numbers "
                "(a 0-d tensor or array is fine) and put arrays in artifacts (log_dict)"
            ) from exc
        if math.isfinite(number):
            finite[clean_key(key)] = number
        else:
            skipped[key] = number
    return finite, skipped


def write_metrics(
    settings: TrackingSettings,
    run_id: str,
    metrics: Mapping[str, Any],
    step: int | None = None,
    *,
    stacklevel: int = 2,
) -> dict[str, float]:
    """Log ``metrics`` into run ``run_id`` in batches; skip NaN/inf with one warning.

    Returns
    -------
    logged : dict of str to float
        What was written (names cleaned for MLflow).
    """
    finite, skipped = _finite_metrics(metrics)
    if skipped:
        listed = ", ".join(f"{k}={v}" for k, v in skipped.items())
        warnings.warn(
            f"not logging non-finite metrics to run {run_id}: {listed}",
            RuntimeWarning,
            stacklevel=stacklevel + 1,
        )
    if not finite:
        return finite
    client = client_for(settings)
    stamp = int(time.time() * 1000)
    entries = [Metric(key, value, stamp, int(step or 0)) for key, value in finite.items()]
    for start in range(0, len(entries), _METRICS_PER_BATCH):
        chunk = entries[start : start + _METRICS_PER_BATCH]
        with_retries(settings, "log metrics", lambda c=chunk: client.log_batch(run_id, metrics=c))
    return finite
