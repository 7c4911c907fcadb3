"""Calibration figures: each function returns a matplotlib Figure drawn on the Agg canvas.

Figures are built as ``matplotlib.figure.Figure`` objects with an Agg canvas, not through
pyplot, so they need no display, leave pyplot's global state and the user's backend alone
and are freed like any object. They are small (a few inches, 100 dpi) and carry units in
their labels. Callers save them (``fig.savefig(path)``) or log them as artifacts.
"""

from __future__ import annotations

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from scipy import stats

from skymoments.calibration.metrics import COMPONENTS

_COLOURS = {"E": "tab:blue", "B": "tab:red"}


def _subplots(nrows: int, ncols: int, figsize: tuple[float, float]):
    fig = Figure(figsize=figsize, dpi=100)
    FigureCanvasAgg(fig)
    return fig, fig.subplots(nrows, ncols, squeeze=False)


def _image(ax, img, title, label, cmap="RdBu_r", symmetric=True, extent=None):
    if symmetric:
        v = float(np.max(np.abs(img))) or 1.0
        im = ax.imshow(img, cmap=cmap, vmin=-v, vmax=v, origin="lower", extent=extent)
    else:
        im = ax.imshow(img, cmap=cmap, origin="lower", extent=extent)
    ax.set_title(title, fontsize=9)
    ax.set_xticks([])
    ax.set_yticks([])
    cb = ax.figure.colorbar(im, ax=ax, fraction=0.046, pad=0.03)
    cb.set_label(label, fontsize=7)
    cb.ax.tick_params(labelsize=6)


def map_grid(
    truth_eb: np.ndarray,
    data_eb: np.ndarray,
    mean_eb: np.ndarray,
    std_eb: np.ndarray,
    baseline_mean_eb: np.ndarray | None = None,
    baseline_name: str = "Wiener",
    side_deg: float | None = None,
) -> Figure:
    """Grid of one validation map: rows E and B; truth, data, mean, std, z (and baseline).

    Parameters
    ----------
    truth_eb, data_eb, mean_eb, std_eb : ndarray, shape (2, npix, npix), microkelvin
        ``data_eb`` is the data's own E/B (``qu_to_eb(data_qu)``).
    baseline_mean_eb : ndarray, shape (2, npix, npix), microkelvin, optional
    side_deg : float, optional
        Patch side, for the axis extent.
    """
    cols = [("truth", truth_eb, "uK"), ("data", data_eb, "uK"), ("posterior mean", mean_eb, "uK")]
    if baseline_mean_eb is not None:
        cols.append((f"{baseline_name} mean", baseline_mean_eb, "uK"))
    extent = None if side_deg is None else (0, side_deg, 0, side_deg)
    ncol = len(cols) + 2
    fig, axes = _subplots(2, ncol, (2.1 * ncol, 4.2))
    z = (truth_eb - mean_eb) / std_eb
    for r, c in enumerate(COMPONENTS):
        for j, (name, arr, unit) in enumerate(cols):
            _image(axes[r, j], arr[r], f"{c} {name}", f"{c} [{unit}]", extent=extent)
        _image(
            axes[r, len(cols)],
            std_eb[r],
            f"{c} posterior std",
            "std [uK]",
            cmap="viridis",
            symmetric=False,
            extent=extent,
        )
        _image(axes[r, len(cols) + 1], z[r], f"{c} z", "z = (truth - mean)/std", extent=extent)
    fig.tight_layout()
    return fig


