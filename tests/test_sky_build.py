"""Building scenarios from config nodes (plain dicts and omegaconf), and their errors."""

from __future__ import annotations

import copy

import numpy as np
import pytest
from omegaconf import OmegaConf

from skymoments.sky import FOREGROUND_NAMES, PRIOR_DISTS
from skymoments.sky.build import foreground_from_config, scenario_from_config
from skymoments.sky.cmb import CMBSpectra
from skymoments.sky.foregrounds import Filaments, GaussianPowerLaw, ImageBank
from skymoments.sky.priors import Fixed, LogUniform, Uniform


def make_cmb(lmax: int = 8000) -> CMBSpectra:
    """Analytic stand-in for CAMB spectra, so these tests make no CAMB call."""
    ell = np.arange(lmax + 1, dtype=float)
    on = (ell >= 2) * np.exp(-((ell / 3000.0) ** 2))
    return CMBSpectra(
        ell=ell, ee_lensed=1e-4 * on, bb_lensed=2e-6 * on, ee_tensor=1e-5 * on, bb_tensor=2e-5 * on
    )


CFG = {
    "patch": {"npix": 32, "pixel_arcmin": 4.0},
    "sky": {
        "cmb": {
            "H0": 67.5,
            "ombh2": 0.022,
            "omch2": 0.122,
            "As": 2.0e-9,
            "ns": 0.965,
            "tau": 0.06,
            "lmax": 5000,
        },
        "foreground": {"name": "filaments", "amplitude_uk": 3.0},
        "beam_fwhm_arcmin": 0.0,
    },
    "prior": {
        "r": {"dist": "uniform", "low": 0.0, "high": 0.2},
        "a_lens": {"dist": "fixed", "value": 1.0},
        "a_fg": {"dist": "loguniform", "low": 0.5, "high": 2.0},
        "noise_uk_arcmin": {"dist": "fixed", "value": 0.0},
    },
}


def _cfg(**changes):
    cfg = copy.deepcopy(CFG)
    for dotted, value in changes.items():
        node = cfg
        *path, last = dotted.split("__")
        for key in path:
            node = node[key]
        if value is None:
            node.pop(last)
        else:
            node[last] = value
    return cfg


@pytest.mark.parametrize("wrap", [dict, OmegaConf.create], ids=["dict", "omegaconf"])
def test_scenario_from_config(wrap):
    sc = scenario_from_config(wrap(_cfg()), cmb=make_cmb())
    assert (sc.patch.npix, sc.patch.pixel_arcmin) == (32, 4.0)
    assert isinstance(sc.foreground, Filaments) and sc.foreground.amplitude_uk == 3.0
    assert sc.priors == {
        "r": Uniform(0.0, 0.2),
        "a_lens": Fixed(1.0),
        "a_fg": LogUniform(0.5, 2.0),
        "noise_uk_arcmin": Fixed(0.0),
    }
    assert sc.draw_components(0, 2)["data_qu"].shape == (2, 2, 32, 32)


def test_foreground_override_and_model_keys():
    bank = ImageBank(np.zeros((1, 2, 32, 32)))
    sc = scenario_from_config(_cfg(), foreground=bank, cmb=make_cmb())
    assert sc.foreground is bank
    fg = foreground_from_config(
        {"name": "gaussian", "amplitude_uk": 2.0, "alpha_ee": -2.5, "bb_over_ee": 0.4}
    )
    assert isinstance(fg, GaussianPowerLaw) and (fg.alpha_ee, fg.bb_over_ee) == (-2.5, 0.4)
    fil = foreground_from_config(OmegaConf.create({"name": "filaments", "length_arcmin": [5, 9]}))
    assert fil.length_arcmin == (5.0, 9.0)


def test_foregrounds_are_chosen_by_target_among_our_own_classes_only():
    target = "skymoments.sky.foregrounds.GaussianPowerLaw"
    fg = foreground_from_config({"_target_": target, "amplitude_uk": 2.0, "bb_over_ee": 0.4})
    assert isinstance(fg, GaussianPowerLaw) and fg.bb_over_ee == 0.4
    # Nothing else is imported or called from a config (one read back from a store, say).
    with pytest.raises(ValueError, match=r"_target_='os\.system' is not a known foreground"):
        foreground_from_config({"_target_": "os.system"})
    # The training bank is built in code from images, not from config keys.
    for node in ({"_target_": "skymoments.sky.foregrounds.ImageBank"}, {"name": "image_bank"}):
        with pytest.raises(ValueError, match=r"is the training bank of synthesized images"):
            foreground_from_config(node)
    with pytest.raises(ValueError, match=r"disagree; choose the foreground by _target_ alone"):
        foreground_from_config({"_target_": target, "name": "filaments"})


def test_exported_names_for_config_validation():
    assert set(FOREGROUND_NAMES) == {"filaments", "gaussian", "image_bank"}
    assert set(PRIOR_DISTS) == {"fixed", "uniform", "loguniform", "truncnormal"}


@pytest.mark.parametrize(
    ("changes", "match"),
    [
        ({"sky__foreground__name": "nebula"}, r"sky\.foreground\.name='nebula'.*Filaments"),
        ({"sky__foreground__name": None}, r"sky\.foreground needs a _target_"),
        ({"sky__foreground__colour": "red"}, r"sky\.foreground.*colour"),
        ({"sky__foreground__amplitude_uk": -3.0}, r"sky\.foreground.*amplitude_uk"),
        ({"prior__r": {"dist": "uniform", "low": 0.3, "high": 0.1}}, r"prior\.r"),
        ({"prior__noise_uk_arcmin": None}, r"prior is missing noise_uk_arcmin"),
        ({"prior__tau": {"dist": "fixed", "value": 0.06}}, r"prior\.tau"),
        ({"patch": None}, r"'patch'"),
        ({"patch__pixel_arcmin": -1.0}, r"pixel_arcmin"),
        ({"sky__beam_fwhm_arcmin": -2.0}, r"beam"),
    ],
)
def test_bad_configs_name_the_key(changes, match):
    with pytest.raises(ValueError, match=match):
        scenario_from_config(_cfg(**changes), cmb=make_cmb())


def test_unknown_cmb_key_is_named():
    # Read before any CAMB call, so this stays fast.
    with pytest.raises(ValueError, match=r"unknown sky\.cmb keys \['omega_b'\]"):
        scenario_from_config(_cfg(sky__cmb__omega_b=0.05))
    with pytest.raises(ValueError, match=r"sky\.cmb\.lmax"):
        scenario_from_config(_cfg(sky__cmb__lmax=10.5))
