"""Synthesis of new maps from one training image by matching its WPH moments.

We minimize ``||phi(x) - phi(x0)||^2`` over the pixels of a batch of maps ``x`` with
L-BFGS (torch.optim.LBFGS, strong-Wolfe line search), ``phi`` the normalized WPH moments
of :mod:`skymoments.synthesis.wph` and ``x0`` the training image. This is the
"microcanonical" gradient-descent model of Bruna & Mallat (arXiv:1801.02013) as used
with WPH moments by Zhang & Mallat 2021 (arXiv:1911.10017, Sec. 7) and Allys et al. 2020
(arXiv:2006.06298, Sec. 4). The start is a Gaussian field with the target's 2-D power
and Q-U cross power (below), so the optimization only has to add the non-Gaussian
structure.

The images of one batch are one optimization problem (the loss is their sum, the
Hessian block-diagonal), solved by one L-BFGS; the moments and their gradients are
evaluated on chunks of a few images so that the intermediate arrays stay in cache (a
whole batch at once was slower per image: memory-bound).
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, fields

import numpy as np
import torch

from skymoments.maps.training_file import check_image_values
from skymoments.synthesis.wavelets import check_bank_args
from skymoments.synthesis.wph import WPHConfig, WPHStatistics, loss_per_image

BOUNDARIES = ("periodic", "mirror", "apodize")
STARTS = ("gaussian", "coarse")
# Edge-discontinuity ratio above which a training image is called non-periodic: the mean
# squared jump across the wrap-around edges over the mean squared jump between interior
# neighbours. A stationary periodic field gives ~1 (within ~30% for 64 pixels); a cut-out
# of a red-spectrum field gives jumps as large as the field itself, >> 1.
EDGE_RATIO_WARN = 4.0
# L-BFGS iterations between checks of the stopping rule and progress reports.
CHECK_EVERY = 10
# Width of the cosine taper of boundary="apodize", as a fraction of the side.
APODIZE_WIDTH = 0.15
# Former names of the settings (they were the papers' letters); a config
# that still uses one is refused with the new name, a bank that recorded them still loads.
LEGACY_NAMES = {
    "J": "n_scales",
    "L": "n_orientations",
    "delta_n": "shift_reach",
    "delta_j": "scale_reach",
    "delta_l": "orientation_reach",
}


@dataclass(frozen=True)
class SynthesisSettings:
    """Everything that determines a synthesized bank (besides the image and the seed).

    Parameters
    ----------
    n_images : int
        Number of maps to synthesize (M).
    n_scales, n_orientations, shift_reach, scale_reach, orientation_reach : int
        WPH statistics (:class:`skymoments.synthesis.wph.WPHConfig`; the papers' J, L,
        Delta_n, Delta_j, Delta_l, see the table in :mod:`skymoments.synthesis.wph`).
    max_iter : int
        L-BFGS iteration cap per batch.
    tol : float
        Stop when the loss decreased by less than this fraction over the last
        ``CHECK_EVERY`` (10) iterations.
    batch : int
        Maps optimized together in one L-BFGS problem.
    boundary : {"periodic", "mirror", "apodize"}
        How the training image's edges are treated (:func:`prepare_target`).
    start : {"gaussian", "coarse"}
        ``gaussian``: L-BFGS starts from a Gaussian field with the target's power
        (:func:`gaussian_start`). ``coarse``: the same field's low frequencies are first
        synthesized at half resolution (``n_scales - 1`` scales) and put back under its
        high frequencies (coarse-to-fine), when the map allows it (:func:`coarse_possible`).
    """

    n_images: int = 16
    n_scales: int = 5
    n_orientations: int = 4
    shift_reach: int = 1
    scale_reach: int = 2
    orientation_reach: int = 1
    max_iter: int = 200
    tol: float = 1e-3
    batch: int = 8
    boundary: str = "periodic"
    start: str = "coarse"

    def wph_config(self) -> WPHConfig:
        return WPHConfig(
            n_scales=self.n_scales,
            n_orientations=self.n_orientations,
            scale_reach=self.scale_reach,
            orientation_reach=self.orientation_reach,
            shift_reach=self.shift_reach,
        )

    def validate(self) -> None:
        """Raise ValueError naming the bad setting."""
        for name in ("n_images", "max_iter", "batch"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | np.integer) or v < 1:
                raise ValueError(f"synthesis.{name} must be a positive integer, got {v!r}")
        if not (isinstance(self.tol, int | float) and 0 <= self.tol < 1):
            raise ValueError(f"synthesis.tol must be a number in [0, 1), got {self.tol!r}")
        if self.start not in STARTS:
            raise ValueError(
                f"synthesis.start must be one of {', '.join(STARTS)}, got {self.start!r}"
            )
        if self.boundary not in BOUNDARIES:
            raise ValueError(
                f"synthesis.boundary must be one of {', '.join(BOUNDARIES)}, got {self.boundary!r}"
            )

    def as_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_mapping(cls, data) -> SynthesisSettings:
        """Settings from the ``synthesis`` config node (other keys of the node ignored).

        Raises
        ------
        ValueError
            A key under its former name (``J``, ``delta_j``, ...: say which it is now), or
            a bad value (:meth:`validate`).
        """
        old = [k for k in LEGACY_NAMES if k in data]
        if old:
            raise ValueError(
                "synthesis settings renamed: "
                + ", ".join(f"synthesis.{k} is now synthesis.{LEGACY_NAMES[k]}" for k in old)
                + "; rename the key(s) in your config or overrides"
            )
        names = [f.name for f in fields(cls)]
        kw = {k: data[k] for k in names if data.get(k) is not None}
        if "tol" in kw:
            kw["tol"] = float(kw["tol"])
        if "boundary" in kw:
            kw["boundary"] = str(kw["boundary"])
        settings = cls(**kw)
        settings.validate()
        return settings


def renamed_settings(settings: dict) -> dict:
    """A bank's recorded settings with keys of the former names (:data:`LEGACY_NAMES`)
    under their current ones; current names pass through unchanged."""
    return {LEGACY_NAMES.get(k, k): v for k, v in settings.items()}


@dataclass
class SynthesisResult:
    """Output of :func:`synthesize`.

    Attributes
    ----------
    images : ndarray, shape (M, C, npix, npix), units of the training image
    loss : ndarray, shape (M,)
        Final ``||phi(x) - phi(x0)||^2`` per image (normalized moments, so dimensionless).
    loss_initial : ndarray, shape (M,)
        The same at the Gaussian start (before the coarse stage, if any).
    loss_start : ndarray, shape (M,)
        The same where the full-resolution L-BFGS starts (after the coarse stage when
        ``start="coarse"``, else equal to ``loss_initial``).
    iterations : list of int
        L-BFGS iterations run per batch.
    seconds : float
        Wall-clock time of the optimization (all batches).
    n_moments : dict
        Moment counts per family (:meth:`WPHStatistics.count`).
    history : list of float
        Mean loss per image at every check, all batches in turn.
    coarse_iterations : list of int
        L-BFGS iterations of the half-resolution stage per batch (empty without it); each
        costs about a quarter of a full-resolution one.
    """

    images: np.ndarray
    loss: np.ndarray
    loss_initial: np.ndarray
    loss_start: np.ndarray
    iterations: list[int]
    seconds: float
    n_moments: dict
    history: list[float] = field(default_factory=list)
    coarse_iterations: list[int] = field(default_factory=list)


def check_image(
    image, n_scales: int | None = None, n_orientations: int | None = None
) -> np.ndarray:
    """Validate a training image and return it as float64, shape (C, n, n).

    The array checks are :func:`skymoments.maps.training_file.check_image_values`'s; the
    wavelet bank's limits are added here.

    Raises
    ------
    ValueError
        Wrong shape, NaN/inf, a constant channel, a side below 2^n_scales, or scales/orientations
        out of range.
    """
    arr = check_image_values(image)
    if n_scales is not None or n_orientations is not None:
        check_bank_args(
            arr.shape[1:],
            1 if n_scales is None else n_scales,
            2 if n_orientations is None else n_orientations,
        )
    return arr


def edge_discontinuity(image: np.ndarray) -> float:
    """Mean squared jump across the periodic edges over that between interior neighbours.

    Parameters
    ----------
    image : ndarray, shape (C, n, n)

    Returns
    -------
    float
        ~1 for a periodic stationary field; >> 1 when the edges do not match.
    """
    x = np.asarray(image, dtype=float)
    edge = np.concatenate(
        [(x[:, 0, :] - x[:, -1, :]).ravel() ** 2, (x[:, :, 0] - x[:, :, -1]).ravel() ** 2]
    )
    inner = np.concatenate([np.diff(x, axis=1).ravel() ** 2, np.diff(x, axis=2).ravel() ** 2])
    return float(edge.mean() / max(inner.mean(), 1e-300))


def prepare_target(image: np.ndarray, boundary: str) -> np.ndarray:
    """The periodic map whose moments the synthesis matches.

    * ``periodic``: the image itself (warns when its edges look non-periodic).
    * ``mirror``: the image reflected into a (C, 2n, 2n) periodic map; the synthesis then
      runs at 2n and keeps the top-left n x n corner. A reflection flips the sign of U
      (and of B) (Q + iU -> Q - iU under a reflection), so channel 1 changes sign in the
      reflected quadrants. U is then discontinuous across the mirror lines (a
      reflection-symmetric polarization field has U = 0 on them), an imprint that the
      synthesis learns too; ``apodize`` avoids it at the cost of a taper.
    * ``apodize``: the image's fluctuation about its mean multiplied by a cosine taper of
      width 0.15 of the side, then rescaled by ``1 / sqrt(mean(w^2))`` to restore its
      variance. The taper's imprint on the moments is the price of this option.
    """
    if boundary not in BOUNDARIES:
        raise ValueError(f"boundary must be one of {', '.join(BOUNDARIES)}, got {boundary!r}")
    x = np.asarray(image, dtype=np.float64)
    if boundary == "periodic":
        ratio = edge_discontinuity(x)
        if ratio > EDGE_RATIO_WARN:
            warnings.warn(
                f"the training image's edges look non-periodic (edge jumps {ratio:.1f}x the "
                "interior ones); the synthesis assumes a periodic map and will add spurious "
                "structure at the edges: set synthesis.boundary=mirror or apodize",
                UserWarning,
                stacklevel=3,
            )
        return x
    if boundary == "mirror":
        sign = np.ones((x.shape[0], 1, 1))
        if x.shape[0] == 2:
            sign[1] = -1.0
        top = np.concatenate([x, sign * x[:, :, ::-1]], axis=2)
        bottom = np.concatenate([sign * x[:, ::-1, :], x[:, ::-1, ::-1]], axis=2)
        return np.concatenate([top, bottom], axis=1)
    from skymoments.maps.spectra import apodization_window

    w = apodization_window(x.shape[-1], width=APODIZE_WIDTH, kind="cosine")
    mean = x.mean(axis=(1, 2), keepdims=True)
    return mean + (x - mean) * w / np.sqrt(np.mean(w**2))


def gaussian_start(target: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """Gaussian maps with the target's 2-D auto and cross power, and its mean.

    ``x_hat = x0_hat * z`` with ``z = fft2(g) / sqrt(N)`` for white noise ``g``: per Fourier
    mode the same complex Gaussian factor multiplies every channel, so the 2-D power of
    Q and U and their cross power (hence EE, BB and EB) are those of the target on
    average, and ``z`` is Hermitian so the maps are real.

    Parameters
    ----------
    target : ndarray, shape (C, n, n)
    n : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n, C, npix, npix)
    """
    c, ny, nx = target.shape
    tf = np.fft.fft2(target)
    z = np.fft.fft2(rng.standard_normal((n, 1, ny, nx))) / math.sqrt(ny * nx)
    z[..., 0, 0] = 1.0  # keep the mean
    return np.fft.ifft2(tf[None] * z).real


ProgressFn = Callable[[dict], None]


def _lbfgs(wph, goal, start, max_iter, tol, chunk, device, dtype, report=None):
    """Minimize the moment loss from ``start`` (b, C, n, n) with one L-BFGS.

    Returns ``(x, loss_initial, loss_final, iterations, history)`` with ``x`` an ndarray
    and the losses per image (Tensors).
    """
    b = start.shape[0]
    x = torch.tensor(start, dtype=dtype, device=device, requires_grad=True)
    last = {}

    def closure():
        x.grad = None
        per = []
        for c0 in range(0, b, chunk):
            li = loss_per_image(wph.moments(x[c0 : c0 + chunk]), goal)
            li.sum().backward()
            per.append(li.detach())
        per = torch.cat(per)
        last["per"] = per
        return per.sum()

    def losses():
        with torch.no_grad():
            return loss_per_image(
                torch.cat([wph.moments(x[c : c + chunk]) for c in range(0, b, chunk)]), goal
            )

    opt = torch.optim.LBFGS(
        [x],
        lr=1.0,
        max_iter=CHECK_EVERY,
        history_size=20,
        line_search_fn="strong_wolfe",
        tolerance_grad=0.0,
        tolerance_change=0.0,
    )
    l0 = losses()
    prev = float(l0.mean())
    done, history = 0, []
    while done < max_iter:
        step = min(CHECK_EVERY, max_iter - done)
        opt.param_groups[0]["max_iter"] = step
        opt.param_groups[0]["max_eval"] = int(step * 1.25) + 1
        opt.step(closure)
        done += step
        cur = float(last["per"].mean())
        if not math.isfinite(cur):
            raise FloatingPointError(
                "the synthesis loss became NaN or infinite; lower synthesis.n_scales or check "
                "the training image"
            )
        history.append(cur)
        if report is not None:
            report(done, cur)
        if prev > 0 and (prev - cur) / prev < tol:
            break
        prev = cur
    return x.detach().cpu().numpy(), l0, losses(), done, history


def _coarse_report(progress, ib: int, n_batches: int, settings):
    """The progress callback of a batch's half-resolution stage (``stage="coarse"``)."""
    if progress is None:
        return None

    def report(done, cur):
        progress(
            {
                "batch": ib,
                "n_batches": n_batches,
                "iteration": done,
                "max_iter": settings.max_iter,
                "loss": cur,
                "images_done": ib * settings.batch,
                "n_images": settings.n_images,
                "stage": "coarse",
            }
        )

    return report


