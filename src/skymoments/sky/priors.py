"""Priors on a scenario's scalar parameters (r, A_lens, foreground amplitude, noise level).

Each prior has ``sample(rng, n) -> ndarray (n,)``, ``mean()``, ``second_moment()``
(``E[x^2]``, needed for prior-averaged power spectra, which scale with the square of an
amplitude), ``support`` ``(low, high)`` and ``to_config()``, the dict that
:func:`prior_from_config` turns back into the same prior.

Config form: ``{dist: fixed, value: v}``, ``{dist: uniform, low: a, high: b}``,
``{dist: loguniform, low: a, high: b}``, ``{dist: truncnormal, mean: m, std: s, low: a,
high: b}``. Keys set to None are ignored, so a node merged onto a schema that carries
every key still reads as its own distribution.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from skymoments.sky.seeds import as_generator

__all__ = [
    "PRIORS",
    "PRIOR_DISTS",
    "Fixed",
    "LogUniform",
    "Prior",
    "TruncatedNormal",
    "Uniform",
    "prior_from_config",
]


def _finite(value, name: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"prior parameter '{name}' must be a number, got {value!r}") from None
    if not np.isfinite(out):
        raise ValueError(f"prior parameter '{name}' must be finite, got {value!r}")
    return out


def _check_n(n) -> int:
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
        raise ValueError(f"n (number of samples) must be a non-negative integer, got {n!r}")
    return int(n)


def _check_bounds(low: float, high: float) -> None:
    if not low < high:
        raise ValueError(
            f"prior parameter 'low' ({low}) must be smaller than 'high' ({high}); "
            "use dist: fixed for a single value"
        )


class Prior:
    """Base class: a distribution over one scalar parameter."""

    dist: str = ""

    @property
    def support(self) -> tuple[float, float]:
        raise NotImplementedError

    def sample(self, rng, n: int) -> np.ndarray:
        raise NotImplementedError

    def mean(self) -> float:
        raise NotImplementedError

    def second_moment(self) -> float:
        raise NotImplementedError

    def var(self) -> float:
        return max(self.second_moment() - self.mean() ** 2, 0.0)

    def to_config(self) -> dict:
        raise NotImplementedError


@dataclass(frozen=True)
class Fixed(Prior):
    """A point mass at ``value``."""

    value: float
    dist = "fixed"

    def __post_init__(self) -> None:
        object.__setattr__(self, "value", _finite(self.value, "value"))

    @property
    def support(self) -> tuple[float, float]:
        return (self.value, self.value)

    def sample(self, rng, n: int) -> np.ndarray:
        return np.full(_check_n(n), self.value)

    def mean(self) -> float:
        return self.value

    def second_moment(self) -> float:
        return self.value**2

    def to_config(self) -> dict:
        return {"dist": "fixed", "value": self.value}


@dataclass(frozen=True)
class Uniform(Prior):
    """Uniform on ``[low, high)``."""

    low: float
    high: float
    dist = "uniform"

    def __post_init__(self) -> None:
        object.__setattr__(self, "low", _finite(self.low, "low"))
        object.__setattr__(self, "high", _finite(self.high, "high"))
        _check_bounds(self.low, self.high)

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def sample(self, rng, n: int) -> np.ndarray:
        return as_generator(rng).uniform(self.low, self.high, size=_check_n(n))

    def mean(self) -> float:
        return 0.5 * (self.low + self.high)

    def second_moment(self) -> float:
        a, b = self.low, self.high
        return (a * a + a * b + b * b) / 3.0

    def to_config(self) -> dict:
        return {"dist": "uniform", "low": self.low, "high": self.high}


@dataclass(frozen=True)
class LogUniform(Prior):
    """Uniform in ``log x`` on ``[low, high)``, ``0 < low < high``."""

    low: float
    high: float
    dist = "loguniform"

    def __post_init__(self) -> None:
        object.__setattr__(self, "low", _finite(self.low, "low"))
        object.__setattr__(self, "high", _finite(self.high, "high"))
        if self.low <= 0:
            raise ValueError(
                f"prior parameter 'low' must be > 0 for a loguniform prior, got {self.low}; "
                "use dist: uniform to include 0"
            )
        _check_bounds(self.low, self.high)

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def sample(self, rng, n: int) -> np.ndarray:
        u = as_generator(rng).uniform(np.log(self.low), np.log(self.high), size=_check_n(n))
        return np.exp(u)

    def _moment(self, k: int) -> float:
        # E[x^k] for density 1 / (x log(b/a)) on [a, b]: (b^k - a^k) / (k log(b/a)).
        a, b = self.low, self.high
        return (b**k - a**k) / (k * np.log(b / a))

    def mean(self) -> float:
        return float(self._moment(1))

    def second_moment(self) -> float:
        return float(self._moment(2))

    def to_config(self) -> dict:
        return {"dist": "loguniform", "low": self.low, "high": self.high}


@dataclass(frozen=True)
class TruncatedNormal(Prior):
    """A normal ``N(mean, std^2)`` truncated to ``[low, high]`` (scipy.stats.truncnorm)."""

    loc: float
    std: float
    low: float
    high: float
    dist = "truncnormal"

    def __post_init__(self) -> None:
        for name in ("loc", "std", "low", "high"):
            label = "mean" if name == "loc" else name
            object.__setattr__(self, name, _finite(getattr(self, name), label))
        if self.std <= 0:
            raise ValueError(f"prior parameter 'std' must be > 0, got {self.std}")
        _check_bounds(self.low, self.high)

    @property
    def _frozen(self):
        a = (self.low - self.loc) / self.std
        b = (self.high - self.loc) / self.std
        return stats.truncnorm(a, b, loc=self.loc, scale=self.std)

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def sample(self, rng, n: int) -> np.ndarray:
        n = _check_n(n)
        out = self._frozen.rvs(size=n, random_state=as_generator(rng))
        return np.atleast_1d(np.asarray(out, dtype=float))

    def mean(self) -> float:
        return float(self._frozen.mean())

    def second_moment(self) -> float:
        return float(self._frozen.moment(2))

    def to_config(self) -> dict:
        return {
            "dist": "truncnormal",
            "mean": self.loc,
            "std": self.std,
            "low": self.low,
            "high": self.high,
        }


PRIORS: dict[str, type[Prior]] = {
    "fixed": Fixed,
    "uniform": Uniform,
    "loguniform": LogUniform,
    "truncnormal": TruncatedNormal,
}
PRIOR_DISTS: tuple[str, ...] = tuple(PRIORS)

# Config keys each distribution needs, in constructor order.
_KEYS = {
    "fixed": ("value",),
    "uniform": ("low", "high"),
    "loguniform": ("low", "high"),
    "truncnormal": ("mean", "std", "low", "high"),
}


def prior_from_config(node) -> Prior:
    """Build a prior from a dict-like node with a ``dist`` key.

    Parameters
    ----------
    node : mapping
        E.g. ``{"dist": "uniform", "low": 0.0, "high": 0.2}``. Keys that are None are
        ignored; a non-None key the distribution does not use is an error.

    Raises
    ------
    ValueError
        Unknown ``dist``, a missing or extra key, or invalid values (the message names
        the parameter).
    """
    if isinstance(node, Prior):
        return node
    try:
        data = {k: v for k, v in dict(node).items() if v is not None}
    except (TypeError, ValueError):
        raise ValueError(f"a prior must be a mapping with a 'dist' key, got {node!r}") from None
    dist = data.pop("dist", None)
    if dist not in PRIORS:
        raise ValueError(
            f"prior dist={dist!r} is not known; choose one of: {', '.join(PRIOR_DISTS)}"
        )
    need = _KEYS[dist]
    missing = [k for k in need if k not in data]
    if missing:
        raise ValueError(f"a {dist} prior needs {', '.join(need)}; missing: {', '.join(missing)}")
    extra = sorted(set(data) - set(need))
    if extra:
        raise ValueError(f"a {dist} prior takes only {', '.join(need)}; remove: {', '.join(extra)}")
    return PRIORS[dist](*(data[k] for k in need))
