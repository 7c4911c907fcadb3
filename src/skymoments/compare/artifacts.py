"""Fetching the artifacts a comparison shows: calibration arrays and map grids.

A missing or unreadable artifact is not an error: it becomes a note that the report shows
where the figure would be. Only a tracking server that cannot be reached stops the
comparison (its :class:`~skymoments.tracking.TrackingUnavailableError` propagates).
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from skymoments.calibration.metrics import COMPONENTS
from skymoments.tracking import TrackingUnavailableError, download_artifact
from skymoments.tracking.settings import quiet_artifact_downloads

__all__ = [
    "ARRAYS_PATH",
    "GRID_PATH",
    "CalibrationCurves",
    "fetch_curves",
    "fetch_png",
]

ARRAYS_PATH = "calibration/arrays.npz"
GRID_PATH = "maps/grid.png"
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@dataclass
class CalibrationCurves:
    """The per-run curves a comparison overlays, read from ``calibration/arrays.npz``.

    Attributes
    ----------
    coverage_levels : ndarray, shape (L,), or None
        Nominal credibility levels.
    coverage : dict of str to ndarray, shape (L,)
        Empirical coverage per component (``"E"``, ``"B"``).
    z_edges : ndarray, shape (K + 1,), or None
        z histogram bin edges (dimensionless).
    z_density : dict of str to ndarray, shape (K,)
        z histogram densities per component.
    notes : list of str
        What was missing.
    """

    coverage_levels: np.ndarray | None = None
    coverage: dict[str, np.ndarray] = field(default_factory=dict)
    z_edges: np.ndarray | None = None
    z_density: dict[str, np.ndarray] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def has_coverage(self) -> bool:
        """Coverage curves for every component."""
        return self.coverage_levels is not None and len(self.coverage) == len(COMPONENTS)

    @property
    def has_z_hist(self) -> bool:
        """z histograms for every component."""
        return self.z_edges is not None and len(self.z_density) == len(COMPONENTS)


def _download(tracking: Any, run_id: str, path: str, dst: Path) -> tuple[Path | None, str]:
    try:
        with quiet_artifact_downloads():
            local = download_artifact(tracking, run_id, path, dst)
    except TrackingUnavailableError:
        raise
    except Exception as exc:  # MLflow raises several types for a missing artifact
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        return None, f"no {path} ({first[:160]})"
    if not local.is_file():
        return None, f"no {path} (not a file in the run's artifacts)"
    return local, ""


def _curves_from(arrays: Any) -> CalibrationCurves:
    out = CalibrationCurves()
    names = set(arrays.files)
    cov_keys = ["coverage_levels"] + [f"coverage_{c}" for c in COMPONENTS]
    if all(k in names for k in cov_keys):
        levels = np.asarray(arrays["coverage_levels"], dtype=float)
        curves = {c: np.asarray(arrays[f"coverage_{c}"], dtype=float) for c in COMPONENTS}
        if all(v.shape == levels.shape for v in curves.values()):
            out.coverage_levels, out.coverage = levels, curves
        else:
            out.notes.append(f"{ARRAYS_PATH}: coverage arrays differ in length from the levels")
    else:
        missing = [k for k in cov_keys if k not in names]
        out.notes.append(f"{ARRAYS_PATH} has no {', '.join(missing)}")
    hist_keys = ["z_hist_edges"] + [f"z_hist_{c}" for c in COMPONENTS]
    if all(k in names for k in hist_keys):
        edges = np.asarray(arrays["z_hist_edges"], dtype=float)
        dens = {c: np.asarray(arrays[f"z_hist_{c}"], dtype=float) for c in COMPONENTS}
        if all(v.shape == (edges.size - 1,) for v in dens.values()):
            out.z_edges, out.z_density = edges, dens
        else:
            out.notes.append(f"{ARRAYS_PATH}: z histograms do not have len(edges) - 1 bins")
    else:
        missing = [k for k in hist_keys if k not in names]
        out.notes.append(f"{ARRAYS_PATH} has no {', '.join(missing)}")
    return out


def fetch_curves(tracking: Any, run_id: str) -> CalibrationCurves:
    """Coverage curves and z histograms of one run (notes say what was missing).

    Parameters
    ----------
    tracking : DictConfig, str or TrackingSettings
    run_id : str

    Returns
    -------
    CalibrationCurves
    """
    with tempfile.TemporaryDirectory(prefix="skymoments-compare-") as tmp:
        local, note = _download(tracking, run_id, ARRAYS_PATH, Path(tmp))
        if local is None:
            return CalibrationCurves(notes=[note])
        try:
            with np.load(local, allow_pickle=False) as arrays:
                return _curves_from(arrays)
        except (OSError, ValueError) as exc:
            return CalibrationCurves(notes=[f"{ARRAYS_PATH} is not a readable .npz ({exc})"])


def fetch_png(tracking: Any, run_id: str, path: str = GRID_PATH) -> tuple[bytes | None, str]:
    """The bytes of a PNG artifact, or ``(None, note)`` when it is missing or not a PNG."""
    with tempfile.TemporaryDirectory(prefix="skymoments-compare-") as tmp:
        local, note = _download(tracking, run_id, path, Path(tmp))
        if local is None:
            return None, note
        data = local.read_bytes()
    if not data.startswith(_PNG_MAGIC):
        return None, f"{path} is not a PNG file"
    return data, ""
