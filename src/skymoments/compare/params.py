"""Which params vary across a set of runs, grouped so that confounded params show once.

A run's params are its flattened resolved config (dotted keys). Its Hydra overrides (tag
``skymoments.overrides``) add the config-group choices, which are not params themselves:
``model=unet`` becomes the pseudo-param ``model`` with value ``unet``. An override of a plain
value (``train.lr=0.01``) is already a param and adds nothing.

A param *varies* when it does not take the same value in every run (a run that lacks it
counts as a value of its own). Params that split the runs into the same groups (choosing
``model=unet`` changes ``model.mean._target_``, ``model.mean.width``, ...) cannot be told
apart by these runs: they are grouped, one representative shown, the others listed as its
aliases. The representative is a group choice if there is one, then an overridden key, then
the shortest key.
"""

from __future__ import annotations

import fnmatch
import math
import shlex
from collections.abc import Sequence
from dataclasses import dataclass

from skymoments.tracking import RunRecord

__all__ = ["OVERRIDES_TAG", "VaryingParam", "is_numeric", "run_overrides", "varying_params"]

OVERRIDES_TAG = "skymoments.overrides"
_NON_NUMBERS = {"true", "false", "null", "none", ""}


def run_overrides(run: RunRecord) -> dict[str, str]:
    """The run's Hydra overrides as ``{key: value}`` (``+``/``++`` prefixes dropped).

    Deletions (``~key``) and ``hydra.*`` / ``hydra/...`` overrides are left out: they say
    nothing about the study.
    """
    text = run.tags.get(OVERRIDES_TAG, "")
    try:
        items = shlex.split(text)
    except ValueError:  # unbalanced quotes in a hand-made tag: fall back to spaces
        items = text.split()
    out: dict[str, str] = {}
    for item in items:
        if "=" not in item or item.startswith("~"):
            continue
        key, value = item.split("=", 1)
        key = key.lstrip("+").strip()
        if not key or key.startswith(("hydra.", "hydra/")) or key == "hydra":
            continue
        out[key] = value
    return out


def is_numeric(values: Sequence[str | None]) -> bool:
    """True when every present value reads as a finite or infinite float (not a bool/null)."""
    present = [v for v in values if v is not None]
    if not present:
        return False
    for v in present:
        if v.strip().lower() in _NON_NUMBERS:
            return False
        try:
            number = float(v)
        except ValueError:
            return False
        if math.isnan(number):
            return False
    return True


@dataclass(frozen=True)
class VaryingParam:
    """One param (or group of confounded params) that varies across the runs.

    Attributes
    ----------
    key : str
        The representative key (dotted param key or a config-group name).
    values : tuple of (str or None)
        Its value in each run, in the runs' order; None where the run lacks it.
    aliases : tuple of str
        Other keys that split the runs the same way.
    numeric : bool
        All present values are numbers (plotted on a numeric axis, else as categories).
    group_choice : bool
        The key is a config-group choice taken from the overrides, not a param.
    """

    key: str
    values: tuple[str | None, ...]
    aliases: tuple[str, ...] = ()
    numeric: bool = False
    group_choice: bool = False

    def floats(self) -> list[float | None]:
        """The values as floats (None where absent); only for a numeric param."""
        if not self.numeric:
            raise ValueError(f"param {self.key!r} is categorical; it has no float values")
        return [None if v is None else float(v) for v in self.values]


def _signature(values: Sequence[str | None]) -> tuple[int, ...]:
    """The partition of runs by value, as first-appearance group numbers."""
    seen: dict[str | None, int] = {}
    return tuple(seen.setdefault(v, len(seen)) for v in values)


def _ignored(key: str, patterns: Sequence[str]) -> bool:
    return any(fnmatch.fnmatchcase(key, p) for p in patterns)


def varying_params(
    runs: Sequence[RunRecord], ignore: Sequence[str] = ("tracking.*",)
) -> list[VaryingParam]:
    """The params that vary across ``runs``, confounded ones grouped.

    Parameters
    ----------
    runs : sequence of RunRecord
    ignore : sequence of str
        fnmatch patterns of keys never reported (default: the tracking node, which says where
        runs are stored, not what they study).

    Returns
    -------
    params : list of VaryingParam
        Group choices first, in override order, then the other representatives by key.
    """
    if len(runs) < 2:
        return []
    table: list[dict[str, str]] = []
    choice_keys: list[str] = []
    overridden: set[str] = set()
    for run in runs:
        row = dict(run.params)
        for key, value in run_overrides(run).items():
            overridden.add(key)
            if key not in run.params:  # a group choice: not a param of its own
                row[key] = value
                if key not in choice_keys:
                    choice_keys.append(key)
        table.append(row)
    keys = sorted({k for row in table for k in row if not _ignored(k, ignore)})
    groups: dict[tuple[int, ...], list[str]] = {}
    columns: dict[str, tuple[str | None, ...]] = {}
    for key in keys:
        values = tuple(row.get(key) for row in table)
        if len(set(values)) < 2:
            continue
        columns[key] = values
        groups.setdefault(_signature(values), []).append(key)

    def preference(key: str) -> tuple:
        return (
            key not in choice_keys,
            choice_keys.index(key) if key in choice_keys else 0,
            key not in overridden,
            key.count("."),
            len(key),
            key,
        )

    out = []
    for members in groups.values():
        members = sorted(members, key=preference)
        head = members[0]
        out.append(
            VaryingParam(
                key=head,
                values=columns[head],
                aliases=tuple(members[1:]),
                numeric=is_numeric(columns[head]),
                group_choice=head in choice_keys,
            )
        )
    out.sort(key=lambda p: (preference(p.key)[:2], p.key))
    return out
