"""Per-mode Wiener filter on a flat patch: the exact posterior when everything is Gaussian.

Model. Write ``e = fft2(qu_to_eb(d))`` for the Fourier modes of the *real* E/B maps of
the data. The filter assumes that, mode by mode, ``e = t + m`` with the truth ``t`` and
the contamination ``m`` independent, E and B uncorrelated, and

    <|t_k|^2> = S(k) npix^2 / Omega_pix,   <|m_k|^2> = N(k) npix^2 / Omega_pix

(the fft2 normalization of DEVELOPERS.md; ``S``, ``N`` in uK^2, the C_ell convention).
Then per mode (Gaussian conditioning; Elsner & Wandelt 2013, arXiv:1210.4931):

    posterior mean      = S / (S + N) e
    posterior variance  = S N / (S + N)        [C_ell units, uK^2]

and because the posterior covariance is stationary (circulant), its pixel variance is the
same in every pixel; by Parseval it is ``sum_k S N / (S + N) / (npix^2 Omega_pix)``.

The zero mode and the Nyquist lines. The real E/B maps carry nothing at ``l = 0``
(``qu_to_eb`` zeroes it), and on an even patch the Nyquist row/column and corner are
handled by ``maps.eb`` (currently: a unitary sign on the lines, the corner zeroed). Where
the real maps carry nothing, the truth is exactly 0, so the filter sets the posterior to 0
with zero variance there. The power of the real maps on each mode, for the usual ways a
field is made, is given by :func:`realmap_eb_gain`; with it the filter is exact on every
mode (the dense test checks this on an 8 x 8 patch).
"""

from __future__ import annotations

import numpy as np

from skymoments.maps.eb import eb_to_qu, qu_to_eb
from skymoments.maps.geometry import ARCMIN, FlatPatch
from skymoments.maps.spectra import eb_spectra


def realmap_eb_gain(patch: FlatPatch, source: str = "qu") -> np.ndarray:
    """Per-mode power gain of the real-map E/B transform, shape (npix, npix), fft2 layout.

    The power per mode of the real E/B maps ``qu_to_eb(qu)`` is ``g P`` where ``P`` is the
    power of the field the Q/U came from:

    * ``source="qu"``: a Q/U field with independent Q and U of equal power ``P`` (white
      noise, or any field isotropic in Q/U);
    * ``source="eb"``: Q/U made by ``eb_to_qu`` from real E/B fields of power ``P``
      (the round trip ``qu_to_eb(eb_to_qu(.))``).

    ``g`` is measured by pushing unit impulses (flat power at every mode) through
    ``maps.eb`` itself, so it follows whatever that module does on the zero mode and on
    the Nyquist lines of an even patch: 1 where the transform is a rotation, 0 where it
    carries nothing (``l = 0``; the Nyquist corner when ``maps.eb`` zeroes it), and
    ``cos^2 2phi`` (or its square for ``"eb"``) on Nyquist modes where only the cosine part
    survives the real inverse FFT. Pass ``g_eb * S + g_qu * N_white`` to
    :class:`WienerFilter` to make it exact on every mode for such fields.
    """
    if source not in ("qu", "eb"):
        raise ValueError(f"source must be 'qu' or 'eb', got {source!r}")
    probe = np.zeros((2, 2, patch.npix, patch.npix))
    probe[0, 0, 0, 0] = probe[1, 1, 0, 0] = 1.0  # flat |fft2| = 1 in one channel each
    if source == "eb":
        probe = eb_to_qu(probe, patch)
    out = np.fft.fft2(qu_to_eb(probe, patch))
    g = np.sum(np.abs(out) ** 2, axis=(0, 1)) / 2.0
    g[np.abs(g) < 1e-12] = 0.0  # exact zeros where the transform drops a mode
    return g


