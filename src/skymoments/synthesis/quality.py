"""How close synthesized maps are to a reference: spectra, pixel histograms, Minkowski
functionals (the checks of Regaldo-Saint Blancard et al., arXiv:2208.03538, abstract, and
Allys et al. 2020, arXiv:2006.06298, Sec. 5).

Metric definitions (the names are a contract: DEVELOPERS.md, Metric names):

* ``synth/ps_ratio_max_dev``: with binned spectra averaged over the synthesized maps (S)
  and over the reference maps (R), the largest over the kept ell bins of
  ``|S_EE / R_EE - 1|``, ``|S_BB / R_BB - 1|`` and ``|S_EB - R_EB| / sqrt(R_EE R_BB)``.
  EB can be close to zero, so its deviation is measured in units of the EE-BB geometric
  mean: a correlation-coefficient error. Kept bins: those at least 2 fundamental modes
  above 0 and below the Nyquist multipole (full annuli inside the Fourier square).
* ``synth/ks_pix``: the two-sample Kolmogorov-Smirnov distance (``scipy.stats.ks_2samp``)
  between the pooled pixel values of synthesized and reference maps, for Q, U and
  ``|P| = sqrt(Q^2 + U^2)``, averaged over the three (the mean is less noisy than the
  max; the per-field values are also returned).
* ``synth/mf_dev``: the three Minkowski functionals of the excursion sets ``{f > nu}``
  (area fraction, boundary length per pixel, Euler characteristic per pixel) at
  ``N_THRESHOLDS`` thresholds between the 2% and 98% quantiles of the reference's pixels,
  for Q, U and |P|. For each field and functional the deviation is
  ``sum_nu |MF_S(nu) - MF_R(nu)| / sum_nu |MF_R(nu)|``, a ratio of curve norms, so a
  functional that crosses zero (the Euler characteristic does) never divides by a
  near-zero value. ``mf_dev`` is the mean over the 3 fields x 3 functionals.

Each is also computed for a Gaussian surrogate with the same spectrum (``synth/gauss_*``)
so that a user sees what the synthesis adds over a Gaussian field.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from skymoments.maps.geometry import FlatPatch
from skymoments.maps.spectra import eb_spectra

N_THRESHOLDS = 15


def _fields(qu: np.ndarray) -> dict[str, np.ndarray]:
    qu = np.asarray(qu, dtype=float)
    if qu.ndim == 3:
        qu = qu[None]
    return {"Q": qu[:, 0], "U": qu[:, 1], "P": np.hypot(qu[:, 0], qu[:, 1])}


def spectrum_deviation(
    synth: np.ndarray, reference: np.ndarray, patch: FlatPatch, edges: np.ndarray | None = None
) -> dict[str, np.ndarray | float]:
    """Ratios of mean binned EE, BB and EB spectra of ``synth`` to those of ``reference``.

    Parameters
    ----------
    synth : ndarray, shape (M, 2, npix, npix), microkelvin (Q, U)
    reference : ndarray, shape (K, 2, npix, npix) or (2, npix, npix)
    patch : FlatPatch
    edges : ndarray, optional
        Multipole bin edges (default: ``patch.default_bin_edges()``).

    Returns
    -------
    dict with ``ell``, ``keep`` (bool mask of bins used), ``ratio_EE``, ``ratio_BB``,
    ``dev_EB`` (per bin), and ``max_dev`` (float), see the module docstring.
    """
    ref = np.asarray(reference, dtype=float)
    ref = ref[None] if ref.ndim == 3 else ref
    s = eb_spectra(np.asarray(synth, dtype=float), patch, edges=edges)
    r = eb_spectra(ref, patch, edges=edges)
    ell = s["ell"]
    se, sb, seb = (np.mean(s[k], axis=0) for k in ("EE", "BB", "EB"))
    re, rb, reb = (np.mean(r[k], axis=0) for k in ("EE", "BB", "EB"))
    keep = (ell > 2 * patch.ell_fundamental) & (ell < patch.ell_nyquist) & np.isfinite(re)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio_ee = se / re
        ratio_bb = sb / rb
        dev_eb = (seb - reb) / np.sqrt(re * rb)
    devs = np.concatenate(
        [np.abs(ratio_ee[keep] - 1), np.abs(ratio_bb[keep] - 1), np.abs(dev_eb[keep])]
    )
    return {
        "ell": ell,
        "keep": keep,
        "ratio_EE": ratio_ee,
        "ratio_BB": ratio_bb,
        "dev_EB": dev_eb,
        "max_dev": float(np.max(devs)),
    }


def ks_pixels(synth: np.ndarray, reference: np.ndarray) -> dict[str, float]:
    """KS distances of pooled pixel histograms of Q, U and |P|, and their mean (``mean``)."""
    fs, fr = _fields(synth), _fields(reference)
    out = {k: float(stats.ks_2samp(fs[k].ravel(), fr[k].ravel()).statistic) for k in fs}
    out["mean"] = float(np.mean([out[k] for k in ("Q", "U", "P")]))
    return out


def minkowski_functionals(field: np.ndarray, thresholds: np.ndarray) -> np.ndarray:
    """Area, boundary length and Euler characteristic of excursion sets on a periodic grid.

    The excursion set ``{f > nu}`` is the union of closed unit pixel squares; its Euler
    characteristic is ``V - E + F`` counting the vertices, edges and faces of those squares
    (a cubical complex; with this convention touching corners connect, i.e.
    8-connectivity of the set). The boundary length counts the pixel edges between a
    pixel in the set and one outside.

    Parameters
    ----------
    field : ndarray, shape (..., n, n)
        One or more maps; the functionals are summed over the leading axes.
    thresholds : ndarray, shape (T,)

    Returns
    -------
    ndarray, shape (3, T)
        Area fraction, boundary length per pixel and Euler characteristic per pixel.
    """
    f = np.asarray(field, dtype=float)
    f = f.reshape(-1, *f.shape[-2:])
    npix = f.size
    out = np.empty((3, len(thresholds)))
    for i, nu in enumerate(thresholds):
        s = f > nu
        up = np.roll(s, 1, axis=-2)  # pixel (i-1, j)
        left = np.roll(s, 1, axis=-1)  # pixel (i, j-1)
        diag = np.roll(up, 1, axis=-1)  # pixel (i-1, j-1)
        faces = s.sum()
        # Vertex (i, j) is the top-left corner of pixel (i, j); it belongs to the complex
        # if any of the four pixels around it is in the set.
        verts = (s | up | left | diag).sum()
        # Horizontal edge from vertex (i, j) to (i, j+1): shared by pixels (i-1, j), (i, j).
        e_h = (s | up).sum()
        # Vertical edge from vertex (i, j) to (i+1, j): shared by pixels (i, j-1), (i, j).
        e_v = (s | left).sum()
        perim = (s ^ up).sum() + (s ^ left).sum()
        out[0, i] = faces / npix
        out[1, i] = perim / npix
        out[2, i] = (verts - e_h - e_v + faces) / npix
    return out


def mf_deviation(synth: np.ndarray, reference: np.ndarray) -> dict[str, float]:
    """Mean relative deviation of the Minkowski functionals of Q, U and |P| (module doc)."""
    fs, fr = _fields(synth), _fields(reference)
    out = {}
    for k in fs:
        nu = np.quantile(fr[k], np.linspace(0.02, 0.98, N_THRESHOLDS))
        ms = minkowski_functionals(fs[k], nu)
        mr = minkowski_functionals(fr[k], nu)
        for m, name in enumerate(("area", "perimeter", "euler")):
            out[f"{k}_{name}"] = float(
                np.sum(np.abs(ms[m] - mr[m])) / max(np.sum(np.abs(mr[m])), 1e-300)
            )
    out["mean"] = float(np.mean(list(out.values())))
    return out


def gaussian_surrogate(image: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """Gaussian maps with the 2-D auto and cross spectra of ``image`` (C, n, n): (n, C, n, n).

    The same construction as the synthesis's starting point
    (:func:`skymoments.synthesis.synthesize.gaussian_start`).
    """
    from skymoments.synthesis.synthesize import gaussian_start

    return gaussian_start(np.asarray(image, dtype=float), n, rng)


def quality_metrics(
    synth: np.ndarray,
    reference: np.ndarray,
    patch: FlatPatch,
    surrogate: np.ndarray | None = None,
    prefix: str = "synth/",
    edges: np.ndarray | None = None,
) -> dict[str, float]:
    """The ``synth/...`` metrics of synthesized maps against a reference, and of a surrogate.

    Parameters
    ----------
    synth : ndarray, shape (M, 2, npix, npix), microkelvin
    reference : ndarray, shape (K, 2, npix, npix) or (2, npix, npix)
        The training image, or independent draws of the true foreground.
    patch : FlatPatch
    surrogate : ndarray, shape (M', 2, npix, npix), optional
        Gaussian maps with the same spectrum; their metrics get ``<prefix>gauss_``.
    prefix : str
        Name prefix, e.g. ``"synth/"`` or ``"synth/truth_"``.
    edges : ndarray, optional
        Multipole bin edges for the spectra.

    Returns
    -------
    dict
        ``<prefix>ps_ratio_max_dev``, ``<prefix>ks_pix``, ``<prefix>mf_dev`` (and the
        ``gauss_`` versions when a surrogate is given).
    """
    out = {}
    sets = [("", synth)] + ([("gauss_", surrogate)] if surrogate is not None else [])
    for tag, maps in sets:
        name = prefix + tag if prefix.endswith("/") else prefix.replace("/", "/" + tag, 1)
        out[name + "ps_ratio_max_dev"] = spectrum_deviation(maps, reference, patch, edges)[
            "max_dev"
        ]
        out[name + "ks_pix"] = ks_pixels(maps, reference)["mean"]
        out[name + "mf_dev"] = mf_deviation(maps, reference)["mean"]
    return out
