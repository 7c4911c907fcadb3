"""Figures of a comparison, as PNG bytes (matplotlib, Agg backend).

* :func:`param_figure`: one varying param against the objective and every key metric, E and
  B side by side; a numeric param on a numeric axis (logarithmic when it spans more than a
  factor 50 and is positive), a categorical one as a strip plot with a small fixed jitter.
* :func:`z_hist_figure`: each run's z histogram (density) overlaid on the N(0, 1) density.
* :func:`coverage_figure`: each run's empirical coverage against the nominal level, with the
  diagonal of perfect calibration.

Runs are coloured by rank (viridis: dark is best) so that the same run has the same colour
in every figure.
"""

from __future__ import annotations

import io
from collections.abc import Mapping

import numpy as np
from scipy import stats

from skymoments.calibration.metrics import COMPONENTS
from skymoments.compare.artifacts import CalibrationCurves
from skymoments.compare.core import KEY_METRICS, Comparison
from skymoments.compare.params import VaryingParam

__all__ = ["coverage_figure", "param_figure", "run_colours", "z_hist_figure"]

_COMPONENT_STYLE = {"E": ("o", "tab:blue"), "B": ("s", "tab:orange")}
# Jitter of a strip plot, in category widths: small enough that categories stay apart.
_JITTER = 0.12
_LOG_SPAN = 50.0


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _png(fig) -> bytes:
    plt = _plt()
    buffer = io.BytesIO()
    try:
        # Fixed margins (set by each figure) rather than tight bounding boxes: the tight
        # layout measures every tick label again and costs more than the drawing itself.
        fig.savefig(buffer, format="png", dpi=90)
    finally:
        plt.close(fig)
    return buffer.getvalue()


def run_colours(comp: Comparison) -> dict[str, tuple]:
    """A colour per ranked run id (viridis by rank, best darkest); unranked runs grey."""
    plt = _plt()
    ranked = comp.ranked
    cmap = plt.get_cmap("viridis")
    out = {}
    for k, entry in enumerate(ranked):
        out[entry.run.run_id] = cmap(0.85 * k / max(len(ranked) - 1, 1))
    for entry in comp.unranked:
        out[entry.run.run_id] = (0.6, 0.6, 0.6, 1.0)
    return out


def _positions(param: VaryingParam, index: list[int]) -> tuple[np.ndarray, list[str] | None, bool]:
    """x positions of the runs ``index``; tick labels for a categorical param; log scale."""
    if param.numeric:
        values = param.floats()
        x = np.array([np.nan if values[i] is None else values[i] for i in index], dtype=float)
        finite = x[np.isfinite(x)]
        log = bool(finite.size and finite.min() > 0 and finite.max() / finite.min() > _LOG_SPAN)
        return x, None, log
    labels: list[str] = []
    for v in param.values:
        label = "(unset)" if v is None else v
        if label not in labels:
            labels.append(label)
    x = np.empty(len(index))
    for j, i in enumerate(index):
        v = param.values[i]
        # Fixed jitter from the run's position, not random: the same report every time.
        offset = _JITTER * (((j * 7) % 5) - 2) / 2
        x[j] = labels.index("(unset)" if v is None else v) + offset
    return x, labels, False


def param_figure(comp: Comparison, param: VaryingParam) -> bytes:
    """The objective and each key metric (E, B) against one varying param; PNG bytes.

    Only runs with metrics (finished runs) are drawn; the best run is ringed in red.
    """
    plt = _plt()
    index = [i for i, e in enumerate(comp.entries) if e.run.status == "FINISHED"]
    x, labels, log = _positions(param, index)
    panels = [(comp.objective.name, None, None)] + list(KEY_METRICS)
    ncols = 4
    nrows = int(np.ceil(len(panels) / ncols))
    fig, axes = plt.subplots(nrows, ncols, figsize=(3.1 * ncols, 2.5 * nrows), squeeze=False)
    best = comp.best.run.run_id if comp.best else None
    for ax, (label, stem, ideal) in zip(axes.flat, panels, strict=False):
        drawn = False
        if stem is None:
            y = np.array(
                [np.nan if comp.entries[i].value is None else comp.entries[i].value for i in index],
                dtype=float,
            )
            series = [("objective", y, "D", "black")]
        else:
            series = []
            for c in COMPONENTS:
                marker, colour = _COMPONENT_STYLE[c]
                y = np.array(
                    [comp.entries[i].run.metrics.get(f"{stem}_{c}", np.nan) for i in index],
                    dtype=float,
                )
                series.append((c, y, marker, colour))
        for name, y, marker, colour in series:
            ok = np.isfinite(x) & np.isfinite(y)
            if not ok.any():
                continue
            drawn = True
            ax.scatter(x[ok], y[ok], marker=marker, color=colour, s=28, alpha=0.85, label=name)
            for j in np.flatnonzero(ok):
                if comp.entries[index[j]].run.run_id == best:
                    ax.scatter([x[j]], [y[j]], s=110, facecolors="none", edgecolors="red")
        if ideal is not None and drawn:
            ax.axhline(ideal, color="grey", lw=0.8, ls="--")
        if not drawn:
            ax.text(0.5, 0.5, "no data", ha="center", va="center", transform=ax.transAxes)
        ax.set_title(label if stem is None else f"{label} ({stem}_C)", fontsize=8)
        if labels is not None:
            ax.set_xticks(range(len(labels)))
            ax.set_xticklabels([t[:14] for t in labels], rotation=30, ha="right", fontsize=7)
            ax.set_xlim(-0.5, len(labels) - 0.5)
        elif log:
            ax.set_xscale("log")
        ax.tick_params(labelsize=7)
        if stem is not None and drawn and label == KEY_METRICS[0][0]:
            ax.legend(fontsize=7, loc="best")
    for ax in list(axes.flat)[len(panels) :]:
        ax.axis("off")
    alias = f" (with {len(param.aliases)} confounded)" if param.aliases else ""
    fig.suptitle(f"{param.key}{alias}", fontsize=10)
    bottom = 0.16 if labels is not None else 0.08
    fig.subplots_adjust(left=0.06, right=0.99, bottom=bottom, top=0.9, wspace=0.3, hspace=0.55)
    return _png(fig)