def white_noise_power_2d(
    patch: FlatPatch, *, sigma_pix_uk: float | None = None, depth_uk_arcmin: float | None = None
) -> np.ndarray:
    """Flat 2-D power (uK^2, C_ell units) of white Q/U noise, shape (npix, npix).

    Give either the per-pixel rms ``sigma_pix_uk`` of Q and of U (then ``C = sigma^2
    Omega_pix``, from the fft2 normalization) or the map depth ``depth_uk_arcmin`` (then
    ``C = (depth * arcmin)^2``, the usual definition of a uK-arcmin depth).
    """
    if (sigma_pix_uk is None) == (depth_uk_arcmin is None):
        raise ValueError("give exactly one of sigma_pix_uk or depth_uk_arcmin for white noise")
    if sigma_pix_uk is not None:
        if not np.isfinite(sigma_pix_uk) or sigma_pix_uk < 0:
            raise ValueError(f"sigma_pix_uk must be >= 0 microkelvin, got {sigma_pix_uk!r}")
        level = sigma_pix_uk**2 * patch.omega_pix
    else:
        if not np.isfinite(depth_uk_arcmin) or depth_uk_arcmin < 0:
            raise ValueError(f"depth_uk_arcmin must be >= 0 uK-arcmin, got {depth_uk_arcmin!r}")
        level = (depth_uk_arcmin * ARCMIN) ** 2
    return np.full(patch.shape, float(level))


def isotropic_power_2d(ell: np.ndarray, cl: np.ndarray, patch: FlatPatch) -> np.ndarray:
    """Interpolate a 1-D spectrum ``C_ell`` onto the patch's fft2 grid of ``|ell|``.

    Parameters
    ----------
    ell : ndarray, shape (L,)
        Increasing multipoles covering ``patch.ell`` up to ``sqrt(2)`` times the Nyquist one.
    cl : ndarray, shape (L,), uK^2
    patch : FlatPatch

    Returns
    -------
    ndarray, shape (npix, npix), uK^2, zero at ``l = 0``.
    """
    ell = np.asarray(ell, dtype=float)
    cl = np.asarray(cl, dtype=float)
    if ell.ndim != 1 or ell.shape != cl.shape or np.any(np.diff(ell) <= 0):
        raise ValueError("ell and cl must be 1-D arrays of the same length with ell increasing")
    if ell[-1] < patch.ell.max():
        raise ValueError(
            f"spectrum stops at ell = {ell[-1]:.0f} but the patch reaches ell = "
            f"{patch.ell.max():.0f}; compute it to a higher lmax"
        )
    out = np.interp(patch.ell, ell, cl)
    out[0, 0] = 0.0
    return out


def _check_power(
    name: str, p: np.ndarray, patch: FlatPatch, what: str = "a 2-D power array in uK^2, C_ell units"
) -> np.ndarray:
    p = np.asarray(p, dtype=np.float64)
    if p.shape != patch.shape:
        raise ValueError(
            f"{name} has shape {p.shape}, expected the patch's fft2 grid {patch.shape} ({what})"
        )
    if not np.all(np.isfinite(p)) or np.any(p < 0):
        raise ValueError(f"{name} must be finite and >= 0 ({what})")
    # A real field's power is even under l -> -l (fft2 index -k mod npix).
    flipped = np.roll(p[::-1, ::-1], 1, axis=(0, 1))
    if not np.allclose(p, flipped, rtol=1e-10, atol=1e-300):
        raise ValueError(
            f"{name} is not symmetric under l -> -l; a real map's power must be (use a "
            "function of |ell|, e.g. isotropic_power_2d)"
        )
    return p


