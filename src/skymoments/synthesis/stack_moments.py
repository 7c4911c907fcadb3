"""The WPH families computed on the wavelet stack, with a hand-derived backward.

``envelope``, ``envelope_wave``, ``xscale_envelope`` and ``xscale_phase``
(:mod:`skymoments.synthesis.wph` defines them) are bilinear forms of phase-harmonic maps of
the whole wavelet stack ``W`` (channels x scales x orientations x pixels). Differentiated
by autograd, every elementwise step keeps its own copy of a stack-sized array, the
backward allocates more and permutes the stack for each product over pixels. Here the
forward and the backward are written out once (:class:`StackMoments`), on one layout
chosen so that every product over pixels is a plain batched matrix product (a loss
evaluation 1.4x faster than autograd of the same moments, the moments equal to rounding;
``experiments/synthesis_speed``):

    W[j, b, t, c, u]   scale, map, orientation, channel, pixel

(``view_as_real`` of it, real and imaginary parts side by side as ``[j, b, t, 2, c, u]``).

Gradient convention (PyTorch's for complex tensors): for a real loss ``L`` and a complex
``z``, ``g_z = dL/dRe z + i dL/dIm z``. The rules used below, for constant ``K``:

* ``m = sum_u conj(p) q``:  ``g_q = g_m p``, ``g_p = conj(g_m) q``;
* ``m = r @ K`` (over the last axis): ``g_r = g_m @ conj(K)^T``;
* ``F = fft2(a)`` with ``a`` real: ``g_a = Re(ifft2(g_F)) * N``; ``w = ifft2(F)``:
  ``g_F = fft2(g_w) / N`` (the adjoints of the unnormalized DFT, N pixels);
* ``|w| = sqrt(w_r^2 + w_i^2)``: ``g_w += g_|w| w / |w|``.

``tests/test_synthesis_wph.py`` checks the gradient of each family against central finite
differences in float64, and the moments against their definition computed in pixel space
with numpy.
"""

from __future__ import annotations

import numpy as np
import torch
from torch.autograd.function import once_differentiable

# |z| below this (relative to the map's unit) has no meaningful phase; the phase harmonic
# of order k >= 2 is evaluated with |z| clamped there (its value there is ~0 anyway). Also
# wph.py's floor under the square root of |P|.
TINY = 1e-30


def _real_re_im(w: torch.Tensor) -> torch.Tensor:
    """``[j, b, t, c, n, n]`` complex -> ``[j, b, t, 2, c, N]`` real, contiguous."""
    jj, b, t, c = w.shape[:4]
    ri = torch.view_as_real(w).permute(0, 1, 2, 6, 3, 4, 5)
    return ri.contiguous().view(jj, b, t, 2, c, -1)


def layout(stats) -> dict[str, list[tuple[tuple[int, ...], object]]]:
    """Per family, the (shape without the batch axis, rotate180 tag) of each block that
    :class:`StackMoments` returns, in its order (that of ``WPHStatistics.forward``)."""
    cfg, c, nt = stats.config, stats.channels, stats.n_theta
    out: dict[str, list] = {
        f: [] for f in ("envelope", "envelope_wave", "xscale_envelope", "xscale_phase")
    }
    for j in range(cfg.n_scales):
        th, tf = len(stats.shifts_half[j]), len(stats.shifts_full[j])
        out["envelope"].append(((c, nt, th), "inv"))
        if c == 2:
            out["envelope"].append(((1, nt, tf), ("neg", j)))
        out["envelope_wave"].append(((c, c, nt, tf), ("neg", j)))
    for dj in range(1, min(cfg.scale_reach, cfg.n_scales - 1) + 1):
        jn = cfg.n_scales - dj
        for _ in range(2 * cfg.orientation_reach + 1):
            out["xscale_envelope"].append(((c, c, jn, nt), "conj"))
        out["xscale_phase"].append(((c, c, jn, nt), "conj"))
    return out


def split_blocks(flat: torch.Tensor, blocks) -> dict[str, list[torch.Tensor]]:
    """The blocks of ``flat`` (b, n), per family, shaped as ``blocks`` (:func:`layout`) says."""
    b, k, out = flat.shape[0], 0, {}
    for fam, entries in blocks.items():
        out[fam] = []
        for shape, _ in entries:
            size = int(np.prod(shape))
            out[fam].append(flat[:, k : k + size].reshape(b, *shape))
            k += size
    return out


