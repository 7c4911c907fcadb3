"""``skymoments compare``: rank tracked runs, print a table, write and log an HTML report.

    skymoments compare compare.sweep=<parent run id>
    skymoments compare compare.experiment=quickstart compare.objective=calibration_score
    skymoments compare "compare.filter=\"params.model.mean.width = '32'\"" compare.out=cmp.html

Options are in ``conf/compare/default.yaml``; the logic is in :mod:`skymoments.compare`.
"""

from __future__ import annotations

from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from skymoments.commands._entry import hydra_task

DEFAULT_NAME = "compare.html"


def _report_path(node: DictConfig) -> Path:
    if node.get("out"):
        return Path(str(node.out)).expanduser().absolute()
    from skymoments.study.jobs import job_dir

    return job_dir() / DEFAULT_NAME


def compare(cfg: DictConfig):
    """Run the comparison that ``cfg.compare`` describes against ``cfg.tracking``."""
    from skymoments.compare import compare_runs

    node = cfg.get("compare")
    if node is None:
        raise ValueError(
            "the config has no 'compare' node; add `- compare: default` to the defaults of "
            "conf/compare.yaml"
        )
    sweep = node.get("sweep")
    if isinstance(sweep, (float, bool)):
        raise ValueError(
            f"compare.sweep was read by Hydra as the {type(sweep).__name__} {sweep!r}, not as a "
            "run id; quote it: compare.sweep=\"'<id>'\""
        )
    ignore = OmegaConf.to_container(node.get("ignore_params") or [], resolve=True)
    return compare_runs(
        cfg.tracking,
        experiment=node.get("experiment"),
        sweep=None if sweep is None else str(sweep),
        filter_string=node.get("filter"),
        objective=str(node.get("objective") or "eval/mse_B"),
        direction=str(node.get("direction") or "auto"),
        out=_report_path(node),
        log=bool(node.get("log_report", True)),
        ignore_params=[str(p) for p in ignore],
        max_param_columns=int(node.get("max_param_columns", 6)),
    )


@hydra_task
def main(cfg: DictConfig) -> None:
    compare(cfg)
