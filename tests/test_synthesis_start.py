"""The coarse-to-fine start of the synthesis: Fourier resampling and the two-stage run."""

from __future__ import annotations

import numpy as np

from skymoments.synthesis.synthesize import (
    SynthesisSettings,
    coarse_possible,
    fourier_resample,
    replace_low_frequencies,
    synthesize,
)


def test_fourier_resample_keeps_a_band_limited_map_exactly():
    # Analytic: cos(2 pi k u / n) with |k| < m / 2 sampled on the m-grid is the same cosine
    # at every (n / m)-th pixel (Shannon: the map is band-limited below the m-grid Nyquist).
    n, m = 64, 32
    u = np.arange(n)
    x = np.cos(2 * np.pi * 3 * u / n)[:, None] * np.sin(2 * np.pi * 5 * u / n)[None, :] + 0.7
    small = fourier_resample(x[None], m)[0]
    np.testing.assert_allclose(small, x[:: n // m, :: n // m], atol=1e-12)
    # Putting it back under any map's high frequencies restores the band-limited part.
    rng = np.random.default_rng(0)
    noise = rng.standard_normal((n, n))
    back = replace_low_frequencies(noise[None], small[None])[0]
    k = np.fft.fftfreq(n) * n
    low = (np.abs(k)[:, None] < m / 2) & (np.abs(k)[None, :] < m / 2)
    fb, fx, fn = np.fft.fft2(back), np.fft.fft2(x), np.fft.fft2(noise)
    np.testing.assert_allclose(fb[low], fx[low], atol=1e-9)
    np.testing.assert_allclose(fb[~low], fn[~low], atol=1e-9)


def test_coarse_start_applies_only_where_the_half_map_holds_the_scales():
    assert coarse_possible(64, 5) and coarse_possible(32, 3)
    assert not coarse_possible(16, 3)  # an 8-pixel half map is too small
    assert not coarse_possible(64, 2)  # one scale left at half resolution
    assert not coarse_possible(33, 3)  # odd side


def _image(n=32, seed=0):
    rng = np.random.default_rng(seed)
    k = np.hypot(*np.meshgrid(np.fft.fftfreq(n), np.fft.fftfreq(n), indexing="ij"))
    x = np.fft.ifft2(np.fft.fft2(rng.standard_normal((2, n, n))) * np.exp(-((k / 0.1) ** 2))).real
    return x + 0.5 * x**2


def test_coarse_start_runs_both_stages_and_lowers_the_starting_loss():
    img = _image()
    common = dict(n_images=2, batch=2, n_scales=3, n_orientations=2, scale_reach=1, tol=0.0)
    plain = synthesize(img, SynthesisSettings(max_iter=2, start="gaussian", **common), seed=4)
    seen = []
    coarse = synthesize(
        img, SynthesisSettings(max_iter=2, start="coarse", **common), seed=4, progress=seen.append
    )
    # Progress is reported from both stages, the half-resolution one first.
    stages = [d["stage"] for d in seen[:-1]]
    assert stages == ["coarse", "fine"], stages
    assert seen[-1]["stage"] == "done" and seen[-1]["images_done"] == 2
    assert plain.coarse_iterations == [] and coarse.coarse_iterations == [2]
    # The same Gaussian field (the same initial loss) with its large scales already fitted
    # starts the full-resolution stage lower.
    np.testing.assert_allclose(coarse.loss_initial, plain.loss_initial, rtol=1e-6)
    np.testing.assert_array_equal(plain.loss_start, plain.loss_initial)
    assert np.mean(coarse.loss_start) < np.mean(plain.loss_initial)
    assert coarse.images.shape == (2, 2, 32, 32) and np.all(np.isfinite(coarse.images))
