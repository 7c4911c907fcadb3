"""Priors against scipy.stats: moments, bounds, KS, and the config round trip."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from skymoments.sky.priors import (
    PRIOR_DISTS,
    Fixed,
    LogUniform,
    TruncatedNormal,
    Uniform,
    prior_from_config,
)

# Each prior beside its scipy.stats reference distribution.
CASES = [
    (Uniform(0.0, 0.2), stats.uniform(loc=0.0, scale=0.2)),
    (LogUniform(0.5, 2.0), stats.loguniform(0.5, 2.0)),
    (TruncatedNormal(1.0, 0.3, 0.5, 2.0), stats.truncnorm(-0.5 / 0.3, 1.0 / 0.3, 1.0, 0.3)),
    (TruncatedNormal(0.0, 1.0, 0.0, 5.0), stats.halfnorm()),  # a half-normal, effectively
]


@pytest.mark.parametrize(("prior", "ref"), CASES, ids=lambda c: getattr(c, "dist", ""))
def test_moments_match_scipy(prior, ref):
    # Exact moments against scipy.stats (analytic there); float64 round-off only, except
    # the half-normal stand-in, whose truncation at 5 sigma changes moments by < 1e-5.
    assert prior.mean() == pytest.approx(ref.mean(), rel=2e-5)
    assert prior.second_moment() == pytest.approx(ref.moment(2), rel=2e-5)
    assert prior.var() == pytest.approx(ref.var(), rel=5e-5)


@pytest.mark.parametrize(("prior", "ref"), CASES, ids=lambda c: getattr(c, "dist", ""))
def test_samples_follow_the_distribution(prior, ref):
    # Sample mean within 4.5 standard errors (CLT), every sample inside the support, and
    # a Kolmogorov-Smirnov test against the scipy cdf accepted unless p < 1e-3.
    n = 20000
    x = prior.sample(np.random.default_rng(0), n)
    assert x.shape == (n,)
    lo, hi = prior.support
    assert np.all(x >= lo) and np.all(x <= hi)
    assert abs(x.mean() - ref.mean()) < 4.5 * ref.std() / np.sqrt(n)
    assert stats.kstest(x, ref.cdf).pvalue > 1e-3


def test_fixed_prior():
    p = Fixed(1.0)
    np.testing.assert_array_equal(p.sample(0, 4), np.ones(4))
    assert p.mean() == 1.0 and p.second_moment() == 1.0 and p.var() == 0.0
    assert p.support == (1.0, 1.0)


def test_samples_are_seeded():
    p = LogUniform(0.5, 2.0)
    np.testing.assert_array_equal(p.sample(3, 5), p.sample(np.random.default_rng(3), 5))


def test_config_round_trip_and_none_keys():
    for prior, _ in CASES:
        assert prior_from_config(prior.to_config()) == prior
    assert prior_from_config({"dist": "fixed", "value": 2.0}) == Fixed(2.0)
    # A node merged onto a schema carrying every key, unused ones None, still parses.
    node = {"dist": "uniform", "value": None, "low": 0.0, "high": 0.2, "mean": None, "std": None}
    assert prior_from_config(node) == Uniform(0.0, 0.2)
    assert set(PRIOR_DISTS) == {"fixed", "uniform", "loguniform", "truncnormal"}


@pytest.mark.parametrize(
    ("node", "match"),
    [
        ({"dist": "uniform", "low": 0.3, "high": 0.1}, "'low'"),
        ({"dist": "uniform", "low": 0.1, "high": 0.1}, "'low'"),
        ({"dist": "loguniform", "low": 0.0, "high": 2.0}, "'low' must be > 0"),
        ({"dist": "loguniform", "low": -1.0, "high": 2.0}, "'low' must be > 0"),
        ({"dist": "truncnormal", "mean": 0.0, "std": -1.0, "low": 0.0, "high": 1.0}, "'std'"),
        ({"dist": "truncnormal", "mean": 0.0, "std": 0.0, "low": 0.0, "high": 1.0}, "'std'"),
        ({"dist": "fixed", "value": "abc"}, "'value'"),
        ({"dist": "fixed", "value": float("nan")}, "'value'"),
        ({"dist": "gamma", "low": 1.0}, "fixed, uniform, loguniform, truncnormal"),
        ({"low": 1.0, "high": 2.0}, "dist"),
        ({"dist": "uniform", "low": 0.0}, "missing: high"),
        ({"dist": "fixed", "value": 1.0, "low": 0.0}, "remove: low"),
        ("uniform", "mapping"),
    ],
)
def test_bad_priors_raise_naming_the_parameter(node, match):
    with pytest.raises(ValueError, match=match):
        prior_from_config(node)


def test_bad_sample_count_raises():
    with pytest.raises(ValueError, match="number of samples"):
        Uniform(0.0, 1.0).sample(0, -1)
