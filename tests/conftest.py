"""Shared fixtures: seeded factories and an isolated cache for the whole session."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
# Under pytest-xdist, share the cores between the workers rather than give each worker (and
# the commands it starts) a thread per core: oversubscribed threads slow everything down.
if "PYTEST_XDIST_WORKER_COUNT" in os.environ and "OMP_NUM_THREADS" not in os.environ:
    _workers = max(1, int(os.environ["PYTEST_XDIST_WORKER_COUNT"]))
    os.environ["OMP_NUM_THREADS"] = str(max(1, (os.cpu_count() or 1) // _workers))


@pytest.fixture(scope="session", autouse=True)
def _session_cache(tmp_path_factory):
    """One CAMB/bank cache per test session, so CAMB runs once and nothing leaks to ~/.cache."""
    if "SKYMOMENTS_TEST_KEEP_CACHE" in os.environ:
        yield
        return
    path = tmp_path_factory.mktemp("skymoments-cache")
    old = os.environ.get("SKYMOMENTS_CACHE")
    os.environ["SKYMOMENTS_CACHE"] = str(path)
    yield
    if old is None:
        os.environ.pop("SKYMOMENTS_CACHE", None)
    else:
        os.environ["SKYMOMENTS_CACHE"] = old


@pytest.fixture
def make_patch():
    """Factory for a FlatPatch: ``make_patch(npix=32, pixel_arcmin=3.0)``."""
    from skymoments.maps import FlatPatch

    def factory(npix: int = 32, pixel_arcmin: float = 3.0):
        return FlatPatch(npix, pixel_arcmin)

    return factory


@pytest.fixture
def rng():
    """A seeded generator; each test gets the same stream."""
    return np.random.default_rng(12345)
