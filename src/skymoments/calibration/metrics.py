"""Pixel-level calibration metrics of a Gaussian-marginal posterior summary (mean, std).

A posterior summary here is a pair of maps (``mean``, ``std``) per component E and B. We
read it as a Gaussian marginal per pixel: the central credible interval at level ``p`` is
``mean +- norm.ppf((1 + p) / 2) * std``. Under that reading and a correct posterior,
``z = (truth - mean) / std`` is N(0, 1) over validation draws, the fraction of pixels with
``|z| < 1, 2, 3`` is 68.27 / 95.45 / 99.73 % and the PIT values ``norm.cdf(z)`` are
uniform (the normal distribution; Talts et al., arXiv:1804.06788, for the PIT idea).
A moment network gives only mean and variance, so a non-Gaussian true posterior can be
mis-covered at some levels even when z has mean 0 and std 1: the coverage curve over 20
levels shows that.

Metric names: DEVELOPERS.md, Metric names (``calib/z_mean_C``, ``calib/cov68_C``, ...).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

COMPONENTS = ("E", "B")

# The three levels named in the metric contract: Gaussian mass within 1, 2, 3 sigma.
SIGMA_LEVELS = {
    "cov68": 1.0,
    "cov95": 2.0,
    "cov997": 3.0,
}

# 20 credibility levels for the coverage curve: 0.05 ... 0.95 in steps of 0.05, plus 0.99.
COVERAGE_LEVELS = np.append(np.round(np.arange(1, 20) * 0.05, 2), 0.99)

PIT_BINS = 20


def as_numpy(x, name: str) -> np.ndarray:
    """A float64 numpy copy of an array or torch tensor, for metric arithmetic."""
    if hasattr(x, "detach"):
        x = x.detach().cpu().numpy()
    arr = np.asarray(x, dtype=np.float64)
    return arr


def check_posterior_inputs(truth, mean, std, names=("truth", "mean", "std")):
    """Validate a (truth, mean, std) triple of map batches and return numpy copies.

    Parameters
    ----------
    truth, mean, std : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        Channels (E, B).

    Returns
    -------
    tuple of three float64 ndarrays, shape (n, 2, npix, npix)

    Raises
    ------
    ValueError
        Shape mismatch, fewer than 4 dimensions or 2 channels, NaN/inf, or std <= 0.
    """
    arrays = [as_numpy(a, n) for a, n in zip((truth, mean, std), names, strict=True)]
    shapes = {n: a.shape for a, n in zip(arrays, names, strict=True)}
    if len(set(shapes.values())) != 1:
        raise ValueError(
            f"posterior arrays differ in shape: {shapes}; pass truth, mean and std as "
            "(n, 2, npix, npix) batches of the same maps"
        )
    shape = arrays[0].shape
    if len(shape) != 4 or shape[1] != 2:
        raise ValueError(
            f"posterior arrays have shape {shape}, expected (n, 2, npix, npix) with channels (E, B)"
        )
    for a, n in zip(arrays, names, strict=True):
        bad = int(a.size - np.count_nonzero(np.isfinite(a)))
        if bad:
            raise ValueError(f"{n} contains {bad} NaN or infinite values; mask or fill them first")
    n_bad = int(np.count_nonzero(arrays[2] <= 0))
    if n_bad:
        raise ValueError(
            f"{names[2]} must be > 0 everywhere, but {n_bad} of {arrays[2].size} pixels are <= 0; "
            "a variance head must be strictly positive (softplus or exp) before taking its sqrt"
        )
    return tuple(arrays)


def zscores(truth, mean, std) -> np.ndarray:
    """``z = (truth - mean) / std``, shape (n, 2, npix, npix), after validating the inputs."""
    t, m, s = check_posterior_inputs(truth, mean, std)
    return (t - m) / s


def coverage_curve(z: np.ndarray, levels: np.ndarray = COVERAGE_LEVELS) -> np.ndarray:
    """Empirical coverage of the Gaussian central intervals at each credibility level.

    Parameters
    ----------
    z : ndarray, any shape
        z-scores of one component.
    levels : ndarray, shape (L,)
        Credibility levels p in (0, 1).

    Returns
    -------
    ndarray, shape (L,)
        Fraction of z with ``|z| < norm.ppf((1 + p) / 2)``.
    """
    half_width = stats.norm.ppf(0.5 * (1.0 + np.asarray(levels)))
    az = np.sort(np.abs(np.ravel(z)))
    return np.searchsorted(az, half_width, side="left") / az.size


def pit_histogram(z: np.ndarray, bins: int = PIT_BINS) -> tuple[np.ndarray, np.ndarray]:
    """Density histogram of PIT values ``norm.cdf(z)`` on [0, 1] (ideal: 1 in every bin).

    Returns
    -------
    edges : ndarray, shape (bins + 1,)
    density : ndarray, shape (bins,)
    """
    edges = np.linspace(0.0, 1.0, bins + 1)
    counts, _ = np.histogram(stats.norm.cdf(np.ravel(z)), bins=edges)
    return edges, counts * bins / max(counts.sum(), 1)


def gaussian_crps(truth, mean, std) -> np.ndarray:
    """Continuous ranked probability score of the predictive N(mean, std^2) at ``truth``.

    Closed form for a Gaussian predictive (Gneiting & Raftery 2007, JASA 102:359, eq. 21):
    ``CRPS = std * (z (2 Phi(z) - 1) + 2 phi(z) - 1 / sqrt(pi))`` with
    ``z = (truth - mean) / std``. In the units of the maps (uK); smaller is better; a
    proper score, so its expectation is minimised only by the true predictive, which
    rewards calibration and sharpness together.
    """
    t, m, s = (np.asarray(a, dtype=np.float64) for a in (truth, mean, std))
    z = (t - m) / s
    return s * (
        z * (2.0 * stats.norm.cdf(z) - 1.0) + 2.0 * stats.norm.pdf(z) - 1.0 / np.sqrt(np.pi)
    )


def gaussian_nll(truth, mean, std) -> np.ndarray:
    """Negative log density of N(mean, std^2) at ``truth``: ``log(std sqrt(2 pi)) + z^2 / 2``.

    The logarithmic score (Gneiting & Raftery 2007, JASA 102:359, section 4.1), strictly
    proper; ``std`` in uK, so the value depends on the unit by ``log(unit)``. Smaller is
    better.
    """
    t, m, s = (np.asarray(a, dtype=np.float64) for a in (truth, mean, std))
    z = (t - m) / s
    return np.log(s) + 0.5 * np.log(2.0 * np.pi) + 0.5 * z**2


def component_score(z_mean: float, z_std: float, covs: dict[str, float]) -> float:
    """The scalar calibration score of one component (0 is ideal; larger is worse).

    ``|z_mean| + |z_std - 1| + mean_k |cov_k - expected_k|`` over the 68.27 / 95.45 /
    99.73 % levels. A sum of absolute departures from the ideal values so that a sweep can
    rank runs by one number; each term is dimensionless and of order the departure itself.
    """
    cov_err = [abs(covs[k] - (2 * stats.norm.cdf(sig) - 1)) for k, sig in SIGMA_LEVELS.items()]
    return float(abs(z_mean) + abs(z_std - 1.0) + np.mean(cov_err))


@dataclass
class CalibrationResult:
    """Calibration metrics and the arrays behind the plots.

    Attributes
    ----------
    metrics : dict of str to float
        ``calib/z_mean_C``, ``calib/z_std_C``, ``calib/cov68_C``, ``calib/cov95_C``,
        ``calib/cov997_C``, ``calib/ks_C``, ``calib/cov_err_max_C``, ``eval/mse_C``, the
        proper scores ``calib/crps_C`` (uK) and ``calib/nll_C`` (per pixel, std in uK) per
        component C, their means over components ``calib/crps`` and ``calib/nll``, and the
        z/coverage departure ``calib/zcov_error_C`` / ``calib/zcov_error`` (a diagnostic:
        it has no sharpness term, so a posterior that ignores the data can score well; the
        same number is still logged as ``calib/score_C`` / ``calib/score``, its former
        name).
    arrays : dict of str to ndarray
        ``coverage_levels`` (L,), ``coverage_C`` (L,), ``pit_edges`` (bins + 1,),
        ``pit_C`` (bins,).
    z : ndarray, shape (n, 2, npix, npix)
    """

    metrics: dict[str, float] = field(default_factory=dict)
    arrays: dict[str, np.ndarray] = field(default_factory=dict)
    z: np.ndarray | None = None


def calibration_metrics(
    truth_eb,
    mean_eb,
    std_eb,
    *,
    levels: np.ndarray = COVERAGE_LEVELS,
    pit_bins: int = PIT_BINS,
) -> CalibrationResult:
    """Calibration of a posterior (mean, std) against the truth, per component E and B.

    The interval reading is Gaussian-marginal: the level-p interval of a pixel is
    ``mean +- norm.ppf((1 + p) / 2) * std`` (see the module docstring).

    Parameters
    ----------
    truth_eb : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        True E/B maps of the validation set.
    mean_eb : same shape, microkelvin
        Posterior mean.
    std_eb : same shape, microkelvin
        Posterior standard deviation, strictly positive.
    levels : ndarray, shape (L,)
        Credibility levels of the coverage curve (default: 20 levels, 0.05 ... 0.99).
    pit_bins : int
        Bins of the PIT histogram.

    Returns
    -------
    CalibrationResult

    Raises
    ------
    ValueError
        For mismatched shapes, non-finite values or ``std <= 0`` (the count is named).
    """
    t, m, s = check_posterior_inputs(truth_eb, mean_eb, std_eb)
    z = (t - m) / s
    levels = np.asarray(levels, dtype=float)
    out = CalibrationResult(z=z)
    out.arrays["coverage_levels"] = levels
    scores, crps, nll = [], [], []
    for i, c in enumerate(COMPONENTS):
        zc = z[:, i].ravel()
        z_mean = float(np.mean(zc))
        z_std = float(np.std(zc))
        covs = {k: float(np.mean(np.abs(zc) < sig)) for k, sig in SIGMA_LEVELS.items()}
        curve = coverage_curve(zc, levels)
        _, pit = pit_histogram(zc, pit_bins)
        score = component_score(z_mean, z_std, covs)
        scores.append(score)
        crps.append(float(np.mean(gaussian_crps(t[:, i], m[:, i], s[:, i]))))
        nll.append(float(np.mean(gaussian_nll(t[:, i], m[:, i], s[:, i]))))
        out.metrics.update(
            {
                f"calib/z_mean_{c}": z_mean,
                f"calib/z_std_{c}": z_std,
                **{f"calib/{k}_{c}": v for k, v in covs.items()},
                f"calib/ks_{c}": float(stats.kstest(zc, "norm").statistic),
                f"calib/cov_err_max_{c}": float(np.max(np.abs(curve - levels))),
                f"calib/score_{c}": score,
                f"calib/zcov_error_{c}": score,
                f"calib/crps_{c}": crps[-1],
                f"calib/nll_{c}": nll[-1],
                f"eval/mse_{c}": float(np.mean((t[:, i] - m[:, i]) ** 2)),
            }
        )
        out.arrays[f"coverage_{c}"] = curve
        out.arrays[f"pit_{c}"] = pit
    out.arrays["pit_edges"] = np.linspace(0.0, 1.0, pit_bins + 1)
    out.metrics["calib/score"] = float(np.mean(scores))
    out.metrics["calib/zcov_error"] = float(np.mean(scores))
    out.metrics["calib/crps"] = float(np.mean(crps))
    out.metrics["calib/nll"] = float(np.mean(nll))
    return out
