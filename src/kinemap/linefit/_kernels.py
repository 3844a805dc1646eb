"""Compiled (numba) kernels: model + analytic Jacobian, initial guesses, Levenberg-Marquardt.

This module only gathers the kernels ``fit.py``, ``_config.py`` and the tests call; they
live in

* ``_kern_base`` -- status and channel-response codes, fastmath flags, line cut-off,
  channel-window search;
* ``_kern_special`` -- normal CDF and exp (scalar and vectorisable);
* ``_kern_model`` -- generic model + Jacobian evaluator and the model kernel;
* ``_kern_whiten`` -- correlated channel noise and the generic normal equations;
* ``_kern_single`` -- the fused one-component path;
* ``_kern_lm`` -- the Levenberg-Marquardt driver and the fit kernel;
* ``_kern_guess`` -- the first guess and its kernel.

Functions calling each other across these modules import one another at module level,
which numba resolves as globals at compile time, as within one module.

Everything here works on plain float64 arrays in km/s; validation happens in ``fit.py``.
The parallel loops run over blocks of spectra, so no Python code executes per spectrum.

Two evaluation paths share one optimiser (:func:`_fit_one`):

* the common case -- one Gaussian component, white noise, top-hat or sampled channels --
  goes through :func:`_eval_single`, which computes chi2, the normal equations and the
  second-derivative (Newton) correction in one vectorised pass without storing the model
  or the Jacobian, with the normal CDF and exp evaluated by branch-free vectorisable code
  (:func:`_vndtr`, :func:`_vexp`); the optimiser then takes Newton steps near the minimum;
* everything else (several or tied components, Hanning response, correlated noise) builds
  the model and Jacobian arrays (:func:`_eval_model`) and solves Gauss-Newton normal
  equations (:func:`_residual_system`).

Both paths truncate each line at +-_ZCUT (8) observed dispersions, where it is below
1.3e-14 of its peak, and agree with each other and with untruncated reference models to
rounding (see the tests).

Compilation notes.  Helpers that do not allocate are compiled with ``_nrt=False``: numba
otherwise wraps every array passed to a call in atomic reference-count updates, which cost
more than a model evaluation in these small per-spectrum calls.  ``error_model='numpy'``
drops the zero-division checks (which block vectorisation) where every divisor is known
to be non-zero.  fastmath: only flags that cannot change NaN/Inf semantics are used (no
'nnan'/'ninf', no approximate functions 'afn'), and only in the model evaluation and the
normal-equation sums, which contain no NaN tests (NaN channels are zero-weighted before);
the optimiser logic runs IEEE-exact.
"""
from kinemap.linefit._kern_base import RESP_HANNING, RESP_NONE, RESP_TOPHAT
from kinemap.linefit._kern_guess import _median, guess_kernel
from kinemap.linefit._kern_lm import fit_kernel
from kinemap.linefit._kern_model import _eval_model, model_kernel
from kinemap.linefit._kern_single import _eval_single
from kinemap.linefit._kern_special import _ndtr_e, _vexp, _vndtr
from kinemap.linefit._kern_whiten import _band_chol, _residual_system

# the entry points, and the inner kernels the tests check against references directly
__all__ = [
    "RESP_NONE", "RESP_TOPHAT", "RESP_HANNING", "fit_kernel", "guess_kernel", "model_kernel",
    "_eval_model", "_eval_single", "_residual_system", "_band_chol", "_ndtr_e", "_vexp", "_vndtr", "_median",
]