class StackMoments(torch.autograd.Function):
    """Normalized ``envelope``, ``envelope_wave``, ``xscale_envelope``, ``xscale_phase``.

    ``forward(ctx, xf, stats)``: ``xf`` the maps in Fourier space, complex, shape
    ``(b, C, ny, nx)``, whose wavelet stack is ``wf = psi * xf`` of shape
    ``[J, b, T, C, ny, nx]``; ``stats`` the :class:`~skymoments.synthesis.wph.
    WPHStatistics` whose tables and normalization are used. Returns one complex tensor
    ``(b, n)``: the blocks of the four families in the order of ``WPHStatistics.forward``,
    each flattened; :func:`layout` gives their shapes (``stats.stack_layout``), by which
    the backward splits its gradient the same way.
    """

    @staticmethod
    def forward(ctx, xf: torch.Tensor, stats) -> torch.Tensor:
        cfg = stats.config
        wf = stats.psi_stack * xf[None, :, None]
        jj, b, nt, c = wf.shape[:4]
        n = stats.npix
        w = torch.fft.ifft2(wf)
        wri = _real_re_im(w)  # [j, b, t, 2, c, N]
        wr, wi = wri[:, :, :, 0], wri[:, :, :, 1]
        amp = torch.sqrt(wr * wr + wi * wi + TINY)  # [j, b, t, c, N]
        inv_amp = 1.0 / amp
        a0 = amp - amp.mean(dim=-1, keepdim=True)
        af = torch.fft.fft2(a0.reshape(wf.shape)).reshape(jj, b, nt, c, n)
        wff = wf.reshape(jj, b, nt, c, n)
        n0, n1 = stats.norm0, stats.norm1  # (C, J, T)
        env, envw = [], []
        for j in range(jj):
            afj = af[j]  # [b, t, c, N]
            p = afj.real**2 + afj.imag**2
            ph_re, ph_im = stats.phase_half_ri[j]
            blk = torch.complex(p @ ph_re, p @ ph_im).permute(0, 2, 1, 3)  # (b, C, T, th)
            env.append(blk / (n0[:, j] ** 2)[None, :, :, None])
            if c == 2:
                blk = (torch.conj(afj[:, :, 0]) * afj[:, :, 1]) @ stats.phase_full[j]
                env.append(blk[:, None] / (n0[0, j] * n0[1, j])[None, None, :, None])
            # envelope_wave for every ordered channel pair: conj(|W_a| hat) W_b hat.
            prod = torch.conj(afj)[:, :, :, None] * wff[j][:, :, None]  # [b, t, a, c, N]
            blk = (prod @ stats.phase_full[j]).permute(0, 2, 3, 1, 4)  # (b, C, C, T, tf)
            norm = n0[:, None, j] * n1[None, :, j]  # (C, C, T)
            envw.append(blk / norm[None, :, :, :, None])
        xenv, xph = [], []
        levels = [wri]  # phase harmonics [W]^(2^k) at scales k .. J-1, (re, im) stacked
        ir2 = torch.stack([inv_amp, 2.0 * inv_amp], dim=3)  # [j, b, t, 2, c, N]
        for dj in range(1, cfg.scale_reach + 1):
            if dj >= jj:
                break
            jn = jj - dj
            # xscale_envelope: all (t1, a) x (t2, re/im, c) pairs by one product over pixels.
            full = a0[:jn].reshape(jn, b, nt * c, n) @ wri[dj:].reshape(jn, b, 2 * nt * c, n).mT
            full = full.reshape(jn, b, nt, c, nt, 2, c)
            for dl in range(-cfg.orientation_reach, cfg.orientation_reach + 1):
                tt, t2, sign = _pairs(nt, dl, cfg.full_angle, full.device, full.dtype)
                sel = full[:, :, tt, :, t2]  # (T, jn, b, a, 2, c)
                m = torch.complex(sel[..., 0, :], sel[..., 1, :] * sign[:, None, None, None, None])
                m = m.permute(2, 3, 4, 1, 0) / n  # (b, a, c, jn, T)
                norm = n0[:, None, :jn, :] * n1[None, :, dj:, :][..., t2]
                xenv.append(m / norm)
            # xscale_phase: [W_j2]^(2^dj) = ([W_j2]^(2^(dj-1)))^2 / |W_j2| (wph.py), written
            # straight into the (re, im)-stacked layout of the product below.
            prev = levels[-1][1:]  # the previous harmonic at scales dj ..
            pr, pi = prev[:, :, :, 0], prev[:, :, :, 1]
            h2 = torch.empty_like(prev)
            torch.mul(pr + pi, pr - pi, out=h2[:, :, :, 0])
            torch.mul(pr, pi, out=h2[:, :, :, 1])
            h2.mul_(ir2[dj:])  # ir2 = (1/|W|, 2/|W|) per (re, im)
            levels.append(h2)
            q = wri[:jn].reshape(jn, b, nt, 2 * c, n) @ h2.reshape(jn, b, nt, 2 * c, n).mT
            q = q.reshape(jn, b, nt, 2, c, 2, c)
            re = q[:, :, :, 0, :, 0] + q[:, :, :, 1, :, 1]
            im = q[:, :, :, 0, :, 1] - q[:, :, :, 1, :, 0]
            m = torch.complex(re, im).permute(1, 3, 4, 0, 2) / n  # (b, a, c, jn, T)
            norm = n1[:, None, :jn] * n1[None, :, dj:]
            xph.append(m / norm)
        blocks = env + envw + xenv + xph
        ctx.stats = stats
        ctx.levels = levels[1:]
        ctx.save_for_backward(wf, wri, inv_amp, a0, af)
        return torch.cat([t.reshape(b, -1) for t in blocks], dim=1)

    @staticmethod
    @once_differentiable  # first derivatives only (all L-BFGS needs); a second one raises
    def backward(ctx, g: torch.Tensor):
        stats = ctx.stats
        cfg = stats.config
        wf, wri, inv_amp, a0, af = ctx.saved_tensors
        jj, b, nt, c = wf.shape[:4]
        n = stats.npix
        n0, n1 = stats.norm0, stats.norm1
        wff = wf.reshape(jj, b, nt, c, n)
        gb = split_blocks(g, stats.stack_layout)
        g_env, g_envw = gb["envelope"], gb["envelope_wave"]
        g_xenv, g_xph = gb["xscale_envelope"], gb["xscale_phase"]
        g_af = torch.empty_like(af)  # every scale's first term assigns, the others add
        g_wf = torch.empty_like(wff)
        per_j = 2 if c == 2 else 1
        for j in range(jj):
            afj = af[j]
            # P = |Af|^2: g_Af = 2 g_P Af (the 2 folded into the small gradient).
            gj = g_env[per_j * j] * (2.0 / n0[:, j] ** 2)[None, :, :, None]  # (b, C, T, th)
            gj = gj.permute(0, 2, 1, 3).reshape(-1, gj.shape[-1])
            ph_re_t, ph_im_t = stats.phase_half_ri_t[j]
            g_p = torch.addmm(gj.imag @ ph_im_t, gj.real, ph_re_t).view(afj.shape)  # [b,t,c,N]
            torch.mul(afj, g_p, out=g_af[j])
            phc = stats.phase_full_adj[j]
            if c == 2:
                gc = g_env[per_j * j + 1][:, 0] / (n0[0, j] * n0[1, j])[None, :, None]
                g_r = (gc.reshape(-1, gc.shape[-1]) @ phc).reshape(*gc.shape[:-1], n)  # [b, t, N]
                g_af[j, :, :, 1].addcmul_(g_r, afj[:, :, 0])
                g_af[j, :, :, 0].addcmul_(torch.conj(g_r), afj[:, :, 1])
            norm = n0[:, None, j] * n1[None, :, j]
            gw = (g_envw[j] / norm[None, :, :, :, None]).permute(0, 3, 1, 2, 4)  # [b, t, a, c, tf]
            g_r = (gw.reshape(-1, gw.shape[-1]) @ phc).reshape(*gw.shape[:-1], n)  # [b, t, a, c, N]
            torch.sum(g_r * afj[:, :, :, None], dim=2, out=g_wf[j])
            g_af[j] += (torch.conj(g_r) * wff[j][:, :, None]).sum(dim=3)
        # Back to pixel space: Af = fft2(A0), A0 real.
        g_a0 = torch.fft.ifft2(g_af.reshape(wf.shape), norm="forward").real.reshape(a0.shape)
        g_wri = torch.zeros_like(wri)
        g_amp = torch.zeros_like(inv_amp)  # gradients reaching |W| other than through A0
        k = 0
        for dj in range(1, len(ctx.levels) + 1):
            jn = jj - dj
            g_full = torch.zeros(jn, b, nt, c, nt, 2, c, dtype=wri.dtype, device=wri.device)
            for dl in range(-cfg.orientation_reach, cfg.orientation_reach + 1):
                tt, t2, sign = _pairs(nt, dl, cfg.full_angle, wri.device, wri.dtype)
                norm = n0[:, None, :jn, :] * n1[None, :, dj:, :][..., t2]
                gm = (g_xenv[k] / norm / n).permute(4, 3, 0, 1, 2)  # (T, jn, b, a, c)
                k += 1
                gsel = torch.stack([gm.real, gm.imag * sign[:, None, None, None, None]], dim=-2)
                # g_full[:, :, tt, :, t2] += gsel, repeated pairs accumulated.
                g_full.permute(2, 4, 0, 1, 3, 5, 6).index_put_((tt, t2), gsel, accumulate=True)
            g_full = g_full.reshape(jn, b, nt * c, 2 * nt * c)
            g_a0[:jn] += (g_full @ wri[dj:].reshape(jn, b, 2 * nt * c, n)).reshape(g_a0[:jn].shape)
            g_wri[dj:] += (g_full.mT @ a0[:jn].reshape(jn, b, nt * c, n)).reshape(g_wri[dj:].shape)
        # xscale_phase, from the highest harmonic down. Level k = [W]^(2^k) at scales k ..
        # is H = p^2 / |W| of the level below, p; for that holomorphic map
        # g_p = 2 conj(p) g_H / |W|, and through 1/|W|: g_|W| -= Re(conj(H) g_H) / |W|.
        g_lev = None  # gradient on the level below the one at hand, at its scales 1 ..
        for dj in range(len(ctx.levels), 0, -1):
            jn = jj - dj
            h2 = ctx.levels[dj - 1]  # [jn, b, t, 2, c, N]
            norm = n1[:, None, :jn] * n1[None, :, dj:]
            gm = (g_xph[dj - 1] / norm / n).permute(3, 0, 4, 1, 2)  # [jn, b, t, a, c]
            gq = torch.empty(jn, b, nt, 2, c, 2, c, dtype=wri.dtype, device=wri.device)
            gq[:, :, :, 0, :, 0] = gm.real
            gq[:, :, :, 1, :, 1] = gm.real
            gq[:, :, :, 0, :, 1] = gm.imag
            gq[:, :, :, 1, :, 0] = -gm.imag
            gq = gq.reshape(jn * b * nt, 2 * c, 2 * c)
            g_wri[:jn].view(jn * b * nt, 2 * c, n).baddbmm_(gq, h2.view(jn * b * nt, 2 * c, n))
            g_h = (gq.mT @ wri[:jn].reshape(jn * b * nt, 2 * c, n)).view(h2.shape)
            if g_lev is not None:
                g_h[1:] += g_lev
            g_hr, g_hi = g_h[:, :, :, 0], g_h[:, :, :, 1]
            ir = inv_amp[dj:]
            u = g_hr * h2[:, :, :, 0]
            u.addcmul_(g_hi, h2[:, :, :, 1])
            g_amp[dj:].addcmul_(u, ir, value=-1.0)
            prev = ctx.levels[dj - 2][1:] if dj > 1 else wri[1:]
            pr, pi = prev[:, :, :, 0], prev[:, :, :, 1]
            g_lev = torch.empty_like(prev)
            torch.mul(g_hr, pr, out=g_lev[:, :, :, 0]).addcmul_(g_hi, pi)
            torch.mul(g_hi, pr, out=g_lev[:, :, :, 1]).addcmul_(g_hr, pi, value=-1.0)
            g_lev.mul_(2.0 * ir[:, :, :, None])
        if g_lev is not None:
            g_wri[1:] += g_lev
        # A0 = |W| - mean(|W|); |W| = sqrt(wr^2 + wi^2).
        g_amp.add_(g_a0).sub_(g_a0.mean(dim=-1, keepdim=True)).mul_(inv_amp)
        g_wri.addcmul_(wri, g_amp[:, :, :, None])  # g_w += g_|W| w / |W|
        g_w = torch.complex(g_wri[:, :, :, 0], g_wri[:, :, :, 1]).reshape(wf.shape)
        g_wf = torch.fft.fft2(g_w, norm="forward").add_(g_wf.reshape(wf.shape))  # fft2(.) / N
        # wf = psi * xf: g_xf = sum over scales and orientations of psi g_wf, accumulated
        # one (j, t) at a time (a reduction over both axes at once strides through memory).
        g_xf = torch.zeros(wf.shape[1:2] + wf.shape[3:], dtype=wf.dtype, device=wf.device)
        psi = stats.psi_stack
        for j in range(jj):
            for t in range(nt):
                g_xf.add_(g_wf[j, :, t] * psi[j, 0, t])
        return g_xf, None


def _pairs(nt: int, dl: int, full_angle: bool, device, dtype):
    """Orientation pairs ``(t, t + dl mod T)`` of ``xscale_envelope`` and the sign of the
    imaginary part: index ``t + T`` is the wavelet turned by pi, ``conj(W_t)`` for a real
    map, unless the orientations cover the full angle."""
    tt = np.arange(nt)
    t2 = (tt + dl) % nt
    wrapped = (tt + dl < 0) | (tt + dl >= nt)
    sign = np.where(wrapped & (not full_angle), -1.0, 1.0)
    return (
        torch.as_tensor(tt, device=device),
        torch.as_tensor(t2, device=device),
        torch.as_tensor(sign, dtype=dtype, device=device),
    )