def z_histogram(z: np.ndarray, z_baseline: np.ndarray | None = None, bins: int = 60) -> Figure:
    """Histograms of z for E and B with the N(0, 1) density drawn over them.

    Parameters
    ----------
    z : ndarray, shape (n, 2, npix, npix)
    z_baseline : ndarray, same shape, optional
        z of the baseline, drawn as a step outline.
    """
    fig, (axes,) = _subplots(1, 2, (7.0, 3.0))
    grid = np.linspace(-5, 5, 400)
    edges = np.linspace(-5, 5, bins + 1)
    for i, c in enumerate(COMPONENTS):
        ax = axes[i]
        ax.hist(
            np.clip(z[:, i].ravel(), -5, 5),
            bins=edges,
            density=True,
            alpha=0.6,
            color=_COLOURS[c],
            label="network",
        )
        if z_baseline is not None:
            ax.hist(
                np.clip(z_baseline[:, i].ravel(), -5, 5),
                bins=edges,
                density=True,
                histtype="step",
                color="k",
                label="Wiener",
            )
        ax.plot(grid, stats.norm.pdf(grid), "k--", lw=1, label="N(0, 1)")
        ax.set_xlabel(f"z_{c} = (truth - mean) / std")
        ax.set_ylabel("density")
        ax.set_yscale("log")
        ax.set_ylim(1e-4, 1.0)
        ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def coverage_plot(
    levels: np.ndarray,
    curves: dict[str, np.ndarray],
    baseline_curves: dict[str, np.ndarray] | None = None,
) -> Figure:
    """Empirical against expected coverage of Gaussian central intervals, E and B.

    Left: the curve with the diagonal. Right: empirical minus expected, where departures
    of a percent are visible.

    Parameters
    ----------
    levels : ndarray, shape (L,)
    curves : dict with ``"E"``, ``"B"`` -> ndarray, shape (L,)
    baseline_curves : same, optional (the Wiener baseline)
    """
    fig, ((ax, dax),) = _subplots(1, 2, (7.2, 3.4))
    ax.plot([0, 1], [0, 1], "k:", lw=1, label="ideal")
    dax.axhline(0.0, color="k", ls=":", lw=1)
    for c in COMPONENTS:
        ax.plot(levels, curves[c], "o-", ms=3, color=_COLOURS[c], label=f"network {c}")
        dax.plot(levels, curves[c] - levels, "o-", ms=3, color=_COLOURS[c], label=f"network {c}")
        if baseline_curves is not None:
            for a, y in ((ax, baseline_curves[c]), (dax, baseline_curves[c] - levels)):
                a.plot(levels, y, "s--", ms=3, color=_COLOURS[c], alpha=0.6, label=f"Wiener {c}")
    ax.set_xlabel("credibility level p (Gaussian interval)")
    ax.set_ylabel("empirical coverage")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.legend(fontsize=7)
    dax.set_xlabel("credibility level p (Gaussian interval)")
    dax.set_ylabel("empirical - expected coverage")
    dax.set_xlim(0, 1)
    dax.legend(fontsize=7)
    fig.suptitle("mean +- norm.ppf((1+p)/2) std; below the diagonal = over-confident", fontsize=8)
    fig.tight_layout()
    return fig


def pit_plot(edges: np.ndarray, pits: dict[str, np.ndarray]) -> Figure:
    """PIT histograms (density, ideal 1) for E and B."""
    fig, ((ax,),) = _subplots(1, 1, (3.6, 3.0))
    for c in COMPONENTS:
        ax.stairs(pits[c], edges, color=_COLOURS[c], label=c)
    ax.axhline(1.0, color="k", ls=":", lw=1, label="uniform")
    ax.set_xlabel("PIT = Phi(z)")
    ax.set_ylabel("density")
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def spectra_panel(
    arrays: dict[str, np.ndarray], baseline: dict[str, np.ndarray] | None = None
) -> Figure:
    """r_ell, T_ell and the residual against the signal spectrum, E and B.

    Parameters
    ----------
    arrays : dict
        From ``multipole_figures``: ``ell``, ``r_ell_C``, ``T_ell_C``, ``cl_signal_C``,
        ``cl_residual_C`` and optionally ``cl_residual_data_C``.
    baseline : dict, optional
        The same keys for the Wiener baseline.
    """
    ell = arrays["ell"]
    fig, (axes,) = _subplots(1, 3, (10.5, 3.2))
    for c in COMPONENTS:
        col = _COLOURS[c]
        axes[0].plot(ell, arrays[f"r_ell_{c}"], "-", color=col, label=f"network {c}")
        axes[1].plot(ell, arrays[f"T_ell_{c}"], "-", color=col, label=f"network {c}")
        axes[2].semilogy(ell, arrays[f"cl_signal_{c}"], "-", color=col, label=f"signal {c}")
        axes[2].semilogy(ell, arrays[f"cl_residual_{c}"], "--", color=col, label=f"residual {c}")
        if f"cl_residual_data_{c}" in arrays:
            axes[2].semilogy(
                ell, arrays[f"cl_residual_data_{c}"], ":", color=col, label=f"data - truth {c}"
            )
        if baseline is not None:
            axes[0].plot(ell, baseline[f"r_ell_{c}"], ":", color=col, label=f"Wiener {c}")
            axes[1].plot(ell, baseline[f"T_ell_{c}"], ":", color=col, label=f"Wiener {c}")
    axes[0].set_ylabel("r_ell = C^XY / sqrt(C^XX C^YY)")
    axes[1].set_ylabel("T_ell = C^XY / C^YY")
    axes[2].set_ylabel("C_ell [uK^2]")
    for ax in axes:
        ax.set_xlabel("multipole ell")
        ax.legend(fontsize=6)
    axes[0].axhline(1, color="k", lw=0.5)
    axes[1].axhline(1, color="k", lw=0.5)
    fig.tight_layout()
    return fig


