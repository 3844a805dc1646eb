"""The result object of the line fitter."""
from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from kinemap.linefit._model import LineModel

__all__ = ["LineFitResult", "COMPONENT_QUANTITIES"]

COMPONENT_QUANTITIES = (
    "velocity",
    "dispersion",
    "observed_dispersion",
    "amplitude",
    "integrated",
)


@dataclass(frozen=True, eq=False)
class LineFitResult:
    """Per-spectrum Gaussian fit results (all arrays have the spectra along axis 0).

    Attributes
    ----------
    params, errors : ndarray, shape (nspec, npar)
        Fitted parameters in ``param_names`` order (amplitudes in data units, velocities
        and intrinsic dispersions in km/s, baseline in data units and data units per
        channel) and their 1-sigma errors from ``(J^T C^-1 J)^-1`` with ``C`` the noise
        covariance built from the given per-spectrum noise (and the channel correlation,
        if any); multiplied by ``sqrt(chi2_reduced)`` only when ``scale_errors=True``.
    param_names : tuple of str
    status : ndarray of int8, shape (nspec,)
        :class:`kinemap.status.Status` codes.  Values are NaN unless the status is ``OK``
        or ``AT_BOUND`` (values kept, treat with care).
    ncomp : ndarray of int8, shape (nspec,)
        Number of Gaussian components in the reported fit (0 when not fitted).  With a fixed
        ``ncomp`` this is that number wherever a fit has values.
    n_iter : ndarray of int32
        Levenberg-Marquardt iterations (Jacobian evaluations); 0 when not fitted; with
        ``ncomp='auto'`` the total over the candidate fits.
    n_channels : ndarray of int32
        Finite channels used.
    chi2_reduced : ndarray
        chi2 / (n_channels - npar) with the noise (and correlation) model used in the fit.
    bic : ndarray
        Bayesian information criterion chi2 + k ln(n_channels) (Schwarz 1978) of the
        reported fit, k its number of free parameters.
    peak_snr : ndarray
        Peak of the baseline-subtracted spectrum divided by the noise (the TOO_FAINT test).
    velocity, dispersion, observed_dispersion, amplitude, integrated : ndarray, shape (nspec, ncomp_max)
        Per-component quantities: centroid velocity (km/s), intrinsic dispersion sigma
        (km/s, instrument and channel response removed), observed dispersion
        ``sqrt(sigma^2 + instrument_sigma^2)`` (km/s, before channel averaging), amplitude
        (peak of the instrument-convolved Gaussian before channel averaging, data units) and
        integrated intensity ``amplitude * sqrt(2 pi) * observed_dispersion``
        (data units x km/s).  Each has a ``*_error`` companion (1 sigma; the integrated
        error propagates the amplitude-dispersion covariance).  Unused components are NaN.
    model : LineModel
        The model of the reported parameters (for ``ncomp='auto'``: the 3-component model).
    instrument_sigma : float
        Instrumental dispersion used (km/s).
    response : str
        Channel response used.
    spatial_shape : tuple
        Shape the spectra came in: ``(nspec,)`` for a batch, ``(ny, nx)`` for a block.
    """

    params: np.ndarray
    errors: np.ndarray
    param_names: tuple
    status: np.ndarray
    ncomp: np.ndarray
    n_iter: np.ndarray
    n_channels: np.ndarray
    chi2_reduced: np.ndarray
    bic: np.ndarray
    peak_snr: np.ndarray
    velocity: np.ndarray
    velocity_err: np.ndarray
    dispersion: np.ndarray
    dispersion_err: np.ndarray
    observed_dispersion: np.ndarray
    observed_dispersion_err: np.ndarray
    amplitude: np.ndarray
    amplitude_err: np.ndarray
    integrated: np.ndarray
    integrated_err: np.ndarray
    model: LineModel
    instrument_sigma: float
    response: str
    spatial_shape: tuple

    @property
    def nspec(self) -> int:
        """Number of spectra."""
        return self.status.shape[0]

    def maps(self) -> dict:
        """All per-spectrum arrays reshaped to ``spatial_shape``.

        Per-component and per-parameter arrays get their component/parameter axis first,
        following the (plane, y, x) layout of cubes: e.g. ``'velocity'`` has shape
        ``(ncomp_max, ny, nx)``, ``'params'`` ``(npar, ny, nx)``, ``'status'`` ``(ny, nx)``.
        The arrays are new (transposed copies), the result is unchanged.
        """
        out = {}
        for f in fields(self):
            val = getattr(self, f.name)
            if not isinstance(val, np.ndarray):
                continue
            if val.ndim == 1:
                out[f.name] = val.reshape(self.spatial_shape).copy()
            else:
                out[f.name] = np.ascontiguousarray(val.T).reshape((val.shape[1],) + tuple(self.spatial_shape))
        return out
