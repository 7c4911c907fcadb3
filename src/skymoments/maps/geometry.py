"""Flat periodic patch geometry and its multipole grid."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

ARCMIN = np.pi / (180.0 * 60.0)  # radians per arcmin


@dataclass(frozen=True)
class FlatPatch:
    """A square flat-sky patch of ``npix x npix`` pixels, periodic in both directions.

    Arrays on the patch are indexed ``[row, column] = [y, x]``; the x axis runs along
    columns. Fourier quantities follow ``numpy.fft.fft2`` layout (no shift).

    Parameters
    ----------
    npix : int
        Pixels per side (at least 4).
    pixel_arcmin : float
        Pixel side in arcmin (positive).
    """

    npix: int
    pixel_arcmin: float

    def __post_init__(self) -> None:
        if not isinstance(self.npix, int | np.integer) or self.npix < 4:
            raise ValueError(f"patch.npix must be an integer >= 4, got {self.npix!r}")
        if not np.isfinite(self.pixel_arcmin) or self.pixel_arcmin <= 0:
            raise ValueError(
                f"patch.pixel_arcmin must be a positive number of arcmin, got {self.pixel_arcmin!r}"
            )
        side_deg = self.npix * self.pixel_arcmin / 60.0
        if side_deg > 180.0:
            raise ValueError(
                f"patch of {self.npix} x {self.pixel_arcmin} arcmin = {side_deg:.1f} deg is larger "
                "than the flat-sky approximation allows (at most 180 deg); "
                "use fewer or smaller pixels"
            )

    @property
    def shape(self) -> tuple[int, int]:
        return (self.npix, self.npix)

    @property
    def pixel_rad(self) -> float:
        """Pixel side in radians."""
        return float(self.pixel_arcmin * ARCMIN)

    @property
    def side_rad(self) -> float:
        """Patch side in radians."""
        return self.npix * self.pixel_rad

    @property
    def omega_pix(self) -> float:
        """Pixel solid angle in steradians."""
        return self.pixel_rad**2

    @property
    def area_sr(self) -> float:
        """Patch solid angle in steradians."""
        return self.side_rad**2

    @property
    def ell_fundamental(self) -> float:
        """Spacing of the multipole grid, 2 pi / side."""
        return 2.0 * np.pi / self.side_rad

    @property
    def ell_nyquist(self) -> float:
        """Largest multipole along an axis, pi / pixel."""
        return np.pi / self.pixel_rad

    @cached_property
    def lxly(self) -> tuple[np.ndarray, np.ndarray]:
        """Multipole components ``(lx, ly)``, each shape (npix, npix), fft2 layout."""
        k = 2.0 * np.pi * np.fft.fftfreq(self.npix, d=self.pixel_rad)
        ly, lx = np.meshgrid(k, k, indexing="ij")
        ly.setflags(write=False)
        lx.setflags(write=False)
        return lx, ly

    @cached_property
    def ell(self) -> np.ndarray:
        """Multipole modulus ``|l|``, shape (npix, npix)."""
        lx, ly = self.lxly
        out = np.hypot(lx, ly)
        out.setflags(write=False)
        return out

    @cached_property
    def phi_ell(self) -> np.ndarray:
        """Angle of the multipole vector, ``atan2(ly, lx)``, shape (npix, npix), radians."""
        lx, ly = self.lxly
        out = np.arctan2(ly, lx)
        out.setflags(write=False)
        return out

    def default_bin_edges(self, n_bins: int | None = None) -> np.ndarray:
        """Linear multipole bin edges from the fundamental mode to the Nyquist multipole.

        The first edge sits at half the fundamental so that the ``l = 0`` mode is excluded
        and the first ring of modes is included.
        """
        if n_bins is None:
            n_bins = max(self.npix // 4, 2)
        lo = 0.5 * self.ell_fundamental
        return np.linspace(lo, self.ell_nyquist, n_bins + 1)

    def check_maps(self, maps: np.ndarray, name: str = "maps", channels: int | None = 2) -> None:
        """Raise ValueError unless ``maps`` is finite and shaped (..., channels, npix, npix)."""
        check_maps(maps, self, name=name, channels=channels)


def check_maps(maps, patch: FlatPatch, name: str = "maps", channels: int | None = 2) -> None:
    """Raise a clear ValueError for a wrongly shaped or non-finite batch of patch maps.

    Parameters
    ----------
    maps : ndarray or torch.Tensor, shape (..., channels, npix, npix)
    patch : FlatPatch
    name : str
        How the maps are called in the message.
    channels : int or None
        Expected channel count (2 for Q/U or E/B); None for a scalar map (..., npix, npix).
    """
    shape = tuple(maps.shape)
    want = (
        ("...", channels, patch.npix, patch.npix) if channels else ("...", patch.npix, patch.npix)
    )
    tail = shape[-3:] if channels else shape[-2:]
    expected_tail = (channels, patch.npix, patch.npix) if channels else (patch.npix, patch.npix)
    if len(shape) < len(expected_tail) or tail != expected_tail:
        raise ValueError(
            f"{name} has shape {shape}, expected {want} for a {patch.npix}x{patch.npix} patch"
            + (" with channels (Q, U) or (E, B)" if channels == 2 else "")
        )
    arr = maps.detach().cpu().numpy() if hasattr(maps, "detach") else np.asarray(maps)
    if not np.all(np.isfinite(arr)):
        bad = int(np.size(arr) - np.count_nonzero(np.isfinite(arr)))
        raise ValueError(f"{name} contains {bad} NaN or infinite values; mask or fill them first")
