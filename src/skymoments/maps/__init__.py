"""Flat patches and the sphere: geometry, Q/U <-> E/B, spin-2 symmetries, spectra, HEALPix."""

from skymoments.maps.eb import eb_to_qu, qu_to_eb
from skymoments.maps.geometry import FlatPatch

__all__ = ["FlatPatch", "eb_to_qu", "qu_to_eb"]
