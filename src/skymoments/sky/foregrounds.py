"""Polarized foreground models: a Gaussian power law, a non-Gaussian filament field, a bank.

Every foreground has a ``name`` and ``draw(patch, rng, n) -> qu`` of shape
(n, 2, npix, npix) in microkelvin at unit amplitude parameter; the Scenario multiplies
each map by its drawn amplitude ``a_fg``. The registry :data:`FOREGROUNDS` maps config
names to classes, and :func:`make_foreground` builds one from a name and keywords.

``amplitude_uk`` means, per model (each chosen to stay meaningful when the patch changes):

* ``gaussian``: ``sqrt(D_ell^EE)`` at ``ell_pivot`` (default 80), with
  ``D_ell = ell (ell + 1) C_ell / 2 pi``: a property of the sky, independent of the patch.
  (On a 64 x 64 patch of 3 arcmin pixels the rms of Q is then close to ``amplitude_uk``.)
* ``filaments``: the rms of Q (equal to that of U) of the stationary field. Filament sizes
  are in arcmin and their number per square degree is fixed, so the field, and with it
  this rms, is the same on any patch larger than a filament.
* ``image_bank``: the images as given (uK), or rescaled to this rms with ``normalize="rms"``.
"""

from __future__ import annotations

import inspect
from pathlib import Path
from typing import Protocol, runtime_checkable

import numpy as np

from skymoments.maps.geometry import FlatPatch
from skymoments.sky.gaussian import gaussian_qu
from skymoments.sky.seeds import as_generator

__all__ = [
    "FOREGROUNDS",
    "Filaments",
    "Foreground",
    "GaussianPowerLaw",
    "ImageBank",
    "make_foreground",
]

# A dust-like polarized power law, the values measured for Galactic dust at high latitude
# by Planck Intermediate Results XXX (A&A 586, A133, 2016, arXiv:1409.5738): C_ell^EE,
# C_ell^BB ~ ell^-2.42 over 40 < ell < 600 and BB/EE = 0.5, amplitudes quoted as D_ell at
# ell = 80 (the pivot multipole recalled from memory).
DUST_LIKE_SLOPE = -2.42
DUST_LIKE_BB_OVER_EE = 0.5
DUST_LIKE_ELL_PIVOT = 80.0


def _check_n(n) -> int:
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
        raise ValueError(f"n (number of maps) must be a positive integer, got {n!r}")
    return int(n)


