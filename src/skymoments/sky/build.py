"""Build a Scenario (and its parts) from a config node.

Expected shape (``conf/`` follows it)::

    patch: {npix: 64, pixel_arcmin: 3.0, margin: 0}
    sky:
      cmb: {H0: 67.5, ombh2: 0.022, omch2: 0.122, As: 2.0e-9, ns: 0.965, tau: 0.06, lmax: 5000}
      foreground: {_target_: skymoments.sky.foregrounds.Filaments, amplitude_uk: 3.0, ...}
      beam_fwhm_arcmin: 0.0
    prior:
      r: {dist: uniform, low: 0.0, high: 0.2}
      a_lens: {dist: fixed, value: 1.0}
      a_fg: {dist: loguniform, low: 0.5, high: 2.0}
      noise_uk_arcmin: {dist: fixed, value: 0.0}

Any dict-like works: an omegaconf ``DictConfig`` (resolved here) or plain dicts.
"""

from __future__ import annotations

import os
from collections.abc import Mapping

from skymoments.maps.geometry import FlatPatch
from skymoments.sky.cmb import CMBCosmology, cmb_spectra
from skymoments.sky.foregrounds import FOREGROUNDS, Filaments, GaussianPowerLaw, make_foreground
from skymoments.sky.priors import PRIOR_DISTS, prior_from_config
from skymoments.sky.scenario import PARAM_NAMES, Scenario

__all__ = [
    "CONFIGURABLE_FOREGROUNDS",
    "FOREGROUNDS",
    "FOREGROUND_NAMES",
    "PARAM_NAMES",
    "PRIOR_DISTS",
    "foreground_from_config",
    "patch_from_config",
    "priors_from_config",
    "scenario_from_config",
]

FOREGROUND_NAMES: tuple[str, ...] = tuple(sorted(FOREGROUNDS))
# The foregrounds a config can choose, by ``_target_`` (the idiom that chooses networks).
# Only these classes are ever built from a config, so a config read back from a store
# (``evaluate``) cannot make this code import or call anything else. ``ImageBank`` is not
# among them: it holds images made in code (the training bank), not keys of a config.
CONFIGURABLE_FOREGROUNDS: dict[str, type] = {
    f"{cls.__module__}.{cls.__name__}": cls for cls in (Filaments, GaussianPowerLaw)
}


def _plain(node):
    """A plain (resolved) Python container from an omegaconf node or a mapping."""
    try:
        from omegaconf import OmegaConf

        if OmegaConf.is_config(node):
            return OmegaConf.to_container(node, resolve=True)
    except ImportError:  # pragma: no cover - omegaconf is a dependency
        pass
    if isinstance(node, Mapping):
        return {k: _plain(v) for k, v in node.items()}
    if isinstance(node, list | tuple):
        return [_plain(v) for v in node]
    return node


def _section(cfg: dict, key: str, where: str = "") -> dict:
    if not isinstance(cfg, Mapping) or key not in cfg or cfg[key] is None:
        raise ValueError(f"the config has no '{where}{key}' section; see sky.build for its shape")
    node = cfg[key]
    if not isinstance(node, Mapping):
        raise ValueError(f"'{where}{key}' must be a mapping, got {type(node).__name__}")
    return dict(node)


def patch_from_config(node) -> FlatPatch:
    """A FlatPatch from ``{npix, pixel_arcmin}``."""
    data = _plain(node)
    if not isinstance(data, Mapping) or "npix" not in data or "pixel_arcmin" not in data:
        raise ValueError(f"patch needs npix and pixel_arcmin, got {data!r}")
    npix = data["npix"]
    if isinstance(npix, float) and npix.is_integer():
        npix = int(npix)
    return FlatPatch(npix, float(data["pixel_arcmin"]))


