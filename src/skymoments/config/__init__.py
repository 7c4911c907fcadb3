"""Locating the packaged Hydra configs and validating composed configs."""

from skymoments.config.locate import conf_dir
from skymoments.config.schema import ConfigError, validate

__all__ = ["ConfigError", "conf_dir", "validate"]
