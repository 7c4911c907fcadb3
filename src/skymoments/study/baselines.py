"""The analytic baselines a trained posterior is judged against."""

from __future__ import annotations

import numpy as np
from omegaconf import DictConfig


def baselines(cfg: DictConfig, scenario, image: np.ndarray):
    """The Gaussian-foreground Wiener filter, and the exact posterior where one exists.

    The Wiener filter's foreground power is estimated from the training ``image`` (2, n, n)
    and scaled by the scenario's ``E[a_fg^2]``; where the scenario is all-Gaussian with
    fixed amplitudes, the exact posterior is the Wiener filter of its true spectra.
    """
    from skymoments.calibration.wiener import WienerFilter, estimate_power_2d_from_image

    patch = scenario.patch
    s_ee, s_bb = scenario.mean_signal_power_2d()
    a2 = scenario.prior_second_moment("a_fg")
    noise2d = scenario.mean_noise_power_2d()
    fg_ee, fg_bb = estimate_power_2d_from_image(image, patch)
    # Noise powers are referred to the sky (divided by B_ell^2), so the filters take the beam.
    beam = scenario.beam_2d
    wiener = WienerFilter(
        patch, s_ee, s_bb, a2 * fg_ee + noise2d, a2 * fg_bb + noise2d, beam_2d=beam
    )
    exact = None
    if scenario.is_gaussian_fixed():
        t_ee, t_bb = scenario.true_noise_power_2d()
        exact = WienerFilter(patch, s_ee, s_bb, t_ee, t_bb, beam_2d=beam)
    return wiener, exact
