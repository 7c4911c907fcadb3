"""Selecting the runs to compare: an experiment, a sweep (parent run), or a filter.

Sweep parent runs (tag ``skymoments.run_kind = sweep``) and earlier comparison runs
(``compare``) are never compared themselves: a sweep is compared through its children.
"""

from __future__ import annotations

import contextlib
import dataclasses
import re
import sqlite3
from dataclasses import dataclass
from typing import Any

from mlflow.exceptions import MlflowException

from skymoments.tracking import RunRecord, find_runs, get_run
from skymoments.tracking.settings import TrackingSettings, settings_from
from skymoments.tracking.store import client_for, connect_read_only, with_retries

__all__ = ["RUN_KIND_TAG", "SWEEP_ID_TAG", "Selection", "check_store", "select_runs"]

RUN_KIND_TAG = "skymoments.run_kind"
SWEEP_ID_TAG = "skymoments.sweep_id"
_NOT_COMPARED = ("sweep", "compare")
_ID_CHARS = re.compile(r"^[A-Za-z0-9_\-]+$")


@dataclass(frozen=True)
class Selection:
    """The runs chosen for a comparison and where they came from.

    Attributes
    ----------
    runs : list of RunRecord
        Oldest first; no sweep parents, no comparison runs.
    description : str
        What was searched, for messages and the report (``"children of sweep run ..."``).
    settings : TrackingSettings
        The store (its ``experiment`` is the experiment searched, if one was).
    experiment_name : str or None
        The experiment the runs were searched in.
    parent : RunRecord or None
        The sweep's parent run, when a sweep was given.
    """

    runs: list[RunRecord]
    description: str
    settings: TrackingSettings
    experiment_name: str | None
    parent: RunRecord | None = None


def _has_mlflow_schema(path) -> bool:
    try:
        # Read-only, and readable even in a folder this user cannot write.
        with contextlib.closing(connect_read_only(path)) as con:
            row = con.execute("SELECT version_num FROM alembic_version").fetchone()
    except sqlite3.Error:
        return False
    return row is not None


def check_store(settings: TrackingSettings) -> None:
    """Refuse a local store that does not exist, before MLflow would create an empty one.

    A server is probed by the tracking package on first use instead (an unreachable one
    raises :class:`~skymoments.tracking.TrackingUnavailableError` naming its URI).

    Raises
    ------
    ValueError
        No SQLite database at the store's path, or one without MLflow's tables.
    """
    path = settings.sqlite_path
    if path is None:
        return
    if not path.is_file():
        raise ValueError(
            f"no tracking store at {path} (tracking URI {settings.tracking_uri}); point "
            "tracking.root at the store folder that holds mlflow.db (by default "
            "skymoments-runs/ in the folder `skymoments run` was launched from), or track "
            "some runs first"
        )
    if not _has_mlflow_schema(path):
        raise ValueError(
            f"{path} is not an MLflow tracking store (no MLflow tables in it); point "
            "tracking.root at the folder holding the store's mlflow.db"
        )


def _compared(runs: list[RunRecord]) -> list[RunRecord]:
    return [r for r in runs if r.tags.get(RUN_KIND_TAG) not in _NOT_COMPARED]


def _find_parent(settings: TrackingSettings, sweep: str) -> RunRecord:
    """The sweep's parent run, by run id or by the ``skymoments.sweep_id`` tag."""
    if not _ID_CHARS.match(sweep):
        raise ValueError(
            f"compare.sweep={sweep!r} is not a run id or sweep id (letters, digits, - and _ "
            "only); pass the sweep's parent run id as printed by the sweep"
        )
    try:
        return get_run(settings, sweep)
    except MlflowException as exc:
        if "not found" not in str(exc).lower() and "does not exist" not in str(exc).lower():
            raise
    everywhere = dataclasses.replace(settings, experiment=None)
    query = f"tags.`{SWEEP_ID_TAG}` = '{sweep}' and tags.`{RUN_KIND_TAG}` = 'sweep'"
    found = find_runs(everywhere, filter_string=query)
    if not found:
        raise ValueError(
            f"no sweep {sweep!r} in {settings.tracking_uri}: no run has that id and no sweep "
            f"parent run has the tag {SWEEP_ID_TAG}={sweep}; pass the parent run id printed "
            "at the start of the sweep (or the sweep id shown as its tag); on the command line "
            "quote an id that is all digits: compare.sweep=\"'<id>'\""
        )
    return found[-1]


def select_runs(
    tracking: Any,
    *,
    experiment: str | None = None,
    sweep: str | None = None,
    filter_string: str | None = None,
) -> Selection:
    """The runs to compare.

    Parameters
    ----------
    tracking : DictConfig, Mapping, str or TrackingSettings
        The tracking config (``cfg.tracking``) or a store URI.
    experiment : str, optional
        Experiment name; default the tracking config's experiment. Ignored for a sweep
        (its parent's experiment is used).
    sweep : str, optional
        The sweep's parent run id, or its ``skymoments.sweep_id`` tag: compare its children.
    filter_string : str, optional
        An MLflow search filter, joined by ``and`` with the above.

    Returns
    -------
    Selection

    Raises
    ------
    ValueError
        The store does not exist; the experiment or sweep is not in it; nothing matches (the
        message names what was searched and where).
    """
    settings = settings_from(tracking)
    check_store(settings)
    where = settings.tracking_uri
    filter_string = (filter_string or "").strip() or None
    if sweep:
        parent = _find_parent(settings, str(sweep).strip())
        client = client_for(settings)
        exp = with_retries(
            settings,
            "read the sweep's experiment",
            lambda: client.get_experiment(parent.experiment_id),
        )
        name = exp.name
        scoped = dataclasses.replace(settings, experiment=name)
        runs = _compared(
            find_runs(
                scoped, experiment=name, parent_run_id=parent.run_id, filter_string=filter_string
            )
        )
        description = f"children of sweep run {parent.run_id} ({parent.name or 'unnamed'})"
        if parent.tags.get(SWEEP_ID_TAG):
            description += f", sweep id {parent.tags[SWEEP_ID_TAG]}"
        description += f", experiment {name!r}"
        if filter_string:
            description += f", filter {filter_string!r}"
        if not runs:
            raise ValueError(
                f"nothing to compare: {description} in {where} matched no runs; check that "
                "the sweep's jobs ran and tracked to this store"
                + (" and that the filter matches them" if filter_string else "")
            )
        return Selection(runs, description, scoped, name, parent)

    name = experiment or settings.experiment
    if not name:
        raise ValueError(
            "compare needs an experiment (compare.experiment=<name>), a sweep "
            "(compare.sweep=<parent run id>) or a tracking config with an experiment"
        )
    scoped = dataclasses.replace(settings, experiment=name)
    try:
        runs = _compared(find_runs(scoped, experiment=name, filter_string=filter_string))
    except MlflowException as exc:
        if filter_string:
            raise ValueError(
                f"compare.filter={filter_string!r} is not a valid MLflow search filter "
                f"({exc.message if hasattr(exc, 'message') else exc}); quote metric names "
                "with slashes in backticks: metrics.`eval/mse_B` < 2"
            ) from exc
        raise
    description = f"experiment {name!r}"
    if filter_string:
        description += f", filter {filter_string!r}"
    if not runs:
        raise ValueError(
            f"nothing to compare: {description} in {where} matched no runs (sweep parents "
            "and comparison runs are not compared themselves)"
        )
    return Selection(runs, description, scoped, name, None)
