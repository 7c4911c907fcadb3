"""The objective that ranks runs, and the ranking itself.

An objective is a metric name (``eval/mse_B``, ``calib/ks_E``, ...) or
``calibration_score``; names, directions and ``calibration_score`` itself are the metric
contract's (:mod:`skymoments.metric_contract`).

Only FINISHED runs are ranked. A run of another status (FAILED, KILLED, RUNNING) is listed
with its status and no rank, and so is a finished run that lacks the objective's metric.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from skymoments.metric_contract import (
    CALIBRATION_SCORE,
    calibration_score,
    objective_value,
)
from skymoments.metric_contract import direction as better_direction
from skymoments.tracking import RunRecord

__all__ = [
    "CALIBRATION_SCORE",
    "Objective",
    "RankedRun",
    "calibration_score",
    "rank_runs",
    "resolve_objective",
]

DIRECTIONS = ("min", "max", "auto")


@dataclass(frozen=True)
class Objective:
    """What ranks the runs.

    Attributes
    ----------
    name : str
        A metric name or ``"calibration_score"``.
    direction : str
        ``"min"`` (smaller is better) or ``"max"``.
    """

    name: str
    direction: str

    def value(self, metrics: Mapping[str, float]) -> float | None:
        """The objective of a run with these metrics; None when it cannot be computed."""
        return objective_value(self.name, metrics)

    @property
    def description(self) -> str:
        """One line for the report: what is ranked and which way."""
        way = "smaller is better" if self.direction == "min" else "larger is better"
        if self.name == CALIBRATION_SCORE:
            return (
                f"{CALIBRATION_SCORE} = mean over E, B of |z_mean| + |z_std - 1| + mean |coverage "
                f"- nominal| at 68.27/95.45/99.73 % ({way}; 0 is ideal)"
            )
        return f"{self.name} ({way})"


def resolve_objective(name: str, direction: str = "auto") -> Objective:
    """Check an objective name and direction; ``auto`` picks the direction from the name.

    Raises
    ------
    ValueError
        An empty name or a direction other than min, max, auto.
    """
    name = str(name or "").strip()
    if not name:
        raise ValueError(
            "compare.objective is empty; set it to a metric name (compare.objective=eval/mse_B) "
            f"or to {CALIBRATION_SCORE}"
        )
    direction = str(direction or "auto").strip().lower()
    if direction not in DIRECTIONS:
        raise ValueError(f"compare.direction must be one of {DIRECTIONS}, got {direction!r}")
    if direction == "auto":
        direction = better_direction(name)
    return Objective(name, direction)


@dataclass(frozen=True)
class RankedRun:
    """A run with its objective value and rank.

    Attributes
    ----------
    run : RunRecord
    value : float or None
        The objective; None when not computable.
    rank : int or None
        1 is best; None for a run that is not ranked.
    reason : str
        Why the run is not ranked (empty when it is).
    """

    run: RunRecord
    value: float | None
    rank: int | None
    reason: str = ""

    @property
    def ranked(self) -> bool:
        """True for a ranked run."""
        return self.rank is not None


def rank_runs(runs: Sequence[RunRecord], objective: Objective) -> list[RankedRun]:
    """Rank the FINISHED runs by the objective; list the others after them, unranked.

    Ties keep the runs' order (oldest first): the sort is stable.

    Parameters
    ----------
    runs : sequence of RunRecord
    objective : Objective

    Returns
    -------
    ranked : list of RankedRun
        Ranked runs best first, then the unranked ones in their original order.

    Raises
    ------
    ValueError
        Finished runs exist but none has the objective's metric (the message lists the
        metric names that are there, closest first).
    """
    candidates: list[tuple[float, int, RunRecord]] = []
    unranked: list[RankedRun] = []
    for i, run in enumerate(runs):
        value = objective.value(run.metrics)
        if run.status != "FINISHED":
            unranked.append(RankedRun(run, value, None, f"status {run.status}"))
        elif value is None:
            unranked.append(RankedRun(run, None, None, f"no {objective.name}"))
        else:
            candidates.append((value, i, run))
    finished = [r for r in runs if r.status == "FINISHED"]
    if finished and not candidates:
        available = sorted({k for r in finished for k in r.metrics})
        close = difflib.get_close_matches(objective.name, available, n=5, cutoff=0.3)
        shown = close or available[:10]
        raise ValueError(
            f"none of the {len(finished)} finished runs has the objective "
            f"{objective.name!r}; set compare.objective to one of their metrics, e.g. "
            f"{', '.join(shown) or '(they have no metrics)'}, or to {CALIBRATION_SCORE}"
        )
    sign = 1.0 if objective.direction == "min" else -1.0
    candidates.sort(key=lambda item: (sign * item[0], item[1]))
    ranked = [RankedRun(run, value, k + 1) for k, (value, _, run) in enumerate(candidates)]
    return ranked + unranked
