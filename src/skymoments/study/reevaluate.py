"""Re-evaluate a tracked model on another validation scenario (``skymoments evaluate``).

The training run's config (its artifact ``config/resolved.yaml``) is loaded, the scenario
overrides of the command line are applied on top of it, the model is loaded from the run,
a fresh evaluation set is drawn from the new scenario, and it is judged by the same code as
``skymoments run`` (:func:`skymoments.study.evaluation.evaluate_and_log`). The result is
logged as a child run of the training run (tag ``mlflow.parentRunId``), in the same
experiment.

What may change: ``sky`` (e.g. ``sky=gaussian``, ``sky.foreground.amplitude_uk=6``),
``prior`` (``prior.a_fg.low=2 prior.a_fg.high=4``, ``prior.noise_uk_arcmin.value=5``),
``eval`` (baseline settings) and ``patch`` only as far as the geometry stays the training
one (a network's posterior is defined on the patch it was trained on). Training choices
(``model``, ``train``, ``augment``, ...) are refused: the model is the trained one.

Baselines. The Wiener baseline is the one an analyst with the *original* training image
would build: the foreground power is estimated from the training run's single training
image (same config, same ``training_image`` seed stream), scaled by the *new* scenario's
``E[a_fg^2]``, and the noise power is the new scenario's. With a foreground model the
network never saw, the baseline is then as mis-specified as the network. Where the new
scenario is all-Gaussian with fixed amplitudes, the exact posterior is computed from its
true spectra.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, replace
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from skymoments.config import conf_dir, validate

__all__ = [
    "EvaluateResult",
    "apply_overrides",
    "evaluate_run",
    "rewrite_argv",
    "scenario_overrides",
]

# Roots of the command line that configure this command, not the evaluated scenario.
COMMAND_ROOTS = ("evaluate", "tracking", "hydra", "name")
# Roots that may be changed on top of the training run's config.
SCENARIO_ROOTS = ("patch", "sky", "prior", "eval")
_RUN_ID = re.compile(r"^[0-9a-f]{32}$")


@dataclass
class EvaluateResult:
    """What :func:`evaluate_run` returns.

    Attributes
    ----------
    run_id : str
        The child run the evaluation was logged into.
    parent_run_id : str
        The training run.
    metrics : dict of str to float
        The evaluation's metrics (names as in DEVELOPERS.md, Metrics).
    parent_metrics : dict of str to float
        The training run's metrics, for a side-by-side summary.
    config : DictConfig
        The evaluated config: the training config with the overrides applied.
    overrides : list of str
        The scenario overrides that were applied.
    """

    run_id: str
    parent_run_id: str
    metrics: dict = field(default_factory=dict)
    parent_metrics: dict = field(default_factory=dict)
    config: DictConfig | None = None
    overrides: list = field(default_factory=list)


def _root(key: str) -> str:
    return key.lstrip("+~").split("=", 1)[0].split(".", 1)[0].split("@", 1)[0]


def _is_group(root: str) -> bool:
    return (conf_dir() / root).is_dir()


def rewrite_argv(args: list[str]) -> list[str]:
    """Prepare ``skymoments evaluate`` arguments for Hydra.

    ``run_id=<id>`` becomes ``evaluate.run_id=<id>``. A scenario override of a key
    (``prior.a_fg.value=2``) is passed as ``++key=value``: it is meant for the training run's
    config, whose shape can differ from the defaults Hydra composes here (a fixed prior
    has ``value`` where the default has ``low`` and ``high``), so Hydra must not refuse
    it. Group choices (``sky=gaussian``), this command's own keys and flags pass unchanged.
    """
    out = []
    for arg in args:
        if arg.startswith("-") or "=" not in arg:
            out.append(arg)
            continue
        key = arg.split("=", 1)[0]
        if key == "run_id":
            out.append("evaluate." + arg)
        elif key.startswith("~") or _root(key) in COMMAND_ROOTS:
            out.append(arg)
        elif "." not in key.lstrip("+") and _is_group(key.lstrip("+")):
            out.append(arg)
        else:
            out.append("++" + arg.lstrip("+"))
    return out


def scenario_overrides(task_overrides) -> list[str]:
    """The overrides of a Hydra job that are meant for the evaluated scenario.

    Drops this command's own keys (``evaluate.*``, ``tracking``, ``hydra.*``, ``name``) and
    the ``+``/``++`` that :func:`rewrite_argv` added (every key override is applied to the
    training config whether or not the key exists there).
    """
    return [o.lstrip("+") for o in map(str, task_overrides) if _root(o) not in COMMAND_ROOTS]


def apply_overrides(
    train_cfg: DictConfig, overrides: list[str], composed: DictConfig | None = None
) -> DictConfig:
    """The training config with scenario overrides applied on top (a new config).

    Parameters
    ----------
    train_cfg : DictConfig
        The training run's resolved config.
    overrides : list of str
        Hydra-style ``key=value`` (also ``+key=value``, ``++key=value``) and group choices
        (``sky=gaussian``), for keys under ``patch``, ``sky``, ``prior`` and ``eval``.
    composed : DictConfig, optional
        This command's config as Hydra composed it with the same overrides: a group choice
        takes its node from there (Hydra composed the option and its defaults list).

    Raises
    ------
    ValueError
        An override of anything else (the model is the trained one), a deletion, a sweep, or
        a group choice without ``composed`` (an unknown option fails in Hydra's composition).
    """
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import HydraException

    cfg = OmegaConf.create(OmegaConf.to_container(train_cfg, resolve=True))
    try:
        parsed = OverridesParser.create().parse_overrides(list(overrides))
    except HydraException as err:
        raise ValueError(f"cannot read the overrides {' '.join(overrides)}: {err}") from None
    for o in parsed:
        key = o.key_or_group
        root = key.split(".", 1)[0]
        if root not in SCENARIO_ROOTS:
            raise ValueError(
                f"{o.input_line}: evaluate re-uses the trained model, so only the validation "
                f"scenario can change ({', '.join(r + '.*' for r in SCENARIO_ROOTS)}); drop "
                f"the {root} override (or train a new model with skymoments run)"
            )
        if o.is_delete():
            raise ValueError(f"{o.input_line}: deleting keys is not supported; set a value")
        if o.is_sweep_override():
            raise ValueError(
                f"{o.input_line}: a sweep needs -m (skymoments evaluate -m run_id=... {key}=a,b)"
            )
        if o.package:
            raise ValueError(f"{o.input_line}: package overrides (@) are not supported")
        value = o.value()
        if "." not in key and _is_group(key) and isinstance(value, str):
            if composed is None or key not in composed:
                raise ValueError(
                    f"{o.input_line}: a group choice needs the config Hydra composed with it"
                )
            cfg[key] = OmegaConf.to_container(composed[key], resolve=True)
        else:
            OmegaConf.update(cfg, key, value, merge=False, force_add=True)
    return cfg


def _check_geometry(train_cfg: DictConfig, eval_cfg: DictConfig, run_id: str) -> None:
    t = (int(train_cfg.patch.npix), float(train_cfg.patch.pixel_arcmin))
    e = (int(eval_cfg.patch.npix), float(eval_cfg.patch.pixel_arcmin))
    if t != e:
        raise ValueError(
            f"run {run_id} was trained on a {t[0]}x{t[0]} patch of {t[1]:g}-arcmin pixels, but "
            f"the overrides ask for {e[0]}x{e[0]} of {e[1]:g} arcmin; a network's posterior is "
            "only defined on its training geometry: drop the patch overrides (or train a model "
            "on that patch)"
        )


def _training_record(settings, run_id: str):
    """The training run's record, with clear errors for every way it can be missing."""
    from skymoments.tracking import get_run

    if run_id is None or not str(run_id).strip():
        raise ValueError("evaluate.run_id is not set; give run_id=<32-character MLflow run id>")
    run_id = str(run_id).strip()
    if not _RUN_ID.match(run_id):
        raise ValueError(
            f"run_id={run_id!r} is not an MLflow run id (32 hexadecimal characters); copy it "
            "from the end of `skymoments run` or from the MLflow UI"
        )
    db = settings.sqlite_path
    if db is not None and not db.is_file():
        # Opening a missing SQLite store would silently create an empty one.
        raise ValueError(
            f"no tracking store at {db}; point tracking.root (or tracking.uri) at the store "
            "the run was logged to"
        )
    try:
        record = get_run(settings, run_id)
    except Exception as exc:
        code = getattr(exc, "error_code", "") or ""
        if "RESOURCE_DOES_NOT_EXIST" in code or "not found" in str(exc).lower():
            raise ValueError(
                f"no run {run_id} in {settings.tracking_uri}; check run_id and the tracking.* "
                "overrides (tracking.root, tracking.uri)"
            ) from None
        raise
    if record.tags.get("skymoments.evaluated_run"):
        raise ValueError(
            f"run {run_id} is itself a re-evaluation of run "
            f"{record.tags['skymoments.evaluated_run']}; give that training run's id"
        )
    if record.status != "FINISHED":
        raise ValueError(
            f"run {run_id} is {record.status}; only a FINISHED `skymoments run` has a model "
            "to evaluate"
        )
    return record


def _training_config(settings, run_id: str, workdir: Path) -> DictConfig:
    from skymoments.tracking import download_artifact

    try:
        path = download_artifact(settings, run_id, "config/resolved.yaml", workdir)
    except Exception as exc:
        raise ValueError(
            f"run {run_id} has no artifact config/resolved.yaml ({exc}); evaluate needs a run "
            "made by `skymoments run`"
        ) from None
    cfg = OmegaConf.load(path)
    for key in ("patch", "sky", "prior", "eval", "seed", "train"):
        if key not in cfg:
            raise ValueError(
                f"run {run_id}'s config/resolved.yaml has no '{key}'; evaluate needs a run made "
                "by `skymoments run`"
            )
    return cfg


def evaluate_run(
    cfg: DictConfig, overrides: list[str] | None = None, out: str | Path | None = None
) -> EvaluateResult:
    """Evaluate the model of run ``cfg.evaluate.run_id`` on an overridden scenario.

    Parameters
    ----------
    cfg : DictConfig
        The composed config of this command: ``evaluate`` (run_id, n, seed, stream,
        run_name) and ``tracking`` (the store holding the run) are read.
    overrides : list of str, optional
        Scenario overrides for the training run's config (see :func:`apply_overrides`).
    out : path-like, optional
        Local folder for the files before they are logged; default the Hydra job folder.

    Returns
    -------
    EvaluateResult

    Raises
    ------
    ValueError
        An unknown or unfinished run, a run without config, a refused override or a
        different patch geometry; all before a child run is opened.
    """
    import tempfile

    from skymoments.sky.build import scenario_from_config
    from skymoments.sky.seeds import streams
    from skymoments.sky.training_image import training_image
    from skymoments.study.evaluation import evaluate_and_log
    from skymoments.study.jobs import job_dir
    from skymoments.tracking import load_model, settings_from, tracked_run
    from skymoments.tracking.store import client_for, with_retries

    overrides = list(overrides or [])
    ev = cfg.evaluate
    settings = settings_from(cfg.tracking)
    # A run_id left unset (OmegaConf's MISSING: conf/evaluate/default.yaml makes it
    # mandatory) reads as None, which _training_record refuses in one line.
    record = _training_record(settings, None if OmegaConf.is_missing(ev, "run_id") else ev.run_id)
    run_id = record.run_id
    out = Path(out) if out is not None else job_dir()
    out.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        train_cfg = _training_config(settings, run_id, Path(tmp))
    eval_cfg = apply_overrides(train_cfg, overrides, composed=cfg)
    _check_geometry(train_cfg, eval_cfg, run_id)
    # The evaluated config records where it was logged and how it was asked for.
    eval_cfg.tracking = OmegaConf.to_container(cfg.tracking, resolve=True)
    eval_cfg.evaluate = OmegaConf.to_container(ev, resolve=True)
    validate(eval_cfg, command="evaluate")

    n = int(ev.n) if ev.get("n") is not None else int(train_cfg.train.n_val)
    seed = int(ev.seed) if ev.get("seed") is not None else int(train_cfg.seed)
    stream = str(ev.get("stream") or "evaluate")
    scenario = scenario_from_config(eval_cfg)
    image, _, _ = training_image(train_cfg)
    model = load_model(run_id, settings, map_location="cpu")

    client = client_for(settings)
    experiment = with_retries(
        settings, "read the experiment", lambda: client.get_experiment(record.experiment_id)
    )
    child_settings = replace(settings, experiment=experiment.name, register_as=None)
    name = ev.get("run_name") or f"evaluate-{run_id[:8]}"
    tags = {
        "skymoments.run_kind": "evaluate",
        "skymoments.evaluated_run": run_id,
        "skymoments.eval_overrides": " ".join(overrides),
        "skymoments.eval_stream": f"{stream}:{seed}",
    }
    with tracked_run(child_settings, run_name=str(name), tags=tags, parent_run_id=run_id) as run:
        run.log_config(eval_cfg)
        rng = streams(seed, stream)[stream]
        metrics = evaluate_and_log(
            eval_cfg,
            run,
            model,
            scenario,
            image,
            out,
            rng,
            n,
            header={"PARENT": run_id, "OVERRIDES": " ".join(overrides)},
        )
        child_id = run.run_id
    return EvaluateResult(
        run_id=child_id,
        parent_run_id=run_id,
        metrics=metrics,
        parent_metrics=dict(record.metrics),
        config=eval_cfg,
        overrides=overrides,
    )
