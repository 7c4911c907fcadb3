"""A comparison: the selected runs, ranked, with the params that vary between them."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

from skymoments.compare.objective import Objective, RankedRun, rank_runs
from skymoments.compare.params import VaryingParam, varying_params
from skymoments.compare.select import Selection
from skymoments.metric_contract import KEY_METRICS as _CONTRACT_KEY_METRICS

__all__ = ["KEY_METRICS", "Comparison", "build_comparison", "format_value"]

# (label, metric stem, ideal value or None): the stem gets _E / _B appended.
KEY_METRICS = _CONTRACT_KEY_METRICS


def format_value(value: float | str | None, digits: int = 4) -> str:
    """A number in ``digits`` significant figures; ``-`` for a missing one."""
    if value is None:
        return "-"
    if isinstance(value, str):
        return value
    if not math.isfinite(value):
        return str(value)
    return f"{value:.{digits}g}"


@dataclass
class Comparison:
    """Ranked runs and what varies between them.

    Attributes
    ----------
    selection : Selection
        Which runs, from where.
    objective : Objective
    entries : list of RankedRun
        Best first, unranked runs last.
    params : list of VaryingParam
        Varying params; their ``values`` follow the order of ``entries``.
    notes : list of str
        Things the reader should know (missing artifacts are added by the report).
    """

    selection: Selection
    objective: Objective
    entries: list[RankedRun]
    params: list[VaryingParam]
    notes: list[str] = field(default_factory=list)

    @property
    def ranked(self) -> list[RankedRun]:
        """The ranked entries, best first."""
        return [e for e in self.entries if e.ranked]

    @property
    def unranked(self) -> list[RankedRun]:
        """Entries without a rank (failed runs, runs without the objective)."""
        return [e for e in self.entries if not e.ranked]

    @property
    def best(self) -> RankedRun | None:
        """Rank 1."""
        ranked = self.ranked
        return ranked[0] if ranked else None

    @property
    def worst(self) -> RankedRun | None:
        """The last ranked run."""
        ranked = self.ranked
        return ranked[-1] if ranked else None

    def summary(self) -> dict:
        """A JSON-able digest: the objective and each run's rank, value and status."""
        return {
            "selection": self.selection.description,
            "tracking_uri": self.selection.settings.tracking_uri,
            "objective": self.objective.name,
            "direction": self.objective.direction,
            "varying_params": [p.key for p in self.params],
            "runs": [
                {
                    "run_id": e.run.run_id,
                    "name": e.run.name,
                    "status": e.run.status,
                    "rank": e.rank,
                    "objective": e.value,
                    "reason": e.reason,
                    "params": {p.key: p.values[i] for p in self.params},
                }
                for i, e in enumerate(self.entries)
            ],
        }


def build_comparison(
    selection: Selection, objective: Objective, ignore_params: Sequence[str] = ("tracking.*",)
) -> Comparison:
    """Rank the selection's runs and find the params that vary between them.

    Raises
    ------
    ValueError
        Finished runs exist but none has the objective (see :func:`rank_runs`).
    """
    entries = rank_runs(selection.runs, objective)
    params = varying_params([e.run for e in entries], ignore=ignore_params)
    notes = []
    if not any(e.ranked for e in entries):
        notes.append("no run finished: nothing is ranked")
    return Comparison(selection, objective, entries, params, notes)