def _runs_with(comp: Comparison, curves: Mapping[str, CalibrationCurves], attr: str) -> list:
    return [
        e for e in comp.ranked if e.run.run_id in curves and getattr(curves[e.run.run_id], attr)
    ]


def _legend(ax, n: int) -> None:
    if n <= 12:
        ax.legend(fontsize=6, loc="best")


def z_hist_figure(comp: Comparison, curves: Mapping[str, CalibrationCurves]) -> bytes | None:
    """Overlaid z histograms (E, B panels) with the N(0, 1) density; None without data."""
    entries = _runs_with(comp, curves, "has_z_hist")
    if not entries:
        return None
    plt = _plt()
    colours = run_colours(comp)
    fig, axes = plt.subplots(
        1, len(COMPONENTS), figsize=(5.2 * len(COMPONENTS), 3.4), squeeze=False
    )
    lo = min(float(curves[e.run.run_id].z_edges[0]) for e in entries)
    hi = max(float(curves[e.run.run_id].z_edges[-1]) for e in entries)
    grid = np.linspace(lo, hi, 400)
    for ax, c in zip(axes[0], COMPONENTS, strict=True):
        for e in entries:
            cv = curves[e.run.run_id]
            ax.stairs(
                cv.z_density[c],
                cv.z_edges,
                color=colours[e.run.run_id],
                lw=1.2,
                label=f"#{e.rank} {e.run.name or e.run.run_id[:8]}",
            )
        # A calibrated posterior's z = (truth - mean) / std follows N(0, 1).
        ax.plot(grid, stats.norm.pdf(grid), color="black", ls="--", lw=1.2, label="N(0, 1)")
        ax.set_title(f"z histogram, {c}", fontsize=9)
        ax.set_xlabel("z = (truth - mean) / std", fontsize=8)
        ax.set_ylabel("density", fontsize=8)
        ax.tick_params(labelsize=7)
        _legend(ax, len(entries) + 1)
    fig.subplots_adjust(left=0.07, right=0.99, bottom=0.14, top=0.92, wspace=0.2)
    return _png(fig)


def coverage_figure(comp: Comparison, curves: Mapping[str, CalibrationCurves]) -> bytes | None:
    """Overlaid coverage curves (E, B panels) with the diagonal; None without data."""
    entries = _runs_with(comp, curves, "has_coverage")
    if not entries:
        return None
    plt = _plt()
    colours = run_colours(comp)
    fig, axes = plt.subplots(
        1, len(COMPONENTS), figsize=(4.2 * len(COMPONENTS), 3.8), squeeze=False
    )
    for ax, c in zip(axes[0], COMPONENTS, strict=True):
        ax.plot([0, 1], [0, 1], color="black", ls="--", lw=1.0, label="ideal")
        for e in entries:
            cv = curves[e.run.run_id]
            ax.plot(
                cv.coverage_levels,
                cv.coverage[c],
                marker=".",
                ms=3,
                lw=1.2,
                color=colours[e.run.run_id],
                label=f"#{e.rank} {e.run.name or e.run.run_id[:8]}",
            )
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        ax.set_aspect("equal")
        ax.set_title(f"coverage, {c}", fontsize=9)
        ax.set_xlabel("nominal credibility level", fontsize=8)
        ax.set_ylabel("empirical coverage", fontsize=8)
        ax.tick_params(labelsize=7)
        _legend(ax, len(entries) + 1)
    fig.subplots_adjust(left=0.08, right=0.99, bottom=0.12, top=0.93, wspace=0.25)
    return _png(fig)
