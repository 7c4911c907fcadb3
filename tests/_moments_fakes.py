"""A small all-Gaussian scenario with the Scenario draw API, for the moments tests.

Signal: isotropic Gaussian E and B with power-law spectra; data: the signal's Q/U plus
white noise in Q and U. No CAMB call, so the plumbing tests stay fast; the Wiener check
uses the real ``skymoments.sky`` Scenario. ``amp_range`` draws a per-map signal
amplitude, like a prior on the scenario's amplitudes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from skymoments.maps import FlatPatch, eb_to_qu
from skymoments.sky.gaussian import gaussian_eb
from skymoments.sky.seeds import as_generator


@dataclass
class ToyDraw:
    data_qu: np.ndarray
    target_eb: np.ndarray
    params: np.ndarray
    param_names: tuple


class GaussianToyScenario:
    """``draw(rng, n, as_torch=False) -> ToyDraw``; ``patch``; 2-D spectra in uK^2.

    Parameters
    ----------
    npix, pixel_arcmin : patch geometry
    noise_uk_arcmin : white noise level per Q and U
    amp_range : (low, high) or None
        Uniform range of a per-map signal amplitude (multiplies both spectra); None fixes
        it to 1.
    """

    param_names = ("a_sig",)

    def __init__(self, npix=16, pixel_arcmin=6.0, noise_uk_arcmin=20.0, amp_range=None):
        self.patch = FlatPatch(npix, pixel_arcmin)
        self.noise_uk_arcmin = float(noise_uk_arcmin)
        self.amp_range = amp_range
        ell = self.patch.ell
        # Power law with a knee so the Wiener filter is far from 1 and from 0 across the
        # patch's multipoles: S = N at ell ~ l_eq for E, a factor 2 lower for B.
        arcmin = np.pi / (180 * 60)
        noise = (self.noise_uk_arcmin * arcmin) ** 2
        l_eq = 0.3 * self.patch.ell_nyquist
        with np.errstate(divide="ignore"):
            s = noise * (ell / l_eq) ** -2.0
        s[0, 0] = 0.0
        self._s_ee, self._s_bb, self._noise = s, 0.5 * s, noise

    def mean_signal_power_2d(self):
        """(S_EE, S_BB), each (npix, npix) uK^2 on the fft2 grid, at amplitude 1."""
        return self._s_ee, self._s_bb

    def noise_power_2d(self):
        """White noise power per Q, U (and so per E, B), uK^2."""
        return self._noise

    def draw(self, rng, n, as_torch=False):
        rng = as_generator(rng)
        if self.amp_range is None:
            amp = np.ones(n)
        else:
            amp = rng.uniform(*self.amp_range, size=n)
        eb = gaussian_eb(
            self.patch,
            amp[:, None, None] * self._s_ee,
            amp[:, None, None] * self._s_bb,
            rng,
            n,
        )
        sigma_pix = np.sqrt(self._noise / self.patch.omega_pix)
        data = eb_to_qu(eb, self.patch) + sigma_pix * rng.standard_normal(eb.shape)
        out = ToyDraw(data, eb, amp[:, None], self.param_names)
        if as_torch:
            f = lambda a: torch.as_tensor(a, dtype=torch.float32)  # noqa: E731
            out = ToyDraw(f(data), f(eb), f(amp[:, None]), self.param_names)
        return out