class WienerFilter:
    """Per-mode Wiener filter for E/B given Q/U data (see the module docstring for the model).

    Parameters
    ----------
    patch : FlatPatch
    signal_ee_2d, signal_bb_2d : ndarray, shape (npix, npix), uK^2
        2-D power of the signal E and B on the fft2 grid (C_ell convention).
    noise_ee_2d, noise_bb_2d : ndarray, shape (npix, npix), uK^2
        2-D power of everything else in the data (foreground + instrumental noise),
        referred to the sky: with a beam, the instrumental part is ``N_white / B^2``.
    beam_2d : ndarray, shape (npix, npix), optional
        Beam transfer function ``B`` (fft2 layout, 1 at ``l = 0``) when the data are
        ``B * (signal + foreground) + noise``. The data are deconvolved per mode before
        the weight is applied; ``S / (S + N_fg + N_white / B^2) / B`` equals
        ``B S / (B^2 (S + N_fg) + N_white)``, which is finite as ``B -> 0``; modes with
        ``B = 0`` get weight 0.

    Attributes
    ----------
    weight : ndarray, shape (2, npix, npix)
        ``S / (S + N)`` per mode, E then B (0 where ``S + N = 0``): the transfer function
        from the truth to the posterior mean.
    data_weight : ndarray, shape (2, npix, npix)
        What multiplies the data's modes: ``weight / B`` (``weight`` without a beam).
    mode_variance : ndarray, shape (2, npix, npix), uK^2
        Posterior variance per mode ``S N / (S + N)`` in C_ell units.
    pixel_std : ndarray, shape (2,), microkelvin
        Posterior std of every pixel of E and of B.
    """

    def __init__(self, patch, signal_ee_2d, signal_bb_2d, noise_ee_2d, noise_bb_2d, beam_2d=None):
        self.patch = patch
        s = np.stack(
            [
                _check_power("signal_ee_2d", signal_ee_2d, patch),
                _check_power("signal_bb_2d", signal_bb_2d, patch),
            ]
        )
        n = np.stack(
            [
                _check_power("noise_ee_2d", noise_ee_2d, patch),
                _check_power("noise_bb_2d", noise_bb_2d, patch),
            ]
        )
        # Modes the real E/B maps carry nothing on (l = 0, and the Nyquist corner where
        # maps.eb zeroes it): the truth is exactly 0 there, so the posterior is 0 with no
        # variance.
        carried = realmap_eb_gain(patch) > 0
        s = np.where(carried, s, 0.0)
        tot = s + n
        with np.errstate(invalid="ignore", divide="ignore"):
            self.weight = np.where(tot > 0, s / tot, 0.0)
            self.mode_variance = np.where(tot > 0, s * n / tot, 0.0)
        self.signal_2d = s
        self.noise_2d = n
        if beam_2d is None:
            self.data_weight = self.weight
        else:
            beam = _check_power("beam_2d", beam_2d, patch, "a beam transfer function B_ell")
            with np.errstate(invalid="ignore", divide="ignore"):
                self.data_weight = np.where(beam > 0, self.weight / beam, 0.0)
        # Parseval: pixel variance of a stationary field with per-mode power V (C_ell units)
        # is sum_k V_k / (npix^2 Omega_pix)  (fft2 normalization, DEVELOPERS.md).
        npix2 = patch.npix**2
        self.pixel_std = np.sqrt(self.mode_variance.sum(axis=(-2, -1)) / (npix2 * patch.omega_pix))

    def posterior_eb(self, data_eb) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and std from the real E/B maps of the data.

        Parameters
        ----------
        data_eb : ndarray, shape (..., 2, npix, npix), microkelvin

        Returns
        -------
        mean_eb : ndarray, shape (..., 2, npix, npix), microkelvin
        std_eb : ndarray, shape (..., 2, npix, npix), microkelvin (constant per component)
        """
        data_eb = np.asarray(data_eb, dtype=np.float64)
        self.patch.check_maps(data_eb, "data_eb")
        mean = np.fft.ifft2(self.data_weight * np.fft.fft2(data_eb)).real
        std = np.broadcast_to(self.pixel_std[:, None, None], mean.shape).copy()
        return mean, std

    def posterior(self, data_qu) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and std of the E/B maps from Q/U data.

        Parameters
        ----------
        data_qu : ndarray or torch.Tensor, shape (..., 2, npix, npix), microkelvin

        Returns
        -------
        mean_eb, std_eb : ndarray, shape (..., 2, npix, npix), microkelvin
        """
        if hasattr(data_qu, "detach"):
            data_qu = data_qu.detach().cpu().numpy()
        data_qu = np.asarray(data_qu, dtype=np.float64)
        self.patch.check_maps(data_qu, "data_qu")
        return self.posterior_eb(qu_to_eb(data_qu, self.patch))

    @property
    def transfer_2d(self) -> np.ndarray:
        """The Wiener weight ``S / (S + N)``, shape (2, npix, npix): the filter's T per mode."""
        return self.weight


