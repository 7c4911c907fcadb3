"""Typed schemas for the composed config, and the checks Hydra's composition cannot make.

Types are checked by merging each node onto a structured (dataclass) schema, which
names the full key of any value of the wrong type; ranges and names (a negative pixel
size, an unknown foreground) are checked here with messages that name the key and say
how to fix it. ``validate`` runs before any work starts.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException


class ConfigError(ValueError):
    """A composed config that cannot be run; the message names the key."""


@dataclass
class PatchSchema:
    npix: int = 64
    pixel_arcmin: float = 3.0


@dataclass
class PriorSchema:
    dist: str = "fixed"
    value: float | None = None
    low: float | None = None
    high: float | None = None
    mean: float | None = None
    std: float | None = None


PRIOR_KEYS = ("r", "a_lens", "a_fg", "noise_uk_arcmin")
TRACKING_KINDS = ("local", "server")


def _typed(node: Any, schema: type, key: str) -> DictConfig:
    """Merge ``node`` onto ``schema`` so a wrongly typed value fails with its full key."""
    base = OmegaConf.structured(schema)
    try:
        return OmegaConf.merge(base, node)
    except OmegaConfBaseException as err:
        raise ConfigError(f"invalid value under '{key}': {err}") from None


def _positive(value: Any, key: str, hint: str) -> None:
    if value is None or not float(value) > 0:
        raise ConfigError(f"{key} must be > 0, got {value!r}; {hint}")


def _check_patch(cfg: DictConfig) -> None:
    patch = _typed(cfg.patch, PatchSchema, "patch")
    _positive(patch.pixel_arcmin, "patch.pixel_arcmin", "set patch.pixel_arcmin=<arcmin per pixel>")
    if patch.npix < 4:
        raise ConfigError(f"patch.npix must be an integer >= 4, got {patch.npix}")
    side_deg = patch.npix * patch.pixel_arcmin / 60.0
    if side_deg > 180.0:
        raise ConfigError(
            f"patch.npix * patch.pixel_arcmin = {side_deg:.1f} deg exceeds 180 deg; "
            "the flat-sky patch cannot be that large"
        )


def _check_sky(cfg: DictConfig) -> None:
    from skymoments.sky.cmb import CMBCosmology
    from skymoments.sky.foregrounds import FOREGROUNDS

    sky = cfg.sky
    # The cosmology's own dataclass is the schema: its fields type the node and its
    # checks name the key (sky.cmb.H0 ...).
    _typed(sky.cmb, CMBCosmology, "sky.cmb")
    try:
        CMBCosmology.from_mapping(OmegaConf.to_container(sky.cmb, resolve=True))
    except (TypeError, ValueError) as err:
        raise ConfigError(f"sky.cmb: {err}") from None
    fg = sky.foreground
    name = fg.get("name") if isinstance(fg, DictConfig) else None
    if name not in FOREGROUNDS:
        known = ", ".join(sorted(FOREGROUNDS))
        raise ConfigError(
            f"sky.foreground.name={name!r} is not a known foreground; choose one of: {known}"
        )
    beam = sky.get("beam_fwhm_arcmin", 0.0)
    if beam is None or float(beam) < 0:
        raise ConfigError(f"sky.beam_fwhm_arcmin must be >= 0 arcmin, got {beam!r}")
    for key in ("amplitude_uk",):
        if key in fg:
            _positive(fg[key], f"sky.foreground.{key}", "give the foreground amplitude in uK")


def _check_prior(cfg: DictConfig) -> None:
    from skymoments.sky.priors import prior_from_config

    for key in PRIOR_KEYS:
        if key not in cfg.prior:
            raise ConfigError(f"prior.{key} is missing; every scenario needs a prior on {key}")
        node = _typed(cfg.prior[key], PriorSchema, f"prior.{key}")
        try:
            prior_from_config(OmegaConf.to_container(node))
        except ValueError as err:
            raise ConfigError(f"prior.{key}: {err}") from None
    for key in cfg.prior:
        if key not in PRIOR_KEYS:
            raise ConfigError(
                f"prior.{key} is not a scenario parameter; known: {', '.join(PRIOR_KEYS)}"
            )


def _check_model(cfg: DictConfig) -> None:
    if "model" not in cfg:
        return
    for stage in ("mean", "variance"):
        node = cfg.model.get(stage)
        if node is None:
            raise ConfigError(f"model.{stage} is missing; pick a model, e.g. model=unet")
        for key in ("width", "depth", "n_blocks", "n_layers", "modes"):
            if key in node and not (isinstance(node[key], int) and node[key] > 0):
                raise ConfigError(
                    f"model.{stage}.{key} must be a positive integer, got {node[key]!r}"
                )
    pos = cfg.model.get("positivity", "softplus")
    if pos not in ("softplus", "logvar"):
        raise ConfigError(f"model.positivity={pos!r}; choose softplus or logvar")


def _check_train(cfg: DictConfig) -> None:
    if "train" not in cfg:
        return
    for key in ("batch_size", "steps_per_epoch", "n_val", "max_epochs_mean", "max_epochs_var"):
        if key in cfg.train:
            value = cfg.train[key]
            if not (isinstance(value, int) and value > 0):
                raise ConfigError(f"train.{key} must be a positive integer, got {value!r}")


def _check_tracking(cfg: DictConfig) -> None:
    if "tracking" not in cfg:
        return
    kind = cfg.tracking.get("kind")
    if kind not in TRACKING_KINDS:
        raise ConfigError(f"tracking.kind={kind!r}; choose tracking=local or tracking=server")
    if kind == "server":
        uri = cfg.tracking.get("uri") if not OmegaConf.is_missing(cfg.tracking, "uri") else None
        if not uri or not str(uri).startswith(("http://", "https://")):
            raise ConfigError(
                "tracking=server needs tracking.uri=http://HOST:PORT of a tracking server, "
                f"got {uri!r}"
            )


CHECKS = (_check_patch, _check_sky, _check_prior, _check_model, _check_train, _check_tracking)


# Nodes that belong to one subcommand: their mandatory keys are checked only by it.
COMMAND_NODES = ("predict", "compare", "synthesis", "evaluate")


def validate(cfg: DictConfig, command: str | None = None) -> DictConfig:
    """Check a composed config before any work; raise :class:`ConfigError` naming the key.

    Parameters
    ----------
    cfg : DictConfig
    command : str, optional
        The subcommand being run; the mandatory (``???``) keys of its own node are
        checked, those of other subcommands' nodes are not.

    Returns the same config, so ``cfg = validate(cfg)`` reads naturally.
    """
    for key in ("patch", "sky", "prior"):
        if key not in cfg:
            raise ConfigError(f"the config has no '{key}' node; compose it from conf/config.yaml")
    missing = {
        key
        for key in OmegaConf.missing_keys(cfg)
        if key.split(".")[0] not in COMMAND_NODES or key.split(".")[0] == command
    }
    if missing:
        raise ConfigError(
            "mandatory config values are not set: "
            + ", ".join(sorted(missing))
            + " (give them as key=value overrides)"
        )
    for check in CHECKS:
        check(cfg)
    return cfg
