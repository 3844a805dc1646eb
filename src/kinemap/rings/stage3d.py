"""Rotation curves from the cube itself: the public 3D ring fit and its result.

:func:`fit_rings_3d` fits the disk model of :mod:`kinemap.rings.disk3d` to the cube
inside the signal mask, in the stages of the 2D fit: (1) global geometry with every
ring's v_rot and dispersion, (2) ring-by-ring position angle, inclination, v_rot and
dispersion, (3) the ring geometry smoothed in radius and a final joint pass over v_rot,
dispersion (and v_exp) of all rings, which gives the errors; then both halves of the disk
separately.  The first guesses come from a 2D fit of the moment-1 map and the moment-2
map.  The ring table has the 2D columns plus dispersion, surface brightness and the
pressure-support columns (:mod:`kinemap.rings.pressure`).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np
from astropy.table import Table

from kinemap.io.products import Product
from kinemap.io.results import StageResult

__all__ = ["RingFit3D", "fit_rings_3d"]


@dataclass(frozen=True)
class RingFit3D(StageResult):
    """A 3D tilted-ring fit of a cube.

    Attributes
    ----------
    table : astropy.table.Table
        One row per ring (``rotation_curve`` product): the 2D columns (radius, v_rot,
        v_rot_err, v_exp, ..., status, geometry errors) plus dispersion,
        dispersion_err, surface_brightness (face-on, cube unit x km/s),
        asymmetric_drift, v_circ, v_circ_err and the formal errors v_rot_err_formal,
        dispersion_err_formal.
    model, residual : ndarray (nchan, ny, nx)
        Model cube and data - model, in the cube's unit (``model_cube``,
        ``residual_cube`` products, written with the cube's WCS).
    rings_2d : RingFit
        The 2D fit of the moment-1 map that gave the first guesses (for comparison).
    velocity : ndarray
        Channel velocities (km/s), for the plots.
    data : ndarray
        The cube as fitted (float32), for the plots.
    timings : dict
        Wall time (s) of 'first_guess', 'stage1', 'stage2', 'stage3', 'halves',
        'bootstrap', 'model'.
    """

    name: ClassVar[str] = "rings3d"

    table: Table
    model: np.ndarray
    residual: np.ndarray
    data: np.ndarray
    velocity: np.ndarray
    rings_2d: object
    meta: object
    mask: np.ndarray = None
    geometry: dict = field(default_factory=dict)
    settings: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)

    def systemic_velocity(self) -> float | None:
        return float(self.geometry["v_sys"])

    def products(self) -> list[Product]:
        wcs = getattr(self.meta, "wcs3d", None)
        b = self.meta.bunit
        tab = self.table.copy()
        tab.meta = {k: (list(v) if isinstance(v, tuple) else v) for k, v in tab.meta.items()}
        return [
            Product("rotation_curve", tab, u.one,
                    "3D tilted-ring solution per ring with pressure support (Begeman 1989; "
                    "V_c^2 = v_rot^2 + V_A^2)", "table"),
            Product("model_cube", self.model.astype(np.float32), b,
                    "3D disk model observed through the beam and channels", "cube",
                    plot=False, wcs=wcs),
            Product("residual_cube", self.residual.astype(np.float32), b,
                    "data minus 3D disk model", "cube", plot=False, wcs=wcs),
        ]

    def summary(self) -> dict:
        g = self.geometry
        ok = np.asarray(self.table["status"]) == 0
        return {"model": "3d", "position_angle_deg": float(g["position_angle"]),
                "inclination_deg": float(g["inclination"]), "v_sys_kms": float(g["v_sys"]),
                "x_center_pix": float(g["x_center"]), "y_center_pix": float(g["y_center"]),
                "rings_fitted": int(ok.sum()), "rings_failed": int((~ok).sum()),
                "chi2_reduced": self.table.meta.get("chi2_reduced"),
                "timings": dict(self.timings)}


def fit_rings_3d(cube, *, noise=None, mask=None, center=None, position_angle=None,
                 inclination=None, v_sys=None, distance=None, ring_width=None, radii=None,
                 fix=(), stages=(1, 2, 3), final_geometry: str = "median",
                 bootstrap: int = 0, seed: int | None = 0, expansion: bool = False,
                 scale_height=0.0, loss: str = "chi2", channel_response: str = "tophat",
                 oversample: int = 4, smoothing="auto", surface_normalisation: str = "rings",
                 progress: bool = False) -> RingFit3D:
    """Fit a 3D tilted-ring disk model to a cube (rotation curves free of beam smearing).

    Parameters
    ----------
    cube : kinemap.io.Cube
        The cube (from :func:`kinemap.read_cube`); it must carry its beam and have
        uniformly spaced channels in velocity.
    noise, mask : NoiseMap, SignalMask, optional
        Default: :func:`kinemap.estimate_noise` and :func:`kinemap.make_mask`.  Only the
        voxels in the mask are compared with the model.
    center : str or SkyCoord, optional
        'RA,DEC'; position_angle, inclination (deg), v_sys (km/s): first guesses (or
        fixed values with ``fix``); guessed by a 2D fit of moment 1 when not given.
    distance : Quantity or float (Mpc), optional
        Adds radius_kpc and mass_enclosed (from v_circ when it is defined, else v_rot).
    ring_width : Quantity or float (arcsec), optional
        Default half the beam FWHM (at least 1.5 pixels); rings reach out to where the
        signal mask ends, less one beam.
    radii : array (arcsec), optional
        Ring centres, overriding the default.
    fix : sequence of str
        Held fixed: 'center', 'x_center', 'y_center', 'position_angle', 'inclination',
        'v_sys', 'v_exp'.
    stages : sequence of int
        1 global geometry (always), 2 ring-by-ring geometry, 3 smoothed geometry.
    final_geometry : {'median', 'polynomial', 'rings', 'global'}
    bootstrap : int
        Noise realisations (beam- and channel-correlated, at the noise map's level) added
        to the best model and refitted; their scatter replaces the formal errors.
    expansion : bool
        Fit a radial (expansion) speed v_exp per ring.
    scale_height : Quantity or float (arcsec)
        sech^2 scale height of the disk, held fixed (0: thin disk).
    loss : {'chi2', 'absolute'}
        Minimise chi^2, or a soft absolute residual (scipy's 'soft_l1', |r| for residuals
        beyond the noise), which resists outliers.
    channel_response : {'tophat', 'hanning', 'none'}
    oversample : int
        Disk-plane samples per pixel step of the model.
    smoothing : 'auto' or float >= 0
        Weight of a penalty on the second differences of v_rot and of the dispersion
        between rings: the chi^2 that a second difference of one typical per-ring error
        costs.  'auto' (default) sets it from how much the beam mixes neighbouring
        rings, exp(-16 ln 2 (ring_width / beam FWHM)^2): 0.0625 for rings half a beam
        wide, 1.5e-5 for one beam (nothing).  0 turns it off.
    surface_normalisation : {'rings', 'pixels'}
        How the model's intensity is tied to the data (both common practice): 'rings'
        (default) gives each ring a face-on Sigma, solved against the data's moment 0;
        'pixels' scales the model in every pixel so that its moment 0 is the data's (the
        model then only shapes the lines; clumpy or lopsided disks fit better, and the
        moment-0 noise that enters the model is not in the errors).

    Returns
    -------
    RingFit3D

    Notes
    -----
    Surface brightness: for every trial geometry the rings' face-on Sigma are the
    non-negative least-squares match of the model's moment 0 to the data's (summed over
    all channels); with ``surface_normalisation='pixels'`` the model is then rescaled
    pixel by pixel to the data's moment 0.  v_rot_err = sqrt(formal^2 + ((v_rot_receding
    - v_rot_approaching) / 2)^2) as in 2D; the formal error (``v_rot_err_formal``) is the
    sandwich covariance for beam-correlated noise (see :mod:`kinemap.rings.fit3d`) or the
    bootstrap scatter.  ``dispersion_err`` is built the same way.  The smoothness
    penalty is in the covariance (it narrows the scatter of the fitted values and their
    errors alike); the bias it gives a curve that bends sharply between rings is not.
    """
    from kinemap.rings._stage3d_run import run_fit

    return run_fit(cube, noise=noise, mask=mask, center=center, position_angle=position_angle,
                   inclination=inclination, v_sys=v_sys, distance=distance,
                   ring_width=ring_width, radii=radii, fix=fix, stages=stages,
                   final_geometry=final_geometry, bootstrap=bootstrap, seed=seed,
                   expansion=expansion, scale_height=scale_height, loss=loss,
                   channel_response=channel_response, oversample=oversample,
                   smoothing=smoothing, surface_normalisation=surface_normalisation,
                   progress=progress)
