"""Search spaces for the ``trials`` sweeper: config entries and command-line sweeps to Optuna.

A search space maps a config key (a dotted key such as ``train.optimizer.lr``, or a config
group such as ``model``) to a distribution. Two spellings are accepted.

In the sweeper config (``hydra.sweeper.params``), a mapping::

    train.optimizer.lr: {type: float, low: 1.0e-4, high: 1.0e-2, log: true}
    model.mean.width:   {type: int, low: 4, high: 16, step: 4}
    model:              {type: choice, choices: [unet, dilated_resnet]}

or a string in Hydra's own sweep grammar (as on the command line)::

    train.optimizer.lr: tag(log, interval(1e-4, 1e-2))   # log-uniform float
    train.optimizer.lr: interval(1e-4, 1e-2)             # uniform float
    model.mean.depth:   range(2, 5)                      # integers 2, 3, 4 (stop excluded)
    model:              choice(unet, dilated_resnet)      # or simply: unet,dilated_resnet

A plain value (``seed: 3``) fixes the key for every trial. Command-line overrides are read
with the same grammar: ``train.optimizer.lr='tag(log, interval(1e-4,1e-2))'`` adds (or
replaces) a searched key, ``seed=3`` fixes one.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = [
    "SearchSpace",
    "format_value",
    "parse_search_space",
    "spec_to_distribution",
]

_TYPES = ("float", "int", "choice")
_SAFE = re.compile(r"^[A-Za-z0-9_./+\-]+$")


@dataclass(frozen=True)
class SearchSpace:
    """What each trial searches and what it keeps fixed.

    Attributes
    ----------
    distributions : dict of str to optuna.distributions.BaseDistribution
        Searched keys, in the order given.
    fixed : dict of str to str
        Overrides passed unchanged to every trial: key to the override's value string.
    """

    distributions: dict
    fixed: dict

    def overrides(self, params: Mapping[str, Any]) -> list[str]:
        """The Hydra overrides of one trial: the fixed ones, then ``key=value`` per param."""
        out = [f"{k}={v}" for k, v in self.fixed.items() if k not in params]
        out += [f"{k}={format_value(v)}" for k, v in params.items()]
        return out


def format_value(value: Any) -> str:
    """A parameter value as a Hydra override value (strings quoted when they need it).

    Parameters
    ----------
    value : None, bool, int, float or str

    Returns
    -------
    text : str
        ``null``, ``true``/``false``, the number (``repr`` keeps every float digit), or
        the string, in single quotes when it holds characters the override grammar reads
        as syntax (spaces, commas, brackets, quotes).
    """
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"cannot pass the non-finite value {value!r} as an override")
        return repr(value)
    text = str(value)
    if _SAFE.match(text):
        return text
    escaped = text.replace("\\", "\\\\").replace("'", "\\'")
    return f"'{escaped}'"


def _number(key: str, name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        try:
            value = float(str(value))
        except ValueError:
            raise ValueError(
                f"search space {key!r}: {name}={value!r} is not a number; write e.g. "
                f"{{type: float, low: 1.0e-4, high: 1.0e-2}}"
            ) from None
    if not math.isfinite(float(value)):
        raise ValueError(f"search space {key!r}: {name}={value!r} must be finite")
    return value


def spec_to_distribution(key: str, spec: Mapping[str, Any]):
    """One mapping spec (``{type, low, high, log, step}`` or ``{type: choice, choices}``).

    Parameters
    ----------
    key : str
        The config key, named in error messages.
    spec : mapping
        ``type`` is ``float``, ``int`` or ``choice``; ``float`` and ``int`` take ``low``,
        ``high`` (both included), optional ``log`` (bool) and ``step``; ``choice`` takes
        ``choices`` (a non-empty list of null/bool/int/float/str).

    Returns
    -------
    distribution : optuna.distributions.BaseDistribution

    Raises
    ------
    ValueError
        Unknown type or keys, ``low >= high``, ``log`` with ``low <= 0`` or with ``step``,
        empty or repeated choices.
    """
    from optuna.distributions import (
        CategoricalDistribution,
        FloatDistribution,
        IntDistribution,
    )

    spec = dict(spec)
    kind = str(spec.pop("type", "")).lower()
    if kind in ("categorical", "choices"):
        kind = "choice"
    if kind not in _TYPES:
        raise ValueError(
            f"search space {key!r}: type={kind or None!r}; choose one of {_TYPES}, e.g. "
            f"{{type: float, low: 1.0e-4, high: 1.0e-2, log: true}}"
        )
    allowed = {"choices"} if kind == "choice" else {"low", "high", "log", "step"}
    unknown = sorted(set(spec) - allowed)
    if unknown:
        raise ValueError(
            f"search space {key!r} (type {kind}): unknown keys {unknown}; allowed: "
            f"{sorted(allowed)}"
        )
    if kind == "choice":
        choices = spec.get("choices")
        if isinstance(choices, (str, bytes)) or not isinstance(choices, Iterable):
            raise ValueError(
                f"search space {key!r}: choices must be a list, e.g. choices: [unet, spectral]"
            )
        choices = tuple(choices)
        if not choices:
            raise ValueError(f"search space {key!r}: choices is empty; give at least one value")
        for c in choices:
            if c is not None and not isinstance(c, (bool, int, float, str)):
                raise ValueError(
                    f"search space {key!r}: choice {c!r} is a {type(c).__name__}; choices must "
                    "be null, booleans, numbers or strings"
                )
        if len(set(map(repr, choices))) != len(choices):
            raise ValueError(f"search space {key!r}: choices {list(choices)} repeat a value")
        return CategoricalDistribution(choices)
    for name in ("low", "high"):
        if name not in spec:
            raise ValueError(f"search space {key!r} (type {kind}): {name} is missing")
    low = _number(key, "low", spec["low"])
    high = _number(key, "high", spec["high"])
    log = bool(spec.get("log", False))
    step = spec.get("step")
    if step is not None:
        step = _number(key, "step", step)
        if step <= 0:
            raise ValueError(f"search space {key!r}: step={step!r} must be positive")
    if not low < high:
        raise ValueError(f"search space {key!r}: low={low!r} must be below high={high!r}")
    if log and low <= 0:
        raise ValueError(f"search space {key!r}: a log scale needs low > 0, got low={low!r}")
    if log and step is not None:
        raise ValueError(f"search space {key!r}: give either log: true or a step, not both")
    if kind == "int":
        for name, v in (("low", low), ("high", high), ("step", step)):
            if v is not None and float(v) != int(v):
                raise ValueError(f"search space {key!r} (type int): {name}={v!r} is not whole")
        return IntDistribution(int(low), int(high), log=log, step=int(step or 1))
    return FloatDistribution(float(low), float(high), log=log, step=step)


def _grammar_to_distribution(key: str, override):
    """A parsed Hydra sweep override (choice, range, interval; tag ``log``) to a distribution."""
    from hydra.core.override_parser.types import ChoiceSweep, IntervalSweep, RangeSweep
    from optuna.distributions import CategoricalDistribution

    sweep = override.value()
    tags = set(getattr(sweep, "tags", set()) or set())
    unknown = sorted(tags - {"log"})
    if unknown:
        raise ValueError(f"search space {key!r}: unknown tags {unknown}; the only tag is log")
    log = "log" in tags
    if isinstance(sweep, ChoiceSweep):
        if log:
            raise ValueError(f"search space {key!r}: tag log applies to interval or range only")
        return CategoricalDistribution(tuple(sweep.list))
    if isinstance(sweep, IntervalSweep):
        spec = {"type": "float", "low": sweep.start, "high": sweep.end, "log": log}
        return spec_to_distribution(key, spec)
    if isinstance(sweep, RangeSweep):
        start, stop, step = sweep.start, sweep.stop, sweep.step
        if all(isinstance(v, int) for v in (start, stop, step)):
            # Hydra's range excludes stop, like Python's: the last value is the last step.
            high = start + ((stop - 1 - start) // step) * step
            spec = {"type": "int", "low": start, "high": high, "log": log}
            if step != 1:
                spec["step"] = step
            return spec_to_distribution(key, spec)
        if log:
            raise ValueError(f"search space {key!r}: tag log needs an integer range")
        # A float range stays discrete: its values as choices.
        return CategoricalDistribution(tuple(float(v) for v in sweep.range()))
    raise ValueError(f"search space {key!r}: cannot search over {override.input_line!r}")


def _parse_lines(lines: Iterable[str]) -> list:
    from hydra.core.override_parser.overrides_parser import OverridesParser

    try:
        return OverridesParser.create().parse_overrides(list(lines))
    except Exception as exc:  # Hydra raises OverrideParseException with the grammar's detail
        raise ValueError(f"cannot read the search space: {exc}") from exc


def parse_search_space(
    params: Mapping[str, Any] | None, arguments: Iterable[str] = ()
) -> SearchSpace:
    """The search space from the sweeper's ``params`` and the command-line overrides.

    Parameters
    ----------
    params : mapping of str to (mapping or str or value), optional
        ``hydra.sweeper.params`` (see the module docstring for the spellings).
    arguments : iterable of str
        The sweep's command-line task overrides (``key=value`` or sweep grammar); they
        come after ``params`` and replace an entry of the same key.

    Returns
    -------
    SearchSpace

    Raises
    ------
    ValueError
        A spec that does not parse, or a space with nothing to search.
    """
    distributions: dict = {}
    fixed: dict = {}
    lines = []
    for key, value in (params or {}).items():
        key = str(key)
        if isinstance(value, Mapping):
            distributions[key] = spec_to_distribution(key, value)
            fixed.pop(key, None)
        else:
            lines.append(f"{key}={format_value(value) if not isinstance(value, str) else value}")
    lines += [str(a) for a in arguments]
    for override in _parse_lines(lines):
        key = override.get_key_element()
        if override.is_sweep_override():
            distributions[key] = _grammar_to_distribution(key, override)
            fixed.pop(key, None)
        else:
            distributions.pop(key, None)
            fixed[key] = override.get_value_element_as_str()
    if not distributions:
        raise ValueError(
            "the trials sweeper has nothing to search: give hydra.sweeper.params (e.g. pick "
            "hparams_search=lr_width) or a sweep override such as "
            "train.optimizer.lr='tag(log, interval(1e-4, 1e-2))'"
        )
    return SearchSpace(distributions=distributions, fixed=fixed)
