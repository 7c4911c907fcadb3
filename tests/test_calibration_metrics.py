"""Calibration metrics against the normal distribution, and the per-multipole identities.

References: scipy.stats.norm (coverage of N(0, s^2) draws, KS distance between two
normal CDFs), and algebraic identities of the spectra for identical maps.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from numpy.testing import assert_allclose
from scipy import optimize, stats

from skymoments.calibration.metrics import (
    COVERAGE_LEVELS,
    calibration_metrics,
    coverage_curve,
    zscores,
)
from skymoments.calibration.multipole import multipole_figures
from skymoments.maps.geometry import FlatPatch

N_MAPS, NPIX = 40, 16  # 20480 independent pixels per component


def calibrated_posterior(seed: int = 0):
    """Truth drawn from N(mean, std^2) pixel by pixel: an exactly calibrated posterior.

    Pixels are independent here, so binomial errors over 20480 pixels apply directly.
    """
    rng = np.random.default_rng(seed)
    shape = (N_MAPS, 2, NPIX, NPIX)
    mean = rng.normal(0.0, 3.0, shape)
    std = rng.uniform(0.5, 2.0, shape)
    truth = mean + std * rng.standard_normal(shape)
    return truth, mean, std


def test_calibrated_posterior_is_ideal():
    """z ~ N(0, 1): mean, std and coverage at the normal values within 4 sigma (binomial)."""
    truth, mean, std = calibrated_posterior()
    m = calibration_metrics(truth, mean, std).metrics
    n = N_MAPS * NPIX * NPIX
    for c in "EB":
        assert abs(m[f"calib/z_mean_{c}"]) < 4 / np.sqrt(n)
        assert abs(m[f"calib/z_std_{c}"] - 1) < 4 / np.sqrt(2 * n)
        for key, k in (("cov68", 1), ("cov95", 2), ("cov997", 3)):
            p = 2 * stats.norm.cdf(k) - 1  # 0.6827, 0.9545, 0.9973
            assert abs(m[f"calib/{key}_{c}"] - p) < 4 * np.sqrt(p * (1 - p) / n)
        # Kolmogorov: sqrt(n) D is below 1.95 with probability 0.999 (scipy.stats.kstwobign).
        assert m[f"calib/ks_{c}"] < stats.kstwobign.ppf(0.999) / np.sqrt(n)
        # The score sums the three departures: under the 4-sigma bounds above at most
        # 0.028 + 0.020 + 0.013 = 0.061.
        assert m[f"calib/score_{c}"] < 0.061


def test_overconfident_posterior_is_flagged_everywhere():
    """Halving std makes z ~ N(0, 4): every metric departs from ideal by the normal's value.

    Reference (scipy.stats.norm): cov at k sigma becomes P(|x| < k/2) = 2 Phi(k/2) - 1,
    i.e. 0.383 / 0.683 / 0.866; the KS distance between N(0, 4) and N(0, 1) is
    max_x |Phi(x/2) - Phi(x)| = 0.1720 (at x = 1.36). Tolerances: 4 binomial sigma.
    """
    truth, mean, std = calibrated_posterior()
    good = calibration_metrics(truth, mean, std)
    bad = calibration_metrics(truth, mean, std / 2)
    n = N_MAPS * NPIX * NPIX
    res = optimize.minimize_scalar(
        lambda x: -abs(stats.norm.cdf(x / 2) - stats.norm.cdf(x)), bounds=(0, 5), method="bounded"
    )
    ks_expect = -res.fun
    for c in "EB":
        assert abs(bad.metrics[f"calib/z_std_{c}"] - 2.0) < 4 * 2 / np.sqrt(2 * n)
        for key, k in (("cov68", 1), ("cov95", 2), ("cov997", 3)):
            p = 2 * stats.norm.cdf(k / 2) - 1
            assert abs(bad.metrics[f"calib/{key}_{c}"] - p) < 4 * np.sqrt(p * (1 - p) / n)
        assert abs(bad.metrics[f"calib/ks_{c}"] - ks_expect) < 2 / np.sqrt(n)
        # Coverage curve below the diagonal at every level (and the calibrated one is not).
        assert np.all(bad.arrays[f"coverage_{c}"] < COVERAGE_LEVELS - 0.01)
        assert bad.metrics[f"calib/cov_err_max_{c}"] > 0.2
        assert good.metrics[f"calib/cov_err_max_{c}"] < 0.02
        assert bad.metrics[f"calib/score_{c}"] > good.metrics[f"calib/score_{c}"] + 1.0
        # PIT piles up at 0 and 1 for an over-confident posterior.
        pit = bad.arrays[f"pit_{c}"]
        assert pit[0] > 2 and pit[-1] > 2 and pit[len(pit) // 2] < 0.6
    assert bad.metrics["calib/score"] > good.metrics["calib/score"]


def test_coverage_curve_matches_normal_quantiles():
    """Coverage of N(0, s^2) draws at level p is 2 Phi(ppf((1+p)/2) / s) - 1 (scipy.stats.norm)."""
    rng = np.random.default_rng(1)
    z = 1.5 * rng.standard_normal(200_000)
    expect = 2 * stats.norm.cdf(stats.norm.ppf((1 + COVERAGE_LEVELS) / 2) / 1.5) - 1
    # binomial error of 2e5 draws: < 1.2e-3; 5 sigma
    assert_allclose(coverage_curve(z), expect, atol=5e-3)
    assert len(COVERAGE_LEVELS) == 20


def test_torch_input_gives_the_same_metrics():
    truth, mean, std = calibrated_posterior(2)
    a = calibration_metrics(truth, mean, std).metrics
    b = calibration_metrics(torch.from_numpy(truth), torch.from_numpy(mean), torch.from_numpy(std))
    assert a == pytest.approx(b.metrics, rel=1e-12)


def test_bad_inputs_raise_clear_errors():
    truth, mean, std = calibrated_posterior(3)
    bad_std = std.copy()
    bad_std[0, 0, :2, :3] = 0.0
    with pytest.raises(ValueError, match="6 of"):
        zscores(truth, mean, bad_std)
    with pytest.raises(ValueError, match="shape"):
        calibration_metrics(truth, mean[:-1], std)
    nan = truth.copy()
    nan[1, 1, 2, 2] = np.nan
    with pytest.raises(ValueError, match="1 NaN"):
        calibration_metrics(nan, mean, std)
    with pytest.raises(ValueError, match=r"\(n, 2, npix, npix\)"):
        calibration_metrics(truth[:, :1], mean[:, :1], std[:, :1])


def test_identical_maps_have_unit_cross_correlation_and_transfer():
    """r_ell = 1 and T_ell = 1 when the estimate is the truth; the residual is 0.

    Reference: algebra, C^XY = C^XX = C^YY for X = Y.
    """
    patch = FlatPatch(16, 3.0)
    rng = np.random.default_rng(4)
    y = rng.standard_normal((10, 2, 16, 16))
    metrics, arr = multipole_figures(y, y, patch, data_qu=rng.standard_normal(y.shape))
    for c in "EB":
        assert_allclose(arr[f"r_ell_{c}"], 1.0, rtol=1e-12)
        assert_allclose(arr[f"T_ell_{c}"], 1.0, rtol=1e-12)
        assert np.all(arr[f"cl_residual_{c}"] == 0)
        assert metrics[f"eval/snr_gain_{c}"] == np.inf
    # A scaled copy: r stays 1, T is the scale (C^XY = a C^YY, C^XX = a^2 C^YY).
    _, arr = multipole_figures(0.5 * y, y, patch)
    assert_allclose(arr["r_ell_E"], 1.0, rtol=1e-12)
    assert_allclose(arr["T_ell_B"], 0.5, rtol=1e-12)


def test_snr_gain_of_a_perfect_and_a_useless_estimate():
    """SNR gain > 1 for an estimate closer to the truth than the data, = 1 for the data.

    Reference: the definition, SNR = sum C^YY / sum C^residual; using the data's own E/B as
    the estimate gives gain exactly 1.
    """
    from skymoments.maps.eb import eb_to_qu, qu_to_eb

    patch = FlatPatch(16, 3.0)
    rng = np.random.default_rng(5)
    truth = qu_to_eb(rng.standard_normal((20, 2, 16, 16)), patch)
    data_qu = eb_to_qu(truth, patch) + 0.7 * rng.standard_normal(truth.shape)
    m_data, _ = multipole_figures(qu_to_eb(data_qu, patch), truth, patch, data_qu=data_qu)
    assert_allclose([m_data["eval/snr_gain_E"], m_data["eval/snr_gain_B"]], 1.0, rtol=1e-12)
    better = truth + 0.5 * (qu_to_eb(data_qu, patch) - truth)  # half the residual
    m_better, _ = multipole_figures(better, truth, patch, data_qu=data_qu)
    # Residual spectrum scales by 0.5^2, so the gain is exactly 4.
    assert_allclose(m_better["eval/snr_gain_E"], 4.0, rtol=1e-10)
