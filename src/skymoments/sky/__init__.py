"""The sky model: CMB spectra, Gaussian realizations, foregrounds, noise, priors, Scenario."""

from skymoments.sky.build import (
    FOREGROUND_NAMES,
    foreground_from_config,
    priors_from_config,
    scenario_from_config,
)
from skymoments.sky.cmb import CMBCosmology, CMBSpectra, cmb_spectra
from skymoments.sky.foregrounds import (
    FOREGROUNDS,
    Filaments,
    Foreground,
    GaussianPowerLaw,
    ImageBank,
    make_foreground,
)
from skymoments.sky.gaussian import gaussian_eb, gaussian_qu, interp_cl_2d
from skymoments.sky.noise import apply_beam, beam_transfer, noise_power_2d, white_noise_qu
from skymoments.sky.priors import (
    PRIOR_DISTS,
    Fixed,
    LogUniform,
    Prior,
    TruncatedNormal,
    Uniform,
    prior_from_config,
)
from skymoments.sky.scenario import PARAM_NAMES, Scenario, SkyDraw
from skymoments.sky.seeds import as_generator, stream, streams

__all__ = [
    "FOREGROUNDS",
    "FOREGROUND_NAMES",
    "PARAM_NAMES",
    "PRIOR_DISTS",
    "CMBCosmology",
    "CMBSpectra",
    "Filaments",
    "Fixed",
    "Foreground",
    "GaussianPowerLaw",
    "ImageBank",
    "LogUniform",
    "Prior",
    "Scenario",
    "SkyDraw",
    "TruncatedNormal",
    "Uniform",
    "apply_beam",
    "as_generator",
    "beam_transfer",
    "cmb_spectra",
    "foreground_from_config",
    "gaussian_eb",
    "gaussian_qu",
    "interp_cl_2d",
    "make_foreground",
    "noise_power_2d",
    "prior_from_config",
    "priors_from_config",
    "scenario_from_config",
    "stream",
    "streams",
    "white_noise_qu",
]
