"""A scenario: the joint distribution of (CMB signal, foreground, noise, parameters, data).

Generative model, per map i (all maps independent):

    r_i, A_lens,i, a_fg,i, w_i ~ priors
    (E, B)_i  ~ Gaussian with C^EE = C^EE,lens + r_i C^EE,tens,  C^BB = A_lens,i C^BB,lens
                + r_i C^BB,tens                                    (the target, before beam)
    (Q, U)_i  = the same signal as Q/U
    F_i       = a_fg,i * foreground.draw()                       (Q/U, microkelvin)
    N_i       ~ white noise of w_i uK-arcmin per Q and U
    data_i    = beam * (signal_i + F_i) + N_i

With ``margin > 0`` every map is a cut-out: the CMB, its target E/B, the generator
foreground and the beam are made on a parent patch of ``npix + 2 margin`` pixels a side (the
same pixel size), and the central ``npix x npix`` is kept, so the maps are not periodic, as
cuts of a real sky are not (see :meth:`Scenario.draw_components`).

The per-map spectrum needs no grouping: the realization is one unit white-noise field per
component, filtered by ``sqrt((A_lens C^lens + r C^tens) / Omega_pix)`` with that map's own
amplitudes (sky.gaussian), which is exactly a Gaussian field of the summed spectrum.

Power-spectrum helpers used by the Wiener and exact baselines are all referred to the
sky, i.e. to beam-deconvolved data: noise power is ``w^2 arcmin^2 / B_ell^2``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from skymoments.maps.eb import eb_to_qu, qu_to_eb
from skymoments.maps.geometry import FlatPatch
from skymoments.sky.cmb import CMBSpectra
from skymoments.sky.foregrounds import Foreground, ImageBank
from skymoments.sky.gaussian import gaussian_eb, interp_cl_2d
from skymoments.sky.noise import apply_beam, beam_transfer, white_noise_qu
from skymoments.sky.noise import noise_power_2d as _white_power_2d
from skymoments.sky.priors import Fixed, Prior, prior_from_config
from skymoments.sky.seeds import as_generator

__all__ = ["PARAM_NAMES", "Scenario", "SkyDraw", "check_margin"]

PARAM_NAMES: tuple[str, ...] = ("r", "a_lens", "a_fg", "noise_uk_arcmin")

# Beam transfer values below this are treated as this when deconvolving noise power, so
# that a wide beam gives a huge but finite noise power instead of inf.
_MIN_BEAM = 1e-30


def check_margin(margin) -> int:
    """``margin`` as an int if it is a whole number of pixels >= 0, else a one-line ValueError."""
    ok = not isinstance(margin, bool) and isinstance(margin, int | np.integer | float)
    if not ok or not np.isfinite(margin) or margin < 0 or int(margin) != margin:
        raise ValueError(
            f"patch.margin must be a whole number of pixels >= 0 (0: periodic maps), got {margin!r}"
        )
    return int(margin)


@dataclass(frozen=True)
class SkyDraw:
    """One batch of training or validation pairs.

    Attributes
    ----------
    data_qu : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        Observed Q/U: beam * (signal + foreground) + noise.
    target_eb : ndarray or torch.Tensor, shape (n, 2, npix, npix), microkelvin
        The CMB signal's E/B maps before the beam.
    params : ndarray or torch.Tensor, shape (n, 4)
        Drawn parameters, columns in ``param_names`` order.
    param_names : tuple of str
    """

    data_qu: object
    target_eb: object
    params: object
    param_names: tuple[str, ...] = PARAM_NAMES


class Scenario:
    """CMB signal + foreground + noise on a flat patch, with priors on four amplitudes.

    Parameters
    ----------
    patch : FlatPatch
    cmb : CMBSpectra
        Lensed and r = 1 tensor spectra (sky.cmb.cmb_spectra).
    foreground : Foreground
        Any object with ``draw(patch, rng, n)`` and ``name`` (sky.foregrounds).
    priors : dict
        Priors (or config dicts) for every name in :data:`PARAM_NAMES`; all supports
        must be >= 0 (amplitudes and a noise level).
    beam_fwhm_arcmin : float
        Gaussian beam applied to signal and foreground; 0 for none.
    margin : int
        Pixels drawn on each side of the patch and cut away (``patch.margin`` of a config):
        0 draws periodic maps on the patch itself; > 0 draws cut-outs of a parent patch of
        ``npix + 2 margin`` pixels (:meth:`draw_components`). The spectra and the noise
        power helpers stay those of the periodic patch (for the baselines); the variance
        ceiling is the cut-out's pixel variance (:meth:`target_variance_bounds`).
    """

    def __init__(
        self,
        patch: FlatPatch,
        cmb: CMBSpectra,
        foreground: Foreground,
        priors: dict,
        beam_fwhm_arcmin: float = 0.0,
        margin: int = 0,
    ) -> None:
        if not isinstance(patch, FlatPatch):
            raise ValueError(f"patch must be a FlatPatch, got {type(patch).__name__}")
        if not isinstance(cmb, CMBSpectra):
            raise ValueError(
                f"cmb must be a CMBSpectra (sky.cmb.cmb_spectra), got {type(cmb).__name__}"
            )
        if not callable(getattr(foreground, "draw", None)):
            raise ValueError(
                "foreground must have a draw(patch, rng, n) method, "
                f"got {type(foreground).__name__}"
            )
        missing = [k for k in PARAM_NAMES if k not in priors]
        extra = sorted(set(priors) - set(PARAM_NAMES))
        if missing or extra:
            raise ValueError(
                f"priors must have exactly the keys {', '.join(PARAM_NAMES)}; "
                + (f"missing: {', '.join(missing)}" if missing else "")
                + ("; " if missing and extra else "")
                + (f"unknown: {', '.join(extra)}" if extra else "")
            )
        self.priors: dict[str, Prior] = {}
        for key in PARAM_NAMES:
            try:
                prior = prior_from_config(priors[key])
            except ValueError as err:
                raise ValueError(f"prior.{key}: {err}") from None
            if prior.support[0] < 0:
                raise ValueError(
                    f"prior.{key} reaches {prior.support[0]} < 0; {key} is an amplitude or a "
                    "noise level and must stay >= 0 (raise its low bound)"
                )
            self.priors[key] = prior
        beam = float(beam_fwhm_arcmin)
        if not np.isfinite(beam) or beam < 0:
            raise ValueError(f"beam_fwhm_arcmin must be >= 0 arcmin, got {beam_fwhm_arcmin!r}")
        self.patch = patch
        self.cmb = cmb
        self.foreground = foreground
        self.beam_fwhm_arcmin = beam
        self.param_names = PARAM_NAMES
        self._ee_lens = interp_cl_2d(cmb.ell, cmb.ee_lensed, patch)
        self._bb_lens = interp_cl_2d(cmb.ell, cmb.bb_lensed, patch)
        self._ee_tens = interp_cl_2d(cmb.ell, cmb.ee_tensor, patch)
        self._bb_tens = interp_cl_2d(cmb.ell, cmb.bb_tensor, patch)
        self.beam_2d = beam_transfer(patch, beam)
        self.beam_2d.setflags(write=False)
        self.margin = check_margin(margin)
        self.parent_patch = (
            FlatPatch(patch.npix + 2 * self.margin, patch.pixel_arcmin) if self.margin else patch
        )
        if self.margin:
            parent = self.parent_patch
            self._parent_spectra = tuple(
                interp_cl_2d(cmb.ell, cl, parent)
                for cl in (cmb.ee_lensed, cmb.bb_lensed, cmb.ee_tensor, cmb.bb_tensor)
            )

    def __repr__(self) -> str:
        pri = ", ".join(f"{k}={v!r}" for k, v in self.priors.items())
        cut = f", margin={self.margin}" if self.margin else ""
        return (
            f"Scenario({self.patch!r}, foreground={self.foreground!r}, "
            f"beam_fwhm_arcmin={self.beam_fwhm_arcmin}{cut}, {pri})"
        )

    # ------------------------------------------------------------------ spectra
    def signal_power_2d(self, r, a_lens) -> tuple[np.ndarray, np.ndarray]:
        """CMB EE and BB power on the 2-D multipole grid for given amplitudes.

        Parameters
        ----------
        r, a_lens : float or ndarray, shape (n,)

        Returns
        -------
        ee2d, bb2d : ndarray, shape (npix, npix) or (n, npix, npix), uK^2
        """
        r = np.asarray(r, dtype=float)
        a_lens = np.asarray(a_lens, dtype=float)
        for name, v in (("r", r), ("a_lens", a_lens)):
            if v.ndim > 1 or not np.all(np.isfinite(v)) or np.any(v < 0):
                raise ValueError(f"{name} must be finite, >= 0, a number or a 1-D array")
        shape = np.broadcast_shapes(r.shape, a_lens.shape)
        r3 = np.broadcast_to(r, shape)[..., None, None]
        a3 = np.broadcast_to(a_lens, shape)[..., None, None]
        ee = self._ee_lens + r3 * self._ee_tens
        bb = a3 * self._bb_lens + r3 * self._bb_tens
        return ee, bb

    def _drawn_power_2d(self, r, a_lens):
        """:meth:`signal_power_2d` on the grid the CMB is drawn on (the parent patch)."""
        if not self.margin:
            return self.signal_power_2d(r, a_lens)
        ee_l, bb_l, ee_t, bb_t = self._parent_spectra
        r3 = np.asarray(r, dtype=float)[..., None, None]
        a3 = np.asarray(a_lens, dtype=float)[..., None, None]
        return ee_l + r3 * ee_t, a3 * bb_l + r3 * bb_t

    def mean_signal_power_2d(self) -> tuple[np.ndarray, np.ndarray]:
        """Prior average of the CMB EE and BB power, each (npix, npix), uK^2.

        The spectrum is linear in r and A_lens, so its prior average is the spectrum at
        the prior means, exactly.
        """
        return self.signal_power_2d(self.priors["r"].mean(), self.priors["a_lens"].mean())

    def prior_mean(self, name: str) -> float:
        """Prior mean of one parameter."""
        return self._prior(name).mean()

    def prior_second_moment(self, name: str) -> float:
        """Prior ``E[x^2]`` of one parameter (foreground power scales with ``a_fg^2``)."""
        return self._prior(name).second_moment()

    def _prior(self, name: str) -> Prior:
        if name not in self.priors:
            raise ValueError(f"unknown parameter {name!r}; known: {', '.join(PARAM_NAMES)}")
        return self.priors[name]

    def noise_power_2d(self, uk_arcmin) -> np.ndarray:
        """White-noise power referred to the sky (divided by B_ell^2), uK^2.

        Parameters
        ----------
        uk_arcmin : float or ndarray, shape (n,)

        Returns
        -------
        ndarray, shape (npix, npix) or (n, npix, npix)
            The same for Q, U, E and B.
        """
        return _white_power_2d(self.patch, uk_arcmin) / np.maximum(self.beam_2d, _MIN_BEAM) ** 2

    def mean_noise_power_2d(self) -> np.ndarray:
        """Prior average of the noise power (uses ``E[w^2]``), shape (npix, npix), uK^2."""
        w2 = self.prior_second_moment("noise_uk_arcmin")
        return self.noise_power_2d(np.sqrt(w2))

    def foreground_power_2d(self) -> tuple[np.ndarray, np.ndarray]:
        """Foreground EE and BB power at unit amplitude, when the model knows it analytically.

        Raises
        ------
        ValueError
            For foregrounds without a ``power_2d`` method (estimate it from maps instead).
        """
        power = getattr(self.foreground, "power_2d", None)
        if power is None:
            raise ValueError(
                f"foreground {getattr(self.foreground, 'name', '?')!r} has no analytic spectrum; "
                "estimate it from maps (calibration.wiener)"
            )
        return power(self.patch)

    def target_variance_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Per-pixel bounds of the posterior variance of the target E and B, uK^2.

        Ceiling: the prior variance of one target pixel at the top of the prior support of
        ``r`` and ``A_lens``. For a periodic stationary field the pixel variance is
        ``mean_k C(k) / Omega_pix`` (Parseval with ``<|X_k|^2> = C npix^2 / Omega_pix``); the
        spectrum grows with both amplitudes, so that is the largest prior variance. The
        posterior variance of a Gaussian signal given ``d`` never exceeds it, and on average
        no posterior variance does (law of total variance). A cut-out (``margin > 0``) is
        part of the parent patch's field, so its pixel variance is the mean over the
        parent's modes.

        Floor: the posterior pixel variance when everything but the white noise is known,
        the signal at the bottom of the prior support and the noise at its lowest:
        ``mean_k S N / (S + N) / Omega_pix`` (the Wiener posterior variance). Knowing more
        can only lower the expected posterior variance, so the true one is above it on
        average. With noise-free data it is 0.

        Returns
        -------
        floor, ceiling : ndarray, shape (2,), uK^2, for (E, B)
        """

        def top(name):
            lo, hi = self.priors[name].support
            return (
                hi
                if np.isfinite(hi)
                else self.priors[name].mean() + 5 * np.sqrt(max(self.priors[name].var(), 0.0))
            )

        omega = self.patch.omega_pix
        ee_hi, bb_hi = self._drawn_power_2d(top("r"), top("a_lens"))
        ceiling = np.array([np.mean(ee_hi), np.mean(bb_hi)]) / omega
        ee_lo, bb_lo = self.signal_power_2d(
            self.priors["r"].support[0], self.priors["a_lens"].support[0]
        )
        noise = self.noise_power_2d(self.priors["noise_uk_arcmin"].support[0])
        floor = []
        for s in (ee_lo, bb_lo):
            tot = s + noise
            post = np.divide(s * noise, tot, out=np.zeros_like(tot), where=tot > 0)
            floor.append(np.mean(post) / omega)
        return np.array(floor), ceiling

    def is_gaussian_fixed(self) -> bool:
        """True when every prior is fixed and the foreground is Gaussian.

        Then signal, foreground and noise are independent stationary Gaussian fields, and
        the Wiener filter is the exact posterior (Gaussian conditioning; Elsner & Wandelt 2013,
        arXiv:1210.4931).
        """
        fixed = all(isinstance(p, Fixed) for p in self.priors.values())
        return fixed and bool(getattr(self.foreground, "is_gaussian", False))

    def true_noise_power_2d(self) -> tuple[np.ndarray, np.ndarray]:
        """EE and BB power of everything but the CMB (foreground + noise), referred to the sky.

        ``a_fg^2 C^fg + w^2 arcmin^2 / B^2`` at the fixed prior values; meaningful when
        :meth:`is_gaussian_fixed`.
        """
        if not self.is_gaussian_fixed():
            raise ValueError(
                "true_noise_power_2d needs fixed priors and a Gaussian foreground "
                "(is_gaussian_fixed() is False)"
            )
        fg_ee, fg_bb = self.foreground_power_2d()
        a2 = self.prior_second_moment("a_fg")
        noise = self.mean_noise_power_2d()
        return a2 * fg_ee + noise, a2 * fg_bb + noise

    # ------------------------------------------------------------------ draws
    def sample_params(self, rng, n: int) -> np.ndarray:
        """Parameters from the priors, shape (n, 4), columns :data:`PARAM_NAMES`."""
        rng = as_generator(rng)
        children = rng.spawn(len(PARAM_NAMES))
        return np.stack(
            [self.priors[k].sample(c, n) for k, c in zip(PARAM_NAMES, children, strict=True)],
            axis=1,
        )

    def draw_components(self, rng, n: int, params: np.ndarray | None = None) -> dict:
        """Draw ``n`` maps with every component kept.

        With ``margin = 0`` every map is periodic on the patch. With ``margin = m > 0``
        every map is the central ``npix x npix`` cut of a parent patch of ``npix + 2 m``
        pixels a side: the CMB Q/U is drawn on the parent, its target E/B is the E/B of the
        parent Q/U (so the E/B of a pixel near the edge depends on Q/U outside the cut, as
        on the sky), the generator foreground is drawn on the parent too, the beam is
        applied on the parent, and then all are cut. The white noise is drawn on the cut.
        A foreground that is an :class:`~skymoments.sky.foregrounds.ImageBank` is drawn at
        the patch size as it is (periodic images stay periodic, a non-periodic bank gives
        windows inside its images) and beamed on the patch: a bank of patch-sized images
        has no content outside the patch to cut from, and the foreground is not the
        target; with non-circular padding the network never sees its wrap-around.

        Parameters
        ----------
        rng : numpy.random.Generator or int
            Parameters, signal, foreground and noise use independent child streams of it,
            so e.g. the CMB realization for a seed does not depend on the foreground model.
            A margin-``m`` draw's signal and generator foreground are the centre of the
            margin-0 draw of the same seed on the parent patch.
        n : int
        params : ndarray, shape (n, 4), optional
            Use these parameters instead of drawing them.

        Returns
        -------
        dict
            ``signal_eb``, ``signal_qu``, ``foreground_qu``, ``noise_qu``, ``data_qu``
            (each (n, 2, npix, npix), microkelvin) and ``params`` (n, 4).
        """
        if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
            raise ValueError(f"n (number of maps) must be a positive integer, got {n!r}")
        n = int(n)
        rng = as_generator(rng)
        r_par, r_cmb, r_fg, r_noise = rng.spawn(4)
        if params is None:
            params = self.sample_params(r_par, n)
        else:
            params = np.array(params, dtype=float)
            if params.shape != (n, len(PARAM_NAMES)):
                raise ValueError(
                    f"params has shape {params.shape}, expected ({n}, {len(PARAM_NAMES)}) "
                    f"with columns {', '.join(PARAM_NAMES)}"
                )
            if not np.all(np.isfinite(params)) or np.any(params < 0):
                raise ValueError("params must be finite and >= 0")
        r, a_lens, a_fg, noise = params.T
        m = self.margin
        grid = self.parent_patch  # the patch itself when m = 0
        ee, bb = self._drawn_power_2d(r, a_lens)
        signal_qu = eb_to_qu(gaussian_eb(grid, ee, bb, r_cmb, n), grid)
        # The target is the E/B content of the Q/U signal itself, so that it is exactly
        # recoverable from noise-free Q/U even where a grid's Q/U <-> E/B round trip is
        # not the identity (the self-conjugate corner mode of an even-sized grid).
        signal_eb = qu_to_eb(signal_qu, grid)
        on_parent = m > 0 and not isinstance(self.foreground, ImageBank)
        fg_grid = grid if on_parent else self.patch
        fg = np.asarray(self.foreground.draw(fg_grid, r_fg, n), dtype=float)
        if fg.shape != (n, 2, fg_grid.npix, fg_grid.npix):
            raise ValueError(
                f"foreground {getattr(self.foreground, 'name', '?')!r} returned shape {fg.shape}, "
                f"expected {(n, 2, fg_grid.npix, fg_grid.npix)}"
            )
        foreground_qu = a_fg[:, None, None, None] * fg
        beam = self.beam_fwhm_arcmin

        def cut(maps):
            return np.ascontiguousarray(maps[..., m : m + self.patch.npix, m : m + self.patch.npix])

        if m == 0 or on_parent:
            sky = signal_qu + foreground_qu
            if beam > 0:
                sky = apply_beam(sky, grid, beam)
            sky = cut(sky) if m else sky
            foreground_qu = cut(foreground_qu) if m else foreground_qu
        else:
            sky_cmb = apply_beam(signal_qu, grid, beam) if beam > 0 else signal_qu
            sky_fg = apply_beam(foreground_qu, self.patch, beam) if beam > 0 else foreground_qu
            sky = cut(sky_cmb) + sky_fg
        if m:
            signal_qu, signal_eb = cut(signal_qu), cut(signal_eb)
        noise_qu = white_noise_qu(self.patch, noise, r_noise, n)
        data_qu = sky + noise_qu
        return {
            "signal_eb": signal_eb,
            "signal_qu": signal_qu,
            "foreground_qu": foreground_qu,
            "noise_qu": noise_qu,
            "data_qu": data_qu,
            "params": params,
        }

    def draw(self, rng, n: int, as_torch: bool = False) -> SkyDraw:
        """Draw ``n`` (data, target, params) triples; see :meth:`draw_components`.

        Parameters
        ----------
        rng : numpy.random.Generator or int
        n : int
        as_torch : bool
            Return float32 torch tensors instead of float64 arrays.
        """
        parts = self.draw_components(rng, n)
        data, target, params = parts["data_qu"], parts["signal_eb"], parts["params"]
        if as_torch:
            import torch

            data, target, params = (
                torch.from_numpy(np.ascontiguousarray(x, dtype=np.float32))
                for x in (data, target, params)
            )
        return SkyDraw(data, target, params, PARAM_NAMES)
