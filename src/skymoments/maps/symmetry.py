"""Spin-2-correct symmetries of square patches: 90-degree rotations, flips, the group D4.

Arrays are shaped ``(..., 2, n, n)`` with channels (Q, U) or (E, B), rows = y and
columns = x (the layout of ``maps.geometry``). Every function takes a numpy array or a
torch tensor and returns the same kind (``torch.rot90`` / ``torch.flip`` for tensors, so
it works on any device and inside autograd).

Sign rules. Under an active rotation of the sky by ``alpha``, ``Q + iU`` at the rotated
point is ``exp(2i alpha) (Q + iU)``; under a reflection ``Q + iU -> Q - iU`` (the
polarization angle, measured from x towards y, changes sign): Q + iU is a spin-2
quantity (Zaldarriaga & Seljak 1997, Phys. Rev. D 55:1830; from memory).
On our axes ``numpy.rot90(m, k=1, axes=(-2, -1))`` sends the point (x, y)
to (y, -x): it is a rotation by **-90 degrees** (clockwise when the patch is shown with
y upwards, ``origin="lower"``; counter-clockwise only in a display with row 0 on top,
where y points down). Since ``exp(+-i pi) = -1`` the sign rule is the same either way:

* ``rot90`` by odd ``k``: ``Q' = -rot90(Q)``, ``U' = -rot90(U)``; even ``k``: no sign;
* a flip along x or along y: ``Q' = flip(Q)``, ``U' = -flip(U)``;
* the transpose (the reflection x <-> y, angle ``psi -> pi/2 - psi``): ``Q' = -Q^T``,
  ``U' = U^T``.

E and B are a scalar and a pseudo-scalar: they just move under rotations, and B changes
sign under reflections (``E' = flip(E)``, ``B' = -flip(B)``; ``E' = E^T``, ``B' = -B^T``).
With the Q/U -> E/B convention of ``maps.eb`` (``phi = atan2(ly, lx)``, x along columns)
these rules commute with the transform exactly, also for even ``n`` (see ``maps.eb``'s
treatment of the Nyquist lines).

The dihedral group D4 has 8 elements, indexed ``g = 4 * f + k`` (``f`` in {0, 1},
``k`` in 0..3): the element first flips along x (the column axis, ``x -> -x``) when
``f = 1``, then rotates with ``rot90`` ``k`` times. ``g = 5`` is the transpose.
"""

from __future__ import annotations

import numpy as np

N_SYMMETRIES = 8


def _is_torch(x) -> bool:
    # Checked by module name so that numpy-only callers never import torch.
    return type(x).__module__.split(".")[0] == "torch"


def _check(x, name: str, channels: int | None = 2) -> None:
    shape = tuple(x.shape)
    need = 3 if channels else 2
    if len(shape) < need or shape[-1] != shape[-2] or (channels and shape[-3] != channels):
        want = "(..., 2, n, n) with channels (Q, U) or (E, B)" if channels else "(..., n, n)"
        raise ValueError(f"{name} has shape {shape}; expected a square patch shaped {want}")


def _rot90(x, k: int):
    if _is_torch(x):
        import torch

        return torch.rot90(x, k, dims=(-2, -1))
    return np.rot90(x, k, axes=(-2, -1))


def _flip(x, axis: int):
    if _is_torch(x):
        import torch

        return torch.flip(x, dims=(axis,))
    return np.flip(x, axis=axis)


def _transpose(x):
    if _is_torch(x):
        return x.transpose(-1, -2)
    return np.swapaxes(x, -1, -2)


def _signs(x, s0: float, s1: float):
    """Multiply channel 0 by ``s0`` and channel 1 by ``s1``; always returns a new array."""
    if _is_torch(x):
        import torch

        sign = torch.tensor([s0, s1], dtype=x.dtype, device=x.device).reshape(2, 1, 1)
        return x * sign
    sign = np.array([s0, s1], dtype=x.dtype if x.dtype.kind in "fc" else float)
    return x * sign.reshape(2, 1, 1)


def _check_axis(axis: int) -> int:
    if axis not in (-1, -2):
        raise ValueError(
            f"flip axis must be -1 (along x: columns reversed) or -2 (along y: rows reversed), "
            f"got {axis!r}"
        )
    return axis


def _check_g(g) -> int:
    if not isinstance(g, int | np.integer) or not 0 <= int(g) < N_SYMMETRIES:
        raise ValueError(f"symmetry index g must be an integer in 0..{N_SYMMETRIES - 1}, got {g!r}")
    return int(g)


# --- Q/U ---------------------------------------------------------------------------------


