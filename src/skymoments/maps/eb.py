"""Q/U <-> E/B on a flat periodic patch by FFT.

Sign convention (ours, stated once here and tested):
with ``phi = atan2(l_y, l_x)`` the angle of the multipole vector, x along columns and
y along rows,

    E(l) =  Q(l) cos 2phi + U(l) sin 2phi
    B(l) = -Q(l) sin 2phi + U(l) cos 2phi

and the inverse ``Q = E cos 2phi - B sin 2phi``, ``U = E sin 2phi + B cos 2phi``. The
``l = 0`` mode carries no E/B and is set to zero in both directions; so is the Nyquist
corner mode of an even-sized patch, and the Nyquist row and column use ``sin 2phi = 0``
(see ``_angles`` for why: it keeps the transform unitary and commuting with the patch
symmetries of ``maps.symmetry``). This is the standard flat-sky relation (Zaldarriaga &
Seljak 1997, Phys. Rev. D 55:1830; from memory). Q and U are measured from the x axis towards the y
axis. On a patch cut by ``maps.healpix.cut_patch`` (rows towards north, columns towards
east, the patch seen from outside the sphere) these E and B agree in sign with healpy's E
and B (tested in tests/test_maps_healpix.py); at the patch centre the patch (Q, U) are
minus HEALPix's COSMO (Q, U), whose angle is measured from south towards east. See
``maps.healpix`` for the rest of the mapping.
"""

from __future__ import annotations

import numpy as np

from skymoments.maps.geometry import FlatPatch


def _angles(patch: FlatPatch) -> tuple[np.ndarray, np.ndarray]:
    """``cos 2phi`` and ``sin 2phi`` on the fft2 grid, with the Nyquist lines made consistent.

    For even ``npix`` the row ``ly = -l_nyq`` is also the row ``ly = +l_nyq`` (the two alias),
    and likewise the column ``lx = -l_nyq``. ``atan2`` picks one alias, which makes the
    transform neither unitary on those modes (the ``.real`` of the inverse FFT silently keeps
    ``cos 2phi`` only) nor commuting with flips and 90-degree rotations. An assignment that is
    the same for both aliases must have ``sin 2phi = 0``; we take ``cos 2phi = -1`` on the
    Nyquist row and ``+1`` on the Nyquist column (the signs ``cos 2phi`` has everywhere on
    them), which keeps the transform unitary. The corner mode ``(l_nyq, l_nyq)`` (a
    checkerboard) changes sign relative to E/B under a 90-degree rotation, so no E/B split of
    it commutes with the rotations: it is zeroed, like ``l = 0``.
    """
    two_phi = 2.0 * patch.phi_ell
    c, s = np.cos(two_phi), np.sin(two_phi)
    if patch.npix % 2 == 0:
        nyq = patch.npix // 2  # fft2 index of the -l_nyq row and column
        c[nyq, :], s[nyq, :] = -1.0, 0.0
        c[:, nyq], s[:, nyq] = 1.0, 0.0
        c[nyq, nyq] = 0.0
    return c, s


def qu_to_eb_fourier(qu: np.ndarray, patch: FlatPatch) -> np.ndarray:
    """Fourier E/B modes of Q/U maps.

    Parameters
    ----------
    qu : ndarray, shape (..., 2, npix, npix), microkelvin
    patch : FlatPatch

    Returns
    -------
    ndarray, complex, shape (..., 2, npix, npix)
        ``numpy.fft.fft2`` of E and B (unnormalized), with the l = 0 mode zeroed.
    """
    qu = np.asarray(qu)
    patch.check_maps(qu, "qu")
    c, s = _angles(patch)
    qf = np.fft.fft2(qu[..., 0, :, :])
    uf = np.fft.fft2(qu[..., 1, :, :])
    ef = qf * c + uf * s
    bf = -qf * s + uf * c
    ef[..., 0, 0] = 0.0
    bf[..., 0, 0] = 0.0
    return np.stack([ef, bf], axis=-3)


def eb_fourier_to_qu(ebf: np.ndarray, patch: FlatPatch) -> np.ndarray:
    """Real Q/U maps, shape (..., 2, npix, npix), from Fourier E/B modes (fft2 layout)."""
    c, s = _angles(patch)
    ef = np.array(ebf[..., 0, :, :], dtype=complex)
    bf = np.array(ebf[..., 1, :, :], dtype=complex)
    ef[..., 0, 0] = 0.0
    bf[..., 0, 0] = 0.0
    q = np.fft.ifft2(ef * c - bf * s).real
    u = np.fft.ifft2(ef * s + bf * c).real
    return np.stack([q, u], axis=-3)


def qu_to_eb(qu: np.ndarray, patch: FlatPatch) -> np.ndarray:
    """E/B maps from Q/U maps on a periodic patch.

    Parameters
    ----------
    qu : ndarray, shape (..., 2, npix, npix), microkelvin
    patch : FlatPatch

    Returns
    -------
    ndarray, shape (..., 2, npix, npix), microkelvin
        Real-space E and B maps (zero mean).
    """
    ebf = qu_to_eb_fourier(qu, patch)
    return np.fft.ifft2(ebf).real


def eb_to_qu(eb: np.ndarray, patch: FlatPatch) -> np.ndarray:
    """Q/U maps from real-space E/B maps, the inverse of :func:`qu_to_eb` (up to the mean).

    Parameters
    ----------
    eb : ndarray, shape (..., 2, npix, npix), microkelvin
    patch : FlatPatch
    """
    eb = np.asarray(eb)
    patch.check_maps(eb, "eb")
    return eb_fourier_to_qu(np.fft.fft2(eb), patch)
