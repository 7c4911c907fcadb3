"""Flatten a nested config into MLflow params: dotted keys, string values, capped lengths."""

from __future__ import annotations

import hashlib
import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from omegaconf import DictConfig, ListConfig, OmegaConf

__all__ = [
    "MAX_KEY_LENGTH",
    "MAX_PARAM_LENGTH",
    "MAX_TAG_LENGTH",
    "cap_value",
    "clean_key",
    "flatten_config",
    "param_value",
]

try:  # the store's own limits, so we cap exactly where MLflow would refuse
    from mlflow.utils.validation import (
        MAX_ENTITY_KEY_LENGTH as MAX_KEY_LENGTH,
    )
    from mlflow.utils.validation import (
        MAX_PARAM_VAL_LENGTH as MAX_PARAM_LENGTH,
    )
    from mlflow.utils.validation import (
        MAX_TAG_VAL_LENGTH as MAX_TAG_LENGTH,
    )
except ImportError:  # pragma: no cover - limits of MLflow 3.x, should the constants move
    MAX_KEY_LENGTH, MAX_PARAM_LENGTH, MAX_TAG_LENGTH = 250, 6000, 8000

TRUNCATION_MARK = "...[truncated]"
# MLflow accepts slashes, word characters, periods, dashes and spaces in keys (colons too,
# except on Windows: we leave them out so a store stays portable).
_BAD_KEY_CHARS = re.compile(r"[^/\w.\- ]")


def param_value(value: Any) -> str:
    """String form of a config leaf, as it would be typed as a Hydra override.

    ``None`` -> ``"null"``, booleans -> ``"true"``/``"false"``, floats by ``repr`` (shortest
    round-trip form), empty containers -> ``"{}"``/``"[]"``, anything else by ``str``.
    """
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, Mapping) and not value:
        return "{}"
    if isinstance(value, (list, tuple)) and not value:
        return "[]"
    return str(value)


def cap_value(text: str, limit: int = MAX_PARAM_LENGTH) -> str:
    """Cut ``text`` to at most ``limit`` characters, marking the cut.

    The tail is replaced by ``...[truncated]`` so that a capped value is recognizable as such
    in the MLflow UI; the full value stays in the ``config/resolved.yaml`` artifact.
    """
    if len(text) <= limit:
        return text
    return text[: limit - len(TRUNCATION_MARK)] + TRUNCATION_MARK


def clean_key(key: str) -> str:
    """Make ``key`` acceptable to MLflow as a param, metric or tag name.

    Characters MLflow refuses become ``_``. A key longer than MLflow's limit keeps its head and
    gets an 8-character digest of the full key, so distinct long keys stay distinct and the
    same key always maps to the same name.
    """
    cleaned = _BAD_KEY_CHARS.sub("_", str(key))
    if len(cleaned) > MAX_KEY_LENGTH:
        digest = hashlib.sha1(cleaned.encode()).hexdigest()[:8]
        cleaned = cleaned[: MAX_KEY_LENGTH - 9] + "~" + digest
    return cleaned


def _to_plain(cfg: Any) -> Any:
    if isinstance(cfg, (DictConfig, ListConfig)):
        return OmegaConf.to_container(cfg, resolve=True, throw_on_missing=False)
    return cfg


def flatten_config(
    cfg: Any,
    *,
    sep: str = ".",
    exclude: Sequence[str] = ("hydra",),
    limit: int = MAX_PARAM_LENGTH,
) -> dict[str, str]:
    """Flatten a nested config to ``{dotted.key: string value}``.

    Parameters
    ----------
    cfg : DictConfig, Mapping or Sequence
        The config. A ``DictConfig`` is resolved first (interpolations evaluated; a mandatory
        ``???`` left unset is recorded as ``"???"``).
    sep : str
        Separator between levels.
    exclude : sequence of str
        Top-level keys to leave out (Hydra's own node by default: it describes the launcher,
        not the experiment).
    limit : int
        Longest value kept; longer values are cut by :func:`cap_value`.

    Returns
    -------
    flat : dict of str to str
        Keys in the config's own order (depth first), list items by index
        (``model.channels.0``); empty containers kept as ``"{}"``/``"[]"`` so that every key of
        the config appears.
    """
    plain = _to_plain(cfg)
    flat: dict[str, str] = {}

    def walk(prefix: str, node: Any) -> None:
        if isinstance(node, Mapping) and node:
            for key, child in node.items():
                walk(f"{prefix}{sep}{key}" if prefix else str(key), child)
        elif isinstance(node, (list, tuple)) and node:
            for index, child in enumerate(node):
                walk(f"{prefix}{sep}{index}" if prefix else str(index), child)
        else:
            key = clean_key(prefix)
            if key in flat:
                raise ValueError(
                    f"config keys {prefix!r} and another key both map to the MLflow name {key!r};"
                    " rename one of them (MLflow names allow letters, digits, _ . - / and space)"
                )
            flat[key] = cap_value(param_value(node), limit)

    if isinstance(plain, Mapping):
        for key, child in plain.items():
            if key in exclude:
                continue
            walk(str(key), child)
    else:
        walk("", plain)
    return flat