def rot90_qu(qu, k: int = 1):
    """Rotate Q/U maps by ``k`` quarter turns (``rot90`` on the last two axes), spin-2-correct.

    Parameters
    ----------
    qu : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
        Channels (Q, U).
    k : int
        Number of ``rot90`` steps; each is a -90 degree rotation of the sky on our axes.

    Returns
    -------
    Same type and shape as ``qu``: ``Q' = -rot90(Q)``, ``U' = -rot90(U)`` for odd ``k``,
    no sign change for even ``k``.
    """
    _check(qu, "qu")
    out = _rot90(qu, int(k))
    s = -1.0 if int(k) % 2 else 1.0
    return _signs(out, s, s)


def flip_qu(qu, axis: int = -1):
    """Mirror Q/U maps along x (``axis=-1``, columns reversed) or y (``axis=-2``).

    Parameters
    ----------
    qu : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    axis : {-1, -2}

    Returns
    -------
    Same type and shape: ``Q' = flip(Q)``, ``U' = -flip(U)``.
    """
    _check(qu, "qu")
    return _signs(_flip(qu, _check_axis(axis)), 1.0, -1.0)


def transpose_qu(qu):
    """Reflect Q/U maps about the diagonal x = y: ``Q' = -Q^T``, ``U' = U^T``.

    Parameters
    ----------
    qu : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    """
    _check(qu, "qu")
    return _signs(_transpose(qu), -1.0, 1.0)


# --- E/B ---------------------------------------------------------------------------------


def rot90_eb(eb, k: int = 1):
    """Rotate E/B maps by ``k`` quarter turns: both just rotate (no sign change).

    Parameters
    ----------
    eb : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    k : int
    """
    _check(eb, "eb")
    return _signs(_rot90(eb, int(k)), 1.0, 1.0)


def flip_eb(eb, axis: int = -1):
    """Mirror E/B maps: ``E' = flip(E)``, ``B' = -flip(B)`` (B is a pseudo-scalar).

    Parameters
    ----------
    eb : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    axis : {-1, -2}
    """
    _check(eb, "eb")
    return _signs(_flip(eb, _check_axis(axis)), 1.0, -1.0)


def transpose_eb(eb):
    """Reflect E/B maps about x = y: ``E' = E^T``, ``B' = -B^T``.

    Parameters
    ----------
    eb : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    """
    _check(eb, "eb")
    return _signs(_transpose(eb), 1.0, -1.0)


# --- D4 ----------------------------------------------------------------------------------


def symmetry_parts(g: int) -> tuple[int, int]:
    """``(f, k)`` of the group element ``g = 4 f + k``: flip along x if ``f``, then ``k`` rot90."""
    g = _check_g(g)
    return g // 4, g % 4


def inverse_symmetry(g: int) -> int:
    """Index of the inverse element: rotations invert ``k -> -k``, reflections are involutions."""
    f, k = symmetry_parts(g)
    return g if f else (-k) % 4


def apply_symmetry_qu(qu, g: int):
    """Apply the D4 element ``g`` (0..7) to Q/U maps, spin-2-correct.

    Parameters
    ----------
    qu : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    g : int
        ``4 * f + k``: flip along x if ``f == 1``, then ``k`` times ``rot90``.

    Returns
    -------
    Same type and shape as ``qu``. Commutes with ``maps.eb.qu_to_eb`` and
    :func:`apply_symmetry_eb`: ``qu_to_eb(apply_symmetry_qu(qu, g)) ==
    apply_symmetry_eb(qu_to_eb(qu), g)``.
    """
    f, k = symmetry_parts(g)
    out = flip_qu(qu, -1) if f else qu
    return rot90_qu(out, k)


def apply_symmetry_eb(eb, g: int):
    """Apply the D4 element ``g`` (0..7) to E/B maps (B changes sign under reflections).

    Parameters
    ----------
    eb : ndarray or torch.Tensor, shape (..., 2, n, n), microkelvin
    g : int
        As in :func:`apply_symmetry_qu`.
    """
    f, k = symmetry_parts(g)
    out = flip_eb(eb, -1) if f else eb
    return rot90_eb(out, k)


def apply_symmetry_scalar(m, g: int):
    """Apply the D4 element ``g`` to scalar maps (T, or per-pixel variances and std maps).

    Parameters
    ----------
    m : ndarray or torch.Tensor, shape (..., n, n)
    g : int

    Notes
    -----
    No sign changes: use this for quantities that are even under reflection, e.g. the
    posterior variance of B (``Var[-B] = Var[B]``).
    """
    _check(m, "m", channels=None)
    f, k = symmetry_parts(g)
    out = _flip(m, -1) if f else m
    out = _rot90(out, k)
    return out.clone() if _is_torch(out) else out.copy()