def fg_intensity_plot(arrays: dict[str, np.ndarray]) -> Figure:
    """z std, predicted std and |mean|/|truth| against the local foreground intensity.

    Parameters
    ----------
    arrays : dict
        From ``stratified_calibration``: ``fg_centres`` and per component ``z_std_fg_C``,
        ``std_fg_C``, ``abs_mean_fg_C``, ``abs_truth_fg_C``; optional ``wiener_z_std_fg_C``.
    """
    x = arrays["fg_centres"]
    fig, (axes,) = _subplots(1, 3, (10.5, 3.0))
    for c in COMPONENTS:
        col = _COLOURS[c]
        axes[0].plot(x, arrays[f"z_std_fg_{c}"], "o-", color=col, label=f"network {c}")
        if f"wiener_z_std_fg_{c}" in arrays:
            axes[0].plot(
                x, arrays[f"wiener_z_std_fg_{c}"], "s--", color=col, alpha=0.6, label=f"Wiener {c}"
            )
        axes[1].plot(x, arrays[f"std_fg_{c}"], "o-", color=col, label=c)
        axes[2].plot(
            x, arrays[f"abs_mean_fg_{c}"] / arrays[f"abs_truth_fg_{c}"], "o-", color=col, label=c
        )
    axes[0].axhline(1, color="k", ls=":", lw=1)
    axes[0].set_ylabel("z std (diagnostic: need not be 1)")
    axes[0].set_title("bins of the true foreground", fontsize=8)
    axes[1].set_ylabel("mean predicted std [uK]")
    axes[2].set_ylabel("mean |posterior mean| / mean |truth|")
    for ax in axes:
        ax.set_xlabel("local foreground |P| (median of bin) [uK]")
        ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def std_over_exact_plot(ratio_eb: np.ndarray, side_deg: float | None = None) -> Figure:
    """Map of predicted std over exact-posterior std (mean over maps), E and B.

    Parameters
    ----------
    ratio_eb : ndarray, shape (2, npix, npix)
    """
    extent = None if side_deg is None else (0, side_deg, 0, side_deg)
    fig, (axes,) = _subplots(1, 2, (6.4, 3.0))
    dev = max(float(np.max(np.abs(ratio_eb - 1.0))), 0.02)
    for i, c in enumerate(COMPONENTS):
        im = axes[i].imshow(
            ratio_eb[i], cmap="RdBu_r", vmin=1 - dev, vmax=1 + dev, origin="lower", extent=extent
        )
        axes[i].set_title(f"{c}: predicted std / exact std", fontsize=9)
        axes[i].set_xticks([])
        axes[i].set_yticks([])
        cb = fig.colorbar(im, ax=axes[i], fraction=0.046, pad=0.03)
        cb.set_label("ratio (ideal 1)", fontsize=7)
    fig.tight_layout()
    return fig


def data_strata_plot(arrays: dict[str, np.ndarray]) -> Figure:
    """z std per predicted-std decile and per observed-intensity quartile (ideal 1 in each).

    Parameters
    ----------
    arrays : dict
        From ``data_stratified_calibration``: ``std_dec_centres_C``, ``z_std_stddec_C``,
        ``data_p_centres``, ``z_std_dbin_C``; optional ``z_std_fg_C`` and ``fg_centres``
        (true-foreground bins, drawn as the diagnostic they are).
    """
    has_fg = "fg_centres" in arrays
    fig, (axes,) = _subplots(1, 3 if has_fg else 2, ((10.5 if has_fg else 7.0), 3.0))
    for c in COMPONENTS:
        col = _COLOURS[c]
        axes[0].plot(
            arrays[f"std_dec_centres_{c}"], arrays[f"z_std_stddec_{c}"], "o-", color=col, label=c
        )
        axes[1].plot(arrays["data_p_centres"], arrays[f"z_std_dbin_{c}"], "o-", color=col, label=c)
        if has_fg:
            axes[2].plot(arrays["fg_centres"], arrays[f"z_std_fg_{c}"], "o--", color=col, label=c)
    axes[0].set_xlabel("predicted std, decile median [uK]")
    axes[0].set_xscale("log")
    axes[1].set_xlabel("observed data |P| (smoothed), quartile median [uK]")
    axes[0].set_title("bins of the predicted std: ideal 1", fontsize=8)
    axes[1].set_title("bins of the data: ideal 1", fontsize=8)
    if has_fg:
        axes[2].set_xlabel("true foreground |P| (smoothed) [uK]")
        axes[2].set_title("diagnostic: bins of the truth, need not be 1", fontsize=8)
    for ax in axes:
        ax.axhline(1, color="k", ls=":", lw=1)
        ax.axhspan(0.8, 1.25, color="0.9", zorder=0)
        ax.set_ylabel("z std")
        ax.legend(fontsize=7)
    fig.tight_layout()
    return fig
