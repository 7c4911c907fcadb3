"""``skymoments settle``: RUNNING runs whose heartbeat stopped, listed and optionally marked.

    skymoments settle                     # list lost runs in every experiment of the store
    skymoments settle settle.mark=true    # mark them KILLED
    skymoments settle settle.experiment=quickstart settle.lost_after_s=600

Options are in ``conf/settle/default.yaml``; the heartbeat is
:mod:`skymoments.tracking.liveness`.
"""

from __future__ import annotations

from datetime import UTC, datetime

from omegaconf import DictConfig

from skymoments.commands._entry import hydra_task


def _ago(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def settle(cfg: DictConfig) -> list[str]:
    """List (and with ``settle.mark`` mark KILLED) the lost runs; return their ids."""
    from skymoments.compare.select import check_store
    from skymoments.tracking import settings_from
    from skymoments.tracking.liveness import find_lost_runs, last_heartbeat_s, mark_lost
    from skymoments.tracking.store import require_writable

    node = cfg.get("settle") or {}
    limit = node.get("lost_after_s")
    if limit is not None:
        try:
            limit = float(limit)
        except (TypeError, ValueError):
            limit = float("nan")
        if not limit > 0:
            raise ValueError(
                f"settle.lost_after_s={node.get('lost_after_s')!r} is not a positive number of "
                "seconds; give e.g. settle.lost_after_s=600 or null (4 heartbeat periods)"
            )
    settings = settings_from(cfg.tracking)
    check_store(settings)
    if bool(node.get("mark", False)):
        require_writable(settings, "mark runs KILLED")
    experiment = node.get("experiment")
    lost, running = find_lost_runs(settings, experiment=experiment, lost_after_s=limit)
    where = f"experiment {experiment!r}" if experiment else "every experiment"
    for run, age in lost:
        last = datetime.fromtimestamp(last_heartbeat_s(run.tags), tz=UTC)
        print(
            f"lost: run {run.run_id} ({run.name or 'unnamed'}) is RUNNING but its heartbeat "
            f"stopped {_ago(age)} ago (last {last:%Y-%m-%d %H:%M:%S} UTC)"
        )
    live = sum(1 for r in running if last_heartbeat_s(r.tags) is not None)
    silent = len(running) - live
    summary = f"{len(lost)} lost, {live} running with a live heartbeat"
    if silent:
        summary += f", {silent} RUNNING without a heartbeat (tracked before runs had one)"
    print(f"{summary} ({where} of {settings.tracking_uri})")
    ids = [run.run_id for run, _ in lost]
    if ids and bool(node.get("mark", False)):
        mark_lost(settings, ids)
        print(f"marked {len(ids)} run(s) KILLED")
    elif ids:
        print("pass settle.mark=true to mark them KILLED")
    return ids


@hydra_task
def main(cfg: DictConfig) -> None:
    from skymoments.config import ConfigError

    try:
        settle(cfg)
    except ConfigError:
        raise
    except ValueError as err:  # a missing store or experiment: one line, exit 2
        raise ConfigError(str(err)) from err
