"""The training image of a synthesis, read from disk: kept here for existing imports.

Reading and checking a user's training image file lives below ``sky`` and ``synthesis``,
in :mod:`skymoments.maps.training_file` (through :mod:`skymoments.maps.reader`, the reader
``skymoments predict`` uses); this module re-exports it.
"""

from __future__ import annotations

from skymoments.maps.training_file import load_training_image

__all__ = ["load_training_image"]
