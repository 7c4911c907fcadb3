"""skymoments: calibrated posterior moments of CMB E/B maps under non-Gaussian foregrounds."""

__version__ = "0.1.0"
