"""Bump steerable wavelets built in Fourier space, with a Gaussian low-pass.

The wavelet of scale ``j`` and orientation ``theta`` is (Mallat, Zhang & Rochette 2018,
arXiv:1810.12136, Sec. 5; Zhang & Mallat 2021, arXiv:1911.10017, Sec. 6: the "bump
steerable" wavelet)

    psi_hat(w) = c * bump(2^j |w|) * cos^(L-1)(arg w - theta) * 1{|arg w - theta| < pi/2},
    bump(r)    = exp(-(r - xi)^2 / (xi^2 - (r - xi)^2)) for 0 < r < 2 xi, else 0,

with ``w`` in radians per pixel on the ``numpy.fft.fftfreq`` grid and ``xi = 0.85 pi`` (the
centre frequency of the finest scale; our choice, see XI0). ``psi_hat`` is real and vanishes on
the half plane opposite to ``theta``, so ``x * psi`` is complex and ``psi_hat(0) = 0``.
The low-pass is a Gaussian ``phi_hat(w) = exp(-|w|^2 / (2 sigma^2))`` with
``sigma = SIGMA_PHI * xi / 2^J`` so that it fills the frequencies below the coarsest
wavelet.

Littlewood-Paley sum. For a real map ``x`` (so ``|x_hat(w)| = |x_hat(-w)|``) and
orientations over ``[0, pi)``,

    sum_lambda ||x * psi_lambda||^2 + ||x * phi||^2 = (1/N) sum_w |x_hat(w)|^2 A(w),
    A(w) = |phi_hat(w)|^2 + 1/2 sum_lambda (|psi_hat_lambda(w)|^2 + |psi_hat_lambda(-w)|^2),

(Parseval; for orientations over ``[0, 2 pi)`` every direction is counted twice and the
sum carries a further 1/2). The bank is scaled so that ``max A = 1``; ``A_min`` over the
plane without ``w = 0`` is then the lower frame bound. The angular part of ``A`` is exactly
constant, because ``sum_l cos^(2m)(phi - l pi / L)`` does not depend on ``phi`` for
``m < L``; only the radial overlap of the dyadic bumps makes ``A`` vary.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import torch

# Centre frequency of the finest wavelet, radians per pixel (our choice: the bump then
# reaches 1.7 pi, so the corners of the Fourier square at sqrt(2) pi keep some weight;
# at 0.75 pi they had none and the lower frame bound was 0).
XI0 = 0.85 * math.pi
# Width of the Gaussian low-pass relative to the coarsest wavelet's centre frequency,
# chosen (scanned 0.6-0.8) so that the Littlewood-Paley sum stays above ~0.45 inside the
# disk |w| < pi; the lowest value, ~0.12, is at the corner (pi, pi) of the plane.
SIGMA_PHI = 0.8
MIN_L, MAX_L = 2, 16
# Filter values below this fraction of the largest are flushed to zero (torch_filters).
FLUSH = 1e-12


@dataclass(frozen=True)
class WaveletBank:
    """Fourier-space filters of a bump steerable wavelet bank.

    Attributes
    ----------
    shape : (int, int)
        Map shape ``(ny, nx)`` in pixels.
    n_scales, n_orientations : int
        Number of dyadic scales (J of the module docstring) and of orientations per half
        turn (L).
    full_angle : bool
        Orientations over ``[0, 2 pi)`` (``2 L`` of them) instead of ``[0, pi)``.
    psi : ndarray, shape (J, n_theta, ny, nx), float64
        Real Fourier-space wavelets, ``fft2`` layout, scale-major.
    phi : ndarray, shape (ny, nx), float64
        Real Fourier-space low-pass.
    thetas : ndarray, shape (n_theta,), radians
    lp_sum : ndarray, shape (ny, nx)
        The Littlewood-Paley sum ``A(w)`` (module docstring).
    """

    shape: tuple[int, int]
    n_scales: int
    n_orientations: int
    full_angle: bool
    psi: np.ndarray
    phi: np.ndarray
    thetas: np.ndarray
    lp_sum: np.ndarray

    @property
    def n_theta(self) -> int:
        return len(self.thetas)

    @property
    def lp_bounds(self) -> tuple[float, float]:
        """(min, max) of the Littlewood-Paley sum over the Fourier plane without ``w = 0``."""
        a = self.lp_sum.copy()
        a[0, 0] = np.nan
        return float(np.nanmin(a)), float(np.nanmax(a))

    def torch_filters(self, device=None, dtype=torch.float32) -> tuple[torch.Tensor, torch.Tensor]:
        """``(psi, phi)`` as real torch tensors of shapes (J, n_theta, ny, nx) and (ny, nx).

        Values below ``FLUSH`` (relative to the largest) are set to zero: the bump's tails
        would otherwise be subnormal numbers in float32, on which CPU arithmetic is one to
        two orders of magnitude slower, while they change no moment measurably.
        """
        out = []
        for a in (self.psi, self.phi):
            a = np.where(np.abs(a) < FLUSH * np.abs(a).max(), 0.0, a)
            out.append(torch.tensor(a, dtype=dtype, device=device))
        return out[0], out[1]


def check_bank_args(shape: tuple[int, int], n_scales: int, n_orientations: int) -> None:
    """Raise ValueError for scales or orientations that the map cannot support."""
    ny, nx = shape
    J, L = n_scales, n_orientations
    if not isinstance(J, int | np.integer) or J < 1:
        raise ValueError(f"n_scales (number of dyadic scales) must be an integer >= 1, got {J!r}")
    if not isinstance(L, int | np.integer) or not MIN_L <= L <= MAX_L:
        # L = 1 would be a half-plane indicator, blind on the line where it switches.
        raise ValueError(
            f"n_orientations (orientations per half turn) must be an integer in "
            f"[{MIN_L}, {MAX_L}], got {L!r}"
        )
    if min(ny, nx) < 2**J:
        raise ValueError(
            f"a {ny}x{nx} map is smaller than 2^n_scales = {2**J} pixels, the size of the "
            f"coarsest wavelet; use n_scales <= {int(np.floor(np.log2(min(ny, nx))))} or a "
            "larger image"
        )


def _aliases(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Two frequency grids for an axis of ``n`` pixels: Nyquist at -pi, and at +pi."""
    a = 2 * np.pi * np.fft.fftfreq(n)
    b = a.copy()
    if n % 2 == 0:
        b[n // 2] = np.pi
    return a, b


def _bump(r: np.ndarray, xi: float) -> np.ndarray:
    out = np.zeros_like(r)
    inside = (r > 0) & (r < 2 * xi)
    d = r[inside] - xi
    out[inside] = np.exp(-(d**2) / (xi**2 - d**2))
    return out


@functools.lru_cache(maxsize=32)
def wavelet_bank(
    shape: tuple[int, int], n_scales: int, n_orientations: int, full_angle: bool = False
) -> WaveletBank:
    """Build (or fetch from the cache) the bank for a map shape.

    Parameters
    ----------
    shape : (int, int)
        Map shape ``(ny, nx)`` in pixels.
    n_scales : int
        Dyadic scales ``j = 0 .. J-1`` (J = n_scales); needs ``2^J <= min(ny, nx)``.
    n_orientations : int
        Orientations ``theta_l = l pi / L`` over ``[0, pi)`` (L = n_orientations),
        2 <= L <= 16.
    full_angle : bool
        Use ``2 L`` orientations over ``[0, 2 pi)``.

    Returns
    -------
    WaveletBank
    """
    shape = (int(shape[0]), int(shape[1]))
    check_bank_args(shape, n_scales, n_orientations)
    J, L = int(n_scales), int(n_orientations)
    ny, nx = shape
    n_theta = 2 * L if full_angle else L
    thetas = np.arange(n_theta) * np.pi / L
    psi2 = np.zeros((J, n_theta, ny, nx))
    # On an even grid the Nyquist frequency is both -pi and +pi. Evaluating the filters at
    # -pi only would leave the Nyquist row and column covered by no wavelet (both w and -w
    # fall in one half plane there), so we average |psi_hat|^2 over the aliases; the
    # Littlewood-Paley sum then stays angle-independent up to the plane's edge.
    for wy1 in _aliases(ny):
        for wx1 in _aliases(nx):
            wy, wx = np.meshgrid(wy1, wx1, indexing="ij")
            r = np.hypot(wx, wy)
            ang = np.arctan2(wy, wx)
            for j in range(J):
                radial = _bump(r * 2.0**j, XI0)
                for t, theta in enumerate(thetas):
                    d = np.angle(np.exp(1j * (ang - theta)))  # wrapped to (-pi, pi]
                    angular = np.where(np.abs(d) < np.pi / 2, np.cos(d) ** (L - 1), 0.0)
                    psi2[j, t] += (radial * angular) ** 2
    psi = np.sqrt(psi2 / 4.0)
    wy, wx = np.meshgrid(_aliases(ny)[0], _aliases(nx)[0], indexing="ij")
    r = np.hypot(wx, wy)
    sigma = SIGMA_PHI * XI0 / 2.0**J
    phi = np.exp(-(r**2) / (2 * sigma**2))
    # psi_hat(-w): index reversal modulo n on both axes.
    psi_neg = np.roll(psi[..., ::-1, ::-1], shift=(1, 1), axis=(-2, -1))
    weight = 0.25 if full_angle else 0.5
    wav = weight * np.sum(psi**2 + psi_neg**2, axis=(0, 1))
    # Scale wavelets and low-pass together so that max A = 1 (a tight-as-possible frame
    # with upper bound 1), the low-pass kept at 1 at w = 0 relative to the wavelets.
    lp = phi**2 + wav
    scale = 1.0 / np.sqrt(lp.max())
    psi *= scale
    phi *= scale
    lp = lp * scale**2
    for a in (psi, phi, lp, thetas):
        a.setflags(write=False)
    return WaveletBank(shape, int(J), int(L), bool(full_angle), psi, phi, thetas, lp)
