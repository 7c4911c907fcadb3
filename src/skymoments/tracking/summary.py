"""End-of-run summary: key metrics, the run id, and how to look at the run."""

from __future__ import annotations

import math
import shlex
from collections.abc import Iterable, Mapping
from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from skymoments.tracking.settings import settings_from

__all__ = ["print_run_summary", "view_hint"]


def view_hint(
    tracking_uri: str, experiment_id: str | None = None, run_id: str | None = None
) -> str:
    """How to see a run: the ``mlflow ui`` command for a local store, the URL for a server."""
    if tracking_uri.startswith(("http://", "https://")):
        url = tracking_uri.rstrip("/")
        if experiment_id and run_id:
            url += f"/#/experiments/{experiment_id}/runs/{run_id}"
        return url
    return f"mlflow ui --backend-store-uri {shlex.quote(tracking_uri)}"


def _format(value: Any) -> str:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(number):
        return str(number)
    return f"{number:.4g}"


def print_run_summary(
    run: Any,
    metrics: Mapping[str, Any],
    keys: Iterable[str] | None = None,
    *,
    title: str | None = None,
    console: Console | None = None,
) -> str:
    """Print a short table of key metrics, the run id and how to open the run.

    Parameters
    ----------
    run : TrackedRun or RunRecord-like
        Anything with ``run_id`` and ``tracking_uri`` (or ``settings``); ``experiment_id`` is
        used for a server URL when present.
    metrics : mapping of str to float
        The values to show (e.g. the evaluation metrics just logged).
    keys : iterable of str, optional
        Which metrics, in this order; keys absent from ``metrics`` show as ``-``. Default: all
        of ``metrics``, sorted by name.
    title : str, optional
        Table title; default ``"run <run name or id>"``.
    console : rich.console.Console, optional
        Where to print; default a new console on stdout.

    Returns
    -------
    hint : str
        The ``mlflow ui --backend-store-uri <uri>`` command (local store) or the run's URL
        (server), as printed.
    """
    uri = getattr(run, "tracking_uri", None)
    if uri is None and hasattr(run, "settings"):
        uri = settings_from(run.settings).tracking_uri
    if uri is None:
        raise ValueError("print_run_summary needs a run with a tracking_uri (a TrackedRun)")
    run_id = getattr(run, "run_id", None)
    experiment_id = getattr(run, "experiment_id", None)
    hint = view_hint(uri, experiment_id, run_id)
    names = list(keys) if keys is not None else sorted(metrics)
    table = Table(title=title or f"run {run_id}", show_header=True, header_style="bold")
    table.add_column("metric")
    table.add_column("value", justify="right")
    for name in names:
        table.add_row(name, _format(metrics[name]) if name in metrics else "-")
    out = console or Console()
    out.print(table)
    out.print(Text.assemble("run id: ", (str(run_id), "bold")))
    # soft_wrap: the command must stay one line that can be copied as it is.
    out.print(Text.assemble("to see it: ", (hint, "bold")), soft_wrap=True)
    return hint
