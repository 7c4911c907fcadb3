"""Typed schemas for the composed config, and the checks Hydra's composition cannot make.

The schemas (dataclasses) are registered once in Hydra's ConfigStore, group ``schema``;
the YAML files under ``conf/`` hold values only. Types are checked by merging each node
onto its registered schema, which names the full key of any value of the wrong type;
ranges and names (a negative pixel size, an unknown foreground, a patch the network cannot
pool) are checked here with messages that name the key and say how to fix it. ``validate``
runs before any work starts, on every node the command's config holds.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from skymoments.sky.cmb import CMBCosmology


class ConfigError(ValueError):
    """A composed config that cannot be run; the message names the key."""


@dataclass
class PatchSchema:
    npix: int = 64
    pixel_arcmin: float = 3.0
    # Pixels drawn on each side and cut away (sky.scenario.Scenario); 0: periodic maps.
    margin: int = 0


@dataclass
class PriorSchema:
    dist: str = "fixed"
    value: float | None = None
    low: float | None = None
    high: float | None = None
    mean: float | None = None
    std: float | None = None


@dataclass
class EvalSchema:
    wiener: bool = True
    fg_bins: int = 4
    edge_px: int = 4


@dataclass
class TrainSchema:
    batch_size: int = 32
    steps_per_epoch: int = 25
    n_val: int = 256
    val_batch_size: int = 64
    max_epochs_mean: int = 10
    max_epochs_var: int = 6
    patience: int = 4
    # An integer, or "auto": measured at start-up (skymoments.moments.perf).
    num_workers: Any = 0
    torch_threads: Any = None
    # The run id of a stopped run to continue (skymoments.tracking.resume).
    resume: str | None = None
    fit_scalers_n: int = 256
    range_draws: int = 4096
    range_margin: float = 0.2
    gradient_clip_val: float | None = 1.0
    variance_loss: str = "gaussian_nll"
    variance_bounds: bool = True
    variance_calibration: str = "validation_scale"
    optimizer: Any = None
    scheduler: Any = None


@dataclass
class PredictHealpixSchema:
    """``predict.healpix``: how a HEALPix input is read, cut and projected back."""

    # The Q and U columns: names or 0-based indices.
    fields: Any = field(default_factory=lambda: ["Q", "U"])
    hdu: int = 1
    nside: int | None = None
    cut: str = "fast"
    lmax: int | None = None
    interpolation: str = "bilinear"
    mask: str | None = None
    min_abs_lat: float | None = None
    overlap: float = 0.25


@dataclass
class PredictSchema:
    """``skymoments predict``'s node; each key is documented in ``conf/predict/default.yaml``.

    ``model`` and ``input`` are mandatory (``MISSING``); the choices and ranges of the
    others are checked by ``skymoments.predict.pipeline.PredictOptions``.
    """

    model: str = MISSING
    input: str = MISSING
    format: str = "auto"
    key: str | None = None
    pixel_arcmin: float | None = None
    convention: str = "patch"
    # [[lon, lat], ...] in degrees, or the path of a two-column text file.
    centres: Any = None
    healpix: PredictHealpixSchema = field(default_factory=PredictHealpixSchema)
    out: str | None = None
    name: str = "posterior"
    force: bool = False
    batch_size: int = 64
    device: str = "cpu"
    quicklook_rows: int = 4
    log_run: bool = True
    experiment: str | None = "predictions"


PRIOR_KEYS = ("r", "a_lens", "a_fg", "noise_uk_arcmin")
TRACKING_KINDS = ("local", "server")
# The typed schemas, registered once in Hydra's ConfigStore (group "schema").
SCHEMAS: dict[str, type] = {
    "patch": PatchSchema,
    # The cosmology's own dataclass is the schema of sky.cmb: its fields type the node.
    "cmb": CMBCosmology,
    "prior": PriorSchema,
    "eval": EvalSchema,
    "train": TrainSchema,
    "predict": PredictSchema,
}
for _name, _schema in SCHEMAS.items():
    ConfigStore.instance().store(group="schema", name=_name, node=_schema)


def _schema(name: str) -> DictConfig:
    return ConfigStore.instance().load(f"schema/{name}.yaml").node


def _typed(node: Any, schema: str, key: str) -> DictConfig:
    """Merge ``node`` onto the registered ``schema`` so a wrong type fails with its full key."""
    base = _schema(schema)
    _refuse_unknown(node, base, key)
    try:
        return OmegaConf.merge(base, node)
    except OmegaConfBaseException as err:
        # One line naming the full key: omegaconf's message spreads the key (relative to the
        # node) and the value over several.
        sub = getattr(err, "full_key", None)
        text = " ".join(str(err).split())
        if sub:
            text = text.split(" full_key:")[0]
            raise ConfigError(f"invalid value for {key}.{sub}: {text}") from None
        raise ConfigError(f"invalid value under '{key}': {text}") from None


def _refuse_unknown(node: Any, base: DictConfig, key: str) -> None:
    """Name the keys of ``node`` that its schema ``base`` does not have (nested schemas too)."""
    if not isinstance(node, DictConfig | dict):
        return
    # keys(), not ``in``: a MISSING value is "not in" its DictConfig.
    known = [str(k) for k in base.keys()]
    unknown = sorted(str(k) for k in node.keys() if k not in known)
    if unknown:
        raise ConfigError(f"unknown {key} keys {unknown}; known: {', '.join(known)}")
    for name in node.keys():
        child = base._get_node(name)
        if isinstance(child, DictConfig) and OmegaConf.get_type(child) not in (dict, None):
            _refuse_unknown(_value(node, name), child, f"{key}.{name}")


def _value(node: Any, name: str) -> Any:
    # A DictConfig's child node as it stands (an unset or interpolated value is not read).
    return node._get_node(name) if isinstance(node, DictConfig) else node[name]


def refuse_missing(keys: Iterable[str]) -> None:
    """Refuse mandatory values left unset (OmegaConf's ``MISSING``, ``???`` in YAML).

    Parameters
    ----------
    keys : iterable of str
        Their full dotted keys, e.g. ``OmegaConf.missing_keys(cfg)``.

    Raises
    ------
    ConfigError
        One line naming every unset key, with an example value where one is known.
    """
    missing = sorted(set(keys))
    if not missing:
        return
    examples = " ".join(f"{k}={MANDATORY_EXAMPLES[k]}" for k in missing if k in MANDATORY_EXAMPLES)
    raise ConfigError(
        "mandatory config values are not set: "
        + ", ".join(missing)
        + " (give them as key=value overrides"
        + (f", e.g. {examples})" if examples else ")")
    )


# What to give for each mandatory value of the shipped configs (``???`` in conf/).
MANDATORY_EXAMPLES = {
    "predict.model": "models:/NAME/VERSION",
    "predict.input": "map.npy",
    "evaluate.run_id": "<32-character run id>",
    "tracking.uri": "http://HOST:PORT",
}


def checked_node(node: Any, schema: str, key: str) -> DictConfig:
    """``node`` typed by its registered ``schema``, every mandatory value set.

    Parameters
    ----------
    node : DictConfig or mapping
        The config node (``cfg.predict``).
    schema : str
        Its schema's name in the ConfigStore group ``schema`` (:data:`SCHEMAS`).
    key : str
        The node's full key, used in messages (``predict``).

    Returns
    -------
    DictConfig
        A new node of the schema's type (``OmegaConf.to_object`` gives the dataclass).

    Raises
    ------
    ConfigError
        An unknown key, a value of the wrong type, or a mandatory value left unset; one line
        naming the full key.
    """
    typed = _typed(node, schema, key)
    refuse_missing(f"{key}.{k}" for k in OmegaConf.missing_keys(typed))
    return typed


def _positive(value: Any, key: str, hint: str) -> None:
    if value is None or not float(value) > 0:
        raise ConfigError(f"{key} must be > 0, got {value!r}; {hint}")


def _check_patch(cfg: DictConfig) -> None:
    patch = _typed(cfg.patch, "patch", "patch")
    _positive(patch.pixel_arcmin, "patch.pixel_arcmin", "set patch.pixel_arcmin=<arcmin per pixel>")
    if patch.npix < 4:
        raise ConfigError(f"patch.npix must be an integer >= 4, got {patch.npix}")
    from skymoments.sky.scenario import check_margin

    try:
        check_margin(patch.margin)
    except ValueError as err:
        raise ConfigError(f"{err}; e.g. patch.margin=16") from None
    side_deg = patch.npix * patch.pixel_arcmin / 60.0
    if side_deg > 180.0:
        raise ConfigError(
            f"patch.npix * patch.pixel_arcmin = {side_deg:.1f} deg exceeds 180 deg; "
            "the flat-sky patch cannot be that large"
        )


def _check_sky(cfg: DictConfig) -> None:
    sky = cfg.sky
    # The cosmology's own dataclass is the schema: its fields type the node and its
    # checks name the key (sky.cmb.H0 ...).
    _typed(sky.cmb, "cmb", "sky.cmb")
    try:
        CMBCosmology.from_mapping(OmegaConf.to_container(sky.cmb, resolve=True))
    except (TypeError, ValueError) as err:
        raise ConfigError(f"sky.cmb: {err}") from None
    from skymoments.sky.build import foreground_from_config

    try:
        # Building it checks the _target_, its keywords and their values.
        foreground_from_config(sky.foreground)
    except ValueError as err:
        raise ConfigError(str(err)) from None
    beam = sky.get("beam_fwhm_arcmin", 0.0)
    if beam is None or float(beam) < 0:
        raise ConfigError(f"sky.beam_fwhm_arcmin must be >= 0 arcmin, got {beam!r}")


def _check_prior(cfg: DictConfig) -> None:
    from skymoments.sky.priors import prior_from_config

    for key in PRIOR_KEYS:
        if key not in cfg.prior:
            raise ConfigError(f"prior.{key} is missing; every scenario needs a prior on {key}")
        node = _typed(cfg.prior[key], "prior", f"prior.{key}")
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
    # The network sizes are checked by the networks' own builder (nets is standalone).
    from skymoments.nets.build import check_sizes

    for stage in ("mean", "variance"):
        node = cfg.model.get(stage)
        if node is None:
            raise ConfigError(f"model.{stage} is missing; pick a model, e.g. model=unet")
        try:
            check_sizes(node, f"model.{stage}")
        except ValueError as err:
            raise ConfigError(str(err)) from None
        pool = _pool_factor(node)
        npix = cfg.patch.npix if "patch" in cfg else None
        if pool > 1 and isinstance(npix, int) and npix % pool:
            raise ConfigError(
                f"patch.npix={npix} cannot be pooled by model.{stage} ({node._target_} of "
                f"depth {node.depth} halves the side {node.depth} times, so it needs a "
                f"multiple of {pool}); choose patch.npix={_nearest(npix, pool)} or a smaller "
                f"model.{stage}.depth"
            )
    pos = cfg.model.get("positivity", "softplus")
    if pos not in ("softplus", "logvar"):
        raise ConfigError(f"model.positivity={pos!r}; choose softplus or logvar")


# Networks that pool: the side is halved ``depth`` times (skymoments.nets.UNet.forward
# refuses a side that is not a multiple of 2**depth).
POOLING_NETS = ("skymoments.nets.UNet", "skymoments.nets.unet.UNet")


def _pool_factor(node: DictConfig) -> int:
    """The number the patch side must be a multiple of for this network (1: any)."""
    if node.get("_target_") in POOLING_NETS and isinstance(node.get("depth"), int):
        return 2 ** int(node.depth)
    return 1


def _nearest(npix: int, step: int) -> int:
    return max(step, step * round(npix / step))


def _check_train(cfg: DictConfig) -> None:
    if "train" not in cfg:
        return
    train = _typed(cfg.train, "train", "train")
    for key in ("batch_size", "steps_per_epoch", "n_val", "max_epochs_mean", "max_epochs_var"):
        if not train[key] > 0:
            raise ConfigError(f"train.{key} must be a positive integer, got {train[key]!r}")
    if not train.range_draws >= 0:
        raise ConfigError(
            f"train.range_draws must be >= 0 (0: the scaler draws alone), got {train.range_draws}"
        )
    if not train.range_margin >= 0:
        raise ConfigError(
            "train.range_margin must be >= 0 (how far beyond the training range, in units of "
            f"its spread, a patch is flagged; 0: at the range's edge), got {train.range_margin}"
        )
    choices = {
        "variance_loss": ("gaussian_nll", "squared"),
        "variance_calibration": ("none", "validation_scale"),
    }
    for key, allowed in choices.items():
        if train[key] not in allowed:
            raise ConfigError(f"train.{key}={train[key]!r}; choose one of {', '.join(allowed)}")
    opt = cfg.train.get("optimizer")
    lr = opt.get("lr") if isinstance(opt, DictConfig) else None
    if lr is not None and (
        isinstance(lr, bool) or not isinstance(lr, int | float) or not float(lr) > 0
    ):
        raise ConfigError(
            f"train.optimizer.lr must be a positive number, got {lr!r}; e.g. "
            "train.optimizer.lr=2e-3"
        )


def _check_eval(cfg: DictConfig) -> None:
    if "eval" not in cfg:
        return
    node = _typed(cfg.eval, "eval", "eval")
    if node.fg_bins < 1:
        raise ConfigError(
            f"eval.fg_bins must be a positive integer (bins of foreground amplitude the "
            f"calibration is split into), got {node.fg_bins}; e.g. eval.fg_bins=4"
        )
    npix = cfg.patch.npix if "patch" in cfg else None
    if node.edge_px < 1 or (isinstance(npix, int) and 2 * node.edge_px >= npix):
        raise ConfigError(
            f"eval.edge_px must be an integer >= 1 leaving an interior (2 * edge_px < "
            f"patch.npix = {npix}), got {node.edge_px}; e.g. eval.edge_px=4"
        )


def _check_synthesis(cfg: DictConfig, command: str | None) -> None:
    """The synthesis settings, where this command synthesizes (``synthesize``, a bank)."""
    if "synthesis" not in cfg:
        return
    uses_bank = "augment" in cfg and bool(cfg.augment.get("bank"))
    if command != "synthesis" and not (command == "run" and uses_bank):
        return
    from skymoments.synthesis.pipeline import settings_from_config

    try:
        settings_from_config(cfg.synthesis)
    except (TypeError, ValueError) as err:
        raise ConfigError(str(err)) from None


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


def _check_predict(cfg: DictConfig) -> None:
    # Keys and types; its mandatory values are the predict command's (COMMAND_NODES), and
    # the choices and ranges are skymoments.predict.pipeline.PredictOptions'.
    _typed(cfg.predict, "predict", "predict")


# Each check runs on its node where the command's config holds it.
CHECKS = {
    "patch": _check_patch,
    "sky": _check_sky,
    "prior": _check_prior,
    "model": _check_model,
    "train": _check_train,
    "eval": _check_eval,
    "tracking": _check_tracking,
    "predict": _check_predict,
}
# Commands that draw from the study's scenario: they need patch, sky and prior.
STUDY_COMMANDS = ("run", "simulate", "synthesis", "evaluate")


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
    for key in ("patch", "sky", "prior") if command in STUDY_COMMANDS else ():
        if key not in cfg:
            raise ConfigError(f"the config has no '{key}' node; compose it from conf/config.yaml")
    # The one check of mandatory values: OmegaConf's own MISSING (``???`` in conf/).
    refuse_missing(
        key
        for key in OmegaConf.missing_keys(cfg)
        if key.split(".")[0] not in COMMAND_NODES or key.split(".")[0] == command
    )
    for key, check in CHECKS.items():
        if key in cfg:
            check(cfg)
    _check_synthesis(cfg, command)
    return cfg
