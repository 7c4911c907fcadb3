"""Wavelet phase harmonic (WPH) statistics of batches of one- or two-channel maps, in torch.

Phase harmonics. For a complex wavelet coefficient ``z = (x * psi_lambda)(u)`` the phase
harmonic of order ``k`` is ``[z]^k = |z| exp(i k arg z)`` (Mallat, Zhang & Rochette 2018,
arXiv:1810.12136, eq. 1), so ``[z]^0 = |z|`` and ``[z]^1 = z``. Raising the phase to the
power ``k`` moves the frequency of a coarse-scale coefficient up by ``k``, which makes
coefficients of different scales correlated when the field has coherent structures.

Moments. Each statistic is a covariance of two phase-harmonic maps at a spatial shift
``tau`` (Zhang & Mallat 2021, arXiv:1911.10017, eq. 5; Allys et al. 2020, arXiv:2006.06298,
Sec. 3),

    M(tau) = < conj([x_a * psi_1]^k1(u) - mean) ([x_b * psi_2]^k2(u + tau) - mean) >_u,

for channels ``a, b`` (Q and U, or E and B). The families and the index sets are named
for what they measure; the table maps each name to the symbol of Allys et al. 2020
(Phys. Rev. D 102, 103506, arXiv:2006.06298, Sec. 3.2) and Regaldo-Saint Blancard et al.
(arXiv:2102.03160, Sec. 3; arXiv:2208.03538, Sec. 2):

==================== ============ =====================================================
name                 paper symbol what it is
==================== ============ =====================================================
``wave_power``       S^(1,1)      k1 = k2 = 1, same wavelet: the power spectrum at the
                                  wavelet's resolution, with shifts ``tau`` (below)
``envelope``         S^(0,0)      k1 = k2 = 0, same wavelet: correlations of the
                                  envelopes ``|W|`` (sparsity)
``envelope_wave``    S^(0,1)      k1 = 0, k2 = 1, same wavelet: envelope-coefficient
                                  correlation
``xscale_envelope``  C^(0,1)      k1 = 0 at ``j1``, k2 = 1 at ``j1 < j2 <= j1 +
                                  scale_reach``, orientations within
                                  ``orientation_reach`` steps, tau = 0
``xscale_phase``     C^phase      k1 = 1 at ``j1``, k2 = 2^(j2 - j1) at ``j2 = j1 + 1 ..
                                  j1 + scale_reach``, same orientation, tau = 0: the
                                  phase alignment across scales
``lowpass``          L            scaling-function moments: the channel means, the
                                  covariance of the low-passed maps, and (our addition)
                                  the one-point moments ``<|y - mean|^p>``, p = 1, 3, of
                                  each channel and of ``|P|`` (the histogram's width and
                                  tails)
``spectrum``         (none)       our addition (off with ``spectrum_bins=0``): the power
                                  in ``n // 4`` linear annuli of ``|w|`` of E, B and
                                  E x B for two channels (of the map for one)
``n_scales``         J            dyadic scales ``j = 0 .. J - 1``
``n_orientations``   L            orientations over ``[0, pi)``
``shift_reach``      Delta_n      largest ``|v|`` of the shifts ``tau = 2^j v``
``scale_reach``      Delta_j      largest ``j2 - j1`` of the cross-scale families
``orientation_reach`` Delta_l     largest orientation offset of ``xscale_envelope``
==================== ============ =====================================================

``wave_power`` pins the spectrum only at the wavelets' dyadic resolution (plus shifts); a
per-bin spectrum within a few percent needs the finer second-order ``spectrum`` moments
(annuli as the project's default spectrum bins, ``FlatPatch.default_bin_edges``; E/B as in
``maps/eb.py``).

For two channels every family is computed for all channel pairs (Q-Q, U-U, Q-U and, for the
non-symmetric families, U-Q), which keeps the QQ, UU and QU power, hence EE, BB and EB, and
the dependence between Q and U.

Shifts. ``tau = 2^j v`` for integer vectors ``|v| <= shift_reach`` (the shift grows with the
wavelet's size, as in arXiv:2006.06298, Sec. 3.2), dropping those that reach half the map.
For an auto-covariance ``M(-tau) = conj(M(tau))``, so only a half plane of ``v`` is used
there; cross-covariances take the full disk.

Normalization. Every moment is divided by ``sigma_1 sigma_2``, the standard deviations of
the two phase-harmonic maps measured once on the reference (target) image: sqrt<|W|^2> for
``k >= 1`` and std(|W|) for ``k = 0`` (arXiv:2102.03160, Sec. 3.3). The target's moments
are then correlation coefficients of order one, whatever the scale, so that no scale or
family dominates the loss.

Computation. Moments with shifts are evaluated in Fourier space: with ``A_hat = fft2(A)``,
``M(tau) = N^-2 sum_w conj(A_hat(w)) B_hat(w) exp(i w.tau)`` (Parseval), a matrix product
with a small table of phases. ``wave_power`` needs no FFT beyond ``x_hat`` since
``conj(W_a_hat) W_b_hat = conj(x_a_hat) x_b_hat psi_hat^2``. The tau = 0 families are means
of products in pixel space, as matrix products over pixels of all (channel, orientation)
pairs at once. The four families on the wavelet stack (``envelope`` to ``xscale_phase``)
are computed by :mod:`skymoments.synthesis.stack_moments`, whose backward is written out
by hand (autograd differentiates the rest); :class:`WPHStatistics` works on any batch,
and the synthesis calls it on chunks of a few images.

Symmetries (tested): the moments are exactly invariant under whole-pixel translations of
a periodic map. Under a 180-degree rotation ``x(u) -> x(-u)``, ``W(u) -> conj(W(-u))``
(``psi_hat`` is real), so ``M(tau) -> conj(M(-tau))``: auto-covariances over the half
plane (``wave_power``, ``envelope`` for a = b) are invariant, the others map to the complex
conjugate at the opposite shift (see :meth:`WPHStatistics.rotate180`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from skymoments.synthesis.stack_moments import TINY, StackMoments, split_blocks
from skymoments.synthesis.stack_moments import layout as layout_of_stack
from skymoments.synthesis.wavelets import WaveletBank, check_bank_args, wavelet_bank

FAMILIES = (
    "wave_power",
    "envelope",
    "envelope_wave",
    "xscale_envelope",
    "xscale_phase",
    "lowpass",
    "spectrum",
)
# The families' former labels (the papers' letters), read from banks written before the
# descriptive names (synthesis/bank.py).
LEGACY_FAMILIES = {
    "S11": "wave_power",
    "S00": "envelope",
    "S01": "envelope_wave",
    "C01": "xscale_envelope",
    "Cphase": "xscale_phase",
    "L": "lowpass",
    "P": "spectrum",
}


@dataclass(frozen=True)
class WPHConfig:
    """Index sets of the WPH statistics (paper symbols in the module docstring's table).

    Parameters
    ----------
    n_scales : int
        Dyadic scales ``j = 0 .. n_scales - 1`` (``2^n_scales <= npix``); the papers' J.
    n_orientations : int
        Orientations over ``[0, pi)`` (2..16); the papers' L.
    scale_reach : int
        Largest scale separation ``j2 - j1`` in ``xscale_envelope`` and ``xscale_phase``
        (>= 0; 0 disables them); the papers' Delta_j.
    orientation_reach : int
        Largest orientation offset, in steps of ``pi / n_orientations``, in
        ``xscale_envelope`` (0 <= orientation_reach < n_orientations); the papers' Delta_l.
    shift_reach : int
        Largest shift vector length ``|v|`` for ``wave_power``, ``envelope`` and
        ``envelope_wave`` (>= 0); the papers' Delta_n.
    full_angle : bool
        Orientations over ``[0, 2 pi)`` instead of ``[0, pi)``.
    spectrum_bins : int or None
        Annuli of the ``spectrum`` family; None means ``npix // 4``, 0 turns the family off.
    """

    n_scales: int = 4
    n_orientations: int = 8
    scale_reach: int = 2
    orientation_reach: int = 1
    shift_reach: int = 1
    full_angle: bool = False
    spectrum_bins: int | None = None

    def validate(self, shape: tuple[int, int]) -> None:
        check_bank_args(shape, self.n_scales, self.n_orientations)
        for name in ("scale_reach", "orientation_reach", "shift_reach"):
            v = getattr(self, name)
            if not isinstance(v, int | np.integer) or v < 0:
                raise ValueError(f"{name} must be a non-negative integer, got {v!r}")
        if self.scale_reach >= self.n_scales and self.n_scales > 1:
            raise ValueError(
                f"scale_reach = {self.scale_reach} must be below n_scales = {self.n_scales}"
            )
        if self.orientation_reach >= self.n_orientations:
            raise ValueError(
                f"orientation_reach = {self.orientation_reach} must be below "
                f"n_orientations = {self.n_orientations}"
            )
        if self.spectrum_bins is not None and (
            not isinstance(self.spectrum_bins, int | np.integer) or self.spectrum_bins < 0
        ):
            raise ValueError(
                f"spectrum_bins must be None or an integer >= 0, got {self.spectrum_bins!r}"
            )
        if self.shift_reach > 4:
            raise ValueError(
                f"shift_reach = {self.shift_reach} is too large; use 0..4 (shifts 2^j v)"
            )


def _shift_vectors(shift_reach: int, half: bool) -> np.ndarray:
    """Integer vectors ``(vy, vx)``, ``|v| <= shift_reach``, zero first; a half plane if asked."""
    out = [(0, 0)]
    for vy in range(-shift_reach, shift_reach + 1):
        for vx in range(-shift_reach, shift_reach + 1):
            if (vy, vx) == (0, 0) or vy * vy + vx * vx > shift_reach * shift_reach:
                continue
            if half and not (vy > 0 or (vy == 0 and vx > 0)):
                continue
            out.append((vy, vx))
    return np.array(out, dtype=int)


class WPHStatistics:
    """WPH moments of maps of a fixed shape, normalized by a reference map.

    Parameters
    ----------
    shape : (int, int)
        Map shape ``(npix, npix)``.
    config : WPHConfig
    channels : int
        1 (a scalar map) or 2 (Q, U or E, B).
    reference : ndarray or Tensor, shape (channels, npix, npix), optional
        The map whose own moments set the normalization (the target). Without it the
        normalization is 1 (raw moments) until :meth:`set_reference` is called.
    device, dtype
        Torch device and real dtype (float32 for synthesis, float64 for gradient checks).
    """

    def __init__(
        self,
        shape: tuple[int, int],
        config: WPHConfig,
        channels: int = 2,
        reference=None,
        device=None,
        dtype=torch.float32,
    ):
        shape = (int(shape[0]), int(shape[1]))
        config.validate(shape)
        if channels not in (1, 2):
            raise ValueError(f"channels must be 1 or 2, got {channels!r}")
        self.shape, self.config, self.channels = shape, config, channels
        self.device, self.dtype = device, dtype
        self.cdtype = torch.complex128 if dtype == torch.float64 else torch.complex64
        self.bank: WaveletBank = wavelet_bank(
            shape, config.n_scales, config.n_orientations, config.full_angle
        )
        psi, phi = self.bank.torch_filters(device, dtype)
        self.psi, self.phi = psi, phi  # (J, T, ny, nx), (ny, nx)
        self.n_theta = self.bank.n_theta
        self.npix = shape[0] * shape[1]
        # Channel pairs: symmetric families (a <= b) and ordered ones (all a, b).
        c = channels
        self.sym_pairs = [(a, b) for a in range(c) for b in range(a, c)]
        self.all_pairs = [(a, b) for a in range(c) for b in range(c)]
        self._build_shift_tables()
        self.psi_stack = psi[:, None, :, None]  # (J, 1, T, 1, ny, nx): StackMoments' layout
        self.stack_layout = layout_of_stack(self)  # StackMoments' blocks: (shape, tag)
        self.norm0 = torch.ones(c, config.n_scales, self.n_theta, dtype=dtype, device=device)
        self.norm1 = torch.ones_like(self.norm0)
        self.norm_low = torch.ones(c, dtype=dtype, device=device)
        self.norm_mean = torch.ones(c, dtype=dtype, device=device)
        self.norm_spec = None
        self.norm_onepoint = torch.ones(c + (c == 2), 2, dtype=dtype, device=device)
        if reference is not None:
            self.set_reference(reference)

    # ------------------------------------------------------------------ set-up
    def _build_shift_tables(self) -> None:
        ny, nx = self.shape
        wy = torch.as_tensor(2 * np.pi * np.fft.fftfreq(ny), dtype=torch.float64)
        wx = torch.as_tensor(2 * np.pi * np.fft.fftfreq(nx), dtype=torch.float64)
        wy, wx = torch.meshgrid(wy, wx, indexing="ij")
        self.shifts_half: list[np.ndarray] = []
        self.shifts_full: list[np.ndarray] = []
        self.phase_half: list[torch.Tensor] = []  # per j: (N, T_half) complex
        self.phase_full: list[torch.Tensor] = []
        self.s11_kernel_half: list[torch.Tensor] = []  # per j: (N, n_theta * T_half)
        self.s11_kernel_full: list[torch.Tensor] = []
        self.neg_full: list[np.ndarray] = []  # index of -tau in the full list
        lim = min(ny, nx) // 2
        for j in range(self.config.n_scales):
            for half, shifts, phases, kern in (
                (True, self.shifts_half, self.phase_half, self.s11_kernel_half),
                (False, self.shifts_full, self.phase_full, self.s11_kernel_full),
            ):
                tau = _shift_vectors(self.config.shift_reach, half) * 2**j
                tau = tau[np.abs(tau).max(axis=1) < lim]
                shifts.append(tau)
                tt = torch.as_tensor(tau, dtype=torch.float64)
                ph = torch.exp(
                    1j * (wy.reshape(-1, 1) * tt[:, 0] + wx.reshape(-1, 1) * tt[:, 1])
                ) / (self.npix**2)
                phases.append(ph.to(self.cdtype).to(self.device))
                psi2 = self.psi[j].to(torch.float64).reshape(self.n_theta, -1) ** 2  # (T, N)
                k = psi2.T[:, :, None] * ph[:, None, :]  # (N, T, n_tau)
                kern.append(k.reshape(self.npix, -1).to(self.cdtype).to(self.device))
                if not half:
                    index = {tuple(t): i for i, t in enumerate(tau.tolist())}
                    self.neg_full.append(np.array([index[(-a, -b)] for a, b in tau.tolist()]))
        self.s11_kernel_half_all = torch.cat(self.s11_kernel_half, dim=1)
        self.s11_kernel_full_all = torch.cat(self.s11_kernel_full, dim=1)
        # Real and imaginary parts of the tables, for real operands (power spectra): a
        # real matrix product each is cheaper than casting the operand to complex.
        self.s11_half_ri = (
            self.s11_kernel_half_all.real.contiguous(),
            self.s11_kernel_half_all.imag.contiguous(),
        )
        self.phase_half_ri = [(t.real.contiguous(), t.imag.contiguous()) for t in self.phase_half]
        # Their adjoints, for the backward of stack_moments.StackMoments.
        self.phase_half_ri_t = [
            (re.T.contiguous(), im.T.contiguous()) for re, im in self.phase_half_ri
        ]
        self.phase_full_adj = [t.conj().T.contiguous() for t in self.phase_full]
        # spectrum family: annulus indicator matrix (N, n_bins) divided by the mode count, and
        # the E/B rotation cos 2phi, sin 2phi of maps/eb.py (phi = atan2(w_y, w_x)).
        nb = self.config.spectrum_bins
        nb = min(ny, nx) // 4 if nb is None else nb
        r = torch.sqrt(wy**2 + wx**2).reshape(-1)
        edges = torch.linspace(0.5 * 2 * np.pi / min(ny, nx), np.pi, nb + 1, dtype=torch.float64)
        self.n_spectrum_bins = nb
        if nb:
            idx = torch.bucketize(r, edges, right=True) - 1
            ind = torch.zeros(self.npix, nb, dtype=torch.float64)
            ok = (idx >= 0) & (idx < nb)
            ind[torch.nonzero(ok)[:, 0], idx[ok]] = 1.0
            ind = ind / ind.sum(dim=0).clamp_min(1.0)
            self.bin_matrix = ind.to(self.dtype).to(self.device)
            ang = torch.atan2(wy, wx).reshape(-1)
            self.cos2 = torch.cos(2 * ang).to(self.dtype).to(self.device)
            self.sin2 = torch.sin(2 * ang).to(self.dtype).to(self.device)

    def _as_tensor(self, x) -> torch.Tensor:
        x = torch.as_tensor(x, dtype=self.dtype, device=self.device)
        if x.ndim == 3:
            x = x[None]
        if x.ndim != 4 or tuple(x.shape[1:]) != (self.channels, *self.shape):
            raise ValueError(
                f"maps have shape {tuple(x.shape)}, expected (batch, {self.channels}, "
                f"{self.shape[0]}, {self.shape[1]})"
            )
        return x

    @torch.no_grad()
    def set_reference(self, reference) -> None:
        """Set the per-channel, per-wavelet normalization from a reference map.

        Parameters
        ----------
        reference : ndarray or Tensor, shape (channels, npix, npix)
        """
        x = self._as_tensor(reference)
        if x.shape[0] != 1:
            raise ValueError("the reference must be one map, shape (channels, npix, npix)")
        _, w, _ = self._transform(x)
        mod = w.abs()
        self.norm1 = mod.pow(2).mean(dim=(-2, -1)).sqrt()[0]
        self.norm0 = mod.std(dim=(-2, -1), unbiased=False)[0]
        low = torch.fft.ifft2(torch.fft.fft2(x) * self.phi).real
        self.norm_low = low.std(dim=(-2, -1), unbiased=False)[0]
        self.norm_mean = x.std(dim=(-2, -1), unbiased=False)[0]
        self.norm_spec = None
        ys = [x[:, i] for i in range(x.shape[1])]
        if x.shape[1] == 2:
            ys.append(torch.sqrt(x[:, 0] ** 2 + x[:, 1] ** 2))
        ys = torch.stack(ys, dim=1)
        sd = ys.std(dim=(-2, -1), unbiased=False)[0]
        self.norm_onepoint = torch.stack([sd, sd**3], dim=-1)
        if self.n_spectrum_bins:
            raw = self._spectrum(torch.fft.fft2(x).reshape(1, x.shape[1], -1))[0]
            if x.shape[1] == 2:
                # EB is normalized by sqrt(EE BB): it can be ~0 itself.
                raw[2] = torch.sqrt(raw[0] * raw[1])
            # An empty or powerless annulus (a tiny map) must not divide by zero.
            self.norm_spec = torch.clamp(raw, min=float(raw.max()) * 1e-8)
        for name in ("norm0", "norm1", "norm_low", "norm_mean", "norm_onepoint"):
            t = getattr(self, name)
            floor = t.max() * 1e-6
            if not torch.all(t > 0):
                raise ValueError(
                    "the reference map has no power in some wavelet band or channel "
                    "(a constant image?); give a map with structure on all scales"
                )
            setattr(self, name, torch.clamp(t, min=floor))

    # ------------------------------------------------------------------ core
    def _spectrum(self, xflat: torch.Tensor) -> torch.Tensor:
        """Binned power (b, 3, n_bins): EE, BB, EB for two channels; (b, 1, n_bins) for one."""
        if xflat.shape[1] == 1:
            return (xflat.real**2 + xflat.imag**2) @ self.bin_matrix
        q, u = xflat[:, 0], xflat[:, 1]
        e = q * self.cos2 + u * self.sin2
        bm = -q * self.sin2 + u * self.cos2
        ee = e.real**2 + e.imag**2
        bb = bm.real**2 + bm.imag**2
        eb = e.real * bm.real + e.imag * bm.imag
        return torch.stack([ee, bb, eb], dim=1) @ self.bin_matrix

    def _transform(self, x: torch.Tensor):
        """``x_hat`` (b, C, ny, nx), wavelet coefficients W (b, C, J, T, ny, nx), W_hat."""
        xf = torch.fft.fft2(x.to(self.dtype))
        wf = xf[:, :, None, None] * self.psi
        w = torch.fft.ifft2(wf)
        return xf, w, wf

    def __call__(self, x) -> dict[str, list[torch.Tensor]]:
        return self.forward(x)

    def forward(self, x) -> dict[str, list[torch.Tensor]]:
        """Normalized WPH moments of a batch of maps.

        Parameters
        ----------
        x : Tensor or ndarray, shape (b, channels, npix, npix), float
            Differentiable when a tensor with ``requires_grad``.

        Returns
        -------
        dict family -> list of complex Tensors
            One entry per family of :data:`FAMILIES`, each a list of blocks of shape
            (b, ...) whose last axis is the shift where the family has shifts;
            :meth:`flatten` concatenates them into (b, n_moments), :meth:`rotate180`
            knows their layout.
        """
        x = self._as_tensor(x)
        b, c = x.shape[:2]
        cfg, n, nt = self.config, self.npix, self.n_theta
        xf = torch.fft.fft2(x)
        out: dict[str, list[torch.Tensor]] = {f: [] for f in FAMILIES}
        tags: dict[str, list] = {f: [] for f in FAMILIES}
        n1 = self.norm1  # (C, J, T)
        xflat = xf.reshape(b, c, n)
        # wave_power for all scales at once from the cross-spectra of x:
        # conj(W_a_hat) W_b_hat = conj(x_a_hat) x_b_hat psi_hat^2.
        auto = xflat.real**2 + xflat.imag**2  # (b, C, N), real
        s_auto = torch.complex(auto @ self.s11_half_ri[0], auto @ self.s11_half_ri[1])
        s_cross = None
        if c == 2:
            s_cross = (torch.conj(xflat[:, :1]) * xflat[:, 1:]) @ self.s11_kernel_full_all
        # The families on the wavelet stack, forward and backward written out once
        # (stack_moments.py), on the stack laid out as [scale, map, orientation, channel].
        blocks = split_blocks(StackMoments.apply(xf, self), self.stack_layout)
        for fam, entries in self.stack_layout.items():
            out[fam] += blocks[fam]
            tags[fam] += [tag for _, tag in entries]
        oh, of = 0, 0
        for j in range(cfg.n_scales):
            th, tf = len(self.shifts_half[j]), len(self.shifts_full[j])
            blk = s_auto[..., oh : oh + nt * th].reshape(b, c, nt, th)
            out["wave_power"].append(blk / (n1[:, j] ** 2)[None, :, :, None])
            tags["wave_power"].append("inv")
            if s_cross is not None:
                blk = s_cross[..., of : of + nt * tf].reshape(b, 1, nt, tf)
                out["wave_power"].append(blk / (n1[0, j] * n1[1, j])[None, None, :, None])
                tags["wave_power"].append(("neg", j))
            oh, of = oh + nt * th, of + nt * tf
        # Scaling-function moments: channel means and low-pass covariances.
        mean = x.mean(dim=(-2, -1))
        out["lowpass"].append((mean / self.norm_mean).to(self.cdtype))
        low = torch.fft.ifft2(xf * self.phi).real
        low = low - low.mean(dim=(-2, -1), keepdim=True)
        sa = [p[0] for p in self.sym_pairs]
        sb = [p[1] for p in self.sym_pairs]
        cov = (low[:, sa] * low[:, sb]).mean(dim=(-2, -1))
        out["lowpass"].append((cov / (self.norm_low[sa] * self.norm_low[sb])).to(self.cdtype))
        tags["lowpass"] += ["inv", "inv"]
        # One-point moments <|y - mean|^p>, p = 1, 3, of each channel and of |P| (two
        # channels): the pixel histogram's width and tails, which the wavelet moments
        # constrain only indirectly (our addition, a j = 0 scaling moment with phi = delta).
        ys = [x[:, i] for i in range(c)]
        if c == 2:
            ys.append(torch.sqrt(x[:, 0] ** 2 + x[:, 1] ** 2 + TINY))
        ys = torch.stack(ys, dim=1)
        dev = (ys - ys.mean(dim=(-2, -1), keepdim=True)).abs()
        onep = torch.stack([dev.mean(dim=(-2, -1)), dev.pow(3).mean(dim=(-2, -1))], dim=-1)
        out["lowpass"].append((onep / self.norm_onepoint).to(self.cdtype))
        tags["lowpass"].append("inv")
        if self.n_spectrum_bins:
            spec = self._spectrum(xflat)
            if self.norm_spec is not None:
                spec = spec / self.norm_spec
            out["spectrum"].append(spec.to(self.cdtype))
            tags["spectrum"].append("inv")
        self._tags = tags
        return out

    # ------------------------------------------------------------------ helpers
    def flatten(self, stats: dict[str, list[torch.Tensor]]) -> torch.Tensor:
        """All moments of :meth:`forward` as one complex tensor, shape (b, n_moments)."""
        b = stats["lowpass"][0].shape[0]
        return torch.cat([t.reshape(b, -1) for f in FAMILIES for t in stats[f]], dim=1)

    def moments(self, x) -> torch.Tensor:
        """``flatten(forward(x))``: complex Tensor, shape (b, n_moments)."""
        return self.flatten(self.forward(x))

    def count(self) -> dict[str, int]:
        """Number of complex moments per family, and ``total``, for this configuration."""
        probe = torch.zeros(1, self.channels, *self.shape, dtype=self.dtype, device=self.device)
        with torch.no_grad():
            stats = self.forward(probe)  # any map will do: only the shapes are used
        out = {f: int(sum(t[0].numel() for t in stats[f])) for f in FAMILIES}
        out["total"] = int(sum(out.values()))
        return out

    def rotate180(self, stats: dict[str, list[torch.Tensor]]) -> dict[str, list[torch.Tensor]]:
        """The moments that the 180-degree rotated map must have, given those of the map.

        ``M(tau) -> conj(M(-tau))`` (module docstring). Auto-covariances over a half plane
        of shifts are their own conjugate at ``-tau`` and stay as they are; tau = 0
        cross-scale moments become their conjugates.
        """
        out: dict[str, list[torch.Tensor]] = {}
        for f, parts in stats.items():
            new = []
            for t, tag in zip(parts, self._tags[f], strict=True):
                if tag == "inv":
                    new.append(t)
                elif tag == "conj":
                    new.append(torch.conj(t))
                else:
                    new.append(torch.conj(t[..., self.neg_full[tag[1]]]))
            out[f] = new
        return out


def loss_per_image(stats: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """``||phi(x) - phi(x0)||^2`` per image.

    Parameters
    ----------
    stats : complex Tensor, shape (b, n_moments)
    target : complex Tensor, shape (n_moments,) or (1, n_moments)

    Returns
    -------
    Tensor, shape (b,), real
    """
    d = stats - target.reshape(1, -1)
    return (d.real**2 + d.imag**2).sum(dim=1)
