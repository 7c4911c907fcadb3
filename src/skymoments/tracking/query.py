"""Reading runs back: search, records, artifacts."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from skymoments.tracking.settings import settings_from
from skymoments.tracking.store import client_for, with_retries

__all__ = ["RunRecord", "download_artifact", "find_runs", "get_run", "metric_history"]


@dataclass(frozen=True)
class RunRecord:
    """A run as read back from the store.

    Attributes
    ----------
    run_id, name, status, experiment_id : str
    params, tags : dict of str to str
    metrics : dict of str to float
        The latest value of each metric.
    start_time, end_time : datetime or None
        UTC.
    artifact_uri : str
    """

    run_id: str
    name: str
    status: str
    experiment_id: str
    params: dict[str, str] = field(default_factory=dict)
    metrics: dict[str, float] = field(default_factory=dict)
    tags: dict[str, str] = field(default_factory=dict)
    start_time: datetime | None = None
    end_time: datetime | None = None
    artifact_uri: str = ""

    @property
    def parent_run_id(self) -> str | None:
        """The sweep parent's run id, if this is a sweep job."""
        return self.tags.get("mlflow.parentRunId")

    @property
    def id(self) -> str:
        """Alias of :attr:`run_id`."""
        return self.run_id


def _time(ms: int | None) -> datetime | None:
    return None if ms is None else datetime.fromtimestamp(ms / 1000.0, tz=UTC)


def _record(run: Any) -> RunRecord:
    return RunRecord(
        run_id=run.info.run_id,
        name=run.info.run_name or "",
        status=run.info.status,
        experiment_id=run.info.experiment_id,
        params=dict(run.data.params),
        metrics=dict(run.data.metrics),
        tags=dict(run.data.tags),
        start_time=_time(run.info.start_time),
        end_time=_time(run.info.end_time),
        artifact_uri=run.info.artifact_uri,
    )


def find_runs(
    tracking: Any,
    experiment: str | None = None,
    parent_run_id: str | None = None,
    filter_string: str | None = None,
    *,
    include_parents: bool = True,
) -> list[RunRecord]:
    """Runs matching the given criteria, oldest first.

    Parameters
    ----------
    tracking : DictConfig, Mapping or str
        The tracking config or a tracking URI.
    experiment : str, optional
        Experiment name. Default: the tracking config's experiment; every experiment of the
        store when only a URI was given.
    parent_run_id : str, optional
        Only the children of this sweep parent.
    filter_string : str, optional
        An MLflow search filter (``"metrics.`eval/mse_B` < 1 and params.model.name = 'unet'"``),
        combined with the above by ``and``.
    include_parents : bool
        When False, leave out sweep parent runs (tag ``skymoments.run_kind = 'sweep'``).

    Returns
    -------
    runs : list of RunRecord

    Raises
    ------
    ValueError
        The experiment does not exist in the store.
    """
    settings = settings_from(tracking)
    client = client_for(settings)
    name = experiment or settings.experiment
    if name is not None:
        found = with_retries(
            settings, f"find experiment {name!r}", lambda: client.get_experiment_by_name(name)
        )
        if found is None:
            raise ValueError(
                f"no experiment named {name!r} in {settings.tracking_uri}; check "
                "tracking.experiment (or pass experiment=...)"
            )
        ids = [found.experiment_id]
    else:
        ids = [
            e.experiment_id
            for e in with_retries(settings, "list experiments", lambda: client.search_experiments())
        ]
    clauses = []
    if parent_run_id:
        clauses.append(f"tags.mlflow.parentRunId = '{parent_run_id}'")
    if filter_string:
        # MLflow filters have no OR and no parentheses: clauses are joined by AND.
        clauses.append(filter_string)
    query = " and ".join(clauses)
    records: list[RunRecord] = []
    token = None
    while True:
        page = with_retries(
            settings,
            "search runs",
            lambda t=token: client.search_runs(
                ids,
                filter_string=query,
                order_by=["attributes.start_time ASC"],
                max_results=1000,
                page_token=t,
            ),
        )
        records.extend(_record(r) for r in page)
        token = page.token
        if not token:
            break
    if not include_parents:
        records = [r for r in records if r.tags.get("skymoments.run_kind") != "sweep"]
    return records


def get_run(tracking: Any, run_id: str) -> RunRecord:
    """One run by id."""
    settings = settings_from(tracking)
    client = client_for(settings)
    return _record(with_retries(settings, f"read run {run_id}", lambda: client.get_run(run_id)))


def metric_history(tracking: Any, run_id: str, key: str) -> list[tuple[int, float]]:
    """``[(step, value), ...]`` of metric ``key`` in run ``run_id``, by step."""
    settings = settings_from(tracking)
    client = client_for(settings)
    history = with_retries(
        settings, f"read metric {key!r}", lambda: client.get_metric_history(run_id, key)
    )
    return sorted((m.step, m.value) for m in history)


def download_artifact(tracking: Any, run_id: str, path: str, dst_dir: str | os.PathLike) -> Path:
    """Copy artifact ``path`` (file or folder) of run ``run_id`` into ``dst_dir``."""
    settings = settings_from(tracking)
    client = client_for(settings)
    Path(dst_dir).mkdir(parents=True, exist_ok=True)
    local = with_retries(
        settings,
        f"download artifact {path!r}",
        lambda: client.download_artifacts(run_id, path, str(dst_dir)),
    )
    return Path(local)
