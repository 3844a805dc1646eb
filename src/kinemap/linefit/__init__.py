"""Per-spectrum Gaussian line fitting on plain arrays (compiled, parallel over spectra).

Public entry points:

* :func:`fit_spectra` -- fit a batch ``(nspec, nchan)`` of spectra;
* :func:`fit_block` -- fit a cube block ``(nchan, ny, nx)`` (batched internally);
* :func:`initial_guess`, :func:`parameter_bounds` -- starting values and box bounds;
* :func:`model_spectra`, :func:`model_block` -- model spectra / cubes for given parameters;
* :class:`LineModel` -- components, tied parameters and baseline;
* :class:`LineFitResult` -- the frozen result (arrays + per-component quantities);
* :func:`channel_noise_correlation` -- lag correlations of smoothed white noise.

See :mod:`kinemap.linefit.fit` for the model definition (amplitude, channel response,
instrument) and the fitting method.
"""
from kinemap.linefit._config import RESPONSES, channel_noise_correlation
from kinemap.linefit._model import BASELINES, LineModel
from kinemap.linefit._result import COMPONENT_QUANTITIES, LineFitResult
from kinemap.linefit.fit import (
    fit_block, fit_spectra, initial_guess, model_block, model_spectra, parameter_bounds
)

__all__ = [
    "BASELINES",
    "COMPONENT_QUANTITIES",
    "RESPONSES",
    "LineFitResult",
    "LineModel",
    "channel_noise_correlation",
    "fit_block",
    "fit_spectra",
    "initial_guess",
    "model_block",
    "model_spectra",
    "parameter_bounds",
]
