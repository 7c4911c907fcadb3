"""Lightning stages (posterior mean, then variance), the DataModule and the pipeline."""

from skymoments.moments.data import MomentsDataModule, TrainDrawStream, stream_generator
from skymoments.moments.perf import DataWaitTimer
from skymoments.moments.pipeline import MomentsResult, fit_scalers, predict_moments, train_moments
from skymoments.moments.stages import MeanModule, VarianceModule

__all__ = [
    "DataWaitTimer",
    "MeanModule",
    "MomentsDataModule",
    "MomentsResult",
    "TrainDrawStream",
    "VarianceModule",
    "fit_scalers",
    "predict_moments",
    "stream_generator",
    "train_moments",
]
