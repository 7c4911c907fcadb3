"""Spin-2 patch symmetries (maps/symmetry.py): sign rules, D4, and commutation with E/B."""

import numpy as np
import pytest
import torch

from skymoments.maps.eb import eb_to_qu, qu_to_eb
from skymoments.maps.geometry import FlatPatch
from skymoments.maps.symmetry import (
    N_SYMMETRIES,
    apply_symmetry_eb,
    apply_symmetry_qu,
    apply_symmetry_scalar,
    flip_eb,
    flip_qu,
    inverse_symmetry,
    rot90_eb,
    rot90_qu,
    symmetry_parts,
    transpose_eb,
    transpose_qu,
)

# float64 FFT round trips of O(1) maps: errors ~1e-15; 1e-12 leaves no room for a sign or
# a misplaced pixel, which are O(1).
ROUND_OFF = 1e-12


def make_qu(npix, seed, lead=(2,)):
    """Seeded white Q/U maps, shape (*lead, 2, npix, npix)."""
    return np.random.default_rng(seed).standard_normal((*lead, 2, npix, npix))


def to_numpy(x):
    return x.detach().cpu().numpy() if isinstance(x, torch.Tensor) else x


def backend(x, kind):
    return torch.from_numpy(np.ascontiguousarray(x)) if kind == "torch" else x


@pytest.mark.parametrize("kind", ["numpy", "torch"])
@pytest.mark.parametrize("npix", [16, 17])
@pytest.mark.parametrize("g", range(N_SYMMETRIES))
def test_symmetries_commute_with_eb(g, npix, kind):
    # THE key property: transforming Q/U then taking E/B equals taking E/B then
    # transforming E/B, for all 8 elements of D4 (spin-2 rules: Q + iU -> e^{2i alpha}(Q + iU)
    # under a rotation, Q - iU under a reflection),
    # on even (Nyquist lines, see maps/eb.py) and odd patches.
    patch = FlatPatch(npix, 2.0)
    qu = make_qu(npix, seed=10 + g)
    lhs = qu_to_eb(to_numpy(apply_symmetry_qu(backend(qu, kind), g)), patch)
    rhs = to_numpy(apply_symmetry_eb(backend(qu_to_eb(qu, patch), kind), g))
    np.testing.assert_allclose(lhs, rhs, rtol=0, atol=ROUND_OFF)
    # And the other way round, E/B -> Q/U.
    eb = make_qu(npix, seed=20 + g)
    lhs = eb_to_qu(to_numpy(apply_symmetry_eb(backend(eb, kind), g)), patch)
    rhs = to_numpy(apply_symmetry_qu(backend(eb_to_qu(eb, patch), kind), g))
    np.testing.assert_allclose(lhs, rhs, rtol=0, atol=ROUND_OFF)


def _analytic_field(x, y):
    """A smooth polarization field: amplitude A and angle psi (from x towards y)."""
    amp = 1.0 + 0.5 * np.cos(0.7 * x + 0.2) * np.sin(0.4 * y - 0.3) + 0.1 * x
    psi = 0.3 * x - 0.5 * y + 0.1 * x * y + 0.4
    return amp, psi


def _qu_on_grid(amp, psi):
    return np.stack([amp * np.cos(2 * psi), amp * np.sin(2 * psi)])


@pytest.mark.parametrize("npix", [8, 9])
def test_sign_rules_from_the_geometry(npix):
    # Independent of E/B: build Q/U from an amplitude and an angle field, move the sky
    # with an explicit map of the points and turn the angle as geometry says
    # (rotation by alpha: psi -> psi + alpha; mirror x -> -x: psi -> pi - psi;
    # mirror y -> -y: psi -> -psi; swap x <-> y: psi -> pi/2 - psi), then compare.
    c = np.arange(npix) - 0.5 * (npix - 1)  # pixel centres about the patch centre
    y, x = np.meshgrid(c, c, indexing="ij")  # rows = y, columns = x
    qu = _qu_on_grid(*_analytic_field(x, y))

    # numpy.rot90 sends (x, y) to (y, -x): a rotation by alpha = -90 degrees. The new
    # field at p is the old one at R^-1 p = (-y, x) with the angle turned by alpha.
    amp, psi = _analytic_field(-y, x)
    np.testing.assert_allclose(rot90_qu(qu, 1), _qu_on_grid(amp, psi - np.pi / 2), atol=1e-12)
    amp, psi = _analytic_field(-x, -y)  # 180 degrees
    np.testing.assert_allclose(rot90_qu(qu, 2), _qu_on_grid(amp, psi + np.pi), atol=1e-12)
    amp, psi = _analytic_field(y, -x)  # +90 degrees = three rot90 steps
    np.testing.assert_allclose(rot90_qu(qu, 3), _qu_on_grid(amp, psi + np.pi / 2), atol=1e-12)

    amp, psi = _analytic_field(-x, y)
    np.testing.assert_allclose(flip_qu(qu, -1), _qu_on_grid(amp, np.pi - psi), atol=1e-12)
    amp, psi = _analytic_field(x, -y)
    np.testing.assert_allclose(flip_qu(qu, -2), _qu_on_grid(amp, -psi), atol=1e-12)
    amp, psi = _analytic_field(y, x)
    np.testing.assert_allclose(transpose_qu(qu), _qu_on_grid(amp, np.pi / 2 - psi), atol=1e-12)