def coarse_possible(npix: int, n_scales: int) -> bool:
    """Whether a coarse-to-fine start applies: a half-resolution map of at least 16 pixels
    that still holds ``n_scales - 1 >= 2`` dyadic scales."""
    return npix % 2 == 0 and npix // 2 >= 16 and n_scales >= 3 and 2 ** (n_scales - 1) <= npix // 2


def _low_index(n: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    """Indices on an n-grid and on an m-grid (m < n) of the frequencies ``|k| < m / 2``."""
    k = np.arange(-((m - 1) // 2), (m - 1) // 2 + 1)
    return k % n, k % m


def fourier_resample(x: np.ndarray, m: int) -> np.ndarray:
    """The maps ``x`` (..., n, n) low-passed to the frequencies ``|k| < m / 2`` on each axis
    and sampled on an m x m grid (Fourier truncation; pixel values keep their scale, the
    m-grid's Nyquist row and column are zero)."""
    n = x.shape[-1]
    fine, crs = _low_index(n, m)
    xf = np.fft.fft2(x)
    out = np.zeros((*x.shape[:-2], m, m), dtype=complex)
    out[..., crs[:, None], crs[None, :]] = xf[..., fine[:, None], fine[None, :]] * (m * m) / (n * n)
    return np.fft.ifft2(out).real


def replace_low_frequencies(x: np.ndarray, coarse: np.ndarray) -> np.ndarray:
    """``x`` (..., n, n) with its frequencies ``|k| < m / 2`` taken from ``coarse`` (..., m, m)."""
    n, m = x.shape[-1], coarse.shape[-1]
    fine, crs = _low_index(n, m)
    xf = np.fft.fft2(x)
    cf = np.fft.fft2(coarse)
    xf[..., fine[:, None], fine[None, :]] = cf[..., crs[:, None], crs[None, :]] * (n * n) / (m * m)
    return np.fft.ifft2(xf).real


def synthesize(
    image,
    settings: SynthesisSettings,
    seed: int | np.random.SeedSequence = 0,
    progress: ProgressFn | None = None,
    chunk: int = 2,
    device=None,
    dtype=torch.float32,
) -> SynthesisResult:
    """Synthesize ``settings.n_images`` maps with the WPH moments of one training image.

    Parameters
    ----------
    image : ndarray, shape (C, n, n) with C = 1 or 2, any units (microkelvin for Q/U)
    settings : SynthesisSettings
    seed : int or numpy.random.SeedSequence
        Seeds the Gaussian starts (the optimization itself is deterministic).
    progress : callable, optional
        Called with a dict (``batch``, ``n_batches``, ``iteration``, ``max_iter``,
        ``loss`` = mean loss per image of the batch, ``images_done``, ``n_images``,
        ``stage`` = ``"coarse"`` or ``"fine"``) every 10 iterations of either stage, and
        once at the end with ``stage="done"`` and the mean loss over every image.
    chunk : int
        Maps per evaluation of the moments inside a batch (memory, not results).
    device, dtype
        Torch device and dtype of the optimization.

    Returns
    -------
    SynthesisResult
    """
    settings.validate()
    x_img = check_image(image, settings.n_scales, settings.n_orientations)
    settings.wph_config().validate(x_img.shape[1:])
    target = prepare_target(x_img, settings.boundary)
    n = x_img.shape[-1]
    # Work in units of the image's rms: float32 is then well conditioned whatever the unit.
    scale = float(x_img.std())
    t = target / scale
    wph = WPHStatistics(t.shape[1:], settings.wph_config(), t.shape[0], t, device, dtype)
    goal = wph.moments(t).detach()[0]
    counts = wph.count()
    coarse = None
    if settings.start == "coarse" and coarse_possible(t.shape[-1], settings.n_scales):
        tc = fourier_resample(t, t.shape[-1] // 2)
        cfg_c = WPHConfig(
            n_scales=settings.n_scales - 1,
            n_orientations=settings.n_orientations,
            scale_reach=min(settings.scale_reach, settings.n_scales - 2),
            orientation_reach=settings.orientation_reach,
            shift_reach=settings.shift_reach,
        )
        wph_c = WPHStatistics(tc.shape[1:], cfg_c, tc.shape[0], tc, device, dtype)
        coarse = (tc, wph_c, wph_c.moments(tc).detach()[0])
    rng = np.random.default_rng(seed)
    n_batches = math.ceil(settings.n_images / settings.batch)
    images, losses, losses0, iters, history = [], [], [], [], []
    coarse_iters, losses_start = [], []
    t0 = time.perf_counter()
    for ib in range(n_batches):
        b = min(settings.batch, settings.n_images - ib * settings.batch)
        start = gaussian_start(t, b, rng)
        lg = None
        if coarse is not None:
            with torch.no_grad():
                xs = torch.tensor(start, dtype=dtype, device=device)
                lg = torch.cat(
                    [
                        loss_per_image(wph.moments(xs[c : c + chunk]), goal)
                        for c in range(0, b, chunk)
                    ]
                )
            # Coarse-to-fine: match the moments of the half-resolution target from the
            # low frequencies of the Gaussian start, then put the result back under the
            # start's high frequencies. The full-resolution problem then starts with its
            # large scales already non-Gaussian; a coarse iteration costs ~1/4 of a fine one.
            tc, wph_c, goal_c = coarse
            low = fourier_resample(start, tc.shape[-1])
            xc, _, _, done_c, _ = _lbfgs(
                wph_c,
                goal_c,
                low,
                settings.max_iter,
                settings.tol,
                chunk,
                device,
                dtype,
                _coarse_report(progress, ib, n_batches, settings),
            )
            start = replace_low_frequencies(start, xc)
            coarse_iters.append(done_c)

        def report(done, cur, ib=ib):
            history.append(cur)
            if progress is not None:
                progress(
                    {
                        "batch": ib,
                        "n_batches": n_batches,
                        "iteration": done,
                        "max_iter": settings.max_iter,
                        "loss": cur,
                        "images_done": ib * settings.batch,
                        "n_images": settings.n_images,
                        "stage": "fine",
                    }
                )

        x, l0, lf, done, _ = _lbfgs(
            wph, goal, start, settings.max_iter, settings.tol, chunk, device, dtype, report
        )
        out = x.astype(np.float64) * scale
        images.append(out[..., :n, :n])
        losses.append(lf.cpu().numpy())
        losses0.append((l0 if lg is None else lg).cpu().numpy())
        losses_start.append(l0.cpu().numpy())
        iters.append(done)
    if progress is not None:
        progress(
            {
                "batch": n_batches,
                "n_batches": n_batches,
                "iteration": iters[-1],
                "max_iter": settings.max_iter,
                "loss": float(np.mean(np.concatenate(losses))),
                "images_done": settings.n_images,
                "n_images": settings.n_images,
                "stage": "done",
            }
        )
    return SynthesisResult(
        images=np.concatenate(images),
        loss=np.concatenate(losses).astype(np.float64),
        loss_initial=np.concatenate(losses0).astype(np.float64),
        loss_start=np.concatenate(losses_start).astype(np.float64),
        iterations=iters,
        seconds=time.perf_counter() - t0,
        n_moments=counts,
        history=history,
        coarse_iterations=coarse_iters,
    )
