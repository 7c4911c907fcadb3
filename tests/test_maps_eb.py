"""Q/U <-> E/B on flat patches (maps/eb.py): round trips, pure modes, the sign convention."""

import numpy as np
import pytest

from skymoments.maps.eb import eb_to_qu, qu_to_eb, qu_to_eb_fourier
from skymoments.maps.geometry import FlatPatch

# float64 FFTs of O(1) maps: a round trip is exact to ~1e-15 times log(npix) per element;
# 1e-12 leaves room for the size of the arrays and nothing for a real error (O(1)).
ROUND_OFF = 1e-12


def make_maps(npix, seed, lead=()):
    """Seeded white (..., 2, npix, npix) maps of unit variance."""
    return np.random.default_rng(seed).standard_normal((*lead, 2, npix, npix))


def remove_mean_and_corner(maps):
    """What the transform keeps: no l = 0 mode and, for even npix, no Nyquist corner mode.

    Both carry no E/B (maps/eb.py): the mean has no direction, and the checkerboard
    (-1)^(i+j) changes sign relative to E/B under a 90-degree rotation.
    """
    out = maps - maps.mean(axis=(-2, -1), keepdims=True)
    n = maps.shape[-1]
    if n % 2 == 0:
        board = (-1.0) ** np.add.outer(np.arange(n), np.arange(n))
        out = out - board * (out * board).mean(axis=(-2, -1), keepdims=True)
    return out


@pytest.mark.parametrize("npix", [16, 17, 32])
def test_eb_qu_eb_round_trip(npix):
    # The transform is a rotation per Fourier mode (unitary): eb -> qu -> eb is the
    # identity on everything but the l = 0 and corner modes (analytic).
    patch = FlatPatch(npix, 2.0)
    eb = make_maps(npix, seed=1, lead=(3,))
    back = qu_to_eb(eb_to_qu(eb, patch), patch)
    np.testing.assert_allclose(back, remove_mean_and_corner(eb), rtol=0, atol=ROUND_OFF)


@pytest.mark.parametrize("npix", [16, 17])
def test_qu_eb_qu_round_trip(npix):
    patch = FlatPatch(npix, 2.0)
    qu = make_maps(npix, seed=2)
    back = eb_to_qu(qu_to_eb(qu, patch), patch)
    np.testing.assert_allclose(back, remove_mean_and_corner(qu), rtol=0, atol=ROUND_OFF)


@pytest.mark.parametrize("npix", [64, 65])
def test_e_only_field_has_b_at_round_off(npix):
    patch = FlatPatch(npix, 3.0)
    e = make_maps(npix, seed=3)[0]
    qu = eb_to_qu(np.stack([e, np.zeros_like(e)]), patch)
    eb = qu_to_eb(qu, patch)
    rel_b = np.abs(eb[1]).max() / np.abs(eb[0]).max()
    print(f"\nE-only field, npix={npix}: max|B| / max|E| = {rel_b:.1e}")
    assert rel_b < ROUND_OFF
    # And a B-only field has no E.
    qu_b = eb_to_qu(np.stack([np.zeros_like(e), e]), patch)
    assert np.abs(qu_to_eb(qu_b, patch)[0]).max() < ROUND_OFF * np.abs(e).max()


@pytest.mark.parametrize("m", [(3, 0), (0, 3), (2, 2), (-2, 3)])
def test_plane_wave_follows_the_stated_convention(m):
    # A single E plane wave of multipole l: Q = cos(2 phi) E, U = sin(2 phi) E with
    # phi = atan2(ly, lx), x along columns, y along rows (maps/eb.py docstring; the
    # standard flat-sky relation, Zaldarriaga & Seljak 1997, PRD 55:1830, from memory).
    npix = 32
    patch = FlatPatch(npix, 2.0)
    mx, my = m
    iy, ix = np.meshgrid(np.arange(npix), np.arange(npix), indexing="ij")
    wave = np.cos(2 * np.pi * (mx * ix + my * iy) / npix)
    phi = np.arctan2(my, mx)
    qu = eb_to_qu(np.stack([wave, np.zeros_like(wave)]), patch)
    np.testing.assert_allclose(qu[0], np.cos(2 * phi) * wave, atol=ROUND_OFF)
    np.testing.assert_allclose(qu[1], np.sin(2 * phi) * wave, atol=ROUND_OFF)
    # The same wave as B: Q = -sin(2 phi) B, U = cos(2 phi) B.
    qu = eb_to_qu(np.stack([np.zeros_like(wave), wave]), patch)
    np.testing.assert_allclose(qu[0], -np.sin(2 * phi) * wave, atol=ROUND_OFF)
    np.testing.assert_allclose(qu[1], np.cos(2 * phi) * wave, atol=ROUND_OFF)


def test_parseval_on_the_nyquist_lines():
    # Unitary per mode, Nyquist lines included (the fix in maps/eb.py): the summed power
    # of Q, U equals that of E, B mode by mode (Parseval), except l = 0 and the corner.
    npix = 16
    patch = FlatPatch(npix, 2.0)
    qu = remove_mean_and_corner(make_maps(npix, seed=4))
    ebf = qu_to_eb_fourier(qu, patch)
    quf = np.fft.fft2(qu)
    power_qu = np.abs(quf[0]) ** 2 + np.abs(quf[1]) ** 2
    power_eb = np.abs(ebf[0]) ** 2 + np.abs(ebf[1]) ** 2
    np.testing.assert_allclose(power_eb, power_qu, rtol=1e-10, atol=1e-10)


def test_bad_input_is_refused():
    patch = FlatPatch(16, 2.0)
    with pytest.raises(ValueError, match="shape"):
        qu_to_eb(np.zeros((3, 16, 16)), patch)
    with pytest.raises(ValueError, match="shape"):
        eb_to_qu(np.zeros((2, 16, 17)), patch)
    bad = make_maps(16, seed=5)
    bad[0, 3, 3] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        qu_to_eb(bad, patch)
    bad[0, 3, 3] = np.inf
    with pytest.raises(ValueError, match="NaN or infinite"):
        eb_to_qu(bad, patch)
