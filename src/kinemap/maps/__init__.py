"""Per-pixel maps that need no model: noise, signal masks and moment maps."""
from kinemap.maps.continuum import ContinuumResult, subtract_continuum
from kinemap.maps.masks import SignalMask, as_mask, make_mask
from kinemap.maps.moments import MomentMaps, compute_moments
from kinemap.maps.noise import NoiseMap, estimate_noise

__all__ = ["ContinuumResult", "subtract_continuum", "NoiseMap", "estimate_noise", "SignalMask", "make_mask", "as_mask", "MomentMaps",
           "compute_moments"]