def estimate_power_2d_from_image(
    qu_images,
    patch: FlatPatch,
    *,
    degree: int = 2,
    n_bins: int = 12,
    window: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Smooth EE and BB 2-D power estimated from one (or a few) Q/U images.

    This is what a user would do to build a Gaussian-foreground Wiener filter from a single
    training image: measure the binned isotropic spectrum, fit a low-order polynomial in
    ``log ell`` to ``log C_ell`` (weighted by the number of modes per bin, since the
    variance of a bin's log-power is about ``1 / n_modes``), and evaluate the fit on the
    fft2 grid of ``|ell|``. The fit keeps the single-image sample variance (about 100 % per
    mode) from imprinting on the filter; a power law is ``degree = 1``.

    Parameters
    ----------
    qu_images : ndarray, shape (2, npix, npix) or (m, 2, npix, npix), microkelvin
        Foreground Q/U image(s); binned spectra are averaged over images.
    patch : FlatPatch
    degree : int
        Polynomial degree of the log-log fit (1 = power law, 2 = a running index).
    n_bins : int
        Logarithmic multipole bins from the fundamental mode to the corner of the grid.
    window : ndarray, shape (npix, npix), optional
        Apodization for a non-periodic image (``maps.spectra.apodization_window``).

    Returns
    -------
    ee_2d, bb_2d : ndarray, shape (npix, npix), uK^2
        Zero at ``l = 0``; outside the fitted range the fit is held at its end values.
    """
    qu = np.asarray(qu_images, dtype=np.float64)
    if qu.ndim == 3:
        qu = qu[None]
    patch.check_maps(qu, "qu_images")
    if qu.ndim != 4:
        raise ValueError(f"qu_images must be (2, npix, npix) or (m, 2, npix, npix), got {qu.shape}")
    if degree < 0 or n_bins < degree + 1:
        raise ValueError(
            f"need degree >= 0 and n_bins > degree, got degree={degree}, n_bins={n_bins}"
        )
    edges = np.geomspace(0.5 * patch.ell_fundamental, 1.001 * patch.ell.max(), n_bins + 1)
    spec = eb_spectra(qu, patch, edges=edges, window=window)
    ell_c = spec["ell"]
    counts = np.histogram(patch.ell.ravel(), bins=edges)[0]
    lell = np.log(np.clip(patch.ell, ell_c[np.isfinite(ell_c)].min(), None))
    out = []
    for key in ("EE", "BB"):
        cl = np.mean(spec[key], axis=0)
        ok = np.isfinite(cl) & (cl > 0) & (counts > 0)
        if np.count_nonzero(ok) < degree + 1:
            raise ValueError(
                f"the image's {key} spectrum has only {np.count_nonzero(ok)} usable bins; "
                "the image is blank or too small for a fit of this degree"
            )
        x = np.log(ell_c[ok])
        coef = np.polyfit(x, np.log(cl[ok]), degree, w=np.sqrt(counts[ok]))
        p2 = np.exp(np.polyval(coef, np.clip(lell, x.min(), x.max())))
        p2[0, 0] = 0.0
        out.append(p2)
    return out[0], out[1]
