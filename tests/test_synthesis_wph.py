"""Wavelet bank and WPH statistics: frame bounds, Parseval, symmetries, gradients."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from skymoments.synthesis.wavelets import wavelet_bank
from skymoments.synthesis.wph import WPHConfig, WPHStatistics


def _smooth_field(rng, n=32, c=2, slope=2.0):
    """A seeded red-spectrum random field (C, n, n), so that every wavelet band has power."""
    k = np.hypot(*np.meshgrid(np.fft.fftfreq(n), np.fft.fftfreq(n), indexing="ij"))
    amp = np.where(k > 0, (k + 1.0 / n) ** (-slope / 2), 0.0)
    white = np.fft.fft2(rng.standard_normal((c, n, n)))
    x = np.fft.ifft2(white * amp).real
    return x + 0.3 * x**2  # a little non-Gaussianity, so higher moments are non-trivial


def _s11_sum(x, J, L):
    """sum over wavelets of <|x * psi|^2> plus <(x * phi - mean)^2>, by direct FFTs."""
    bank = wavelet_bank(x.shape, J, L)
    xf = np.fft.fft2(x - x.mean())
    w = np.fft.ifft2(xf[None, None] * bank.psi)
    low = np.fft.ifft2(xf * bank.phi).real
    return float(np.sum(np.mean(np.abs(w) ** 2, axis=(-2, -1))) + np.mean(low**2))


def test_littlewood_paley_bound_on_plane_waves():
    # A plane wave cos(w.u) has all its power at +-w, so by Parseval the wavelet-plus-low-pass
    # energy over its variance equals the Littlewood-Paley sum A(w) (wavelets.py docstring):
    # this checks the bound against an independent computation of each filter's response.
    n, J, L = 32, 4, 4
    bank = wavelet_bank((n, n), J, L)
    lo, hi = bank.lp_bounds
    yy, xx = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    for ky, kx in [(1, 0), (0, 3), (5, 7), (11, -4), (16, 16), (16, 0), (-9, 13)]:
        wave = np.cos(2 * np.pi * (ky * yy + kx * xx) / n)
        ratio = _s11_sum(wave, J, L) / np.var(wave)
        assert ratio == pytest.approx(bank.lp_sum[ky % n, kx % n], rel=1e-9)
        assert lo - 1e-12 <= ratio <= hi + 1e-12


def test_littlewood_paley_bounds_are_a_frame():
    # The bank is scaled to max A = 1. Inside the disk |w| < pi the dyadic bumps overlap
    # enough to keep A above 0.4 (our design value ~0.45, wavelets.py SIGMA_PHI); the
    # lowest value anywhere is at the corner of the Fourier square and must stay positive
    # (a frame: no frequency is lost).
    for shape, J, L in [((32, 32), 4, 4), ((64, 64), 5, 8), ((64, 64), 5, 4)]:
        bank = wavelet_bank(shape, J, L)
        lo, hi = bank.lp_bounds
        assert hi == pytest.approx(1.0, abs=1e-12)
        assert lo > 0.05
        f = 2 * np.pi * np.fft.fftfreq(shape[0])
        r = np.hypot(*np.meshgrid(f, f, indexing="ij"))
        inner = bank.lp_sum[(r < np.pi) & (r > 0)]
        assert inner.min() > 0.4
        # The angular part is exactly flat (sum_l cos^(2m)(phi - l pi/L) is constant for
        # m < L): on a ring the sum varies only through the discrete grid's radii.
        ring = np.abs(r - 0.5 * np.pi) < 0.02
        assert np.ptp(bank.lp_sum[ring]) < 0.05


def test_s11_sum_matches_variance_within_the_bound(rng):
    # Parseval: sum_lambda wave_power(tau=0) + low-pass variance = (1/N^2) sum_w |x_hat|^2 A(w), so
    # it lies between A_min and A_max times the variance (wavelets.py docstring).
    x = _smooth_field(rng, n=32, c=1)[0]
    J, L = 4, 4
    bank = wavelet_bank(x.shape, J, L)
    lo, hi = bank.lp_bounds
    var = np.var(x)
    wph = WPHStatistics(x.shape, WPHConfig(n_scales=J, n_orientations=L, shift_reach=0), channels=1)
    stats = wph.forward(x[None])  # raw moments (normalization 1 without a reference)
    s11 = sum(float(t[0].real.sum()) for t in stats["wave_power"])  # shift_reach = 0: tau = 0 only
    low = float(stats["lowpass"][1][0].real.sum())  # low-pass variance
    total = s11 + low
    assert total == pytest.approx(_s11_sum(x, J, L), rel=1e-5)  # float32 statistics
    assert lo * var <= total <= hi * var


def test_bank_is_cached_and_checks_its_arguments():
    assert wavelet_bank((32, 32), 3, 4) is wavelet_bank((32, 32), 3, 4)
    with pytest.raises(ValueError, match="smaller than 2\\^n_scales"):
        wavelet_bank((16, 16), 5, 4)
    with pytest.raises(ValueError, match="n_orientations \\(orientations"):
        wavelet_bank((32, 32), 3, 1)
    with pytest.raises(ValueError, match="n_orientations \\(orientations"):
        wavelet_bank((32, 32), 3, 17)
    with pytest.raises(ValueError, match="n_scales \\(number"):
        wavelet_bank((32, 32), 0, 4)
    with pytest.raises(ValueError, match="orientation_reach"):
        WPHConfig(n_scales=3, n_orientations=4, orientation_reach=4).validate((32, 32))


@pytest.fixture(scope="module")
def wph_and_map():
    x = _smooth_field(np.random.default_rng(7), n=32, c=2)
    cfg = WPHConfig(n_scales=4, n_orientations=4, scale_reach=2, orientation_reach=1, shift_reach=1)
    return WPHStatistics((32, 32), cfg, channels=2, reference=x, dtype=torch.float64), x


def test_translation_invariance(wph_and_map):
    # Periodic convolutions commute with whole-pixel shifts and the moments average over
    # positions, so they are exactly invariant (up to float64 round-off).
    wph, x = wph_and_map
    m = wph.moments(x)
    for shift in [(1, 0), (0, 5), (-7, 11), (16, 16)]:
        ms = wph.moments(np.roll(x, shift, axis=(-2, -1)))
        np.testing.assert_allclose(ms.numpy(), m.numpy(), atol=1e-10, rtol=0)


def test_rotation_by_180_degrees(wph_and_map):
    # x(u) -> x(-u) maps W(u) to conj(W(-u)) because psi_hat is real, so every moment goes
    # to conj(M(-tau)) (wph.py docstring). Q and U keep their signs under a 180-degree
    # rotation (spin 2: Q + iU gains e^{2i alpha} = e^{2i pi} = 1).
    wph, x = wph_and_map
    rot = np.roll(x[:, ::-1, ::-1], (1, 1), axis=(-2, -1))  # u -> -u modulo n
    s, sr = wph.forward(x), wph.forward(rot)
    pred = wph.flatten(wph.rotate180(s))
    np.testing.assert_allclose(wph.flatten(sr).numpy(), pred.numpy(), atol=1e-10, rtol=0)
    # The auto-covariance families over half-plane shifts are invariant as they are.
    for fam in ("wave_power", "envelope"):
        for a, b, tag in zip(s[fam], sr[fam], wph._tags[fam], strict=True):
            if tag == "inv":
                np.testing.assert_allclose(b.numpy(), a.numpy(), atol=1e-10, rtol=0)
    # The tau = 0 cross-scale moments keep their modulus (they are conjugated).
    for fam in ("xscale_envelope", "xscale_phase"):
        for a, b in zip(s[fam], sr[fam], strict=True):
            np.testing.assert_allclose(b.abs().numpy(), a.abs().numpy(), atol=1e-10, rtol=0)


def test_target_normalization_and_counts(wph_and_map):
    wph, x = wph_and_map
    s = wph.forward(x)
    # Auto wave_power at tau = 0 of the reference is <|W|^2> / sigma_1^2 = 1 by construction.
    for t in s["wave_power"][::2]:
        np.testing.assert_allclose(t[..., 0].real.numpy(), 1.0, rtol=1e-10)
    counts = wph.count()
    assert counts["total"] == wph.moments(x).shape[1]
    assert counts["total"] == sum(v for k, v in counts.items() if k != "total")
    # envelope_wave: 4 channel pairs x L orientations x (5 shifts at j < 3, 5 at j = 3: 16 px).
    assert counts["envelope_wave"] == 4 * 4 * 5 * 4
    # xscale_phase: (J - 1) + (J - 2) scale pairs x L orientations x 4 channel pairs.
    assert counts["xscale_phase"] == (3 + 2) * 4 * 4


def test_gradcheck_float64_tiny_map():
    # torch.autograd.gradcheck compares the analytic gradient with central differences.
    rng = np.random.default_rng(3)
    ref = _smooth_field(rng, n=8, c=2)
    wph = WPHStatistics(
        (8, 8),
        WPHConfig(n_scales=2, n_orientations=2, scale_reach=1, orientation_reach=1, shift_reach=1),
        2,
        ref,
        dtype=torch.float64,
    )
    x = torch.tensor(_smooth_field(rng, n=8, c=2)[None], dtype=torch.float64, requires_grad=True)

    def f(inp):
        m = wph.moments(inp)
        return torch.cat([m.real, m.imag], dim=1)

    # fast_mode checks a random projection of the Jacobian (the full one costs a backward
    # per output, 30 s with the hand-written backward); the next test checks each family.
    assert torch.autograd.gradcheck(f, (x,), eps=1e-6, atol=1e-5, rtol=1e-4, fast_mode=True)


@pytest.mark.parametrize("channels,full_angle", [(2, False), (1, False), (2, True)])
def test_gradient_of_each_family_matches_finite_differences(channels, full_angle):
    # The wavelet-stack families have a hand-written backward (stack_moments.py). Numerical
    # reference: the central difference (L(x + e v) - L(x - e v)) / 2e of a float64 loss,
    # e = 1e-6 of the map's std, against <grad L, v>, for the loss of each family alone (so
    # that no family hides behind the others) along three random directions; a 1% error in
    # one term of the backward fails it. Three scales chain two harmonic orders ([W]^2,
    # [W]^4); orientation pairs wrap.
    rng = np.random.default_rng(11)
    cfg = WPHConfig(
        n_scales=3, n_orientations=3, scale_reach=2, orientation_reach=1, shift_reach=1,
        full_angle=full_angle,
    )  # fmt: skip
    ref = _smooth_field(rng, 16, channels)
    wph = WPHStatistics((16, 16), cfg, channels, ref, dtype=torch.float64)
    goal = wph.forward(_smooth_field(rng, 16, channels)[None])
    x0 = torch.tensor(_smooth_field(rng, 16, channels)[None], dtype=torch.float64)
    for fam in goal:
        if not goal[fam]:
            continue

        def loss(x, fam=fam):
            got = wph.forward(x)[fam]
            return sum(((a - b).abs() ** 2).sum() for a, b in zip(got, goal[fam], strict=True))

        x = x0.clone().requires_grad_(True)
        loss(x).backward()
        for _ in range(3):
            v = torch.tensor(rng.standard_normal(x0.shape))
            eps = 1e-6 * float(x0.std())
            with torch.no_grad():
                num = (loss(x0 + eps * v) - loss(x0 - eps * v)) / (2 * eps)
            ana = float((x.grad * v).sum())
            assert abs(ana - float(num)) <= 1e-6 * abs(float(num)) + 1e-12, (fam, ana, float(num))


def test_stack_families_match_their_definition(rng):
    # numpy reference: each moment computed from its definition in pixel space,
    # M(tau) = < conj(A(u)) B(u + tau) >_u with np.roll for the shift (module docstring of
    # synthesis/wph.py), [z]^k = |z| exp(i k arg z), raw moments (no reference map).
    n, J, L = 16, 3, 4
    cfg = WPHConfig(n_scales=J, n_orientations=L, scale_reach=2, orientation_reach=1, shift_reach=1)
    wph = WPHStatistics((n, n), cfg, 2, dtype=torch.float64)
    x = _smooth_field(rng, n=n, c=2)
    stats = wph.forward(x[None])
    psi = wavelet_bank((n, n), J, L).psi  # (J, L, n, n)
    w = np.fft.ifft2(np.fft.fft2(x)[:, None, None] * psi)  # (C, J, L, n, n)
    env = np.abs(w) - np.abs(w).mean(axis=(-2, -1), keepdims=True)

    def cov(a, b, tau=(0, 0)):
        return np.mean(np.conj(a) * np.roll(b, (-tau[0], -tau[1]), axis=(-2, -1)))

    def harmonic(z, k):
        return np.abs(z) * np.exp(1j * k * np.angle(z))

    j, t = 1, 2
    taus = wph.shifts_full[j]
    s = 3  # a shift other than 0
    got = stats["envelope_wave"][j][0, 0, 1, t, s].item()  # envelope of Q, coefficient of U
    np.testing.assert_allclose(got, cov(env[0, j, t], w[1, j, t], taus[s]), rtol=1e-10)
    got = stats["envelope"][2 * j][0, 1, t, 1].item()  # U's envelope, half-plane shift 1
    want = cov(env[1, j, t], env[1, j, t], wph.shifts_half[j][1])
    np.testing.assert_allclose(got, want, rtol=1e-10)
    # xscale_envelope block (dj = 1, dl = +1): A0 of Q at (j1, t) with W of U at
    # (j1 + 1, t + 1), the conjugate where t + 1 wraps past pi.
    blk = stats["xscale_envelope"][2]  # dl = -1, 0, +1 for dj = 1
    for t1 in range(L):
        t2 = (t1 + 1) % L
        wb = w[1, 1, t2] if t1 + 1 < L else np.conj(w[1, 1, t2])
        np.testing.assert_allclose(blk[0, 0, 1, 0, t1].item(), cov(env[0, 0, t1], wb), rtol=1e-10)
    # xscale_phase (dj = 2): conj(W_U(j = 0, t)) [W_Q(j = 2, t)]^4.
    got = stats["xscale_phase"][1][0, 1, 0, 0, t].item()
    np.testing.assert_allclose(got, cov(w[1, 0, t], harmonic(w[0, 2, t], 4)), rtol=1e-10)


def test_batch_equals_single(wph_and_map):
    wph, x = wph_and_map
    y = np.stack([x, np.roll(x, 3, axis=-1) ** 2])
    both = wph.moments(y)
    np.testing.assert_allclose(both[1:].numpy(), wph.moments(y[1]).numpy(), atol=1e-12)
