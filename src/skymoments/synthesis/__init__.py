"""Foreground synthesis from one training image by wavelet phase harmonic (WPH) moments.

Modules: :mod:`.wavelets` (bump steerable bank), :mod:`.wph` (the moments),
:mod:`.synthesize` (L-BFGS synthesis), :mod:`.bank` (the on-disk bank), :mod:`.sources`
(reading a training image), :mod:`.quality` (``synth/...`` metrics).
"""

from skymoments.synthesis.synthesize import SynthesisResult, SynthesisSettings, synthesize
from skymoments.synthesis.wavelets import WaveletBank, wavelet_bank
from skymoments.synthesis.wph import WPHConfig, WPHStatistics

__all__ = [
    "SynthesisResult",
    "SynthesisSettings",
    "WPHConfig",
    "WPHStatistics",
    "WaveletBank",
    "synthesize",
    "wavelet_bank",
]
