"""Applying a tracked posterior-moment model to new maps (``skymoments predict``).

- :mod:`~skymoments.predict.source`: model reference -> URI, training run, training geometry.
- :mod:`~skymoments.predict.inputs`: ``.npy``/``.npz`` patches, FITS images, HEALPix maps;
  every check that needs no model.
- :mod:`~skymoments.predict.outputs`: posterior FITS/npz with provenance, quick-look PNG,
  HEALPix back-projection, atomic writes that never overwrite without ``force``.
- :mod:`~skymoments.predict.pipeline`: :func:`run_prediction`, the order of work.
"""

from skymoments.predict.inputs import (
    CONVENTIONS,
    MapInput,
    check_patch_geometry,
    parse_centres,
    read_input,
    to_patch_frame,
)
from skymoments.predict.outputs import (
    check_outputs,
    output_paths,
    project_to_healpix,
    write_outputs,
)
from skymoments.predict.source import ModelSource, geometry_from_params, resolve_model_source

__all__ = [
    "CONVENTIONS",
    "MapInput",
    "ModelSource",
    "PredictOptions",
    "PredictionResult",
    "check_outputs",
    "check_patch_geometry",
    "geometry_from_params",
    "output_paths",
    "parse_centres",
    "project_to_healpix",
    "read_input",
    "resolve_model_source",
    "run_prediction",
    "to_patch_frame",
    "write_outputs",
]


def __getattr__(name: str):
    # The pipeline imports the tracking package (MLflow); the readers do not need it.
    if name in ("PredictOptions", "PredictionResult", "run_prediction"):
        from skymoments.predict import pipeline

        return getattr(pipeline, name)
    raise AttributeError(f"module 'skymoments.predict' has no attribute {name!r}")