def _positive(value, name: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not np.isfinite(out) or out <= 0:
        raise ValueError(f"{name} must be a positive number, got {value!r}")
    return out


def _finite(value, name: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not np.isfinite(out):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return out


@runtime_checkable
class Foreground(Protocol):
    """What a Scenario needs from a foreground model."""

    name: str

    def draw(self, patch: FlatPatch, rng, n: int) -> np.ndarray:
        """Q/U maps, shape (n, 2, npix, npix), microkelvin, at unit amplitude parameter."""
        ...


def _qu_variance(patch: FlatPatch, ee2d: np.ndarray, bb2d: np.ndarray) -> float:
    """Expected per-pixel variance of Q (= that of U) of a Gaussian field with these spectra.

    Per mode, Q = E cos 2phi - B sin 2phi (maps/eb.py), so C^QQ = C^EE cos^2 2phi +
    C^BB sin^2 2phi; the pixel variance is sum_k C_k / (N Omega_pix) by Parseval with the
    fft2 normalization <|X_k|^2> = C N / Omega_pix.
    """
    c2 = np.cos(2.0 * patch.phi_ell) ** 2
    cqq = ee2d * c2 + bb2d * (1.0 - c2)
    return float(np.sum(cqq) / (patch.npix**2 * patch.omega_pix))


class GaussianPowerLaw:
    """A Gaussian polarized foreground with power-law EE and BB spectra.

    ``C_ell^EE = C_p (ell / ell_pivot)^alpha_ee`` and ``C_ell^BB = bb_over_ee * C_p
    (ell / ell_pivot)^alpha_bb`` with ``C_p = 2 pi amplitude_uk^2 / (ell_p (ell_p + 1))``,
    i.e. ``D_ell^EE(ell_pivot) = amplitude_uk^2``. Defaults are a dust-like power law, the
    values measured for Galactic dust (Planck Intermediate Results XXX, A&A 586, A133, 2016).

    Parameters
    ----------
    amplitude_uk : float
        ``sqrt(D^EE)`` at the pivot, microkelvin.
    alpha_ee, alpha_bb : float
        Power-law indices of ``C_ell``.
    bb_over_ee : float
        ``C^BB / C^EE`` at the pivot.
    ell_pivot : float
    """

    name = "gaussian"
    is_gaussian = True

    def __init__(
        self,
        amplitude_uk: float = 1.0,
        alpha_ee: float = DUST_LIKE_SLOPE,
        alpha_bb: float = DUST_LIKE_SLOPE,
        bb_over_ee: float = DUST_LIKE_BB_OVER_EE,
        ell_pivot: float = DUST_LIKE_ELL_PIVOT,
    ) -> None:
        self.amplitude_uk = _positive(amplitude_uk, "amplitude_uk")
        self.alpha_ee = _finite(alpha_ee, "alpha_ee")
        self.alpha_bb = _finite(alpha_bb, "alpha_bb")
        self.bb_over_ee = _positive(bb_over_ee, "bb_over_ee")
        self.ell_pivot = _positive(ell_pivot, "ell_pivot")

    def __repr__(self) -> str:
        return (
            f"GaussianPowerLaw(amplitude_uk={self.amplitude_uk}, alpha_ee={self.alpha_ee}, "
            f"alpha_bb={self.alpha_bb}, bb_over_ee={self.bb_over_ee}, ell_pivot={self.ell_pivot})"
        )

    @property
    def cl_pivot(self) -> float:
        """``C_ell^EE`` at the pivot, uK^2."""
        lp = self.ell_pivot
        return 2.0 * np.pi * self.amplitude_uk**2 / (lp * (lp + 1.0))

    def spectra(self, ell) -> dict[str, np.ndarray]:
        """``{"ee": C_ell^EE, "bb": C_ell^BB}`` in uK^2 at ``ell`` (0 where ell <= 0)."""
        ell = np.asarray(ell, dtype=float)
        pos = ell > 0
        x = np.where(pos, ell, 1.0) / self.ell_pivot
        ee = np.where(pos, self.cl_pivot * x**self.alpha_ee, 0.0)
        bb = np.where(pos, self.bb_over_ee * self.cl_pivot * x**self.alpha_bb, 0.0)
        return {"ee": ee, "bb": bb}

    def power_2d(self, patch: FlatPatch) -> tuple[np.ndarray, np.ndarray]:
        """EE and BB spectra on the patch's 2-D multipole grid, each (npix, npix), uK^2."""
        s = self.spectra(patch.ell)
        return s["ee"], s["bb"]

    def qu_rms(self, patch: FlatPatch) -> float:
        """Expected rms of Q (= of U) on ``patch``, microkelvin."""
        return float(np.sqrt(_qu_variance(patch, *self.power_2d(patch))))

    def draw(self, patch: FlatPatch, rng, n: int) -> np.ndarray:
        """Gaussian Q/U maps, shape (n, 2, npix, npix), microkelvin."""
        ee, bb = self.power_2d(patch)
        return gaussian_qu(patch, ee, bb, as_generator(rng), _check_n(n))


# The patch on which Filaments' default number of filaments is stated: 64 x 64 pixels of
# 3 arcmin, 3.2 deg on a side.
_REFERENCE_AREA_DEG2 = (64 * 3.0 / 60.0) ** 2
# Narrower filaments than this (in pixels, Gaussian sigma) are not resolved by the grid.
_MIN_SIGMA_PIX = 0.75


def _filament_energy(chord: float, bend: np.ndarray, s: float) -> np.ndarray:
    """Expected sum_x Q(x)^2 of one unit-intensity filament, random orientation, in pixels^2.

    The filament is z(x) = int exp(2i chi(t)) K(x - c(t)) |c'(t)| dt with K(r) =
    exp(-r^2 / 2 s^2) / (sqrt(2 pi) s) (cross-section peak 1). Since K * K(r) =
    exp(-r^2 / 4 s^2) / 2 (convolution of Gaussians), Parseval gives

        sum_x |z|^2 = 1/2 int int cos(2 (psi(t) - psi(t'))) exp(-|c(t) - c(t')|^2 / 4 s^2)
                      |c'(t)| |c'(t')| dt dt',

    and a uniformly random overall angle puts half of it in Q. The double integral is
    done by the midpoint rule on a grid finer than s / 4 along the curve (the integrand
    is smooth on that scale). For a straight segment it reduces to
    s sqrt(pi) L erf(L / 2s) - 2 s^2 (1 - exp(-L^2 / 4 s^2)) (checked in the tests).

    Parameters
    ----------
    chord : float
        Chord length, pixels.
    bend : ndarray, shape (m,)
        Control-point offsets in units of the chord.
    s : float
        Gaussian sigma of the cross-section, pixels.

    Returns
    -------
    ndarray, shape (m,)
    """
    bend = np.asarray(bend, dtype=float)
    arc = chord * float(np.max(_bezier_arc_factor(bend))) if bend.size else chord
    n_q = int(np.ceil(4.0 * arc / s)) + 8
    t = (np.arange(n_q) + 0.5) / n_q
    # Bezier P0 = (0, 0), P1 = (L/2, h L), P2 = (L, 0): c(t) and c'(t).
    cx = chord * t
    cy = chord * bend[:, None] * 2.0 * t * (1.0 - t)
    dx = np.full_like(t, chord)
    dy = chord * bend[:, None] * 2.0 * (1.0 - 2.0 * t)
    speed = np.hypot(dx, dy)
    e2 = (dx + 1j * dy) ** 2 / speed**2  # exp(2i psi)
    dist2 = (cx[None, :, None] - cx[None, None, :]) ** 2 + (cy[:, :, None] - cy[:, None, :]) ** 2
    cos2 = (e2[:, :, None] * np.conj(e2[:, None, :])).real
    w = speed / n_q
    integrand = cos2 * np.exp(-dist2 / (4.0 * s**2)) * w[:, :, None] * w[:, None, :]
    return 0.25 * integrand.sum(axis=(1, 2))


def _straight_energy(length, s: float):
    """Closed form of ``2 * _filament_energy`` for a straight segment (sum_x p^2)."""
    from scipy.special import erf

    length = np.asarray(length, dtype=float)
    return s * np.sqrt(np.pi) * length * erf(length / (2 * s)) - 2 * s**2 * (
        1 - np.exp(-(length**2) / (4 * s**2))
    )


def _bezier_arc_factor(h: np.ndarray) -> np.ndarray:
    """Arc length over chord of a quadratic Bezier whose control point is offset by h * chord.

    P0 = (0, 0), P2 = (1, 0), P1 = (1/2, h): |P'(t)| = 2 sqrt(1/4 + h^2 (1 - 2t)^2),
    integrated by 48-point Gauss-Legendre quadrature (smooth integrand, exact to round-off).
    """
    t, w = np.polynomial.legendre.leggauss(48)
    t = 0.5 * (t + 1.0)
    w = 0.5 * w
    speed = 2.0 * np.sqrt(0.25 + (np.asarray(h)[..., None] * (1.0 - 2.0 * t)) ** 2)
    return np.sum(speed * w, axis=-1)


class Filaments:
    """A non-Gaussian polarized field of curved filaments (our own demo generator).

    Each filament is a quadratic Bezier curve with a Gaussian cross-section, placed at a
    uniformly random position and direction on the periodic patch. Its polarization is
    tied to its local direction psi, as for dust whose grains align with a magnetic field
    running along the filament: ``Q + iU = I exp(2i (psi + pi/2 + delta))``, the
    polarization perpendicular to the filament (Planck Intermediate Results XXXII,
    arXiv:1409.6728, find the field mostly along dust filaments; memory) up to a random
    misalignment ``delta`` per filament. Perpendicular polarization makes a straight
    filament pure E, so misalignment, curvature and ends create the B power, and EE > BB.
    Intensities are lognormal; the number of filaments is Poisson.

    Rendering is vectorized: points sampled every <= 1 profile sigma along every filament of
    every map are deposited with cloud-in-cell weights, and one FFT per map convolves them
    with the Gaussian profile and divides out the cloud-in-cell window (Hockney &
    Eastwood 1988, "Computer simulation using particles", the CIC assignment function).

    Parameters
    ----------
    amplitude_uk : float
        rms of Q (and of U) of the whole field, filaments plus diffuse part, microkelvin.
    n_filaments : float
        Mean number of filaments on a 3.2 x 3.2 deg patch (64 x 64 pixels of 3 arcmin);
        other patches get the same number per square degree.
    length_arcmin : (float, float)
        Range of chord lengths, drawn log-uniformly, arcmin.
    width_arcmin : float
        FWHM of the cross-section, arcmin (never below 1.77 pixels, the grid's resolution).
    curvature : float
        Control-point offset from the chord's midpoint, in units of the chord, drawn
        uniformly in [-curvature, curvature]; 0 gives straight filaments.
    sigma_ln : float
        Standard deviation of ln(intensity).
    misalignment_deg : float
        Standard deviation of the polarization angle about the perpendicular, degrees.
    diffuse_fraction : float
        Fraction in [0, 1) of the Q variance given to a faint Gaussian diffuse component
        with the dust-like spectrum (:class:`GaussianPowerLaw` shape).
    """

    name = "filaments"
    is_gaussian = False

    def __init__(
        self,
        amplitude_uk: float = 1.0,
        n_filaments: float = 150.0,
        length_arcmin=(12.0, 60.0),
        width_arcmin: float = 7.0,
        curvature: float = 0.3,
        sigma_ln: float = 0.8,
        misalignment_deg: float = 15.0,
        diffuse_fraction: float = 0.1,
    ) -> None:
        self.amplitude_uk = _positive(amplitude_uk, "amplitude_uk")
        self.n_filaments = _positive(n_filaments, "n_filaments")
        try:
            lo, hi = (float(v) for v in length_arcmin)
        except (TypeError, ValueError):
            raise ValueError(
                f"length_arcmin must be a pair (min, max) of arcmin, got {length_arcmin!r}"
            ) from None
        if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo <= hi):
            raise ValueError(f"length_arcmin must satisfy 0 < min <= max, got {length_arcmin!r}")
        self.length_arcmin = (lo, hi)
        self.width_arcmin = _positive(width_arcmin, "width_arcmin")
        self.curvature = _finite(curvature, "curvature")
        if self.curvature < 0:
            raise ValueError(f"curvature must be >= 0, got {curvature!r}")
        self.sigma_ln = _finite(sigma_ln, "sigma_ln")
        if self.sigma_ln < 0:
            raise ValueError(f"sigma_ln must be >= 0, got {sigma_ln!r}")
        self.misalignment_deg = _finite(misalignment_deg, "misalignment_deg")
        if self.misalignment_deg < 0:
            raise ValueError(f"misalignment_deg must be >= 0, got {misalignment_deg!r}")
        self.diffuse_fraction = _finite(diffuse_fraction, "diffuse_fraction")
        if not 0 <= self.diffuse_fraction < 1:
            raise ValueError(f"diffuse_fraction must be in [0, 1), got {diffuse_fraction!r}")
        self._diffuse = GaussianPowerLaw()
        self._setup: dict[FlatPatch, dict] = {}

    def __repr__(self) -> str:
        return (
            f"Filaments(amplitude_uk={self.amplitude_uk}, n_filaments={self.n_filaments}, "
            f"length_arcmin={self.length_arcmin}, width_arcmin={self.width_arcmin}, "
            f"curvature={self.curvature}, sigma_ln={self.sigma_ln}, "
            f"misalignment_deg={self.misalignment_deg}, diffuse_fraction={self.diffuse_fraction})"
        )

    def mean_count(self, patch: FlatPatch) -> float:
        """Expected number of filaments on ``patch``."""
        area = (patch.npix * patch.pixel_arcmin / 60.0) ** 2
        return self.n_filaments * area / _REFERENCE_AREA_DEG2

    def sigma_pix(self, patch: FlatPatch) -> float:
        """Gaussian sigma of the cross-section in pixels, after the resolution floor."""
        s = self.width_arcmin / np.sqrt(8.0 * np.log(2.0)) / patch.pixel_arcmin
        return max(s, _MIN_SIGMA_PIX)

    def _prepare(self, patch: FlatPatch) -> dict:
        cached = self._setup.get(patch)
        if cached is not None:
            return cached
        s = self.sigma_pix(patch)
        lmin, lmax = (v / patch.pixel_arcmin for v in self.length_arcmin)
        # E[sum_x Q^2] of one filament over the length (log-uniform) and bend (uniform)
        # distributions, by Gauss-Legendre quadrature over both.
        x, wx = np.polynomial.legendre.leggauss(16)
        u = 0.5 * (x + 1.0)
        chords = np.exp(np.log(lmin) + u * np.log(lmax / lmin))
        bends = self.curvature * x
        energy = sum(
            0.5 * wl * np.sum(0.5 * wx * _filament_energy(L, bends, s))
            for L, wl in zip(chords, wx, strict=True)
        )
        mu = self.mean_count(patch)
        # E[Q^2] = (mu / Npix) E[A^2] E[sum_x Q_unit^2] with E[A^2] = exp(2 sigma_ln^2)
        # (lognormal); different filaments have independent angles, so no cross terms.
        var_unit = mu / patch.npix**2 * np.exp(2.0 * self.sigma_ln**2) * energy
        scale = self.amplitude_uk * np.sqrt((1.0 - self.diffuse_fraction) / var_unit)
        k = 2.0 * np.pi * np.fft.fftfreq(patch.npix)  # radians per pixel
        ky, kx = np.meshgrid(k, k, indexing="ij")
        kernel = np.sqrt(2.0 * np.pi) * s * np.exp(-0.5 * (kx**2 + ky**2) * s**2)
        cic = (np.sinc(kx / (2 * np.pi)) * np.sinc(ky / (2 * np.pi))) ** 2
        # Points at most one profile sigma apart along the curve (its speed |P'(t)| peaks
        # at chord * sqrt(1 + 4 h^2)): after the Gaussian smoothing, the ripple of a chain
        # of points spaced d apart is ~exp(-2 pi^2 s^2 / d^2) < 3e-9 of the mean (Poisson
        # summation), so the chain is a continuous filament.
        n_t = int(np.ceil(lmax * np.sqrt(1.0 + 4.0 * self.curvature**2) / s)) + 2
        setup = {
            "filter": kernel / cic * scale,
            "n_t": n_t,
            "lmin": lmin,
            "lmax": lmax,
            "mu": mu,
        }
        if self.diffuse_fraction > 0:
            ee, bb = self._diffuse.power_2d(patch)
            var_d = _qu_variance(patch, ee, bb)
            f = self.diffuse_fraction * self.amplitude_uk**2 / var_d
            setup["diffuse"] = (ee * f, bb * f)
        self._setup[patch] = setup
        return setup

    def draw(self, patch: FlatPatch, rng, n: int) -> np.ndarray:
        """Filament Q/U maps, shape (n, 2, npix, npix), microkelvin, at unit amplitude parameter."""
        n = _check_n(n)
        rng = as_generator(rng)
        st = self._prepare(patch)
        npix = patch.npix
        counts = rng.poisson(st["mu"], size=n)
        total = int(counts.sum())
        owner = np.repeat(np.arange(n), counts)
        p0 = rng.uniform(0.0, npix, size=(total, 2))  # (x, y) in pixels
        psi0 = rng.uniform(0.0, 2.0 * np.pi, size=total)
        chord = np.exp(rng.uniform(np.log(st["lmin"]), np.log(st["lmax"]), size=total))
        bend = rng.uniform(-self.curvature, self.curvature, size=total)
        amp = np.exp(self.sigma_ln * rng.standard_normal(total))
        delta = np.deg2rad(self.misalignment_deg) * rng.standard_normal(total)

        along = np.stack([np.cos(psi0), np.sin(psi0)], axis=-1) * chord[:, None]
        perp = np.stack([-along[:, 1], along[:, 0]], axis=-1)
        p2 = p0 + along
        p1 = p0 + 0.5 * along + bend[:, None] * perp
        n_t = st["n_t"]
        t = (np.arange(n_t) + 0.5) / n_t  # midpoint rule in t
        a, b, c = (1 - t) ** 2, 2 * (1 - t) * t, t**2
        pts = (
            a[None, :, None] * p0[:, None]
            + b[None, :, None] * p1[:, None]
            + c[None, :, None] * p2[:, None]
        )
        # P'(t) = 2 (1 - t)(P1 - P0) + 2 t (P2 - P1)
        d = (
            2 * (1 - t)[None, :, None] * (p1 - p0)[:, None]
            + 2 * t[None, :, None] * (p2 - p1)[:, None]
        )
        tangent = d[..., 0] + 1j * d[..., 1]
        speed = np.abs(tangent)
        # exp(2i psi) = tangent^2 / |tangent|^2; exp(2i (psi + pi/2)) = -exp(2i psi).
        rot = (-amp * np.exp(2j * delta))[:, None]
        weight = rot * tangent**2 / np.maximum(speed, 1e-300) / n_t  # |P'| dt * exp(2i chi)

        x = pts[..., 0].ravel()
        y = pts[..., 1].ravel()
        w = weight.ravel()
        base = np.repeat(owner, n_t) * npix * npix
        ix = np.floor(x)
        iy = np.floor(y)
        fx = x - ix
        fy = y - iy
        ix = ix.astype(np.int64) % npix
        iy = iy.astype(np.int64) % npix
        jx = (ix + 1) % npix
        jy = (iy + 1) % npix
        idx = np.concatenate(
            [
                base + iy * npix + ix,
                base + iy * npix + jx,
                base + jy * npix + ix,
                base + jy * npix + jx,
            ]
        )
        cw = np.concatenate([(1 - fx) * (1 - fy), fx * (1 - fy), (1 - fx) * fy, fx * fy])
        ww = np.tile(w, 4) * cw
        size = n * npix * npix
        grid = np.bincount(idx, weights=ww.real, minlength=size) + 1j * np.bincount(
            idx, weights=ww.imag, minlength=size
        )
        grid = grid.reshape(n, npix, npix)
        z = np.fft.ifft2(np.fft.fft2(grid) * st["filter"])
        qu = np.stack([z.real, z.imag], axis=1)
        if "diffuse" in st:
            qu += gaussian_qu(patch, *st["diffuse"], rng, n)
        return qu


def _load_images(images) -> np.ndarray:
    if isinstance(images, str | Path):
        path = Path(images).expanduser()
        if not path.is_file():
            raise ValueError(f"image bank file {path} does not exist")
        with np.load(path, allow_pickle=False) as data:
            if "images" not in data:
                raise ValueError(
                    f"{path} has no 'images' array (keys: {', '.join(data.files)}); a bank is an "
                    ".npz with images shaped (M, 2, n, n)"
                )
            return np.array(data["images"], dtype=np.float64)
    return np.array(images, dtype=np.float64)


class ImageBank:
    """Foreground maps drawn at random from a fixed set of images.

    Used for training on a synthesized bank, or on the single training image. Each map is
    a uniformly chosen image, then

    * with ``translations``: a window of the patch size at a uniformly random offset. A
      ``periodic`` image (a synthesized map, a draw of a periodic generator) is read with
      wrap-around, so every one of its ``n^2`` whole-pixel translations is used: a
      translation is an exact symmetry of a stationary periodic field, as the rotations and
      reflections are. A non-periodic image (a cut of the real sky) has a seam at its
      edge, so its windows lie inside it: offsets in ``[0, n - npix]`` per axis, none for an
      image of the patch size. Without translations the window is the image's corner
      ``[0:npix, 0:npix]``;
    * with ``symmetries``: transformed by a uniformly chosen element of the square's
      symmetry group (4 rotations x 2 reflections, done spin-2-correctly by
      ``maps.symmetry.apply_symmetry_qu``).

    An image may be larger than the patch (one image covering several patch areas, as a
    real foreground template would).

    Parameters
    ----------
    images : ndarray, shape (M, 2, n, n), microkelvin, or a path to an .npz with ``images``
        (Q, U) images; an (2, n, n) array is taken as one image.
    symmetries : bool
        Apply a random D4 symmetry per draw.
    normalize : {None, "rms"}
        None keeps the images as given; "rms" rescales the whole bank by one factor so
        that its rms of Q and U over all images and pixels is ``amplitude_uk``.
    amplitude_uk : float, optional
        Target rms for ``normalize="rms"`` (default 1).
    translations : bool
        Random whole-pixel translations (windows) per draw.
    periodic : bool
        Whether the images are periodic (see above).
    """

    name = "image_bank"
    is_gaussian = False

    def __init__(
        self,
        images,
        symmetries: bool = True,
        normalize: str | None = None,
        amplitude_uk: float | None = None,
        translations: bool = False,
        periodic: bool = True,
    ) -> None:
        arr = _load_images(images)
        if arr.ndim == 3:
            arr = arr[None]
        if arr.ndim != 4 or arr.shape[1] != 2 or arr.shape[2] != arr.shape[3] or arr.shape[0] < 1:
            raise ValueError(
                f"images has shape {arr.shape}, expected (M, 2, n, n): M >= 1 square (Q, U) images"
            )
        if not np.all(np.isfinite(arr)):
            bad = int(arr.size - np.count_nonzero(np.isfinite(arr)))
            raise ValueError(f"images contain {bad} NaN or infinite values; clean the bank first")
        if normalize not in (None, "none", "rms"):
            raise ValueError(f"normalize={normalize!r}; choose None or 'rms'")
        if normalize == "rms":
            target = 1.0 if amplitude_uk is None else _positive(amplitude_uk, "amplitude_uk")
            rms = float(np.sqrt(np.mean(arr**2)))
            if rms == 0:
                raise ValueError("images are all zero; cannot normalize them to an rms")
            arr = arr * (target / rms)
        elif amplitude_uk is not None:
            raise ValueError("amplitude_uk is used only with normalize='rms'")
        arr.setflags(write=False)
        self._images = arr
        self.symmetries = bool(symmetries)
        self.normalize = None if normalize == "none" else normalize
        self.translations = bool(translations)
        self.periodic = bool(periodic)

    def __repr__(self) -> str:
        return (
            f"ImageBank({len(self)} images of {self.npix}x{self.npix}, "
            f"symmetries={self.symmetries}, translations={self.translations}, "
            f"periodic={self.periodic}, normalize={self.normalize!r})"
        )

    def __len__(self) -> int:
        return int(self._images.shape[0])

    @property
    def images(self) -> np.ndarray:
        """The bank, shape (M, 2, n, n), microkelvin (read-only)."""
        return self._images

    @property
    def npix(self) -> int:
        return int(self._images.shape[-1])

    def subset(self, indices) -> ImageBank:
        """A bank of the images at ``indices``, with the same draw settings."""
        idx = np.asarray(indices, dtype=int)
        return ImageBank(
            self._images[idx],
            symmetries=self.symmetries,
            translations=self.translations,
            periodic=self.periodic,
        )

    def split(self, n_second: int, what: str = "the bank") -> tuple[ImageBank, ImageBank]:
        """Two banks of disjoint images: the first ``M - n_second`` and the last ``n_second``.

        Raises
        ------
        ValueError
            When either part would be empty; the message says how many images are needed.
        """
        if isinstance(n_second, bool) or not isinstance(n_second, int | np.integer):
            raise ValueError(
                f"the number of images to split off must be an integer, got {n_second!r}"
            )
        n_second = int(n_second)
        if n_second < 1 or len(self) < n_second + 1:
            need = max(n_second, 1) + 1
            raise ValueError(
                f"{what} holds {len(self)} image(s), too few to give {max(n_second, 1)} to the "
                f"variance stage and at least 1 to the mean stage: it needs at least {need} "
                f"images (raise synthesis.n_images to {need - 1} or more, or lower "
                "augment.var_images)"
            )
        cut = len(self) - n_second
        return self.subset(range(cut)), self.subset(range(cut, len(self)))

    def _windows(self, patch: FlatPatch, rng, pick: np.ndarray) -> np.ndarray:
        n_img, npix = self.npix, patch.npix
        if not self.translations:
            return self._images[pick][..., :npix, :npix].copy()
        if self.periodic:
            oy = rng.integers(n_img, size=len(pick))
            ox = rng.integers(n_img, size=len(pick))
        else:
            oy = rng.integers(n_img - npix + 1, size=len(pick))
            ox = rng.integers(n_img - npix + 1, size=len(pick))
        rows = (oy[:, None] + np.arange(npix)[None, :]) % n_img  # (n, npix)
        cols = (ox[:, None] + np.arange(npix)[None, :]) % n_img
        imgs = self._images[pick]  # (n, 2, n_img, n_img)
        k = np.arange(len(pick))[:, None, None, None]
        c = np.arange(2)[None, :, None, None]
        return imgs[k, c, rows[:, None, :, None], cols[:, None, None, :]]

    def draw(self, patch: FlatPatch, rng, n: int) -> np.ndarray:
        """Random windows of random images (each under a random D4 symmetry), uK.

        Shape (n, 2, npix, npix).
        """
        n = _check_n(n)
        if self.npix < patch.npix or (self.npix != patch.npix and not self.translations):
            raise ValueError(
                f"the image bank holds {self.npix}x{self.npix} images but the patch is "
                f"{patch.npix}x{patch.npix}; synthesize or cut images at the patch size"
                + (" (or larger, with translations)" if self.npix < patch.npix else "")
                + ("" if self.npix < patch.npix else ", or enable translations")
            )
        rng = as_generator(rng)
        pick = rng.integers(len(self), size=n)
        out = self._windows(patch, rng, pick)
        if self.symmetries:
            from skymoments.maps.symmetry import N_SYMMETRIES, apply_symmetry_qu

            g = rng.integers(N_SYMMETRIES, size=n)
            for gi in np.unique(g):
                sel = g == gi
                out[sel] = apply_symmetry_qu(out[sel], int(gi))
        return out


FOREGROUNDS: dict[str, type] = {
    GaussianPowerLaw.name: GaussianPowerLaw,
    Filaments.name: Filaments,
    ImageBank.name: ImageBank,
}


def make_foreground(name: str, **kwargs):
    """Build a registered foreground by name.

    Parameters
    ----------
    name : str
        A key of :data:`FOREGROUNDS`.
    **kwargs
        Constructor keywords of that model.

    Raises
    ------
    ValueError
        Unknown name (the message lists the known ones) or keyword.
    """
    if name not in FOREGROUNDS:
        raise ValueError(
            f"unknown foreground {name!r}; choose one of: {', '.join(sorted(FOREGROUNDS))}"
        )
    cls = FOREGROUNDS[name]
    params = inspect.signature(cls.__init__).parameters
    known = [p for p in params if p != "self"]
    unknown = sorted(set(kwargs) - set(known))
    if unknown:
        raise ValueError(
            f"foreground {name!r} does not take {', '.join(unknown)}; its keys are: "
            f"{', '.join(known)}"
        )
    return cls(**kwargs)
