"""A stopped run continued by a new one: find it, check the config is the same, link the two.

A job stopped before its end (a cluster's preemption or time limit, SIGKILL, a crash) leaves
a KILLED, FAILED or lost run and its job folder (tag ``skymoments.output_dir``). A new run
started with ``train.resume=<run_id>`` continues it: :func:`resume_point` reads the stopped
run, refuses it unless it was stopped and ran exactly the config given now (every key but
the resume key itself), and returns where its job folder is; what the folder holds is the
science's business (:mod:`skymoments.moments.resume`). Once the new run is open,
:func:`link_runs` tags it ``skymoments.resumed_from=<old id>`` and the old one
``skymoments.resumed_by=<new id>``.

The stopped run's config is read from its ``config/resolved.yaml`` artifact (never capped,
unlike params); loading it parses YAML and runs nothing.
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from omegaconf import OmegaConf

from skymoments.tracking.flatten import flatten_config
from skymoments.tracking.liveness import lost_for_s, mark_lost
from skymoments.tracking.settings import quiet_artifact_downloads, settings_from
from skymoments.tracking.store import client_for, with_retries

__all__ = [
    "RESUMED_BY_TAG",
    "RESUMED_FROM_TAG",
    "ResumePoint",
    "ResumeRefused",
    "link_runs",
    "resume_point",
]

RESUMED_FROM_TAG = "skymoments.resumed_from"
RESUMED_BY_TAG = "skymoments.resumed_by"
OUTPUT_DIR_TAG = "skymoments.output_dir"
CONFIG_ARTIFACT = "config/resolved.yaml"
# The differing keys a refusal names in full; more are counted.
_SHOWN_KEYS = 6


class ResumeRefused(ValueError):
    """The run asked for cannot be continued; the message says why and what to do."""


@dataclass(frozen=True)
class ResumePoint:
    """A stopped run to continue.

    Attributes
    ----------
    run_id : str
    status : str
        Its status when it was found (a lost RUNNING run is marked KILLED first).
    job_dir : pathlib.Path
        Its Hydra job folder.
    """

    run_id: str
    status: str
    job_dir: Path


def resume_point(cfg: Any, run_id: str, key: str = "train.resume") -> ResumePoint:
    """The stopped run ``run_id`` of ``cfg.tracking``'s store, checked against ``cfg``.

    Parameters
    ----------
    cfg : DictConfig
        The composed config of the new run (its ``tracking`` node says which store).
    run_id : str
    key : str
        The dotted config key holding the run id: the one key allowed to differ.

    Raises
    ------
    ResumeRefused
        No such run; a FINISHED run, or one still alive (its heartbeat beating); no job
        folder recorded or found; no recorded config; a config that differs from the run's
        (the message names the differing keys).
    """
    settings = settings_from(cfg["tracking"])
    client = client_for(settings)
    try:
        run = with_retries(settings, f"read run {run_id}", lambda: client.get_run(run_id))
    except Exception as exc:
        if "RESOURCE_DOES_NOT_EXIST" in str(getattr(exc, "error_code", "")) or (
            "not found" in str(exc).lower()
        ):
            raise ResumeRefused(
                f"{key}={run_id}: no such run in {settings.tracking_uri}; give the id of a "
                "stopped run of this store (`skymoments compare` lists them)"
            ) from None
        raise
    status = run.info.status
    tags = dict(run.data.tags)
    if status == "FINISHED":
        raise ResumeRefused(
            f"{key}={run_id}: run {run_id} FINISHED, there is nothing to resume; start a new "
            f"run without {key}"
        )
    if status == "RUNNING":
        if lost_for_s(status, tags) is None:
            raise ResumeRefused(
                f"{key}={run_id}: run {run_id} is still RUNNING (its heartbeat is alive); stop "
                "it first, or wait until `skymoments settle` lists it as lost"
            )
    if run.info.experiment_id != with_retries(
        settings,
        "find the experiment",
        lambda: getattr(client.get_experiment_by_name(settings.experiment), "experiment_id", None),
    ):
        raise ResumeRefused(
            f"{key}={run_id}: run {run_id} is not in experiment {settings.experiment!r}; "
            "resume it with the name (experiment) it was started with"
        )
    folder = tags.get(OUTPUT_DIR_TAG)
    if not folder:
        raise ResumeRefused(
            f"{key}={run_id}: run {run_id} records no job folder (tag {OUTPUT_DIR_TAG}), so it "
            f"has no checkpoint to resume from; start a new run without {key}"
        )
    job_dir = Path(folder)
    if not job_dir.is_dir():
        raise ResumeRefused(
            f"{key}={run_id}: the job folder {job_dir} of run {run_id} is gone, and its "
            f"checkpoints with it; start a new run without {key}"
        )
    _check_same_config(client, settings, run_id, cfg, key)
    if status == "RUNNING":
        # Its heartbeat stopped: the process is gone, as `skymoments settle` would record.
        mark_lost(settings, [run_id])
    return ResumePoint(run_id=run_id, status=status, job_dir=job_dir)


def _check_same_config(client, settings, run_id: str, cfg: Any, key: str) -> None:
    with tempfile.TemporaryDirectory() as tmp, quiet_artifact_downloads():
        try:
            local = with_retries(
                settings,
                f"read the config of run {run_id}",
                lambda: client.download_artifacts(run_id, CONFIG_ARTIFACT, tmp),
            )
        except Exception:
            raise ResumeRefused(
                f"{key}={run_id}: run {run_id} has no recorded config ({CONFIG_ARTIFACT}), so "
                f"a continuation cannot be checked against it; start a new run without {key}"
            ) from None
        before = flatten_config(OmegaConf.load(local))
    now = flatten_config(cfg)
    differing = [
        k
        for k in sorted(set(before) | set(now))
        if k != key and before.get(k, "<unset>") != now.get(k, "<unset>")
    ]
    if not differing:
        return
    shown = [f"{k} ({before.get(k, '<unset>')} -> {now.get(k, '<unset>')})" for k in differing]
    more = len(shown) - _SHOWN_KEYS
    text = ", ".join(shown[:_SHOWN_KEYS]) + (f" and {more} more" if more > 0 else "")
    raise ResumeRefused(
        f"{key}={run_id}: the config differs from run {run_id}'s in {text}; resume with the "
        f"run's own overrides (tag skymoments.overrides) plus {key} only"
    )


def link_runs(cfg: Any, old_run_id: str, new_run_id: str) -> None:
    """Tag the old run ``skymoments.resumed_by`` the new one (the new one carries
    ``skymoments.resumed_from`` from its creation)."""
    settings = settings_from(cfg["tracking"])
    client = client_for(settings)
    with_retries(
        settings,
        f"tag run {old_run_id}",
        lambda: client.set_tag(old_run_id, RESUMED_BY_TAG, new_run_id),
    )