def test_named_operations_are_group_elements():
    qu = make_qu(12, seed=3)
    for k in range(4):
        np.testing.assert_array_equal(rot90_qu(qu, k), apply_symmetry_qu(qu, k))
        np.testing.assert_array_equal(rot90_eb(qu, k), apply_symmetry_eb(qu, k))
    np.testing.assert_array_equal(flip_qu(qu, -1), apply_symmetry_qu(qu, 4))
    np.testing.assert_array_equal(transpose_qu(qu), apply_symmetry_qu(qu, 5))
    np.testing.assert_array_equal(flip_qu(qu, -2), apply_symmetry_qu(qu, 6))
    np.testing.assert_array_equal(flip_eb(qu, -1), apply_symmetry_eb(qu, 4))
    np.testing.assert_array_equal(transpose_eb(qu), apply_symmetry_eb(qu, 5))
    np.testing.assert_array_equal(flip_eb(qu, -2), apply_symmetry_eb(qu, 6))
    # Stated rules on arrays, from the spin-2 rules above (checked numerically here).
    np.testing.assert_array_equal(
        rot90_qu(qu)[..., 0, :, :], -np.rot90(qu[..., 0, :, :], axes=(-2, -1))
    )
    np.testing.assert_array_equal(flip_qu(qu)[..., 1, :, :], -np.flip(qu[..., 1, :, :], -1))
    np.testing.assert_array_equal(
        transpose_qu(qu)[..., 0, :, :], -np.swapaxes(qu[..., 0, :, :], -1, -2)
    )
    np.testing.assert_array_equal(
        transpose_eb(qu)[..., 1, :, :], -np.swapaxes(qu[..., 1, :, :], -1, -2)
    )
    assert [symmetry_parts(g) for g in (0, 3, 4, 7)] == [(0, 0), (0, 3), (1, 0), (1, 3)]


@pytest.mark.parametrize("g", range(N_SYMMETRIES))
def test_inverse_and_group_closure(g):
    qu = make_qu(10, seed=4)
    back = apply_symmetry_qu(apply_symmetry_qu(qu, g), inverse_symmetry(g))
    np.testing.assert_array_equal(back, qu)
    back = apply_symmetry_eb(apply_symmetry_eb(qu, g), inverse_symmetry(g))
    np.testing.assert_array_equal(back, qu)
    # Composition stays in the group: g then h equals one element (D4 is closed), and
    # the 8 elements give 8 different maps.
    images = [apply_symmetry_qu(apply_symmetry_qu(qu, g), h) for h in range(N_SYMMETRIES)]
    singles = [apply_symmetry_qu(qu, h) for h in range(N_SYMMETRIES)]
    for im in images:
        assert sum(np.array_equal(im, s) for s in singles) == 1


def test_scalar_maps_follow_e():
    # Scalars (T, variances) move like E, with no sign: E is a scalar (analytic).
    eb = make_qu(9, seed=5)
    for g in range(N_SYMMETRIES):
        np.testing.assert_array_equal(
            apply_symmetry_scalar(eb[:, 0], g), apply_symmetry_eb(eb, g)[:, 0]
        )
        # Var[-B] = Var[B]: the magnitude of B follows the scalar rule.
        np.testing.assert_array_equal(
            apply_symmetry_scalar(np.abs(eb[:, 1]), g), np.abs(apply_symmetry_eb(eb, g)[:, 1])
        )


def test_torch_keeps_type_dtype_and_gradients():
    qu = torch.randn(3, 2, 8, 8, dtype=torch.float32, requires_grad=True)
    out = apply_symmetry_qu(qu, 7)
    assert isinstance(out, torch.Tensor) and out.dtype == torch.float32 and out.shape == qu.shape
    ref = apply_symmetry_qu(qu.detach().numpy(), 7)
    np.testing.assert_array_equal(out.detach().numpy(), ref)
    out.sum().backward()  # a symmetry is linear: the gradient of the sum is +-1 per pixel
    assert torch.all(qu.grad.abs() == 1)
    assert apply_symmetry_qu(np.zeros((2, 4, 4), dtype=np.float32), 1).dtype == np.float32


def test_bad_input_is_refused():
    with pytest.raises(ValueError, match="square patch"):
        rot90_qu(np.zeros((3, 8, 8)))
    with pytest.raises(ValueError, match="square patch"):
        flip_eb(np.zeros((2, 8, 9)))
    with pytest.raises(ValueError, match="square patch"):
        apply_symmetry_scalar(np.zeros(8), 0)
    with pytest.raises(ValueError, match="0..7"):
        apply_symmetry_qu(np.zeros((2, 8, 8)), 8)
    with pytest.raises(ValueError, match="0..7"):
        apply_symmetry_eb(np.zeros((2, 8, 8)), 1.0)
    with pytest.raises(ValueError, match="axis"):
        flip_qu(np.zeros((2, 8, 8)), 0)