def _foreground_class(data: dict) -> type:
    """The class ``{_target_: ...}`` (or, in configs of earlier runs, ``{name: ...}``) names."""
    choices = ", ".join(f"_target_={t}" for t in CONFIGURABLE_FOREGROUNDS)
    target, name = data.pop("_target_", None), data.pop("name", None)
    if target is None and name is None:
        raise ValueError(f"sky.foreground needs a _target_; choose one of: {choices}")
    found = []
    for key, value in (("_target_", target), ("name", name)):
        if value is None:
            continue
        if key == "_target_":
            cls = CONFIGURABLE_FOREGROUNDS.get(str(value))
        else:
            cls = FOREGROUNDS.get(str(value))
            cls = cls if cls in CONFIGURABLE_FOREGROUNDS.values() else None
        if cls is None:
            bank = "ImageBank" in str(value) or value == "image_bank"
            why = (
                "is the training bank of synthesized images, built in code, not a sky model"
                if bank
                else "is not a known foreground"
            )
            raise ValueError(f"sky.foreground.{key}={value!r} {why}; choose one of: {choices}")
        found.append(cls)
    if len(set(found)) > 1:
        raise ValueError(
            f"sky.foreground.name={name!r} and sky.foreground._target_={target} disagree; "
            "choose the foreground by _target_ alone"
        )
    return found[0]


def foreground_from_config(node):
    """A foreground from ``{_target_: <class>, **model keywords}`` (e.g. ``cfg.sky.foreground``).

    ``_target_`` is one of :data:`CONFIGURABLE_FOREGROUNDS`; the ``{name: ...}`` form of
    configs logged by earlier versions is read too.

    Raises
    ------
    ValueError
        Unknown target (listing the known ones) or keyword, or an invalid value; the
        message names ``sky.foreground``.
    """
    data = _plain(node)
    if not isinstance(data, Mapping):
        raise ValueError(f"sky.foreground must be a mapping with a _target_, got {data!r}")
    data = dict(data)
    cls = _foreground_class(data)
    if "length_arcmin" in data and isinstance(data["length_arcmin"], list):
        data["length_arcmin"] = tuple(data["length_arcmin"])
    try:
        return make_foreground(cls.name, **data)
    except (TypeError, ValueError) as err:
        raise ValueError(f"sky.foreground: {err}") from None


def priors_from_config(node) -> dict:
    """The four priors from the ``prior`` section, keyed by :data:`PARAM_NAMES`."""
    data = _plain(node)
    if not isinstance(data, Mapping):
        raise ValueError(f"prior must be a mapping of {', '.join(PARAM_NAMES)}, got {data!r}")
    missing = [k for k in PARAM_NAMES if k not in data]
    if missing:
        raise ValueError(
            f"prior is missing {', '.join(missing)}; every scenario needs all of "
            f"{', '.join(PARAM_NAMES)}"
        )
    extra = sorted(set(data) - set(PARAM_NAMES))
    if extra:
        raise ValueError(
            f"prior.{extra[0]} is not a scenario parameter; known: {', '.join(PARAM_NAMES)}"
        )
    out = {}
    for key in PARAM_NAMES:
        try:
            out[key] = prior_from_config(data[key])
        except ValueError as err:
            raise ValueError(f"prior.{key}: {err}") from None
    return out


def scenario_from_config(
    cfg, foreground=None, cmb=None, cache_dir: str | os.PathLike | None = None
) -> Scenario:
    """Build the Scenario a config describes.

    Parameters
    ----------
    cfg : mapping or omegaconf.DictConfig
        With ``patch``, ``sky`` and ``prior`` sections (module docstring).
    foreground : object, optional
        A foreground (e.g. an ImageBank of synthesized images) that replaces the
        configured ``sky.foreground``.
    cmb : CMBSpectra, optional
        Spectra to use instead of computing (or loading) those of ``sky.cmb``; then
        ``sky.cmb`` is not read.
    cache_dir : path-like, optional
        CMB spectra cache folder (default ``$SKYMOMENTS_CACHE`` or ``~/.cache/skymoments``).
    """
    data = _plain(cfg)
    patch = patch_from_config(_section(data, "patch"))
    margin = _section(data, "patch").get("margin") or 0  # configs before cut-outs: periodic
    sky = _section(data, "sky")
    if cmb is None:
        cosmo = CMBCosmology.from_mapping(_section(sky, "cmb", "sky."))
        cmb = cmb_spectra(cosmo, cache_dir=cache_dir)
    if foreground is None:
        foreground = foreground_from_config(_section(sky, "foreground", "sky."))
    beam = sky.get("beam_fwhm_arcmin", 0.0)
    beam = 0.0 if beam is None else float(beam)
    priors = priors_from_config(_section(data, "prior"))
    return Scenario(patch, cmb, foreground, priors, beam_fwhm_arcmin=beam, margin=margin)
